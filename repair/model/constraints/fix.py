"""``fix`` (hard): pin variables to values."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Hashable, Mapping

from flipfix.repair.documents.fields import require, resolve_mapping
from flipfix.repair.errors import InputError
from flipfix.repair.lowering.pieces import Pieces, label_bits
from flipfix.repair.model.constraints.kind import ConstraintKind
from flipfix.repair.model.problem import Problem

__all__ = ["FixVariables", "KIND", "read_assignment"]


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


def read_json(obj: Mapping, problem: Problem, field: str) -> dict:
    return {"values": read_assignment(obj, problem, field, "values")}


def write_json(c: FixVariables) -> dict:
    return {"values": {str(lab): int(v) for lab, v in c.values.items()}}


def lower(problem: Problem, c: FixVariables, name: str, field: str) -> Pieces:
    idx, bits = label_bits(problem, c.values, field + ".values")
    if idx.size == 0:
        raise InputError(field + ".values", "is empty")
    return Pieces(name, fixed=list(zip(idx.tolist(), bits.tolist())), hard=True)


KIND = ConstraintKind(
    name="fix", cls=FixVariables, json_keys=frozenset({"values"}),
    read_json=read_json, write_json=write_json, lower=lower)
