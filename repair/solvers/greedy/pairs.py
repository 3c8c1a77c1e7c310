"""Pair moves inside hard rows: one variable up, one down, when no single flip improves.

A tight or equality row blocks every single flip of its members; a pair that keeps the
row's activity within bounds can still move. Only rows that block some single flip of
theirs are tried (elsewhere a pair is two single flips, already found not to improve),
and in each the best ``pair_width`` "up" and "down" members by their own change.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

from flipfix.repair.solvers.greedy.jit import kernel
from flipfix.repair.solvers.greedy.state import eval_flip, flip_state, row_viol

__all__ = ["PairBounds", "PairLists", "pair_bounds", "pair_lists", "best_pair"]


class PairBounds(NamedTuple):
    """amax float64 (m,): each row's largest |coefficient|; jpos float64 (n,): each
    variable's largest positive coupling (0 if none) times (1 + 1e-9) plus the objective
    tolerance (a margin), a bound on what a pair gains over its two single flips."""

    amax: np.ndarray
    jpos: np.ndarray


class PairLists(NamedTuple):
    """Scratch: the best ``pair_width`` members of a row going up (up_i int64, up_v
    float64 their changes, ascending) and going down (dn_i, dn_v), each (pair_width,)."""

    up_i: np.ndarray
    up_v: np.ndarray
    dn_i: np.ndarray
    dn_v: np.ndarray


def _row_maxima(indptr: np.ndarray, data: np.ndarray) -> np.ndarray:
    """Each row's largest positive entry of a CSR matrix (indptr, data), 0 if none:
    float64 (rows,)."""
    out = np.zeros(indptr.size - 1)
    filled = np.diff(indptr) > 0
    if filled.any():  # a row's segment runs to the next filled row's start: its own end
        out[filled] = np.maximum(np.maximum.reduceat(data, indptr[:-1][filled]), 0.0)
    return out


def pair_bounds(qubo, rows, tol: float) -> PairBounds:
    """The bounds of :class:`PairBounds` for a problem's QUBO and rows
    (:mod:`flipfix.repair.kernels.bundles`) and objective tolerance."""
    return PairBounds(_row_maxima(rows.a_ptr, np.abs(rows.a_val)),
                      _row_maxima(qubo.indptr, qubo.data) * (1.0 + 1e-9) + tol)


def pair_lists(pair_width: int) -> PairLists:
    return PairLists(np.empty(pair_width, dtype=np.int64), np.empty(pair_width),
                     np.empty(pair_width, dtype=np.int64), np.empty(pair_width))


@kernel
def best_pair(S, dist, Q, C, R, bounds, lists, P, best):
    """The best feasible pair move (one variable up, one down, in the same row) whose
    change is below ``best``: (i, j) int64, or (-1, -1).

    S :class:`~flipfix.repair.solvers.greedy.state.State` at distance ``dist``; Q, C, R
    the problem's :mod:`~flipfix.repair.kernels.bundles`; bounds :class:`PairBounds`;
    lists :class:`PairLists` (each row tries its best ``up_i.size`` of each side); P
    :class:`~flipfix.repair.solvers.greedy.qubo.Params`.
    """
    x, act = S.x, S.act
    fixed = Q.fixed
    a_ptr, a_col, a_vals, lo, hi, rtol = R.a_ptr, R.a_col, R.a_val, R.lo, R.hi, R.rtol
    amax, jpos = bounds
    up_i, up_v, dn_i, dn_v = lists
    price, radius = P.price, P.radius
    pair_width = up_i.size
    vtol = 1e-12
    bi = np.int64(-1)
    bj = np.int64(-1)
    for r in range(a_ptr.size - 1):
        # only rows that block some single flip of theirs: elsewhere a pair is just two
        # single flips, which phase 2 has already found not to improve
        if (row_viol(act[r] + amax[r], lo[r], hi[r], rtol[r]) == 0.0
                and row_viol(act[r] - amax[r], lo[r], hi[r], rtol[r]) == 0.0):
            continue  # slack both ways for every member
        blocked = False
        for q in range(a_ptr[r], a_ptr[r + 1]):
            i = a_col[q]
            if fixed[i] < 0:
                a1 = act[r] + (1.0 - 2.0 * x[i]) * a_vals[q]
                if row_viol(a1, lo[r], hi[r], rtol[r]) > 0.0:
                    blocked = True
                    break
        if not blocked:
            continue
        nu = 0
        ndn = 0
        for q in range(a_ptr[r], a_ptr[r + 1]):
            i = a_col[q]
            if fixed[i] >= 0:
                continue
            dobj, dviol, nd = eval_flip(i, S, dist, C, R, price)
            if x[i] == 0:
                ids, vals, cnt = up_i, up_v, nu
            else:
                ids, vals, cnt = dn_i, dn_v, ndn
            # keep the pair_width lowest dobj (insertion into a short sorted list)
            if cnt < pair_width or dobj < vals[cnt - 1]:
                pos = cnt if cnt < pair_width else pair_width - 1
                while pos > 0 and vals[pos - 1] > dobj:
                    vals[pos] = vals[pos - 1]
                    ids[pos] = ids[pos - 1]
                    pos -= 1
                vals[pos] = dobj
                ids[pos] = i
                if cnt < pair_width:
                    cnt += 1
            if x[i] == 0:
                nu = cnt
            else:
                ndn = cnt
        # without count penalties, moving i up and j down changes the objective by
        # change_i + change_j - J_ij (the QUBO's pair term), so by no less than
        # change_i + change_j - jpos[i]: pairs that cannot beat ``best`` are skipped
        # (both lists are sorted by change, ascending)
        prune = C.cp_ptr.size == 1
        for a in range(nu):
            i = up_i[a]
            if prune and ndn > 0 and up_v[a] + dn_v[0] - jpos[i] >= best:
                continue
            dobj_i, dv_i, nd_i = eval_flip(i, S, dist, C, R, price)
            d1 = flip_state(i, S, dist, Q, C, R)
            for b in range(ndn):
                if prune and up_v[a] + dn_v[b] - jpos[i] >= best:
                    break
                j = dn_i[b]
                dobj_j, dv_j, nd_j = eval_flip(j, S, d1, C, R, price)
                tot = dobj_i + dobj_j
                if tot < best and dv_i + dv_j <= vtol and (nd_j <= radius or nd_j < dist):
                    best = tot
                    bi = i
                    bj = j
            flip_state(i, S, d1, Q, C, R)
    return bi, bj
