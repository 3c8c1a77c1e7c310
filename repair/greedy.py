"""Greedy repair: batched steepest descent by single flips and pair moves.

For every candidate, independently and deterministically:

1. pin the fixed variables;
2. restore feasibility with the least cost: while a hard row is violated, take
   the flip (or, when no single flip helps, the pair of flips) with the lowest
   objective change per unit of violation removed;
3. descend: take the feasible single flip with the most negative objective
   change; when none improves and hard rows exist, try pair moves (one variable
   up, one down, both in the same row) so equality rows can still move; stop at
   a local minimum.

The objective is the compiled QUBO plus the non-linear count penalties plus
``flip_price`` times the Hamming distance from the candidate. ``max_flips``
caps that distance (a hard radius).

Cost per flip update is O(degree): local fields, count-penalty term states and
row activities are updated only where the flipped variable appears. With no
hard rows, count penalties or radius, the improving flips are kept in a binary
heap, so a step costs O(degree * log heap) instead of an O(n) scan.
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import numba as nb
import numpy as np

from .compiled import FEAS_TOL, Compiled

__all__ = ["GreedyOutput", "greedy_repair", "descend_qubo", "objective_tol", "warm_up"]

_INF = np.inf


@dataclass
class GreedyOutput:
    """X: int8 (K, n) repaired assignments; steps: int64 (K,) moves taken;
    done: bool (K,) whether the candidate was processed within the budget;
    seconds: float64 (K,) time spent on each candidate (its chunk's share)."""

    X: np.ndarray
    steps: np.ndarray
    done: np.ndarray
    seconds: np.ndarray


# ---------------------------------------------------------------- fast path
@nb.njit(cache=True, inline="always")
def _less(hv, hi, a, b):
    """Heap order: smaller change first, then the lower variable index (deterministic ties)."""
    return hv[a] < hv[b] or (hv[a] == hv[b] and hi[a] < hi[b])


@nb.njit(cache=True, inline="always")
def _swap(hv, hi, hs, a, b):
    hv[a], hv[b] = hv[b], hv[a]
    hi[a], hi[b] = hi[b], hi[a]
    hs[a], hs[b] = hs[b], hs[a]


@nb.njit(cache=True)
def _sift_down(hv, hi, hs, size, p):
    while True:
        c = 2 * p + 1
        if c >= size:
            return
        if c + 1 < size and _less(hv, hi, c + 1, c):
            c += 1
        if not _less(hv, hi, c, p):
            return
        _swap(hv, hi, hs, c, p)
        p = c


@nb.njit(cache=True)
def _push(hv, hi, hs, size, value, var, stamp):
    hv[size] = value
    hi[size] = var
    hs[size] = stamp
    c = size
    while c > 0:
        p = (c - 1) // 2
        if not _less(hv, hi, c, p):
            break
        _swap(hv, hi, hs, c, p)
        c = p
    return size + 1


@nb.njit(cache=True, inline="always")
def _delta(x, o, field, price, i):
    d = (1.0 - 2.0 * x[i]) * field[i]
    return d + price if x[i] == o[i] else d - price


@nb.njit(cache=True)
def _refill(x, o, field, fixed, price, tol, stamp, hv, hi, hs):
    """Heap of every improving free variable (current stamps), built in O(n)."""
    size = 0
    for i in range(x.size):
        if fixed[i] < 0:
            d = _delta(x, o, field, price, i)
            if d < -tol:
                hv[size] = d
                hi[size] = i
                hs[size] = stamp[i]
                size += 1
    for p in range(size // 2 - 1, -1, -1):
        _sift_down(hv, hi, hs, size, p)
    return size


@nb.njit(cache=True)
def _descend_heap(X, origin, h, indptr, indices, data, fixed, price, tol, max_steps, steps_out):
    """Steepest descent on a pure QUBO (+ fixings, + flip price), in place on X (K, n).

    The improving flips sit in a binary heap with lazy deletion: a variable's entry is
    current while its stamp matches. A flip re-stamps the variable and its neighbours and
    pushes those that improve, so a step costs O(degree * log heap); near a local minimum
    the heap is small, so start-up is the O(n + nnz) field computation alone.
    """
    K, n = X.shape
    cap = 4 * n + 64
    hv = np.empty(cap)
    hi = np.empty(cap, dtype=np.int64)
    hs = np.empty(cap, dtype=np.int64)
    field = np.empty(n)
    stamp = np.zeros(n, dtype=np.int64)
    for k in range(K):
        x = X[k]
        o = origin[k]
        for i in range(n):
            if fixed[i] >= 0 and x[i] != fixed[i]:
                x[i] = fixed[i]
        for i in range(n):
            f = h[i]
            for p in range(indptr[i], indptr[i + 1]):
                f += data[p] * x[indices[p]]
            field[i] = f
        size = _refill(x, o, field, fixed, price, tol, stamp, hv, hi, hs)
        steps = 0
        while steps < max_steps and size > 0:
            i = hi[0]
            if hs[0] != stamp[i]:  # stale entry: drop it
                size -= 1
                _swap(hv, hi, hs, 0, size)
                _sift_down(hv, hi, hs, size, 0)
                continue
            if hv[0] >= -tol:
                break
            size -= 1
            _swap(hv, hi, hs, 0, size)
            _sift_down(hv, hi, hs, size, 0)
            s = 1.0 - 2.0 * x[i]  # +1 for 0 -> 1
            x[i] = 1 - x[i]
            stamp[i] += 1
            if size + indptr[i + 1] - indptr[i] + 1 > cap:
                for p in range(indptr[i], indptr[i + 1]):
                    field[indices[p]] += s * data[p]
                    stamp[indices[p]] += 1
                size = _refill(x, o, field, fixed, price, tol, stamp, hv, hi, hs)
                steps += 1
                continue
            d = _delta(x, o, field, price, i)
            if d < -tol:
                size = _push(hv, hi, hs, size, d, i, stamp[i])
            for p in range(indptr[i], indptr[i + 1]):
                j = indices[p]
                field[j] += s * data[p]
                if fixed[j] < 0:
                    stamp[j] += 1
                    dj = _delta(x, o, field, price, j)
                    if dj < -tol:
                        size = _push(hv, hi, hs, size, dj, j, stamp[j])
            steps += 1
        steps_out[k] = steps


# -------------------------------------------------------------- general path
@nb.njit(cache=True, inline="always")
def _row_viol(act, lo, hi, tol):
    v = 0.0
    if act < lo:
        v = lo - act
    elif act > hi:
        v = act - hi
    return v if v > tol else 0.0


@nb.njit(cache=True, inline="always")
def _eval_flip(i, S, dist, C, R, price):
    """(objective change, violation change, new distance) of flipping variable i.

    S = (x, origin, field, dcount, sat, act, dd): one candidate's state;
    C = count-penalty arrays, R = row arrays (see _descend_general).
    """
    x, o, field, dcount, sat, act, dd = S
    cp_ptr, cp_table, term_pen, term_coef, term_arity, lit_val, vt_ptr, vt_term, vt_lit = C
    col_ptr, col_row, col_val, lo, hi, rtol = R
    xi = x[i]
    dobj = (1.0 - 2.0 * xi) * field[i]
    # count penalties: term t containing i changes its satisfied-literal count by +-1
    for q in range(vt_ptr[i], vt_ptr[i + 1]):
        t = vt_term[q]
        lit = vt_lit[q]
        a = term_arity[t]
        s = sat[t]
        before = 1 if s == a else 0
        s2 = s - 1 if xi == lit_val[lit] else s + 1
        after = 1 if s2 == a else 0
        dd[term_pen[t]] += term_coef[t] * (after - before)
    for q in range(vt_ptr[i], vt_ptr[i + 1]):
        pen = term_pen[vt_term[q]]
        if dd[pen] != 0:
            base = cp_ptr[pen]
            d0 = dcount[pen]
            dobj += cp_table[base + d0 + dd[pen]] - cp_table[base + d0]
            dd[pen] = 0
    dviol = 0.0
    sgn = 1.0 - 2.0 * xi
    for q in range(col_ptr[i], col_ptr[i + 1]):
        r = col_row[q]
        a0 = act[r]
        a1 = a0 + sgn * col_val[q]
        dviol += _row_viol(a1, lo[r], hi[r], rtol[r]) - _row_viol(a0, lo[r], hi[r], rtol[r])
    nd = dist + 1 if xi == o[i] else dist - 1
    dobj += price * (nd - dist)
    return dobj, dviol, nd


@nb.njit(cache=True)
def _apply_flip(i, S, dist, Q, C, R):
    """Flip variable i, updating fields, term states, counts and row activities in O(degree)."""
    x, o, field, dcount, sat, act, dd = S
    indptr, indices, data = Q
    cp_ptr, cp_table, term_pen, term_coef, term_arity, lit_val, vt_ptr, vt_term, vt_lit = C
    col_ptr, col_row, col_val, lo, hi, rtol = R
    xi = x[i]
    sgn = 1.0 - 2.0 * xi
    for q in range(vt_ptr[i], vt_ptr[i + 1]):
        t = vt_term[q]
        a = term_arity[t]
        s = sat[t]
        before = 1 if s == a else 0
        s2 = s - 1 if xi == lit_val[vt_lit[q]] else s + 1
        sat[t] = s2
        after = 1 if s2 == a else 0
        dcount[term_pen[t]] += term_coef[t] * (after - before)
    for p in range(indptr[i], indptr[i + 1]):
        field[indices[p]] += sgn * data[p]
    for q in range(col_ptr[i], col_ptr[i + 1]):
        act[col_row[q]] += sgn * col_val[q]
    x[i] = 1 - xi
    return dist + 1 if xi == o[i] else dist - 1


@nb.njit(cache=True)
def _total_viol(act, lo, hi, rtol):
    v = 0.0
    for r in range(act.size):
        v += _row_viol(act[r], lo[r], hi[r], rtol[r])
    return v


@nb.njit(cache=True)
def _descend_general(X, origin, h, indptr, indices, data, fixed, price, tol, max_steps, radius,
                     cp_ptr, cp_table, cp_const, term_pen, term_coef, term_arity, lit_ptr,
                     lit_var, lit_val, vt_ptr, vt_term, vt_lit,
                     a_ptr, a_col, a_val, col_ptr, col_row, col_val, lo, hi, rtol,
                     pair_width, steps_out):
    K, n = X.shape
    P = cp_const.size
    T = term_pen.size
    m = lo.size
    field = np.empty(n)
    dcount = np.empty(P, dtype=np.int64)
    sat = np.empty(T, dtype=np.int64)
    act = np.empty(m)
    dd = np.zeros(P, dtype=np.int64)
    free = np.empty(n, dtype=np.int64)
    nfree = 0
    for i in range(n):
        if fixed[i] < 0:
            free[nfree] = i
            nfree += 1
    up_i = np.empty(pair_width, dtype=np.int64)
    up_v = np.empty(pair_width)
    dn_i = np.empty(pair_width, dtype=np.int64)
    dn_v = np.empty(pair_width)
    vtol = 1e-12
    Q = (indptr, indices, data)
    C = (cp_ptr, cp_table, term_pen, term_coef, term_arity, lit_val, vt_ptr, vt_term, vt_lit)
    R = (col_ptr, col_row, col_val, lo, hi, rtol)
    for k in range(K):
        x = X[k]
        o = origin[k]
        S = (x, o, field, dcount, sat, act, dd)
        for i in range(n):
            if fixed[i] >= 0 and x[i] != fixed[i]:
                x[i] = fixed[i]
        dist = 0
        for i in range(n):
            if x[i] != o[i]:
                dist += 1
        for i in range(n):
            f = h[i]
            for p in range(indptr[i], indptr[i + 1]):
                f += data[p] * x[indices[p]]
            field[i] = f
        for p in range(P):
            dcount[p] = cp_const[p]
        for t in range(T):
            s = 0
            for q in range(lit_ptr[t], lit_ptr[t + 1]):
                if x[lit_var[q]] == lit_val[q]:
                    s += 1
            sat[t] = s
            if s == term_arity[t]:
                dcount[term_pen[t]] += term_coef[t]
        for r in range(m):
            a = 0.0
            for q in range(a_ptr[r], a_ptr[r + 1]):
                a += a_val[q] * x[a_col[q]]
            act[r] = a
        steps = 0
        # ---- phase 1: restore feasibility at least cost per unit of violation
        viol = _total_viol(act, lo, hi, rtol)
        while viol > 0.0 and steps < max_steps:
            best = _INF
            bi = -1
            for f in range(nfree):
                i = free[f]
                dobj, dviol, nd = _eval_flip(i, S, dist, C, R, price)
                if dviol < -vtol and (nd <= radius or nd < dist):
                    score = dobj / (-dviol)
                    if score < best:
                        best = score
                        bi = i
            if bi >= 0:
                dist = _apply_flip(bi, S, dist, Q, C, R)
                steps += 1
                viol = _total_viol(act, lo, hi, rtol)
                continue
            # no single flip helps: pairs (i in a violated row, j anywhere)
            bj = -1
            for r in range(m):
                if _row_viol(act[r], lo[r], hi[r], rtol[r]) == 0.0:
                    continue
                for q in range(a_ptr[r], a_ptr[r + 1]):
                    i = a_col[q]
                    if fixed[i] >= 0:
                        continue
                    dobj_i, dv_i, nd_i = _eval_flip(i, S, dist, C, R, price)
                    d1 = _apply_flip(i, S, dist, Q, C, R)
                    for f in range(nfree):
                        j = free[f]
                        if j == i:
                            continue
                        dobj_j, dv_j, nd_j = _eval_flip(j, S, d1, C, R, price)
                        dv = dv_i + dv_j
                        if dv < -vtol and (nd_j <= radius or nd_j < dist):
                            score = (dobj_i + dobj_j) / (-dv)
                            if score < best:
                                best = score
                                bi = i
                                bj = j
                    _apply_flip(i, S, d1, Q, C, R)
            if bi < 0:
                break  # stuck: report the least-violating point reached
            for v in (bi, bj):
                dist = _apply_flip(v, S, dist, Q, C, R)
            steps += 1
            viol = _total_viol(act, lo, hi, rtol)
        if viol > 0.0:
            steps_out[k] = steps
            continue
        # ---- phase 2: feasible steepest descent, single flips then pair moves
        while steps < max_steps:
            best = -tol
            bi = -1
            for f in range(nfree):
                i = free[f]
                dobj, dviol, nd = _eval_flip(i, S, dist, C, R, price)
                if dobj < best and dviol <= vtol and (nd <= radius or nd < dist):
                    best = dobj
                    bi = i
            if bi >= 0:
                dist = _apply_flip(bi, S, dist, Q, C, R)
                steps += 1
                continue
            if m == 0:
                break
            # pair moves inside each row: the best few "up" and "down" variables
            bj = -1
            for r in range(m):
                nu = 0
                ndn = 0
                for q in range(a_ptr[r], a_ptr[r + 1]):
                    i = a_col[q]
                    if fixed[i] >= 0:
                        continue
                    dobj, dviol, nd = _eval_flip(i, S, dist, C, R, price)
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
                for a in range(nu):
                    i = up_i[a]
                    dobj_i, dv_i, nd_i = _eval_flip(i, S, dist, C, R, price)
                    d1 = _apply_flip(i, S, dist, Q, C, R)
                    for b in range(ndn):
                        j = dn_i[b]
                        dobj_j, dv_j, nd_j = _eval_flip(j, S, d1, C, R, price)
                        tot = dobj_i + dobj_j
                        if (tot < best and dv_i + dv_j <= vtol
                                and (nd_j <= radius or nd_j < dist)):
                            best = tot
                            bi = i
                            bj = j
                    _apply_flip(i, S, d1, Q, C, R)
            if bi < 0:
                break
            for v in (bi, bj):
                dist = _apply_flip(v, S, dist, Q, C, R)
            steps += 1
        steps_out[k] = steps


# ------------------------------------------------------------------ driver
def _count_arrays(compiled: Compiled, n: int):
    """Flatten the count penalties into the kernel's arrays."""
    tables, consts, t_pen, t_coef, t_ar, l_ptr, l_var, l_val = [], [], [], [], [], [0], [], []
    for p, spec in enumerate(compiled.counts):
        tables.append(np.asarray(spec.table, dtype=np.float64))
        consts.append(spec.const)
        for coef, lits in spec.terms:
            t_pen.append(p)
            t_coef.append(coef)
            t_ar.append(len(lits))
            for i, b in lits:
                l_var.append(i)
                l_val.append(b)
            l_ptr.append(len(l_var))
    cp_ptr = np.zeros(len(tables) + 1, dtype=np.int64)
    cp_ptr[1:] = np.cumsum([t.size for t in tables]) if tables else []
    cp_table = np.concatenate(tables) if tables else np.zeros(0)
    l_var_a = np.asarray(l_var, dtype=np.int64)
    lit_term = np.repeat(np.arange(len(t_pen), dtype=np.int64), np.diff(np.asarray(l_ptr)))
    order = np.argsort(l_var_a, kind="stable")
    vt_ptr = np.zeros(n + 1, dtype=np.int64)
    np.add.at(vt_ptr, l_var_a + 1, 1)
    vt_ptr = np.cumsum(vt_ptr)
    return (cp_ptr, cp_table, np.asarray(consts, dtype=np.int64),
            np.asarray(t_pen, dtype=np.int64), np.asarray(t_coef, dtype=np.int64),
            np.asarray(t_ar, dtype=np.int64), np.asarray(l_ptr, dtype=np.int64), l_var_a,
            np.asarray(l_val, dtype=np.int8), vt_ptr, lit_term[order], order.astype(np.int64))


def _row_arrays(compiled: Compiled, n: int):
    """Rows as CSR and CSC plus a per-row tolerance."""
    a_ptr, a_col, a_val = compiled.a_indptr, compiled.a_indices.astype(np.int64), compiled.a_data
    rows = np.repeat(np.arange(a_ptr.size - 1, dtype=np.int64), np.diff(a_ptr))
    order = np.argsort(a_col, kind="stable")
    col_ptr = np.zeros(n + 1, dtype=np.int64)
    np.add.at(col_ptr, a_col + 1, 1)
    col_ptr = np.cumsum(col_ptr)
    rtol = np.asarray([FEAS_TOL * (1.0 + np.abs(r.coef).sum()) for r in compiled.rows],
                      dtype=np.float64)
    return a_ptr, a_col, a_val, col_ptr, rows[order], a_val[order], rtol


def objective_tol(compiled: Compiled) -> float:
    """Smallest objective change counted as an improvement (1e-9 of the largest coefficient)."""
    scale = max(np.abs(compiled.h).max(initial=0.0), np.abs(compiled.data).max(initial=0.0), 1.0)
    return 1e-9 * scale


def descend_qubo(h, indptr, indices, data, X0, *, fixed=None, flip_price: float = 0.0,
                 tol: float = 1e-9, max_steps: int | None = None):
    """Steepest single-flip descent on a QUBO (CSR couplings) from every row of X0 (int8 (K, n)).

    Returns (X int8 (K, n), steps int64 (K,)). The fast path behind greedy_repair.
    """
    X = np.array(X0, dtype=np.int8, copy=True, order="C")
    n = X.shape[1]
    fixed = np.full(n, -1, dtype=np.int8) if fixed is None else np.asarray(fixed, dtype=np.int8)
    steps = np.zeros(X.shape[0], dtype=np.int64)
    _descend_heap(X, X0.astype(np.int8), np.asarray(h, np.float64), np.asarray(indptr, np.int64),
                  np.asarray(indices, np.int32), np.asarray(data, np.float64), fixed,
                  float(flip_price), float(tol), int(max_steps or 100 * n + 1000), steps)
    return X, steps


def greedy_repair(compiled: Compiled, X0: np.ndarray, *, origin: np.ndarray | None = None,
                  max_flips: int | None = None, flip_price: float = 0.0,
                  deadline: float | None = None, cancel=None, chunk: int = 64,
                  pair_width: int | None = None, progress=None) -> GreedyOutput:
    """Repair every row of X0 (int8 (K, n), 0/1) greedily on the compiled late problem.

    ``origin`` (int8 (K, n), default X0) is what flips are counted from (radius, price).
    ``deadline`` is a ``time.perf_counter()`` value; candidates not reached by then
    (or after ``cancel`` is set) are returned unchanged with ``done`` False.
    ``progress(done, total)`` is called after each chunk.
    ``pair_width``: pair moves inside a row try the best ``pair_width`` "up" and "down"
    variables of that row; by default every pair of rows up to 32 variables long,
    the best 32 of each side in longer rows.
    """
    X0 = np.ascontiguousarray(X0, dtype=np.int8)
    K, n = X0.shape
    O = X0 if origin is None else np.ascontiguousarray(origin, dtype=np.int8)
    X = X0.copy()
    steps = np.zeros(K, dtype=np.int64)
    done = np.zeros(K, dtype=bool)
    seconds = np.zeros(K)
    radius = n if max_flips is None else int(max_flips)
    tol = objective_tol(compiled)
    max_steps = 100 * n + 1000
    fast = not compiled.counts and not compiled.rows and radius >= n
    if pair_width is None:
        longest = int(np.diff(compiled.a_indptr).max(initial=1))
        pair_width = max(1, min(32, longest))
    if not fast:
        cnt = _count_arrays(compiled, n)
        rows = _row_arrays(compiled, n)
    start = 0
    size = 1 if deadline is not None else chunk  # with a deadline: measure one, then fit
    per_cand = 0.0  # measured seconds per candidate
    while start < K:
        if cancel is not None and cancel.is_set():
            break
        if deadline is not None:
            left = deadline - time.perf_counter()
            if start > 0 and left <= 0.0:
                break
            if per_cand > 0.0:  # a chunk should fit in what is left
                size = int(max(1, min(chunk, left / per_cand)))
        t0 = time.perf_counter()
        sl = slice(start, min(K, start + size))
        start = sl.stop
        Xc = X[sl].copy()
        st = np.zeros(Xc.shape[0], dtype=np.int64)
        if fast:
            _descend_heap(Xc, O[sl], compiled.h, compiled.indptr, compiled.indices,
                          compiled.data, compiled.fixed, float(flip_price), tol, max_steps, st)
        else:
            (cp_ptr, cp_table, cp_const, t_pen, t_coef, t_ar, l_ptr, l_var, l_val, vt_ptr,
             vt_term, vt_lit) = cnt
            a_ptr, a_col, a_val, col_ptr, col_row, col_val, rtol = rows
            _descend_general(Xc, O[sl], compiled.h, compiled.indptr, compiled.indices,
                             compiled.data, compiled.fixed, float(flip_price), tol, max_steps,
                             radius, cp_ptr, cp_table, cp_const, t_pen, t_coef, t_ar, l_ptr,
                             l_var, l_val, vt_ptr, vt_term, vt_lit, a_ptr, a_col, a_val,
                             col_ptr, col_row, col_val, compiled.lo, compiled.hi, rtol,
                             int(pair_width), st)
        per_cand = (time.perf_counter() - t0) / Xc.shape[0]
        X[sl] = Xc
        steps[sl] = st
        done[sl] = True
        seconds[sl] = per_cand
        if progress is not None:
            progress(int(done.sum()), K)
    return GreedyOutput(X=X, steps=steps, done=done, seconds=seconds)


_WARM = False


def warm_up() -> None:
    """Compile (or load from the on-disk cache) every kernel on a tiny model, once per
    process, so that no request pays the compilation inside its time budget."""
    global _WARM
    if _WARM:
        return
    from .compiled import compile_constraints
    from .constraints import HammingPenalty, LinearConstraint
    from .model import Problem

    p = Problem.from_terms({0: -1.0, 1: 1.0, 2: 0.5}, [(0, 1, 2.0), (1, 2, -1.0)])
    X0 = np.zeros((1, 3), dtype=np.int8)
    greedy_repair(compile_constraints(p, []), X0)
    greedy_repair(compile_constraints(p, [
        HammingPenalty({0: 1, 1: 1, 2: 1}, shape="quadratic"),
        LinearConstraint({0: 1, 1: 1}, "==", 1)]), X0)
    p.energies(X0)
    p.local_fields(X0)
    _WARM = True
