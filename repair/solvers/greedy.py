"""Greedy repair: batched steepest descent by single flips and pair moves.

For every candidate, independently and deterministically:

1. pin the fixed variables;
2. restore feasibility with the least cost: while a hard row is violated, take
   the flip (or, when no single flip helps, the pair of flips) with the lowest
   objective change per unit of violation removed;
3. descend: take the feasible single flip with the most negative objective
   change; when none improves, try pair moves (one variable up, one down, both in
   a row that blocks some single flip) so tight and equality rows can still move;
   stop at a local minimum.

The objective is the compiled QUBO plus the non-linear count penalties plus
``flip_price`` times the Hamming distance from the candidate. ``max_flips``
caps that distance (a hard radius).

Cost per flip is O(degree log n) at worst, independent of n in practice: local fields,
count-penalty term states and row activities are updated only where the flipped
variable appears, and the best flip comes from tournament trees (flipfix.repair.kernels.tournament)
rather than a scan. On a pure QUBO one tree holds the improving flips (a small heap
when a start has few). With late rows and count penalties, variables are grouped by
how a flip moves the long ("wide") structures, one tree per group keyed by the rest of
the change, and a step compares one top per group (see "grouped single flips"); with
too many groups the kernel scans the free variables instead.

The inner kernels run without numba's reference counting (see ``_kernel``).
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import numba as nb
import numpy as np

from flipfix.repair.lowering.compiled import FEAS_TOL, Compiled
from flipfix.repair.kernels.batching import thread_pool
from flipfix.repair.kernels.bundles import late_arrays, objective_tol, unsigned
from flipfix.repair.kernels.tournament import tree_clear, tree_drain, tree_set

__all__ = ["GreedyOutput", "greedy_repair", "descend_qubo", "objective_tol", "warm_up"]

_INF = np.inf

#: Inner kernels are compiled without numba's reference counting: they allocate nothing
#: (their callers pass every array in and keep it alive), and the counting's calls cost
#: more than the arithmetic in loops over small helpers (bench/kernel.py).
_kernel = nb.njit(cache=True, _nrt=False)
#: Starts with at most this many improving flips descend with a small heap, others with
#: the tournament tree (bench/kernel.py: near-optimal vs random starts).
SMALL_START = 64


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


@nb.njit(cache=True, inline="always")
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


@nb.njit(cache=True, inline="always")
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


@nb.njit(cache=True)
def _row_sums(h, indptr, data):
    """h + J 1: every variable's field when all bits are 1. float64 (n,)."""
    full = h.copy()
    for i in range(h.size):
        for p in range(indptr[i], indptr[i + 1]):
            full[i] += data[p]
    return full


@nb.njit(cache=True)
def _anchor_field(anchor, h, indptr, indices, data):
    """h + J anchor, float64 (n,)."""
    field = h.copy()
    for i in range(h.size):
        for p in range(indptr[i], indptr[i + 1]):
            field[i] += data[p] * anchor[indices[p]]
    return field


@nb.njit(cache=True)
def _start_refs(anchor, h, indptr, indices, data):
    """What every chunk of one call starts its candidates from (:func:`_init_field`):
    (h + J 1, h + J anchor, -data, zeros int8 (n,), ones int8 (n,)). Built once per call."""
    n = h.size
    return (_row_sums(h, indptr, data), _anchor_field(anchor, h, indptr, indices, data), -data,
            np.zeros(n, dtype=np.int8), np.ones(n, dtype=np.int8))


@nb.njit(cache=True, inline="always")
def _delta(x, o, field, price, i):
    d = (1.0 - 2.0 * x[i]) * field[i]
    return d + price if x[i] == o[i] else d - price


@nb.njit(cache=True, inline="always")
def _route(x, anchor):
    """Which way to x's state is cheapest: 0 from the anchor's, by the bits that differ
    from it; 1 from all-zeros, by the set bits; 2 from all-ones, by the clear bits."""
    n = x.size
    ones = 0
    apart = 0
    for i in range(n):
        ones += x[i]
        apart += x[i] != anchor[i]
    if apart <= ones and apart <= n - ones:
        return 0
    return 1 if 2 * ones <= n else 2


@nb.njit(cache=True, inline="always")
def _differing(x, ref, out):
    """The positions where x and ref differ, ascending, into out[:count] (int64, size >=
    n); returns count. Branch-free: a differing bit is a coin toss for the branch
    predictor, and a mispredicted branch per bit cost more than the store."""
    c = 0
    for j in range(x.size):
        out[c] = j
        c += x[j] != ref[j]
    return c


@nb.njit(cache=True, inline="always")
def _init_field(route, x, anchor, afield, zeros, h, ones, full, indptr, indices, data, ndata,
                field, found):
    """field = h + J x (J symmetric CSR) by ``route`` (:func:`_route`): the reference state
    (the anchor, all-zeros or all-ones) and its field (``afield``, h or ``full`` = h + J 1),
    then a scatter of the bits where x differs from it. Returns how many differ; their
    positions are left in ``found[:count]``. ``ndata`` is -data (no multiply by the flip's
    sign in the scatter)."""
    if route == 0:
        ref, base = anchor, afield
    elif route == 1:
        ref, base = zeros, h
    else:
        ref, base = ones, full
    for i in range(x.size):
        field[i] = base[i]
    count = _differing(x, ref, found)
    for q in range(count):
        j = found[q]
        d = data if x[j] == 1 else ndata
        for p in range(indptr[j], indptr[j + 1]):
            field[indices[p]] += d[p]
    return count


@_kernel
def _heap_descent(x, o, field, fixed, price, tol, max_steps, indptr, indices, data, found, cnt,
                  hv, hi, hs, stamp):
    """The same descent for a start with few improving flips (``found[:cnt]``): they sit in
    a small binary heap with lazy deletion (an entry is current while its stamp matches),
    cheaper than tree walks while the heap stays small. Returns the steps taken."""
    cap = hv.size
    size = 0
    for c in range(cnt):
        i = found[c]
        size = _push(hv, hi, hs, size, _delta(x, o, field, price, i), i, stamp[i])
    steps = 0
    while steps < max_steps and size > 0:
        i = hi[0]
        if hs[0] != stamp[i] or hv[0] >= -tol:  # stale entry (or no improvement): drop it
            size -= 1
            _swap(hv, hi, hs, 0, size)
            _sift_down(hv, hi, hs, size, 0)
            continue
        size -= 1
        _swap(hv, hi, hs, 0, size)
        _sift_down(hv, hi, hs, size, 0)
        s = 1.0 - 2.0 * x[i]  # +1 for 0 -> 1
        x[i] = 1 - x[i]
        stamp[i] += 1
        for p in range(indptr[i], indptr[i + 1]):
            j = indices[p]
            field[j] += s * data[p]
            if fixed[j] < 0:
                stamp[j] += 1
                dj = _delta(x, o, field, price, j)
                if dj < -tol:
                    if size == cap:  # full of stale entries: keep the current ones
                        size = _compact(x, o, field, price, tol, stamp, hv, hi, hs, size)
                    size = _push(hv, hi, hs, size, dj, j, stamp[j])
        steps += 1
    return steps


