"""Batch scores of the late problem: cost and hard violation of many assignments, fast.

:meth:`flipfix.repair.lowering.compiled.Compiled.evaluate` splits every assignment's cost by
component and its violation by constraint. Ranking and auditing a library need only the two
totals, for many assignments: the library once, then every repaired answer, which sits near
its own candidate. :class:`Scorer` scores the library once (keeping each candidate's state:
energy, count values, row activities, missed fixings) and every later assignment from its
candidate's state by the bits that differ:

* energy of the merged search QUBO: each differing bit's linear and coupling changes (a
  coupling between two differing bits is counted half from each end);
* count penalties: only the terms holding a differing variable are re-evaluated;
* hard rows: the activities move by the differing bits' coefficients (by variable, CSC);
* fixings: the differing pinned bits.

Cost per assignment: O(n) to find the differing bits plus O(their degree), against O(nnz)
from scratch (used when more than a quarter of the bits differ). The totals are those of
``evaluate`` (cost = base energy + soft penalties; violation = the sum of the hard
constraints' violations, a row's below its tolerance counted 0) up to floating-point
rounding; feasibility (violation == 0) is the same test.
"""

from __future__ import annotations

import time

import numba as nb
import numpy as np

from flipfix.repair.kernels.batching import thread_pool
from flipfix.repair.kernels.bundles import late_arrays
from flipfix.repair.kernels.jit import copy_into, counted_entry, entry, kernel
from flipfix.repair.lowering.compiled import Compiled

__all__ = ["Scorer", "distances", "warm_up"]

#: how many candidates before each one a library's scoring looks at for a near reference,
#: comparing about SAMPLE evenly spaced bits
WINDOW = 8
SAMPLE = 256
#: most row activities (candidates x hard rows) a Scorer keeps; past it, assignments are
#: scored from scratch
KEEP_ACTIVITIES = 20_000_000
#: seconds one block of a library's scoring aims at when it runs to a deadline
BLOCK_SECONDS = 0.005


@kernel
def _scratch(x, q, c, r, offset, d, act):
    """From scratch for x int8 (n,): fills d int64 (P,) and, when act has m entries, act
    float64 (m,); returns (merged-QUBO energy, number of pinned bits x misses)."""
    h, indptr, indices, data, fixed = q
    e = 0.0
    mis = 0
    for i in range(x.size):
        if fixed[i] >= 0 and x[i] != fixed[i]:
            mis += 1
        if x[i]:  # h_i + half of each coupling to a set bit (the other half from there)
            acc = h[i]
            for p in range(indptr[i], indptr[i + 1]):  # branch-free: the bits are random
                acc += 0.5 * data[p] * x[indices[p]]
            e += acc
    cp_const, term_pen, term_coef, lit_ptr, lit_var, lit_val = c[2], c[3], c[4], c[6], c[7], c[8]
    for p in range(cp_const.size):
        d[p] = cp_const[p]
    for t in range(term_pen.size):
        s = 1
        for li in range(lit_ptr[t], lit_ptr[t + 1]):
            if x[lit_var[li]] != lit_val[li]:
                s = 0
                break
        d[term_pen[t]] += term_coef[t] * s
    if act.size == r[6].size:
        a_ptr, a_col, a_val = r[0], r[1], r[2]
        for row in range(act.size):
            v = 0.0
            for p in range(a_ptr[row], a_ptr[row + 1]):
                v += a_val[p] * x[a_col[p]]
            act[row] = v
    return e + offset, mis


@kernel
def _delta(x, a, diff, nd, e, mis, d, act, q, c, r, stamp, mark, touched):
    """The state (e, mis, d, act) of ``a`` moved, in place for d and act, to that of ``x``
    by the ``nd`` bits ``diff[:nd]`` where they differ; returns (e, mis). ``stamp`` int64
    (T,) holds no entry equal to ``mark``."""
    h, indptr, indices, data, fixed = q
    term_pen, term_coef = c[3], c[4]
    lit_ptr, lit_var, lit_val, vt_ptr, vt_term = c[6], c[7], c[8], c[9], c[10]
    col_ptr, col_row, col_val = r[3], r[4], r[5]
    nt = 0
    for qq in range(nd):
        i = diff[qq]
        xi = np.int64(x[i])
        ai = np.int64(a[i])
        e += h[i] * (xi - ai)
        for p in range(indptr[i], indptr[i + 1]):
            j = indices[p]
            t = data[p] * (xi * x[j] - ai * a[j])
            if x[j] != a[j]:
                t *= 0.5  # the other end counts the other half
            e += t
        if fixed[i] >= 0:
            mis += np.int64(xi != fixed[i]) - np.int64(ai != fixed[i])
        for p in range(col_ptr[i], col_ptr[i + 1]):
            act[col_row[p]] += col_val[p] * (xi - ai)
        for li in range(vt_ptr[i], vt_ptr[i + 1]):
            tt = vt_term[li]
            if stamp[tt] != mark:
                stamp[tt] = mark
                touched[nt] = tt
                nt += 1
    for qq in range(nt):
        tt = touched[qq]
        sx = 1
        sa = 1
        for li in range(lit_ptr[tt], lit_ptr[tt + 1]):
            if x[lit_var[li]] != lit_val[li]:
                sx = 0
            if a[lit_var[li]] != lit_val[li]:
                sa = 0
        d[term_pen[tt]] += term_coef[tt] * (sx - sa)
    return e, mis


