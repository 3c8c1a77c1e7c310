"""Feasibility restore: while a hard row is violated, the move with the least objective
change per unit of violation removed.

A move is a single flip, or, when no single flip reduces the violation, a pair (one
variable of a violated row, one anywhere). Moves that would leave the radius are not
taken. A restore that finds no helping move stops at the least-violating point reached.
"""

from __future__ import annotations

import numpy as np

from flipfix.repair.solvers.greedy.jit import kernel
from flipfix.repair.solvers.greedy.state import eval_flip, flip_state, row_viol, total_viol

__all__ = ["restore"]

_INF = np.inf
_VTOL = 1e-12  # the least violation change that counts


@kernel
def _best_repair_pair(S, dist, Q, C, R, free, nfree, P, best):
    """The pair (i in a violated row, j any free variable) with the least objective change
    per unit of violation removed, if below ``best``: (i, j) int64, or (-1, -1)."""
    act, fixed = S.act, Q.fixed
    a_ptr, a_col, lo, hi, rtol = R.a_ptr, R.a_col, R.lo, R.hi, R.rtol
    price, radius = P.price, P.radius
    bi = np.int64(-1)
    bj = np.int64(-1)
    for r in range(lo.size):
        if row_viol(act[r], lo[r], hi[r], rtol[r]) == 0.0:
            continue
        for q in range(a_ptr[r], a_ptr[r + 1]):
            i = a_col[q]
            if fixed[i] >= 0:
                continue
            dobj_i, dv_i, nd_i = eval_flip(i, S, dist, C, R, price)
            d1 = flip_state(i, S, dist, Q, C, R)
            for f in range(nfree):
                j = free[f]
                if j == i:
                    continue
                dobj_j, dv_j, nd_j = eval_flip(j, S, d1, C, R, price)
                dv = dv_i + dv_j
                if dv < -_VTOL and (nd_j <= radius or nd_j < dist):
                    score = (dobj_i + dobj_j) / (-dv)
                    if score < best:
                        best = score
                        bi = i
                        bj = j
            flip_state(i, S, d1, Q, C, R)
    return bi, bj


@kernel
def restore(S, dist, Q, C, R, free, nfree, P):
    """Restore feasibility of S (:class:`~flipfix.repair.solvers.greedy.state.State`, at
    distance ``dist`` int64) in place; ``free[:nfree]`` int64 the free variables; P
    :class:`~flipfix.repair.solvers.greedy.qubo.Params`. Returns (steps int64, distance
    int64, remaining violation float64)."""
    price, radius, max_steps = P.price, P.radius, P.max_steps
    steps = 0
    viol = total_viol(S.act, R)
    while viol > 0.0 and steps < max_steps:
        best = _INF
        bi = np.int64(-1)
        for f in range(nfree):
            i = free[f]
            dobj, dviol, nd = eval_flip(i, S, dist, C, R, price)
            if dviol < -_VTOL and (nd <= radius or nd < dist):
                score = dobj / (-dviol)
                if score < best:
                    best = score
                    bi = i
        if bi >= 0:
            dist = flip_state(bi, S, dist, Q, C, R)
            steps += 1
            viol = total_viol(S.act, R)
            continue
        # no single flip helps: pairs (i in a violated row, j anywhere)
        bi, bj = _best_repair_pair(S, dist, Q, C, R, free, nfree, P, best)
        if bi < 0:
            break  # stuck: report the least-violating point reached
        for v in (bi, bj):
            dist = flip_state(v, S, dist, Q, C, R)
        steps += 1
        viol = total_viol(S.act, R)
    return steps, dist, viol