@_kernel
def _compact(x, o, field, price, tol, stamp, hv, hi, hs, size):
    """Drop the stale entries of a full heap and re-heapify; returns the new size."""
    keep = 0
    for e in range(size):
        i = hi[e]
        if hs[e] == stamp[i]:
            hv[keep] = hv[e]
            hi[keep] = i
            hs[keep] = hs[e]
            keep += 1
    for p in range(keep // 2 - 1, -1, -1):
        _sift_down(hv, hi, hs, keep, p)
    return keep


@nb.njit(cache=True, nogil=True)
def _descend_tree(X, origin, h, indptr, indices, data, fixed, price, tol, max_steps, anchor,
                  refs, steps_out):
    """Steepest descent on a pure QUBO (+ fixings, + flip price), in place on X (K, n).

    The improving flips are the finite leaves of a tournament tree (flipfix.repair.kernels.tournament); a
    flip re-keys the variable and its neighbours, each O(log n) at worst and mostly a
    level or two. A descent ends with no improving flip, so the tree is empty again and
    the next candidate's start-up is its field computation and one pass over n.
    ``refs`` is :func:`_start_refs` of ``anchor``.
    """
    n = X.shape[1]
    N = 1
    while N < n:
        N *= 2
    cap = 4 * n + 64  # the small heap's capacity (it compacts when full)
    full, afield, ndata, zeros, ones = refs
    scratch = (np.empty(2 * N), np.empty(2 * N, dtype=np.int64), np.empty(n), full, anchor,
               afield, np.empty(n, dtype=np.int64), np.empty(cap), np.empty(cap, dtype=np.int64),
               np.empty(cap, dtype=np.int64), np.zeros(n, dtype=np.int64), zeros, ones, ndata)
    _tree_core(X, origin, h, indptr, indices, data, fixed, price, tol, max_steps, steps_out,
               scratch)


@_kernel
def _tree_core(X, origin, h, indptr, indices, data, fixed, price, tol, max_steps, steps_out,
               scratch):
    (tkey, titem, field, full, anchor, afield, found, hv, hi, hs, stamp, zeros, ones,
     ndata) = scratch
    K, n = X.shape
    N = tkey.size // 2
    for p in range(N):
        titem[N + p] = p
    tree_clear(tkey, titem, 0, N)
    pinned = 0
    for i in range(n):
        pinned += fixed[i] >= 0
    for k in range(K):
        x = X[k]
        o = origin[k]
        if pinned:
            for i in range(n):
                if fixed[i] >= 0 and x[i] != fixed[i]:
                    x[i] = fixed[i]
        _init_field(_route(x, anchor), x, anchor, afield, zeros, h, ones, full, indptr, indices,
                    data, ndata, field, found)
        cnt = 0
        for i in range(n):  # a plain pass first: the improving flips are few near a minimum
            if _delta(x, o, field, price, i) < -tol and fixed[i] < 0:
                found[cnt] = i
                cnt += 1
        if cnt <= SMALL_START:
            steps = _heap_descent(x, o, field, fixed, price, tol, max_steps, indptr, indices,
                                  data, found, cnt, hv, hi, hs, stamp)
            steps_out[k] = steps
            continue
        for c in range(cnt):
            i = found[c]
            tree_set(tkey, titem, 0, N, i, _delta(x, o, field, price, i))
        steps = 0
        while steps < max_steps and tkey[1] < -tol:
            i = titem[1]
            s = 1.0 - 2.0 * x[i]  # +1 for 0 -> 1
            x[i] = 1 - x[i]
            tree_set(tkey, titem, 0, N, i, _INF)  # flipping back undoes an improvement
            for p in range(indptr[i], indptr[i + 1]):
                j = indices[p]
                field[j] += s * data[p]
                if fixed[j] < 0:
                    dj = _delta(x, o, field, price, j)
                    tree_set(tkey, titem, 0, N, j, dj if dj < -tol else _INF)
            steps += 1
        steps_out[k] = steps
        tree_drain(tkey, 0, N, found)  # empty unless max_steps stopped the descent


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


@_kernel
def _apply_flip(i, S, dist, Q, C, R):
    """Flip variable i, updating fields, term states, counts and row activities in O(degree)."""
    return _flip_state(i, S, dist, Q, C, R)


@nb.njit(cache=True, inline="always")
def _flip_state(i, S, dist, Q, C, R):
    """:func:`_apply_flip` inlined, for loops where the call's argument copying (some 25
    arrays) would cost more than the flip."""
    x, o, field, dcount, sat, act, dd = S
    indptr, indices, data = Q
    xi = x[i]
    sgn = 1.0 - 2.0 * xi
    _leave(i, xi, dcount, sat, act, C, R)
    for p in range(indptr[i], indptr[i + 1]):
        field[indices[p]] += sgn * data[p]
    x[i] = 1 - xi
    return dist + 1 if xi == o[i] else dist - 1


@nb.njit(cache=True, inline="always")
def _leave(i, xi, dcount, sat, act, C, R):
    """Variable i leaves value xi: its terms' states, the count penalties' counts and the
    row activities follow (fields and x are the caller's). Order-free: applying several
    variables' moves in any order gives the same state."""
    cp_ptr, cp_table, term_pen, term_coef, term_arity, lit_val, vt_ptr, vt_term, vt_lit = C
    col_ptr, col_row, col_val = R[0], R[1], R[2]
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
    for q in range(col_ptr[i], col_ptr[i + 1]):
        act[col_row[q]] += sgn * col_val[q]


@nb.njit(cache=True, inline="always")
def _fresh_counts(x, cp_const, term_pen, term_coef, term_arity, lit_ptr, lit_var, lit_val,
                  a_ptr, a_col, a_val, dcount, sat, act):
    """x's count-penalty counts ``dcount``, term states ``sat`` and row activities ``act``,
    computed anew."""
    for p in range(cp_const.size):
        dcount[p] = cp_const[p]
    for t in range(term_pen.size):
        s = 0
        for q in range(lit_ptr[t], lit_ptr[t + 1]):
            s += x[lit_var[q]] == lit_val[q]
        sat[t] = s
        if s == term_arity[t]:
            dcount[term_pen[t]] += term_coef[t]
    for r in range(act.size):
        a = 0.0
        for q in range(a_ptr[r], a_ptr[r + 1]):
            a += a_val[q] * x[a_col[q]]
        act[r] = a


@_kernel
def _total_viol(act, lo, hi, rtol):
    v = 0.0
    for r in range(act.size):
        v += _row_viol(act[r], lo[r], hi[r], rtol[r])
    return v


@nb.njit(cache=True)
def _largest_positive(indptr, data):
    """Each row's largest positive coefficient of a CSR matrix, 0 if none: float64 (rows,)."""
    out = np.zeros(indptr.size - 1)
    for r in range(indptr.size - 1):
        for p in range(indptr[r], indptr[r + 1]):
            out[r] = max(out[r], data[p])
    return out


@nb.njit(cache=True, nogil=True)
def _descend_general(X, origin, h, indptr, indices, data, fixed, price, tol, max_steps, radius,
                     cp_ptr, cp_table, cp_const, term_pen, term_coef, term_arity, lit_ptr,
                     lit_var, lit_val, vt_ptr, vt_term, vt_lit,
                     a_ptr, a_col, a_val, col_ptr, col_row, col_val, lo, hi, rtol,
                     pair_width, use_groups, par, gbase, glb, tn, lp, gmem_ptr, gmem, gs_ptr,
                     gs_kind, gs_id, gs_val, nvt_ptr, nvt_term, nvt_lit, ncol_ptr, ncol_row,
                     ncol_val, vs_ptr, vs_struct, sm_ptr, sm_var, anchor, refs, amax, jpos,
                     qualify, steps_out):
    """Restore feasibility, then descend (see the module docstring), in place on X (K, n).

    With ``use_groups`` the single flips of phase 2 come from the grouped trees: ``gbase``
    int64 (n, 2) is the group of variable i when it holds bit b and ``lp`` its leaf there,
    ``par`` 2 when a radius splits each group by whether a flip moves away from the
    candidate (else 1), ``tn`` int64 (groups * par,) each tree's leaf count (a power of
    two), ``gmem_ptr`` / ``gmem`` each base group's members (ascending), ``gs_*`` each
    base group's signature (kind 0: a
    wide row and the activity change, 1: a wide count penalty and the change of d),
    ``nvt_*`` / ``ncol_*`` the variable-to-term and variable-to-row maps of the narrow
    structures only, ``vs_*`` / ``sm_*`` variable -> narrow structures -> members.
    ``refs`` is :func:`_start_refs` of ``anchor``; ``amax`` float64 (m,) each row's largest
    |coefficient|, ``jpos`` float64 (n,) each variable's largest positive coupling plus a
    margin (see :func:`_best_pair`); ``qualify`` float64 (2, n) see :func:`_rekey_all`.
    """
    n = X.shape[1]
    tb = np.zeros(tn.size, dtype=np.int64)  # each tree's offset in the flat arrays
    for g in range(1, tn.size):
        tb[g] = tb[g - 1] + 2 * tn[g - 1]
    slots = tb[-1] + 2 * tn[-1] if tn.size else 0
    full, afield, ndata, zeros, ones = refs
    most = 0  # the longest re-key list of one flip
    for i in range(n):
        c = 1 + indptr[i + 1] - indptr[i]
        for q in range(vs_ptr[i], vs_ptr[i + 1]):
            c += sm_ptr[vs_struct[q] + 1] - sm_ptr[vs_struct[q]]
        most = max(most, c)
    scratch = (np.empty(n), np.empty(cp_const.size, dtype=np.int64),
               np.empty(term_pen.size, dtype=np.int64), np.empty(lo.size),
               np.zeros(cp_const.size, dtype=np.int64), np.empty(n, dtype=np.int64),
               np.empty(pair_width, dtype=np.int64), np.empty(pair_width),
               np.empty(pair_width, dtype=np.int64), np.empty(pair_width),
               np.empty(slots), np.empty(slots, dtype=np.int64), tb,
               np.empty(most, dtype=np.int64), full, anchor, afield, np.empty(n, dtype=np.int64),
               amax, jpos,
               np.empty(cp_const.size, dtype=np.int64), np.empty(term_pen.size, dtype=np.int64),
               np.empty(lo.size), zeros, ones, ndata)
    _general_core(X, origin, h, indptr, indices, data, fixed, price, tol, max_steps, radius,
                  cp_ptr, cp_table, cp_const, term_pen, term_coef, term_arity, lit_ptr,
                  lit_var, lit_val, vt_ptr, vt_term, vt_lit,
                  a_ptr, a_col, a_val, col_ptr, col_row, col_val, lo, hi, rtol,
                  pair_width, use_groups, par, gbase, glb, tn, lp, gmem_ptr, gmem, gs_ptr, gs_kind,
                  gs_id, gs_val, nvt_ptr, nvt_term, nvt_lit, ncol_ptr, ncol_row, ncol_val,
                  vs_ptr, vs_struct, sm_ptr, sm_var, qualify, steps_out, scratch)


@_kernel
def _general_core(X, origin, h, indptr, indices, data, fixed, price, tol, max_steps, radius,
                  cp_ptr, cp_table, cp_const, term_pen, term_coef, term_arity, lit_ptr,
                  lit_var, lit_val, vt_ptr, vt_term, vt_lit,
                  a_ptr, a_col, a_val, col_ptr, col_row, col_val, lo, hi, rtol,
                  pair_width, use_groups, par, gbase, glb, tn, lp, gmem_ptr, gmem, gs_ptr, gs_kind,
                  gs_id, gs_val, nvt_ptr, nvt_term, nvt_lit, ncol_ptr, ncol_row, ncol_val,
                  vs_ptr, vs_struct, sm_ptr, sm_var, qualify, steps_out, scratch):
    (field, dcount, sat, act, dd, free, up_i, up_v, dn_i, dn_v, tkey, titem, tb, todo, full,
     anchor, afield, found, amax, jpos, adcount, asat, aact, zeros, ones, ndata) = scratch
    K, n = X.shape
    P = cp_const.size
    T = term_pen.size
    m = lo.size
    nfree = 0
    for i in range(n):
        if fixed[i] < 0:
            free[nfree] = i
            nfree += 1
    pinned = nfree < n
    vtol = 1e-12
    Q = (indptr, indices, data)
    C = (cp_ptr, cp_table, term_pen, term_coef, term_arity, lit_val, vt_ptr, vt_term, vt_lit)
    R = (col_ptr, col_row, col_val, lo, hi, rtol)
    Cn = (cp_ptr, cp_table, term_pen, term_coef, term_arity, lit_val, nvt_ptr, nvt_term, nvt_lit)
    Rn = (ncol_ptr, ncol_row, ncol_val, lo, hi, rtol)
    G = (gs_ptr, gs_kind, gs_id, gs_val)
    N = (vs_ptr, vs_struct, sm_ptr, sm_var)
    H = (tkey, titem, tb, tn, lp)
    _fresh_counts(anchor, cp_const, term_pen, term_coef, term_arity, lit_ptr, lit_var, lit_val,
                  a_ptr, a_col, a_val, adcount, asat, aact)
    for g in range(tn.size):  # leaf items never change
        gb = g // par
        cnt = gmem_ptr[gb + 1] - gmem_ptr[gb]
        for p in range(tn[g]):
            titem[tb[g] + tn[g] + p] = gmem[gmem_ptr[gb] + p] if p < cnt else -1
        tree_clear(tkey, titem, tb[g], tn[g])
    for k in range(K):
        x = X[k]
        o = origin[k]
        S = (x, o, field, dcount, sat, act, dd)
        if pinned:
            for i in range(n):
                if fixed[i] >= 0 and x[i] != fixed[i]:
                    x[i] = fixed[i]
        dist = 0
        for i in range(n):
            dist += x[i] != o[i]
        route = _route(x, anchor)
        if route == 0:
            # from the anchor's whole state: the fields by the scatter, then each differing
            # bit's move for term states, counts and activities
            cnt_diff = _init_field(0, x, anchor, afield, zeros, h, ones, full, indptr, indices,
                                   data, ndata, field, found)
            for p in range(P):
                dcount[p] = adcount[p]
            for t in range(T):
                sat[t] = asat[t]
            for r in range(m):
                act[r] = aact[r]
            for q in range(cnt_diff):
                j = found[q]
                _leave(j, anchor[j], dcount, sat, act, C, R)
        else:
            _init_field(route, x, anchor, afield, zeros, h, ones, full, indptr, indices, data,
                        ndata, field, found)
            _fresh_counts(x, cp_const, term_pen, term_coef, term_arity, lit_ptr, lit_var,
                          lit_val, a_ptr, a_col, a_val, dcount, sat, act)
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
        if use_groups:
            for g in range(tn.size):
                tree_drain(tkey, tb[g], tn[g], found)
            _rekey_all(S, Cn, Rn, price, tol, fixed, gbase, glb, par, H, qualify)
        while steps < max_steps:
            if use_groups:
                best, bi = _best_group_top(S, dist, H, G, C, R, radius, par, tol)
            else:
                best = -tol
                bi = -1
                for f in range(nfree):
                    i = free[f]
                    dobj, dviol, nd = _eval_flip(i, S, dist, C, R, price)
                    if dobj < best and dviol <= vtol and (nd <= radius or nd < dist):
                        best = dobj
                        bi = i
            bj = -1
            if bi < 0:  # no single flip improves: pair moves inside rows
                if m == 0:
                    break
                bi, bj = _best_pair(S, dist, Q, C, R, a_ptr, a_col, a_val, amax, jpos, fixed,
                                    price, radius, -tol, up_i, up_v, dn_i, dn_v)
                if bi < 0:
                    break
            for v in range(2):  # one call site: _flip is inlined
                w = bi if v == 0 else bj
                if w < 0:
                    break
                dist = _flip(w, S, dist, Q, C, R, use_groups, Cn, Rn, price, tol, fixed, gbase,
                             glb, par, H, N, todo, qualify)
            steps += 1
        steps_out[k] = steps


@_kernel
def _best_pair(S, dist, Q, C, R, a_ptr, a_col, a_vals, amax, jpos, fixed, price, radius, best,
               up_i, up_v, dn_i, dn_v):
    """The best feasible pair move (one variable up, one down, in the same row) below
    ``best``: (i, j), or (-1, -1). Each row tries its best ``up_i.size`` of each side.
    ``amax`` float64 (m,) is each row's largest |coefficient|, ``jpos`` float64 (n,) each
    variable's largest positive coupling, 0 if none (a margin for a small tolerance is added
    by the caller)."""
    x = S[0]
    pair_width = up_i.size
    vtol = 1e-12
    bi = -1
    bj = -1
    act, lo, hi, rtol = S[5], R[3], R[4], R[5]
    for r in range(a_ptr.size - 1):
        # only rows that block some single flip of theirs: elsewhere a pair is just two
        # single flips, which phase 2 has already found not to improve
        if (_row_viol(act[r] + amax[r], lo[r], hi[r], rtol[r]) == 0.0
                and _row_viol(act[r] - amax[r], lo[r], hi[r], rtol[r]) == 0.0):
            continue  # slack both ways for every member
        blocked = False
        for q in range(a_ptr[r], a_ptr[r + 1]):
            i = a_col[q]
            if fixed[i] < 0:
                a1 = act[r] + (1.0 - 2.0 * x[i]) * a_vals[q]
                if _row_viol(a1, lo[r], hi[r], rtol[r]) > 0.0:
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
        # without count penalties, moving i up and j down changes the objective by
        # change_i + change_j - J_ij (the QUBO's pair term), so by no less than
        # change_i + change_j - jpos[i]: pairs that cannot beat ``best`` are skipped
        # (both lists are sorted by change, ascending)
        prune = C[0].size == 1
        for a in range(nu):
            i = up_i[a]
            if prune and ndn > 0 and up_v[a] + dn_v[0] - jpos[i] >= best:
                continue
            dobj_i, dv_i, nd_i = _eval_flip(i, S, dist, C, R, price)
            d1 = _flip_state(i, S, dist, Q, C, R)
            for b in range(ndn):
                if prune and up_v[a] + dn_v[b] - jpos[i] >= best:
                    break
                j = dn_i[b]
                dobj_j, dv_j, nd_j = _eval_flip(j, S, d1, C, R, price)
                tot = dobj_i + dobj_j
                if tot < best and dv_i + dv_j <= vtol and (nd_j <= radius or nd_j < dist):
                    best = tot
                    bi = i
                    bj = j
            _flip_state(i, S, d1, Q, C, R)
    return bi, bj


# ----------------------------------------------------- grouped single flips
# With late rows or count penalties, the change of a flip has a local part (QUBO field,
# flip price, the narrow structures the variable is in) and a part from the wide
# structures (long rows, long count penalties of single-literal terms) that depends only
# on which way the flip moves each of them. Variables with the same such signature form a
# group; each group keeps its variables in a tournament tree by local part, so a step looks
# at one top per group and a flip re-keys only the variables that share a structure with it.
@nb.njit(cache=True, inline="always")
def _rekey(j, S, Cn, Rn, price, tol, fixed, gbase, glb, par, H):
    """Recompute variable j's local change; its leaf in its group's tree holds it only
    while it could be taken (local change + the group's least possible offset below -tol)."""
    if fixed[j] >= 0:
        return
    x, o = S[0], S[1]
    tkey, titem, tb, tn, lp = H
    dobj, dviol, nd = _eval_flip(j, S, 0, Cn, Rn, price)
    b = x[j]
    gb = gbase[j, b]
    g = gb * par + (1 if par == 2 and b == o[j] else 0)
    ok = dviol <= 1e-12 and dobj + glb[gb] < -tol
    tree_set(tkey, titem, tb[g], tn[g], lp[j, b], dobj if ok else _INF)


@nb.njit(cache=True, inline="always")
def _best_group_top(S, dist, H, G, C, R, radius, par, tol):
    """(change, variable) of the best feasible single flip below -tol, or (-tol, -1)."""
    act, dcount = S[5], S[3]
    key, item, tb, tn, lp = H
    gs_ptr, gs_kind, gs_id, gs_val = G
    cp_table, cp_ptr = C[1], C[0]
    lo, hi, rtol = R[3], R[4], R[5]
    best = -tol
    bi = -1
    for g in range(tn.size):
        s0 = tb[g] + 1  # the root
        top = key[s0]
        if top == _INF:
            continue
        if par == 2:
            nd = dist + 1 if g % 2 == 1 else dist - 1
            if not (nd <= radius or nd < dist):
                continue
        gb = g // par
        off = 0.0
        ok = True
        for q in range(gs_ptr[gb], gs_ptr[gb + 1]):
            sid = gs_id[q]
            v = gs_val[q]
            if gs_kind[q] == 0:
                a0 = act[sid]
                if (_row_viol(a0 + v, lo[sid], hi[sid], rtol[sid])
                        - _row_viol(a0, lo[sid], hi[sid], rtol[sid])) > 1e-12:
                    ok = False
                    break
            else:
                b = cp_ptr[sid]
                d0 = dcount[sid]
                off += cp_table[b + d0 + int(v)] - cp_table[b + d0]
        if not ok:
            continue
        val = top + off
        if val < best or (val == best and item[s0] < bi):
            best = val
            bi = item[s0]
    return best, bi


@nb.njit(cache=True, inline="always")
def _flip(i, S, dist, Q, C, R, use_groups, Cn, Rn, price, tol, fixed, gbase, glb, par, H, N,
          todo, qualify):
    """Flip variable i (all state) and, with groups, re-key every variable whose local
    change it alters: i, its QUBO neighbours, the members of its narrow structures.
    ``todo`` int64 (>= n + degree + co-members,) is scratch; ``qualify`` see
    :func:`_rekey_all`."""
    if use_groups:  # i leaves its group's tree: flipped, it belongs to another
        tkey, titem, tb, tn, lp = H
        x, o = S[0], S[1]
        b = x[i]
        g = gbase[i, b] * par + (1 if par == 2 and b == o[i] else 0)
        tree_set(tkey, titem, tb[g], tn[g], lp[i, b], _INF)
    dist = _flip_state(i, S, dist, Q, C, R)
    if not use_groups:
        return dist
    indptr, indices = Q[0], Q[1]
    vs_ptr, vs_struct, sm_ptr, sm_var = N
    cnt = 0
    todo[cnt] = i
    cnt += 1
    for p in range(indptr[i], indptr[i + 1]):
        todo[cnt] = indices[p]
        cnt += 1
    for q in range(vs_ptr[i], vs_ptr[i + 1]):
        s = vs_struct[q]
        for e in range(sm_ptr[s], sm_ptr[s + 1]):
            todo[cnt] = sm_var[e]
            cnt += 1
    x, o, field = S[0], S[1], S[2]
    tkey, titem, tb, tn, lp = H
    for t in range(cnt):
        j = todo[t]
        b = x[j]
        if _delta(x, o, field, price, j) < qualify[b, j]:
            _rekey(j, S, Cn, Rn, price, tol, fixed, gbase, glb, par, H)
        elif fixed[j] < 0:  # what _rekey would conclude (narrow rows only add violation)
            g = gbase[j, b] * par + (1 if par == 2 and b == o[j] else 0)
            tree_set(tkey, titem, tb[g], tn[g], lp[j, b], _INF)
    return dist


@_kernel
def _rekey_all(S, Cn, Rn, price, tol, fixed, gbase, glb, par, H, qualify):
    """Re-key every free variable into empty trees. A variable in no narrow count penalty
    can only lose from its narrow rows, so its QUBO-and-price change already tells when it
    cannot qualify: below ``qualify[b, j]`` (float64 (2, n): -tol minus the least offset of
    j's group when j holds bit b; -inf for a pinned j; +inf for a j in a narrow count
    penalty, which always takes the full evaluation). One contiguous pass; near a minimum
    the branch is rarely taken, so a plain ``if`` beats a branch-free list here."""
    x, o, field = S[0], S[1], S[2]
    for j in range(x.size):
        if _delta(x, o, field, price, j) < qualify[x[j], j]:
            _rekey(j, S, Cn, Rn, price, tol, fixed, gbase, glb, par, H)


# ------------------------------------------------------------------ driver
def _row_tuple(rows):
    """The row arrays in the order the general kernel takes them (lo, hi passed apart)."""
    return (rows.a_ptr, rows.a_col, rows.a_val, rows.col_ptr, rows.col_row, rows.col_val,
            rows.rtol)


#: A row or count penalty over more than this many variables is "wide": its share of a
#: flip's change is taken per group (see "grouped single flips"), not re-keyed per member.
#: Common practice for such a split; the figure is ours, set by bench/kernel.py.
WIDE = 64
#: More wide structures than this: no groups (their signature matrix is (2, n, wide)).
MAX_WIDE = 16
#: Grouped trees pay only while there are few groups; past this share of the free
#: variables the plain scan over free variables is used instead.
MAX_GROUP_SHARE = 0.25
#: ... but up to this many groups always use them.
MIN_GROUPS = 4


def _csr(keys: np.ndarray, values: np.ndarray, n: int):
    """(ptr int64 (n+1,), values sorted by key, stable)."""
    order = np.argsort(keys, kind="stable")
    ptr = np.zeros(n + 1, dtype=np.int64)
    np.add.at(ptr, keys + 1, 1)
    return np.cumsum(ptr), values[order]


def _group_layout(compiled: Compiled, cnt, rows):
    """Groups of variables by their wide-structure signature, and the narrow maps.

    Returns a dict of kernel arrays (see _descend_general) plus ``members`` int64 (groups,)
    (how many free variables can be in each base group) and ``groups``.
    """
    n = compiled.n
    (cp_ptr, cp_table, cp_const, t_pen, t_coef, t_ar, l_ptr, l_var, l_val, vt_ptr,
     vt_term, vt_lit) = cnt
    a_ptr, a_col, a_val, col_ptr, col_row, col_val, rtol = rows
    m, P = a_ptr.size - 1, cp_const.size
    row_len = np.diff(a_ptr)
    pen_len = np.bincount(t_pen, minlength=P) if P else np.zeros(0, dtype=np.int64)
    single = np.ones(P, dtype=bool)
    if t_pen.size:
        np.logical_and.at(single, t_pen, t_ar == 1)
    wide_row = row_len > WIDE
    wide_pen = (pen_len > WIDE) & single
    # signature matrix: for (i, b) the change of each wide structure when i flips from b
    wr, wp = np.flatnonzero(wide_row), np.flatnonzero(wide_pen)
    W = wr.size + wp.size
    if W > MAX_WIDE:  # the signatures would be many and their matrix large: scan instead
        wr, wp, W = wr[:0], wp[:0], 0
        wide_row[:] = False
        wide_pen[:] = False
        too_many = True
    else:
        too_many = False
    M = np.zeros((2, n, W))
    for c, r in enumerate(wr):
        cols = a_col[a_ptr[r]:a_ptr[r + 1]]
        vals = a_val[a_ptr[r]:a_ptr[r + 1]]
        np.add.at(M[0], (cols, c), vals)     # 0 -> 1 adds a
        np.add.at(M[1], (cols, c), -vals)    # 1 -> 0 removes it
    lit_term = np.repeat(np.arange(t_pen.size, dtype=np.int64), np.diff(l_ptr))
    for c, p in enumerate(wp, start=wr.size):
        sel = t_pen[lit_term] == p
        v, lit, coef = l_var[sel], l_val[sel], t_coef[lit_term[sel]]
        for b in (0, 1):  # the literal (v, lit) is satisfied now iff b == lit
            np.add.at(M[b], (v, c), np.where(lit == b, -coef, coef).astype(np.float64))
    uniq, inv = np.unique(M.reshape(2 * n, W), axis=0, return_inverse=True)
    gbase = np.ascontiguousarray(inv.reshape(2, n).T, dtype=np.int64)
    free = compiled.fixed < 0
    groups = n + 1 if too_many else uniq.shape[0]  # n + 1: never worth the trees
    members = np.zeros(groups, dtype=np.int64)
    g0, g1 = gbase[free, 0], gbase[free, 1]
    np.add.at(members, g0, 1)
    np.add.at(members, g1[g1 != g0], 1)
    # each base group's members, ascending, and every (variable, bit)'s leaf in its group
    fidx = np.flatnonzero(free)
    pairs = np.concatenate([np.stack([g0, fidx], 1), np.stack([g1, fidx], 1)[g1 != g0]])
    pairs = pairs[np.lexsort((pairs[:, 1], pairs[:, 0]))]
    gmem_ptr = np.concatenate([[0], np.cumsum(members)]).astype(np.int64)
    gmem = np.ascontiguousarray(pairs[:, 1], dtype=np.int64)
    rank = np.arange(gmem.size, dtype=np.int64) - gmem_ptr[pairs[:, 0]]
    codes = pairs[:, 0] * n + pairs[:, 1]
    lp = np.zeros((n, 2), dtype=np.int64)
    for b in (0, 1):
        pos = np.searchsorted(codes, gbase[fidx, b] * n + fidx)
        lp[fidx, b] = rank[pos]
    nz_g, nz_c = np.nonzero(uniq)
    kinds = np.concatenate([np.zeros(wr.size, np.int64), np.ones(wp.size, np.int64)])
    ids = np.concatenate([wr, wp]).astype(np.int64)
    gs_ptr = np.zeros(groups + 1, dtype=np.int64)
    np.add.at(gs_ptr, nz_g + 1, 1)
    # narrow maps: variable -> terms of narrow penalties, variable -> narrow rows
    keep_t = ~wide_pen[t_pen[vt_term]] if vt_term.size else np.zeros(0, dtype=bool)
    keep_r = ~wide_row[col_row] if col_row.size else np.zeros(0, dtype=bool)
    # members of each narrow structure (rows 0..m-1, then penalties m..m+P-1)
    s_of, v_of = [], []
    for r in np.flatnonzero(~wide_row):
        cols = a_col[a_ptr[r]:a_ptr[r + 1]]
        s_of.append(np.full(cols.size, r, dtype=np.int64))
        v_of.append(cols.astype(np.int64))
    for p in np.flatnonzero(~wide_pen):
        vs = np.unique(l_var[t_pen[lit_term] == p])
        s_of.append(np.full(vs.size, m + p, dtype=np.int64))
        v_of.append(vs.astype(np.int64))
    s_all = np.concatenate(s_of) if s_of else np.zeros(0, np.int64)
    v_all = np.concatenate(v_of) if v_of else np.zeros(0, np.int64)
    sm_ptr, sm_var = _csr(s_all, v_all, m + P)
    vs_ptr, vs_struct = _csr(v_all, s_all, n)
    nvt_ptr = np.concatenate([[0], np.cumsum(np.bincount(
        np.repeat(np.arange(n), np.diff(vt_ptr))[keep_t], minlength=n))]).astype(np.int64)
    ncol_ptr = np.concatenate([[0], np.cumsum(np.bincount(
        np.repeat(np.arange(n), np.diff(col_ptr))[keep_r], minlength=n))]).astype(np.int64)
    # least offset each group can ever get: rows add none, a count penalty its table's
    # smallest step of that size
    glb = np.zeros(groups)
    for g, c in zip(nz_g, nz_c):
        if c >= wr.size:
            t = compiled.counts[int(ids[c])].table
            step = int(round(uniq[g, c]))
            lo_d, hi_d = max(0, -step), min(t.size, t.size - step)
            if hi_d > lo_d:
                glb[g] += min(0.0, float((t[lo_d + step:hi_d + step] - t[lo_d:hi_d]).min()))
    return {
        "gbase": gbase, "members": members, "groups": groups, "glb": glb, "lp": lp,
        "gmem_ptr": gmem_ptr, "gmem": gmem,
        "gs_ptr": np.cumsum(gs_ptr), "gs_kind": kinds[nz_c], "gs_id": ids[nz_c],
        "gs_val": uniq[nz_g, nz_c].astype(np.float64),
        "nvt_ptr": nvt_ptr, "nvt_term": vt_term[keep_t], "nvt_lit": vt_lit[keep_t],
        "ncol_ptr": ncol_ptr, "ncol_row": col_row[keep_r], "ncol_val": col_val[keep_r],
        "vs_ptr": vs_ptr, "vs_struct": vs_struct, "sm_ptr": sm_ptr, "sm_var": sm_var,
    }


def _qualify(lay: dict, fixed: np.ndarray, tol: float) -> np.ndarray:
    """float64 (2, n): the QUBO-and-price change below which variable j holding bit b may
    enter its group's tree (see :func:`_rekey_all`)."""
    q = np.ascontiguousarray((-tol - lay["glb"][lay["gbase"]]).T)
    q[:, np.diff(lay["nvt_ptr"]) > 0] = np.inf
    q[:, fixed >= 0] = -np.inf
    return q


def _general_arrays(compiled: Compiled):
    """Every array the general kernel needs, built once per compiled problem."""
    cached = getattr(compiled, "_greedy_arrays", None)
    if cached is None:
        late = late_arrays(compiled)
        cnt, rows = late.counts, _row_tuple(late.rows)
        cached = (cnt, rows, _group_layout(compiled, cnt, rows))
        compiled._greedy_arrays = cached
    return cached


@nb.njit(cache=True, nogil=True)
def _column_ones(X):
    """The number of ones in each column of X (int8 (K, n), 0/1): int64 (n,). A compiled
    loop: numpy's ``X.sum(axis=0)`` widens every int8 on the way and took ~0.4 us a row."""
    K, n = X.shape
    c = np.zeros(n, dtype=np.int32)
    for k in range(K):
        for i in range(n):
            c[i] += X[k, i]
    return c.astype(np.int64)


def consensus(X: np.ndarray, fixed: np.ndarray) -> np.ndarray:
    """Bitwise majority of the rows of X (int8 (K, n)) with the fixings applied: int8 (n,).

    The kernels start each candidate's fields from this anchor's when it is the nearer
    route (candidates of one library tend to agree on most bits)."""
    a = (2 * _column_ones(X) >= X.shape[0]).astype(np.int8)
    pinned = fixed >= 0
    a[pinned] = fixed[pinned]
    return a


def descend_qubo(h, indptr, indices, data, X0, *, fixed=None, flip_price: float = 0.0,
                 tol: float = 1e-9, max_steps: int | None = None):
    """Steepest single-flip descent on a QUBO (CSR couplings) from every row of X0 (int8 (K, n)).

    Returns (X int8 (K, n), steps int64 (K,)). The fast path behind greedy_repair.
    """
    X = np.array(X0, dtype=np.int8, copy=True, order="C")
    n = X.shape[1]
    fixed = np.full(n, -1, dtype=np.int8) if fixed is None else np.asarray(fixed, dtype=np.int8)
    steps = np.zeros(X.shape[0], dtype=np.int64)
    origin = np.ascontiguousarray(X0, dtype=np.int8)  # read only: no copy when already so
    h = np.asarray(h, np.float64)
    indptr = np.asarray(indptr, np.int64)
    cols = unsigned(indices)
    data = np.asarray(data, np.float64)
    anchor = consensus(X, fixed)
    _descend_tree(X, origin, h, indptr, cols, data, fixed, float(flip_price), float(tol),
                  int(max_steps or 100 * n + 1000), anchor,
                  _start_refs(anchor, h, indptr, cols, data), steps)
    return X, steps


_threads = thread_pool  # one process-wide pool per worker count


def _in_parts(run, X: np.ndarray, O: np.ndarray, steps: np.ndarray, workers: int) -> None:
    """run(X, O, steps) on ``workers`` contiguous row blocks at once (in place). Each
    candidate's descent depends on that candidate alone, so the answers do not depend on
    the split."""
    parts = min(workers, X.shape[0])
    if parts <= 1:
        run(X, O, steps)
        return
    cuts = np.linspace(0, X.shape[0], parts + 1).astype(int)
    jobs = [_threads(parts).submit(run, X[a:b], O[a:b], steps[a:b])
            for a, b in zip(cuts[:-1], cuts[1:])]
    for j in jobs:
        j.result()


def greedy_repair(compiled: Compiled, X0: np.ndarray, *, origin: np.ndarray | None = None,
                  max_flips: int | None = None, flip_price: float = 0.0,
                  deadline: float | None = None, cancel=None, chunk: int = 64,
                  pair_width: int | None = None, progress=None,
                  workers: int = 1) -> GreedyOutput:
    """Repair every row of X0 (int8 (K, n), 0/1) greedily on the compiled late problem.

    ``origin`` (int8 (K, n), default X0) is what flips are counted from (radius, price).
    ``deadline`` is a ``time.perf_counter()`` value; candidates not reached by then
    (or after ``cancel`` is set), or whose descent it interrupts, are returned unchanged
    with ``done`` False; past the deadline no descent starts.
    ``progress(done, total)`` is called after each chunk.
    ``pair_width``: pair moves inside a row try the best ``pair_width`` "up" and "down"
    variables of that row; by default every pair of rows up to 32 variables long,
    the best 32 of each side in longer rows.
    ``workers``: threads that descend parts of each chunk at once; the answers do not
    depend on it.
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
        cnt, rows, lay = _general_arrays(compiled)
        par = 2 if radius < n else 1
        nfree = int((compiled.fixed < 0).sum())
        use_groups = lay["groups"] * par <= max(MIN_GROUPS, MAX_GROUP_SHARE * nfree)
        leaves = 1 << np.ceil(np.log2(np.maximum(lay["members"], 1))).astype(np.int64)
        tn = np.repeat(leaves, par) if use_groups else np.zeros(0, dtype=np.int64)
    anchor = consensus(X0, compiled.fixed)
    cols = unsigned(compiled.indices)
    refs = _start_refs(anchor, compiled.h, compiled.indptr, cols, compiled.data)
    if not fast:
        amax = _largest_positive(rows[0], np.abs(rows[2]))
        jpos = _largest_positive(compiled.indptr, compiled.data) * (1.0 + 1e-9) + tol
        qualify = _qualify(lay, compiled.fixed, tol)

    def run(Xc, Oc, st, max_steps=max_steps):  # one kernel call, in place on Xc (rows, n), st (rows,)
        if fast:
            _descend_tree(Xc, Oc, compiled.h, compiled.indptr, cols,
                          compiled.data, compiled.fixed, float(flip_price), tol, max_steps,
                          anchor, refs, st)
            return
        (cp_ptr, cp_table, cp_const, t_pen, t_coef, t_ar, l_ptr, l_var, l_val, vt_ptr,
         vt_term, vt_lit) = cnt
        a_ptr, a_col, a_val, col_ptr, col_row, col_val, rtol = rows
        _descend_general(Xc, Oc, compiled.h, compiled.indptr, cols,
                         compiled.data, compiled.fixed, float(flip_price), tol, max_steps,
                         radius, cp_ptr, cp_table, cp_const, t_pen, t_coef, t_ar, l_ptr,
                         l_var, l_val, vt_ptr, vt_term, vt_lit, a_ptr, a_col, a_val,
                         col_ptr, col_row, col_val, compiled.lo, compiled.hi, rtol,
                         int(pair_width), use_groups, par, lay["gbase"], lay["glb"], tn,
                         lay["lp"], lay["gmem_ptr"], lay["gmem"],
                         lay["gs_ptr"], lay["gs_kind"], lay["gs_id"], lay["gs_val"],
                         lay["nvt_ptr"], lay["nvt_term"], lay["nvt_lit"], lay["ncol_ptr"],
                         lay["ncol_row"], lay["ncol_val"], lay["vs_ptr"], lay["vs_struct"],
                         lay["sm_ptr"], lay["sm_var"], anchor, refs, amax, jpos, qualify, st)

    start = 0
    size = 1 if deadline is not None else chunk  # with a deadline: measure one, then fit
    per_cand = 0.0  # measured seconds per candidate
    pace = [0.0, 0]  # with a deadline: seconds and steps of the kernel calls so far
    while start < K:
        if cancel is not None and cancel.is_set():
            break
        if deadline is not None:
            left = deadline - time.perf_counter()
            if left <= 0.0:
                break
            if per_cand > 0.0:  # a chunk should fit in what is left
                size = int(max(1, min(chunk, left / per_cand)))
        t0 = time.perf_counter()
        sl = slice(start, min(K, start + size))
        start = sl.stop
        Xc = X[sl].copy()
        st = np.zeros(Xc.shape[0], dtype=np.int64)
        if deadline is None:
            _in_parts(run, Xc, O[sl], st, workers)
            finished = np.ones(Xc.shape[0], dtype=bool)
        else:
            finished = _in_slices(run, Xc, O[sl], st, workers, deadline, max_steps, pace,
                                  cancel)
        per_cand = (time.perf_counter() - t0) / Xc.shape[0]
        X[sl] = np.where(finished[:, None], Xc, X[sl])  # unfinished: returned unchanged
        steps[sl] = np.where(finished, st, 0)
        done[sl] = finished
        seconds[sl] = per_cand
        if progress is not None:
            progress(int(done.sum()), K)
        if not finished.all():
            break
    return GreedyOutput(X=X, steps=steps, done=done, seconds=seconds)


#: steps per candidate of the first kernel call under a deadline (a step of the feasibility
#: phase scans every free variable: ~5 ms at 100,000 variables with a wide row)
FIRST_SLICE = 16


def _in_slices(run, X, O, steps, workers, deadline, max_steps, pace, cancel) -> np.ndarray:
    """:func:`_in_parts` under a deadline: each kernel call is capped at the steps that fit
    in half of what is left (at the pace measured so far, ``pace`` = [seconds, steps],
    updated), and candidates that reach the cap continue from where they stopped (a
    descent depends only on its current state) until they finish or the deadline passes.
    Returns which rows finished (bool (rows,)); ``steps`` gets their steps."""
    rows = X.shape[0]
    live = np.arange(rows)
    per_part = -(-rows // max(1, min(workers, rows)))  # candidates one thread descends
    while live.size:
        left = deadline - time.perf_counter()
        if left <= 0.0 or (cancel is not None and cancel.is_set()):
            break
        if pace[1] > 0:
            fit = 0.5 * left * pace[1] / max(pace[0], 1e-9) / per_part
            cap = int(min(max_steps, max(FIRST_SLICE, fit)))
        else:
            cap = min(max_steps, FIRST_SLICE)
        sub = X[live]
        st = np.zeros(live.size, dtype=np.int64)
        t = time.perf_counter()
        _in_parts(lambda a, b, c: run(a, b, c, cap), sub, O[live], st, workers)
        pace[0] += time.perf_counter() - t
        pace[1] += int(st.sum()) // max(1, min(workers, live.size))
        X[live] = sub
        steps[live] += st
        live = live[st >= cap] if cap < max_steps else live[:0]
    finished = np.ones(rows, dtype=bool)
    finished[live] = False
    return finished


_WARM = False


def warm_up() -> None:
    """Compile (or load from the on-disk cache) every kernel on a tiny model, once per
    process, so that no request pays the compilation inside its time budget."""
    global _WARM
    if _WARM:
        return
    from flipfix.repair.lowering.compiled import compile_constraints
    from flipfix.repair.model.constraints import HammingPenalty, LinearConstraint
    from flipfix.repair.model.problem import Problem

    p = Problem.from_terms({0: -1.0, 1: 1.0, 2: 0.5}, [(0, 1, 2.0), (1, 2, -1.0)])
    X0 = np.zeros((1, 3), dtype=np.int8)
    greedy_repair(compile_constraints(p, []), X0)
    greedy_repair(compile_constraints(p, [
        HammingPenalty({0: 1, 1: 1, 2: 1}, shape="quadratic"),
        LinearConstraint({0: 1, 1: 1}, "==", 1)]), X0)
    p.energies(X0)
    p.local_fields(X0)
    _WARM = True