@kernel
def _total(e, mis, d, act, c, r):
    """(cost, violation) from an energy, missed fixings, count values and activities."""
    cp_ptr, cp_table = c[0], c[1]
    lo, hi, rtol = r[6], r[7], r[8]
    for p in range(d.size):
        e += cp_table[cp_ptr[p] + d[p]]
    v = float(mis)
    for row in range(lo.size):
        w = max(0.0, lo[row] - act[row]) + max(0.0, act[row] - hi[row])
        if w > rtol[row]:
            v += w
    return e, v


@kernel
def _differing(x, a, diff):
    nd = 0
    for i in range(x.size):
        if x[i] != a[i]:
            diff[nd] = i
            nd += 1
    return nd


@kernel
def _count_differing(x, a):
    cnt = 0
    for i in range(x.size):
        cnt += x[i] != a[i]
    return cnt


@counted_entry
def _library(X, done, first, stop, window, far, q, c, r, offset, e0, mis0, d0, act0, cost,
             viol):
    """Rows first..stop-1 of X: each from the nearest of the ``window`` rows before it that
    are already scored (rows before ``done``, or from ``first`` on in this range; nearest on a
    sample of ``SAMPLE`` bits) when at most ``far`` bits differ, else from scratch; fills each
    row's state (e0, mis0, d0 and, when kept, act0) and totals."""
    n = X.shape[1]
    m = r[6].size
    keep = act0.shape[1] == m
    act = np.empty(m)
    diff = np.empty(n, dtype=np.int64)
    stamp = np.zeros(c[3].size, dtype=np.int64)
    touched = np.empty(c[3].size, dtype=np.int64)
    stride = max(1, n // SAMPLE)
    for k in range(first, stop):
        x = X[k]
        a_act = act0[k] if keep else act
        near, fewest = -1, n + 1
        if keep:  # the nearest by a sample of the bits, then the whole distance to it
            for b in range(max(0, k - window), k):
                if done <= b < first:  # another thread's range, maybe not scored yet
                    continue
                cnt = _count_differing(x[::stride], X[b, ::stride])
                if cnt < fewest:
                    near, fewest = b, cnt
        nd = far + 1 if near < 0 else _differing(x, X[near], diff)
        if nd > far:
            e0[k], mis0[k] = _scratch(x, q, c, r, offset, d0[k], a_act)
        else:
            copy_into(d0[k], d0[near])
            copy_into(a_act, act0[near])
            e0[k], mis0[k] = _delta(x, X[near], diff, nd, e0[near], mis0[near], d0[k], a_act,
                                    q, c, r, stamp, k + 1, touched)
        cost[k], viol[k] = _total(e0[k], mis0[k], d0[k], a_act, c, r)


@counted_entry
def _near(X, R, rows, scored, e0, mis0, d0, act0, q, c, r, offset, far, cost, viol, flips):
    """Row k of X from the state of row rows[k] of R (from scratch past ``far`` differing
    bits, or when that row is not among the first ``scored``); also its Hamming distance
    from that row."""
    K, n = X.shape
    m = r[6].size
    keep = act0.shape[1] == m
    diff = np.empty(n, dtype=np.int64)
    d = np.empty(d0.shape[1], dtype=np.int64)
    act = np.empty(m)
    stamp = np.zeros(c[3].size, dtype=np.int64)
    touched = np.empty(c[3].size, dtype=np.int64)
    for k in range(K):
        x = X[k]
        a = R[rows[k]]
        nd = _differing(x, a, diff)
        flips[k] = nd
        if nd > far or not keep or rows[k] >= scored:
            e, mis = _scratch(x, q, c, r, offset, d, act)
        else:
            copy_into(d, d0[rows[k]])
            copy_into(act, act0[rows[k]])
            e, mis = _delta(x, a, diff, nd, e0[rows[k]], mis0[rows[k]], d, act, q, c, r,
                            stamp, k + 1, touched)
        cost[k], viol[k] = _total(e, mis, d, act, c, r)


class Scorer:
    """Scores of the late problem ``compiled`` for a library X0 int8 (K, n) and for
    assignments near its candidates.

    ``cost``, ``violation`` float64 (K,): the library's own scores, computed on creation on
    ``workers`` threads (each candidate from the nearest of the ``WINDOW`` before it when
    at most a quarter of the bits differ, else from scratch), in library order.

    ``deadline`` (a ``time.perf_counter()`` value, or None): scoring stops there, in blocks
    of rows sized to take about ``BLOCK_SECONDS`` each (at least the first row is scored);
    ``later_per_row`` seconds that each scored row will cost the caller later (its share of
    the result) count against that deadline too;
    ``scored`` is how many leading candidates were, and the rest keep NaN cost and
    violation (:meth:`near` scores assignments near them from scratch).
    """

    def __init__(self, compiled: Compiled, X0: np.ndarray, *, workers: int = 1,
                 deadline: float | None = None, later_per_row: float = 0.0):
        self.compiled = compiled
        self.X0 = np.ascontiguousarray(X0, dtype=np.int8)
        self.arrays = late_arrays(compiled)
        q, c, r = self.arrays
        K, n = self.X0.shape
        m = r.lo.size
        self.e0 = np.empty(K)
        self.mis0 = np.empty(K, dtype=np.int64)
        self.d0 = np.empty((K, c.cp_const.size), dtype=np.int64)
        self.act0 = np.empty((K, m if K * m <= KEEP_ACTIVITIES else 0))
        self.cost, self.violation = np.full(K, np.nan), np.full(K, np.nan)
        self.scored = 0

        def run(done, a, b):
            _library(self.X0, done, a, b, WINDOW, n // 4, q, c, r, float(compiled.offset),
                     self.e0, self.mis0, self.d0, self.act0, self.cost, self.violation)

        def block(a, b):  # rows a..b-1, split over the threads
            parts = max(1, min(workers, b - a))
            if parts == 1:
                run(a, a, b)
                return
            cuts = np.linspace(a, b, parts + 1).astype(np.int64).tolist()
            jobs = [thread_pool(parts).submit(run, a, x, y) for x, y in zip(cuts[:-1], cuts[1:])]
            for j in jobs:
                j.result()

        if deadline is None:
            block(0, K)
            self.scored = K
            return
        size = max(1, workers)
        while self.scored < K:
            t = time.perf_counter()
            stop = min(K, self.scored + size)
            block(self.scored, stop)
            rows, self.scored = stop - self.scored, stop
            now = time.perf_counter()
            left = deadline - now - later_per_row * self.scored
            if left <= 0.0:
                break
            per_row = max(1e-7, (now - t) / rows) + later_per_row
            # the next block: about BLOCK_SECONDS, and never past the deadline
            size = int(max(1, min(BLOCK_SECONDS, left) / per_row))

    def near(self, X: np.ndarray, ks) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(cost float64, violation float64, flips int64), each (len(X),), of the rows of X
        int8 (len(X), n), row j scored from candidate ``ks[j]`` (flips: the distance from it;
        from scratch when that candidate was not scored)."""
        X = np.ascontiguousarray(X, dtype=np.int8)
        if X.ndim == 1:
            X = X[None, :]
        ks = np.ascontiguousarray(np.broadcast_to(np.asarray(ks, dtype=np.int64), X.shape[:1]))
        q, c, r = self.arrays
        out = np.empty(X.shape[0]), np.empty(X.shape[0]), np.empty(X.shape[0], dtype=np.int64)
        _near(X, self.X0, ks, np.int64(self.scored), self.e0, self.mis0, self.d0, self.act0, q, c, r,
              float(self.compiled.offset), X.shape[1] // 4, *out)
        return out


@entry
def _distances(X, y, out):
    for k in range(X.shape[0]):
        x = X[k]
        cnt = 0
        for i in range(x.size):
            cnt += x[i] != y[i]
        out[k] = cnt


def distances(X: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Hamming distance of every row of X (int8 (K, n)) from y (int8 (n,)): int64 (K,)."""
    X = np.ascontiguousarray(X, dtype=np.int8)
    out = np.empty(X.shape[0], dtype=np.int64)
    _distances(X, np.ascontiguousarray(y, dtype=np.int8).ravel(), out)
    return out


_WARM = False


def warm_up() -> None:
    """Compile (or load from the on-disk cache) the scoring kernels on a tiny model, once
    per process, so that no request pays the compilation inside its time budget."""
    global _WARM
    if _WARM:
        return
    from flipfix.repair.lowering.compiled import compile_constraints
    from flipfix.repair.model.constraints import HammingPenalty, LinearConstraint
    from flipfix.repair.model.problem import Problem

    p = Problem.from_terms({0: -1.0, 1: 1.0, 2: 0.5}, [(0, 1, 2.0), (1, 2, -1.0)])
    X0 = np.zeros((2, 3), dtype=np.int8)
    X0[1, 0] = 1
    for cs in ([], [HammingPenalty({0: 1, 1: 1, 2: 1}, shape="quadratic"),
                    LinearConstraint({0: 1, 1: 1}, "==", 1)]):
        s = Scorer(compile_constraints(p, cs), X0)
        s.near(X0[::-1], [0, 1])
    distances(X0, X0[0])
    _WARM = True
