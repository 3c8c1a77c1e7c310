"""Feasibility restore: while a hard row is violated, the move with the least objective
change per unit of violation removed.

A move is a single flip, or, when no single flip reduces the violation, a pair (one
variable of a violated row, one anywhere). Moves that would leave the radius are not
taken. A restore that finds no helping move stops at the least-violating point reached.

The single flips are kept in two tournament trees
(:mod:`~flipfix.repair.solvers.greedy.tournament`), one for flips away from the
candidate and one for flips back to it (away flips are not taken at the radius), keyed by
``objective change / violation removed`` (+inf when the flip removes none). Only a flip
that reduces the violation can be chosen, so only members of violated rows are keyed at
the start. A flip re-keys: itself, its QUBO neighbours, the other literals of its count
terms, every member of a count penalty whose count it changed, and every member of a row
whose *regime* it changed. A row's regime (far above ``hi``, far below ``lo``, deep
inside, or near a bound, where "far" and "deep" are measured by the row's largest
|coefficient|) says whether its share of a member's violation change can differ from
before the flip: far outside it is that member's coefficient (with sign) whatever the
activity, deep inside it is zero. So a step costs O(degree x log n) while the rows stay
far from their bounds (a cardinality row thousands of flips off), and O(row length) in
the few steps near a bound; the old restore scanned every free variable at every step.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

from flipfix.repair.solvers.greedy.jit import kernel
from flipfix.repair.solvers.greedy.state import eval_flip, flip_state, row_viol, total_viol
from flipfix.repair.solvers.greedy.tournament import tree_clear, tree_drain, tree_set

__all__ = ["RestoreWork", "restore_work", "init_restore", "restore"]

_INF = np.inf
_VTOL = 1e-12  # the least violation change that counts


class RestoreWork(NamedTuple):
    """Scratch of :func:`restore`, n variables (N leaves, a power of two >= n), m rows,
    P count penalties, T terms.

    key float64 (4N,), item int64 (4N,): two tournament trees (away flips at offset 0,
    flips back at 2N); stamp int64 (n,): the tick at which each variable was last
    re-keyed; tick int64 (1,): the current tick; todo int64 (n,): the variables one flip
    re-keys; stack int64 (64,): the trees' drain scratch; pens int64 (max(T, 1),): the
    penalties one flip changed; rowmax float64 (m,): each row's largest |coefficient|; pt_ptr int64 (P+1,), pt_term int64 (T,): each count
    penalty's terms. :func:`init_restore` fills the trees' items, rowmax and the penalty
    map once per kernel call.
    """

    key: np.ndarray
    item: np.ndarray
    stamp: np.ndarray
    tick: np.ndarray
    todo: np.ndarray
    stack: np.ndarray
    pens: np.ndarray
    rowmax: np.ndarray
    pt_ptr: np.ndarray
    pt_term: np.ndarray


def restore_work(n: int, P: int, T: int, m: int) -> RestoreWork:
    N = 1
    while N < n:
        N *= 2
    i64 = np.int64
    return RestoreWork(np.empty(4 * N), np.empty(4 * N, dtype=i64), np.zeros(n, dtype=i64),
                       np.zeros(1, dtype=i64), np.empty(n, dtype=i64), np.empty(64, dtype=i64),
                       np.empty(max(T, 1), dtype=i64), np.empty(m), np.zeros(P + 1, dtype=i64),
                       np.empty(T, dtype=i64))


@kernel
def init_restore(W, C, R):
    """Empty trees with their leaves' items, each row's largest |coefficient| and each
    count penalty's terms (O(n + nnz + T), once per kernel call)."""
    N = W.key.size // 4
    for p in range(N):
        W.item[N + p] = p
        W.item[3 * N + p] = p
    tree_clear(W.key, W.item, np.int64(0), N)
    tree_clear(W.key, W.item, 2 * N, N)
    a_ptr, a_val = R.a_ptr, R.a_val
    for r in range(W.rowmax.size):
        big = 0.0
        for q in range(a_ptr[r], a_ptr[r + 1]):
            big = max(big, abs(a_val[q]))
        W.rowmax[r] = big
    term_pen, pt_ptr, pt_term = C.term_pen, W.pt_ptr, W.pt_term
    for p in range(pt_ptr.size):
        pt_ptr[p] = 0
    for t in range(term_pen.size):
        pt_ptr[term_pen[t] + 1] += 1
    for p in range(1, pt_ptr.size):
        pt_ptr[p] += pt_ptr[p - 1]
    for t in range(term_pen.size):  # counting sort; pt_ptr[p] is p's start again after
        p = term_pen[t]
        pt_term[pt_ptr[p]] = t
        pt_ptr[p] += 1
    for p in range(pt_ptr.size - 1, 0, -1):
        pt_ptr[p] = pt_ptr[p - 1]
    if pt_ptr.size:
        pt_ptr[0] = 0


