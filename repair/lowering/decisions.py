"""Lowering over integer decisions: encoding validity, value literals, forbidden values.

Shared by :func:`flipfix.repair.lowering.compiled.compile_constraints` (every
declared decision stays valid) and the integer-level constraint kinds of
:mod:`flipfix.repair.model.constraints`. Every row and count built here stays in
range for *every* bit string, valid or not.
"""

from __future__ import annotations

from typing import Any, Sequence

import numpy as np

from flipfix.repair.errors import InputError
from flipfix.repair.lowering.pieces import Pieces, RowSpec
from flipfix.repair.model.encodings import decision_bits, find_decision, value_index
from flipfix.repair.model.problem import ONE_HOT, Decision, Problem

__all__ = ["encoding_pieces", "value_literals", "forbid_pieces", "decision_values"]


def encoding_pieces(problem: Problem) -> list[Pieces]:
    """One hard :class:`Pieces` per decision keeping its encoding valid.

    one-hot: ``sum_m x_m == 1``; domain wall: ``x_{i+1} - x_i <= 0`` for each
    neighbouring pair (k = 2 has one free bit and no row).
    """
    out = []
    for d in problem.decisions:
        idx = decision_bits(problem, d)
        name = f"encoding[{d.name}]"
        if d.encoding == ONE_HOT:
            rows = [RowSpec(name, idx, np.ones(idx.size), 1.0, 1.0)]
        else:
            rows = [RowSpec(f"{name}[{i}]", idx[[i + 1, i]], np.asarray([1.0, -1.0]), -np.inf, 0.0)
                    for i in range(idx.size - 1)]
        out.append(Pieces(name, rows=rows, hard=True))
    return out


def value_literals(d: Decision, idx: np.ndarray, m: int) -> list:
    """Literals ``[(position, bit)]`` whose AND is ``[value index == m]`` on valid strings."""
    if d.encoding == ONE_HOT:
        return [(int(idx[m]), 1)]
    k = len(d.values)
    if m == 0:
        return [(int(idx[0]), 0)]
    if m == k - 1:
        return [(int(idx[k - 2]), 1)]
    return [(int(idx[m - 1]), 1), (int(idx[m]), 0)]


def forbid_pieces(problem: Problem, d: Decision, forbidden: Sequence[int], name: str) -> Pieces:
    """Hard: the decision takes none of the value indices ``forbidden``."""
    idx = decision_bits(problem, d)
    fix_idx, fix_bits, rows = [], [], []
    for m in sorted(set(forbidden)):
        lits = value_literals(d, idx, m)
        if len(lits) == 1:
            (i, b), = lits
            fix_idx.append(i)
            fix_bits.append(1 - b)
        else:
            # not (x_{m-1} = 1 and x_m = 0):  x_{m-1} - x_m <= 0
            (i, _), (j, _) = lits
            rows.append(RowSpec(f"{name}[{d.values[m]!r}]", np.asarray([i, j], dtype=np.int64),
                                np.asarray([1.0, -1.0]), -np.inf, 0.0))
    return Pieces(name, fix_idx=fix_idx, fix_bits=fix_bits, rows=rows, hard=True)


def decision_values(problem: Problem, decision: Any, values: Any, field: str
                    ) -> tuple[Decision, list[int]]:
    """(the decision named ``decision``, the value indices of the non-empty list ``values``);
    errors name ``field.decision``, ``field.values`` or ``field.values[k]``."""
    d = find_decision(problem, decision, field + ".decision")
    if isinstance(values, (str, bytes)) or not isinstance(values, Sequence):
        raise InputError(field + ".values", "must be a list of values")
    if len(values) == 0:
        raise InputError(field + ".values", "is empty")
    return d, [value_index(d, v, f"{field}.values[{k}]") for k, v in enumerate(values)]
