"""Proto enum numbers <-> the core's names, and the one reader of an enum field.

Every proto enum's zero value means "not set": where the field has a default, the
``*_NAMES`` table maps the zero value to that default (the same in every request);
where it has none, the zero value is missing from the table and :func:`enum_name`
refuses it with the field's name.
"""

from __future__ import annotations

from typing import Mapping

from flipfix.repair.errors import InputError

from flipfix.service.generated import flipfix_pb2 as pb

__all__ = [
    "enum_name", "expected", "VARTYPE_NAMES", "ENCODING_NAMES", "ENCODING_ENUM", "SHAPE_NAMES",
    "SHAPE_ENUM", "SENSE_NAMES", "SENSE_ENUM", "DISTANCE_NAMES", "DISTANCE_ENUM", "METHOD_NAMES",
    "METHOD_ENUM", "REFERENCE_NAMES", "REFERENCE_ENUM", "SELECTION_NAMES", "SELECTION_ENUM",
    "STATUS_ENUM", "STATUS_NAMES", "CPSAT_ENUM", "CPSAT_NAMES", "STOP_ENUM", "STOP_NAMES",
    "PHASE_ENUM", "PHASE_NAMES", "SOLVER_ENUM", "SOLVER_NAMES", "solvers_to_proto", "proto_to_solvers",
]

VARTYPE_NAMES = {pb.VARTYPE_BINARY: "BINARY", pb.VARTYPE_SPIN: "SPIN"}
ENCODING_NAMES = {pb.ENCODING_ONE_HOT: "one_hot", pb.ENCODING_DOMAIN_WALL: "domain_wall"}
ENCODING_ENUM = {v: k for k, v in ENCODING_NAMES.items()}
SHAPE_ENUM = {"linear": pb.PENALTY_SHAPE_LINEAR, "quadratic": pb.PENALTY_SHAPE_QUADRATIC,
              "threshold": pb.PENALTY_SHAPE_THRESHOLD, "table": pb.PENALTY_SHAPE_TABLE}
SHAPE_NAMES = {pb.PENALTY_SHAPE_UNSPECIFIED: "linear", **{v: k for k, v in SHAPE_ENUM.items()}}
SENSE_NAMES = {pb.SENSE_LE: "<=", pb.SENSE_EQ: "==", pb.SENSE_GE: ">="}
SENSE_ENUM = {v: k for k, v in SENSE_NAMES.items()}
DISTANCE_ENUM = {"changed": pb.DECISION_DISTANCE_CHANGED, "absolute": pb.DECISION_DISTANCE_ABSOLUTE}
DISTANCE_NAMES = {pb.DECISION_DISTANCE_UNSPECIFIED: "changed",
                  **{v: k for k, v in DISTANCE_ENUM.items()}}
METHOD_ENUM = {"portfolio": pb.METHOD_PORTFOLIO, "greedy": pb.METHOD_GREEDY,
               "cpsat": pb.METHOD_CPSAT}
#: METHOD_UNSPECIFIED is METHOD_PORTFOLIO in every request
METHOD_NAMES = {pb.METHOD_UNSPECIFIED: "portfolio", **{v: k for k, v in METHOD_ENUM.items()}}
REFERENCE_ENUM = {"uniform": pb.REFERENCE_KIND_UNIFORM, "perturbed": pb.REFERENCE_KIND_PERTURBED}
REFERENCE_NAMES = {pb.REFERENCE_KIND_UNSPECIFIED: "uniform",
                   **{v: k for k, v in REFERENCE_ENUM.items()}}
#: the core's curation method names
SELECTION_ENUM = {"forward": pb.SELECTION_FORWARD, "exhaustive": pb.SELECTION_EXHAUSTIVE}
SELECTION_NAMES = {pb.SELECTION_UNSPECIFIED: "forward",
                   **{v: k for k, v in SELECTION_ENUM.items()}}
