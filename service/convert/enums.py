"""Proto enum numbers <-> the core's names, and the one reader of an enum field."""

from __future__ import annotations

from typing import Mapping

from flipfix.repair.errors import InputError

from flipfix.service.generated import flipfix_pb2 as pb

__all__ = [
    "enum_name", "VARTYPE_NAMES", "ENCODING_NAMES", "ENCODING_ENUM", "SHAPE_NAMES", "SHAPE_ENUM",
    "SENSE_NAMES", "SENSE_ENUM", "DISTANCE_NAMES", "DISTANCE_ENUM", "METHOD_NAMES", "METHOD_ENUM",
    "METHOD_TEXT",
    "AUDIT_METHOD_NAMES", "REFERENCE_NAMES", "REFERENCE_ENUM", "SELECTION_NAMES",
]

VARTYPE_NAMES = {pb.BINARY: "BINARY", pb.SPIN: "SPIN"}
ENCODING_NAMES = {pb.ONE_HOT: "one_hot", pb.DOMAIN_WALL: "domain_wall"}
ENCODING_ENUM = {v: k for k, v in ENCODING_NAMES.items()}
SHAPE_NAMES = {pb.SHAPE_UNSPECIFIED: "linear", pb.LINEAR: "linear", pb.QUADRATIC: "quadratic",
               pb.THRESHOLD: "threshold", pb.TABLE: "table"}
SHAPE_ENUM = {"linear": pb.LINEAR, "quadratic": pb.QUADRATIC, "threshold": pb.THRESHOLD,
              "table": pb.TABLE}
SENSE_NAMES = {pb.LE: "<=", pb.EQ: "==", pb.GE: ">="}
SENSE_ENUM = {v: k for k, v in SENSE_NAMES.items()}
DISTANCE_NAMES = {pb.DISTANCE_UNSPECIFIED: "changed", pb.CHANGED: "changed",
                  pb.ABSOLUTE: "absolute"}
DISTANCE_ENUM = {"changed": pb.CHANGED, "absolute": pb.ABSOLUTE}
METHOD_NAMES = {pb.METHOD_UNSPECIFIED: "portfolio", pb.PORTFOLIO: "portfolio",
                pb.GREEDY: "greedy", pb.CPSAT: "cpsat"}
METHOD_ENUM = {"portfolio": pb.PORTFOLIO, "greedy": pb.GREEDY, "cpsat": pb.CPSAT}
METHOD_TEXT = "PORTFOLIO, GREEDY or CPSAT"
#: METHOD_UNSPECIFIED in the audit requests: greedy (fast, deterministic)
AUDIT_METHOD_NAMES = {**METHOD_NAMES, pb.METHOD_UNSPECIFIED: "greedy"}
REFERENCE_NAMES = {pb.REFERENCE_UNSPECIFIED: "uniform", pb.UNIFORM: "uniform",
                   pb.PERTURBED: "perturbed"}
REFERENCE_ENUM = {"uniform": pb.UNIFORM, "perturbed": pb.PERTURBED}
SELECTION_NAMES = {pb.SELECTION_UNSPECIFIED: "forward", pb.FORWARD: "forward",
                   pb.EXHAUSTIVE: "exhaustive"}


def enum_name(names: Mapping[int, str], value: int, field: str, expected: str) -> str:
    """The core's name of enum number ``value``; an unknown number is an InputError
    naming ``field`` (``expected`` lists the accepted values, e.g. ``"LE, EQ or GE"``)."""
    if value not in names:
        raise InputError(field, f"must be {expected}, got {value}")
    return names[value]
