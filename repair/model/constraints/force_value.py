"""``force_value`` (hard): a declared decision takes this value."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Mapping

from flipfix.repair.documents.fields import require
from flipfix.repair.lowering.pieces import Pieces
from flipfix.repair.model.constraints.kind import ConstraintKind
from flipfix.repair.model.encodings import decision_bits, encode, find_decision, value_index
from flipfix.repair.model.problem import Problem

__all__ = ["ForceValue", "KIND"]


@dataclass(frozen=True)
class ForceValue:
    """Hard: decision ``decision`` takes ``value`` (every bit of the decision is pinned)."""

    decision: str
    value: Any
    name: str = "force_value"


def read_json(obj: Mapping, problem: Problem, field: str) -> dict:
    return {"decision": require(obj, "decision", field), "value": require(obj, "value", field)}


def write_json(c: ForceValue) -> dict:
    return {"decision": c.decision, "value": c.value}


def lower(problem: Problem, c: ForceValue, name: str, field: str) -> Pieces:
    d = find_decision(problem, c.decision, field + ".decision")
    bits = encode(d, value_index(d, c.value, field + ".value"))
    return Pieces(name, fix_idx=decision_bits(problem, d), fix_bits=bits,
                  hard=True)


KIND = ConstraintKind(
    name="force_value", cls=ForceValue, json_keys=frozenset({"decision", "value"}),
    read_json=read_json, write_json=write_json, lower=lower)
