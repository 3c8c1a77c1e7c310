"""``forbid_values`` (hard): a declared decision takes none of these values."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Mapping, Sequence

from flipfix.repair.documents.fields import as_list, require
from flipfix.repair.lowering.decisions import decision_values, forbid_pieces
from flipfix.repair.lowering.pieces import Pieces
from flipfix.repair.model.constraints.kind import ConstraintKind
from flipfix.repair.model.problem import Problem

__all__ = ["ForbidValues", "KIND", "read_decision_values", "write_decision_values"]


@dataclass(frozen=True)
class ForbidValues:
    """Hard: decision ``decision`` takes none of ``values`` ("machine M is down in slots 3-4")."""

    decision: str
    values: Sequence[Any]
    name: str = "forbid_values"


def read_decision_values(obj: Mapping, problem: Problem, field: str) -> dict:
    """``{"decision": name, "values": [value, ...]}`` (checked against the problem when lowered)."""
    return {"decision": require(obj, "decision", field),
            "values": as_list(require(obj, "values", field), field + ".values")}


def write_decision_values(c) -> dict:
    return {"decision": c.decision, "values": list(c.values)}


def lower(problem: Problem, c: ForbidValues, name: str, field: str) -> Pieces:
    d, forbidden = decision_values(problem, c.decision, c.values, field)
    return forbid_pieces(problem, d, forbidden, name)


KIND = ConstraintKind(
    name="forbid_values", cls=ForbidValues, json_keys=frozenset({"decision", "values"}),
    read_json=read_decision_values, write_json=write_decision_values, lower=lower)