@kernel
def _regime(a, lo, hi, tol, big):
    """1 far above hi, -1 far below lo, 0 deep inside (every member's flip keeps the row
    within its tolerance), 2 near a bound: a row's share of a member's violation change
    is the same at two activities of the same regime other than 2."""
    if a - big - hi > tol:
        return 1
    if lo - a - big > tol:
        return -1
    if a + big - hi <= tol and lo - a + big <= tol:
        return 0
    return 2


@kernel
def _rebuild(key, item, b0, N):
    """Every inner node of the tree at b0 from its leaves, O(N)."""
    for r in range(N - 1, 0, -1):
        l = b0 + 2 * r
        c = l + 1 if key[l + 1] < key[l] else l
        key[b0 + r] = key[c]
        item[b0 + r] = item[c]


@kernel
def _push(j, W, fixed, cnt):
    """Add free variable j to the re-key list ``W.todo[:cnt]`` once per tick; returns the
    new count."""
    if fixed[j] < 0 and W.stamp[j] != W.tick[0]:
        W.stamp[j] = W.tick[0]
        W.todo[cnt] = j
        cnt += 1
    return cnt


@kernel
def _push_span(s, ptr, idx, W, fixed, cnt):
    """:func:`_push` every variable of span s of a CSR list (``idx[ptr[s]:ptr[s + 1]]``:
    the members of row s, or the literals of term s); returns the new count."""
    for q in range(ptr[s], ptr[s + 1]):
        cnt = _push(idx[q], W, fixed, cnt)
    return cnt


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
            if P.stop[0] != 0:  # O(nfree) per i: give up at once when stopped
                return np.int64(-1), np.int64(-1)
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
def restore(S, dist, Q, C, R, free, nfree, P, W):
    """Restore feasibility of S (:class:`~flipfix.repair.solvers.greedy.state.State`, at
    distance ``dist`` int64) in place; ``free[:nfree]`` int64 the free variables; P
    :class:`~flipfix.repair.solvers.greedy.qubo.Params` (stops early when ``P.stop[0]``
    is set); W :class:`RestoreWork` (trees empty on entry and on return). Returns
    (steps int64, distance int64, remaining violation float64).

    One kernel with one call site of each flip helper (the keying of the re-key list at
    the top of each step, the flips at its end), for a short compile."""
    x, o, act, sat, fixed = S.x, S.o, S.act, S.sat, Q.fixed
    lo, hi, rtol = R.lo, R.hi, R.rtol
    col_ptr, col_row, col_val = R.col_ptr, R.col_row, R.col_val
    vt_ptr, vt_term, vt_lit, lit_val = C.vt_ptr, C.vt_term, C.vt_lit, C.lit_val
    term_pen, term_arity = C.term_pen, C.term_arity
    indptr, indices = Q.indptr, Q.indices
    price, radius, max_steps, stop = P.price, P.radius, P.max_steps, P.stop
    key, item, todo = W.key, W.item, W.todo
    N = key.size // 4
    N2 = 2 * N
    steps = 0
    nviol = 0
    W.tick[0] += 1
    members = 0
    cnt = np.int64(0)
    for r in range(lo.size):
        if row_viol(act[r], lo[r], hi[r], rtol[r]) > 0.0:
            nviol += 1
            members += R.a_ptr[r + 1] - R.a_ptr[r]
            cnt = _push_span(r, R.a_ptr, R.a_col, W, fixed, cnt)
    # at a start with many keys: leaves written directly, then both trees rebuilt, O(N)
    bulk = members > N // 8
    while True:
        # ---- key the re-key list: score if the flip reduces the violation, in the tree
        # of the flip's direction (away from the candidate, or back); +inf in the other
        for c in range(cnt):
            j = todo[c]
            dobj, dviol, nd = eval_flip(j, S, np.int64(0), C, R, price)
            k = dobj / (-dviol) if dviol < -_VTOL else _INF
            away = np.int64(0) if x[j] == o[j] else N2
            if bulk:
                key[away + N + j] = k
            else:
                tree_set(key, item, away, N, j, k)
                tree_set(key, item, N2 - away, N, j, _INF)
        if bulk:
            _rebuild(key, item, np.int64(0), N)
            _rebuild(key, item, N2, N)
            bulk = False
        if nviol == 0 or steps >= max_steps or stop[0] != 0:
            break
        # ---- the best single flip (away flips only inside the radius), else a pair
        ka = key[1] if dist < radius else _INF
        kb = key[N2 + 1]
        bi = np.int64(-1)
        if ka < kb or (ka == kb and ka < _INF and item[1] < item[N2 + 1]):
            bi = item[1]
        elif kb < _INF:
            bi = item[N2 + 1]
        bj = np.int64(-1)
        if bi < 0:  # no single flip helps: pairs (i in a violated row, j anywhere)
            bi, bj = _best_repair_pair(S, dist, Q, C, R, free, nfree, P, _INF)
            if bi < 0:
                break  # stuck: report the least-violating point reached
        W.tick[0] += 1
        cnt = np.int64(0)
        for v in range(2):  # flip (one call site), listing what each flip changed
            i = bi if v == 0 else bj
            if i < 0:
                break
            xi = x[i]
            npen = 0
            for q in range(vt_ptr[i], vt_ptr[i + 1]):  # penalties whose count changes
                t = vt_term[q]
                a = term_arity[t]
                st = sat[t]
                st2 = st - 1 if xi == lit_val[vt_lit[q]] else st + 1
                if (st == a) != (st2 == a):
                    W.pens[npen] = term_pen[t]
                    npen += 1
            dist = flip_state(i, S, dist, Q, C, R)
            cnt = _push(i, W, fixed, cnt)
            for p in range(indptr[i], indptr[i + 1]):
                cnt = _push(np.int64(indices[p]), W, fixed, cnt)
            sgn = 1.0 - 2.0 * xi
            for q in range(col_ptr[i], col_ptr[i + 1]):
                r = col_row[q]
                a1 = act[r]
                a0 = a1 - sgn * col_val[q]
                nviol += ((row_viol(a1, lo[r], hi[r], rtol[r]) > 0.0)
                          - (row_viol(a0, lo[r], hi[r], rtol[r]) > 0.0))
                g0 = _regime(a0, lo[r], hi[r], rtol[r], W.rowmax[r])
                if g0 == 2 or g0 != _regime(a1, lo[r], hi[r], rtol[r], W.rowmax[r]):
                    cnt = _push_span(r, R.a_ptr, R.a_col, W, fixed, cnt)
            for q in range(vt_ptr[i], vt_ptr[i + 1]):
                cnt = _push_span(vt_term[q], C.lit_ptr, C.lit_var, W, fixed, cnt)
            for c in range(npen):
                pen = W.pens[c]
                for u in range(W.pt_ptr[pen], W.pt_ptr[pen + 1]):
                    cnt = _push_span(W.pt_term[u], C.lit_ptr, C.lit_var, W, fixed, cnt)
        steps += 1
    tree_drain(key, np.int64(0), N, W.stack)
    tree_drain(key, N2, N, W.stack)
    return steps, dist, total_viol(act, R)