STATUS_ENUM = {"optimal": pb.REPAIR_STATUS_OPTIMAL, "feasible": pb.REPAIR_STATUS_FEASIBLE,
               "infeasible": pb.REPAIR_STATUS_INFEASIBLE,
               "no_feasible_found": pb.REPAIR_STATUS_NO_FEASIBLE_FOUND}
STATUS_NAMES = {v: k for k, v in STATUS_ENUM.items()}
#: CP-SAT's status names in the core ("" : it did not run)
CPSAT_ENUM = {"": pb.CPSAT_STATUS_UNSPECIFIED, "optimal": pb.CPSAT_STATUS_OPTIMAL,
              "feasible": pb.CPSAT_STATUS_FEASIBLE, "infeasible": pb.CPSAT_STATUS_INFEASIBLE,
              "unknown": pb.CPSAT_STATUS_UNKNOWN, "invalid": pb.CPSAT_STATUS_INVALID}
CPSAT_NAMES = {v: k for k, v in CPSAT_ENUM.items()}
STOP_ENUM = {"done": pb.STOP_REASON_DONE, "time_limit": pb.STOP_REASON_TIME_LIMIT,
             "cancelled": pb.STOP_REASON_CANCELLED}
STOP_NAMES = {v: k for k, v in STOP_ENUM.items()}
#: the core's progress phase names; a name missing here is reported as PHASE_UNSPECIFIED
PHASE_ENUM = {"greedy": pb.PHASE_GREEDY, "anneal": pb.PHASE_ANNEAL,
              "neighbourhood": pb.PHASE_NEIGHBOURHOOD, "full": pb.PHASE_FULL,
              "cpsat": pb.PHASE_CPSAT, "stress": pb.PHASE_STRESS, "grow": pb.PHASE_GROW}
PHASE_NAMES = {v: k for k, v in PHASE_ENUM.items()}
#: the core's stage names (a method label joins them with "+", e.g. "anneal+greedy")
SOLVER_ENUM = {"unrepaired": pb.SOLVER_UNREPAIRED, "unchanged": pb.SOLVER_UNCHANGED,
               "greedy": pb.SOLVER_GREEDY, "anneal": pb.SOLVER_ANNEAL, "cpsat": pb.SOLVER_CPSAT,
               "unscored": pb.SOLVER_UNSCORED}
SOLVER_NAMES = {v: k for k, v in SOLVER_ENUM.items()}


def solvers_to_proto(label: str) -> list[int]:
    """A core method label (``"anneal+greedy"``) -> Solver numbers in stage order.

    A stage name this contract does not list is a server fault (KeyError: INTERNAL),
    caught by the tests rather than sent as a number the caller cannot read."""
    return [SOLVER_ENUM[part] for part in label.split("+")] if label else []


def proto_to_solvers(values) -> str:
    """Solver numbers -> the core's method label (unknown numbers as ``solver<N>``)."""
    return "+".join(SOLVER_NAMES.get(v, f"solver{v}") for v in values)


def expected(enum_type, names: Mapping[int, str]) -> str:
    """The accepted value names of ``enum_type`` (the keys of ``names``), for messages:
    ``"SENSE_LE, SENSE_EQ or SENSE_GE"``."""
    accepted = [enum_type.Name(v) for v in sorted(names) if v != 0]
    return ", ".join(accepted[:-1]) + " or " + accepted[-1] if len(accepted) > 1 else accepted[0]


def enum_name(names: Mapping[int, str], value: int, field: str, enum_type) -> str:
    """The core's name of enum number ``value``; a number missing from ``names`` (an
    unknown number, or the zero value of a field without a default) is an InputError
    naming ``field`` and listing the accepted values of ``enum_type``."""
    if value not in names:
        what = "is not set" if value == 0 else f"is {value}, not a known value"
        raise InputError(field, f"{what}; must be {expected(enum_type, names)}")
    return names[value]
