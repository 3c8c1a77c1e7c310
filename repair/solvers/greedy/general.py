"""The general descent: late rows and count penalties, a radius, a price per flip.

For every candidate: pin the fixed variables; restore feasibility
(:mod:`~flipfix.repair.solvers.greedy.restore`); then descend: take the feasible single
flip with the most negative change (from the grouped trees,
:mod:`~flipfix.repair.solvers.greedy.groups`, or a scan over the free variables when
groups do not pay); when none improves, the best pair move inside a row
(:mod:`~flipfix.repair.solvers.greedy.pairs`); stop at a local minimum.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

from flipfix.repair.solvers.greedy.groups import (best_group_top, drain_trees, flip,
                                                  init_trees, narrow_view, rekey_all)
from flipfix.repair.solvers.greedy.jit import entry
from flipfix.repair.solvers.greedy.pairs import best_pair
from flipfix.repair.solvers.greedy.restore import RestoreWork, init_restore, restore, restore_work
from flipfix.repair.solvers.greedy.start import init_field, route
from flipfix.repair.solvers.greedy.state import State, eval_flip, fresh_counts, leave

__all__ = ["Work", "general_work", "descend_general"]


class Work(NamedTuple):
    """Scratch of :func:`descend_general`, n variables, P count penalties, T terms, m rows.

    field float64 (n,), dcount int64 (P,), sat int64 (T,), act float64 (m,), dd int64 (P,)
    zeros: the candidate's :class:`~flipfix.repair.solvers.greedy.state.State` arrays;
    free int64 (n,): the free variables; found int64 (n,); todo int64 (most,): a flip's
    re-key list; adcount int64 (P,), asat int64 (T,), aact float64 (m,): the anchor's
    counts, term states and activities; rw: the restore's
    :class:`~flipfix.repair.solvers.greedy.restore.RestoreWork`.
    """

    field: np.ndarray
    dcount: np.ndarray
    sat: np.ndarray
    act: np.ndarray
    dd: np.ndarray
    free: np.ndarray
    found: np.ndarray
    todo: np.ndarray
    adcount: np.ndarray
    asat: np.ndarray
    aact: np.ndarray
    rw: RestoreWork


def general_work(n: int, P: int, T: int, m: int, most: int) -> Work:
    i64 = np.int64
    return Work(np.empty(n), np.empty(P, dtype=i64), np.empty(T, dtype=i64), np.empty(m),
                np.zeros(P, dtype=i64), np.empty(n, dtype=i64), np.empty(n, dtype=i64),
                np.empty(most, dtype=i64), np.empty(P, dtype=i64), np.empty(T, dtype=i64),
                np.empty(m), restore_work(n, P, T, m))


@entry
def descend_general(X, origin, Q, C, R, maps, groups, T, refs, bounds, lists, P, work,
                    steps_out):
    """Restore feasibility, then descend (see the module docstring), in place on X int8
    (K, n); origin int8 (K, n) the candidates (radius, price).

    Q, C, R: the problem's :mod:`~flipfix.repair.kernels.bundles`; maps, groups: its
    :class:`~flipfix.repair.solvers.greedy.layout.NarrowMaps` and
    :class:`~flipfix.repair.solvers.greedy.groups.Groups`; T the call's
    :class:`~flipfix.repair.solvers.greedy.groups.Trees`; refs
    :class:`~flipfix.repair.solvers.greedy.start.StartRefs`; bounds, lists
    :mod:`~flipfix.repair.solvers.greedy.pairs` bounds and scratch; P
    :class:`~flipfix.repair.solvers.greedy.qubo.Params`; work :class:`Work`; steps_out
    int64 (K,) the moves taken.
    """
    K, n = X.shape
    fixed = Q.fixed
    free, found, field = work.free, work.found, work.field
    dcount, sat, act = work.dcount, work.sat, work.act
    adcount, asat, aact = work.adcount, work.asat, work.aact
    anchor = refs.anchor
    price, tol, radius, max_steps = P.price, P.tol, P.radius, P.max_steps
    nfree = np.int64(0)
    for i in range(n):
        if fixed[i] < 0:
            free[nfree] = i
            nfree += 1
    pinned = nfree < n
    vtol = 1e-12
    m = act.size
    narrow = narrow_view(C, R, maps)
    fresh_counts(anchor, C, R, adcount, asat, aact)
    init_trees(T, groups, P.par)
    init_restore(work.rw, C, R)
    stop = P.stop
    for k in range(K):
        if stop[0] != 0:  # cut short: this and the later candidates are unfinished
            steps_out[k] = max_steps
            continue
        x = X[k]
        o = origin[k]
        S = State(x, o, field, dcount, sat, act, work.dd)
        if pinned:
            for i in range(n):
                if fixed[i] >= 0 and x[i] != fixed[i]:
                    x[i] = fixed[i]
        dist = np.int64(0)
        for i in range(n):
            dist += x[i] != o[i]
        way = route(x, anchor)
        differ = init_field(way, x, refs, Q, field, found)
        if way == 0:
            # from the anchor's whole state: the fields by the scatter, then each differing
            # bit's move for term states, counts and activities
            for p in range(dcount.size):
                dcount[p] = adcount[p]
            for t in range(sat.size):
                sat[t] = asat[t]
            for r in range(m):
                act[r] = aact[r]
            for q in range(differ):
                j = found[q]
                leave(j, anchor[j], S, C, R)
        else:
            fresh_counts(x, C, R, dcount, sat, act)
        # ---- phase 1: restore feasibility at least cost per unit of violation
        steps, dist, viol = restore(S, dist, Q, C, R, free, nfree, P, work.rw)
        if viol > 0.0:
            steps_out[k] = max_steps if stop[0] != 0 else steps
            continue
        # ---- phase 2: feasible steepest descent, single flips then pair moves
        if P.use_groups:
            drain_trees(T, found)
            rekey_all(S, narrow, groups, T, P, fixed)
        while steps < max_steps:
            if stop[0] != 0:
                steps = max_steps
                break
            if P.use_groups:
                best, bi = best_group_top(S, dist, T, groups, C, R, P)
            else:
                best = -tol
                bi = np.int64(-1)
                for f in range(nfree):
                    i = free[f]
                    dobj, dviol, nd = eval_flip(i, S, dist, C, R, price)
                    if dobj < best and dviol <= vtol and (nd <= radius or nd < dist):
                        best = dobj
                        bi = i
            bj = np.int64(-1)
            if bi < 0:  # no single flip improves: pair moves inside rows
                if m == 0:
                    break
                bi, bj = best_pair(S, dist, Q, C, R, bounds, lists, P, -tol)
                if bi < 0:
                    break
            for v in range(2):  # one call site
                w = bi if v == 0 else bj
                if w < 0:
                    break
                dist = flip(w, S, dist, Q, C, R, narrow, groups, T, P, work.todo)
            steps += 1
        steps_out[k] = steps
