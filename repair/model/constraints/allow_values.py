"""``allow_values`` (hard): a declared decision takes one of these values."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Sequence

from flipfix.repair.lowering.decisions import decision_values, forbid_pieces
from flipfix.repair.lowering.pieces import Pieces
from flipfix.repair.model.constraints.forbid_values import (
    read_decision_values, write_decision_values,
)
from flipfix.repair.model.constraints.kind import ConstraintKind
from flipfix.repair.model.problem import Problem

__all__ = ["AllowValues", "KIND"]


@dataclass(frozen=True)
class AllowValues:
    """Hard: decision ``decision`` takes one of ``values``."""

    decision: str
    values: Sequence[Any]
    name: str = "allow_values"


def lower(problem: Problem, c: AllowValues, name: str, field: str) -> Pieces:
    d, keep = decision_values(problem, c.decision, c.values, field)
    return forbid_pieces(problem, d, [m for m in range(len(d.values)) if m not in keep], name)


KIND = ConstraintKind(
    name="allow_values", cls=AllowValues, json_keys=frozenset({"decision", "values"}),
    read_json=read_decision_values, write_json=write_decision_values, lower=lower)
