"""``forbid`` (hard): these variables may not all take these values at once."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Hashable, Mapping

import numpy as np

from flipfix.repair.lowering.pieces import Pieces, RowSpec, label_bits
from flipfix.repair.model.constraints.fix import assignment_form
from flipfix.repair.model.constraints.kind import ConstraintKind
from flipfix.repair.model.problem import Problem

__all__ = ["ForbidAssignment", "KIND"]


@dataclass(frozen=True)
class ForbidAssignment:
    """Hard: the listed variables may not all take the listed values at once."""

    assignment: Mapping[Hashable, int]
    name: str = "forbid"


read_json, write_json = assignment_form("assignment")


def lower(problem: Problem, c: ForbidAssignment, name: str, field: str) -> Pieces:
    idx, bits = label_bits(problem, c.assignment, field + ".assignment")
    # matches = sum_{b=1} x_i + sum_{b=0} (1 - x_i) <= |P| - 1
    coef = np.where(bits == 1, 1.0, -1.0)
    hi = float(idx.size - 1) - float((bits == 0).sum())
    return Pieces(name, rows=[RowSpec(name, idx, coef, -np.inf, hi)], hard=True)


KIND = ConstraintKind(
    name="forbid", cls=ForbidAssignment, json_keys=frozenset({"assignment"}),
    read_json=read_json, write_json=write_json, lower=lower)
