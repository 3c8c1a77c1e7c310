"""``fix`` (hard): pin variables to values."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Hashable, Mapping

from flipfix.repair.documents.fields import require, resolve_mapping
from flipfix.repair.errors import InputError
from flipfix.repair.lowering.pieces import Pieces, label_bits
from flipfix.repair.model.constraints.kind import ConstraintKind
from flipfix.repair.model.problem import Problem

__all__ = ["FixVariables", "KIND", "read_assignment", "assignment_json", "assignment_form"]


@dataclass(frozen=True)
class FixVariables:
    """Hard: each listed variable takes the given caller-vartype value."""

    values: Mapping[Hashable, int]
    name: str = "fix"


def read_assignment(obj: Mapping, problem: Problem, field: str, key: str) -> dict:
    """``obj[key]``: a non-empty ``{label: value}`` object, labels resolved (values checked
    when lowered)."""
    out = resolve_mapping(problem, require(obj, key, field), f"{field}.{key}")
    if not out:
        raise InputError(f"{field}.{key}", "is empty")
    return out


def assignment_json(mapping: Mapping) -> dict:
    """``{label: value}`` -> a JSON object (keys written as strings, read back by the label rule)."""
    return {str(lab): int(v) for lab, v in mapping.items()}


def assignment_form(key: str) -> tuple:
    """``(read_json, write_json)`` of a kind whose one field ``key`` is an assignment."""

    def read_json(obj: Mapping, problem: Problem, field: str) -> dict:
        return {key: read_assignment(obj, problem, field, key)}

    def write_json(c) -> dict:
        return {key: assignment_json(getattr(c, key))}

    return read_json, write_json


read_json, write_json = assignment_form("values")


def lower(problem: Problem, c: FixVariables, name: str, field: str) -> Pieces:
    idx, bits = label_bits(problem, c.values, field + ".values")
    return Pieces(name, fix_idx=idx, fix_bits=bits, hard=True)


KIND = ConstraintKind(
    name="fix", cls=FixVariables, json_keys=frozenset({"values"}),
    read_json=read_json, write_json=write_json, lower=lower)
