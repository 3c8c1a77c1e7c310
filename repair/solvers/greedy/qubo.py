"""Steepest single-flip descent on a pure QUBO (+ fixings, + a price per flip).

The improving flips are the finite leaves of a tournament tree
(:mod:`~flipfix.repair.solvers.greedy.tournament`); a flip re-keys the variable and its
neighbours, each O(log n) at worst and mostly a level or two. A start with few improving
flips (a near-optimal candidate) descends with a small heap instead
(:mod:`~flipfix.repair.solvers.greedy.heap`), cheaper than tree walks while it stays
small. A descent ends with no improving flip, so the tree is empty again and the next
candidate's start-up is its field computation and one pass over n.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

from flipfix.repair.kernels.bundles import Qubo, unsigned
from flipfix.repair.solvers.greedy.heap import Heap, compact, new_heap, pop, push
from flipfix.repair.solvers.greedy.jit import entry, kernel
from flipfix.repair.solvers.greedy.start import consensus, init_field, route, start_refs
from flipfix.repair.solvers.greedy.state import delta
from flipfix.repair.solvers.greedy.tournament import tree_clear, tree_drain, tree_set

__all__ = ["Params", "TreeWork", "SMALL_START", "descend_qubo", "descend_tree", "tree_work"]

_INF = np.inf
#: Starts with at most this many improving flips descend with a small heap, others with
#: the tournament tree (bench/kernel.py: near-optimal vs random starts).
SMALL_START = 64


class Params(NamedTuple):
    """A call's scalars: price float (per flip away from the candidate), tol float (the
    least change counted as an improvement), max_steps int (moves per candidate), radius
    int (the most flips from the candidate), use_groups bool (single flips from the grouped
    trees), par int (2 when a radius splits each group by the flip's direction, else 1),
    stop int64 (1,): set non-zero (by the driver's deadline timer or a cancel, while a
    kernel runs) to end the call at the next step; the candidates it cuts short report
    ``max_steps`` steps (unfinished). The pure-QUBO descent reads price, tol, max_steps and
    stop."""

    price: float
    tol: float
    max_steps: int
    radius: int
    use_groups: bool
    par: int
    stop: np.ndarray


class TreeWork(NamedTuple):
    """Scratch of :func:`descend_tree`, n variables, N leaves (a power of two >= n).

    tkey float64 (2N,), titem int64 (2N,): the tree; field float64 (n,); found int64 (n,);
    heap: a :class:`~flipfix.repair.solvers.greedy.heap.Heap` of 4n + 64 entries; stamp
    int64 (n,) zeros: each variable's heap stamp.
    """

    tkey: np.ndarray
    titem: np.ndarray
    field: np.ndarray
    found: np.ndarray
    heap: Heap
    stamp: np.ndarray


def tree_work(n: int) -> TreeWork:
    N = 1
    while N < n:
        N *= 2
    return TreeWork(np.empty(2 * N), np.empty(2 * N, dtype=np.int64), np.empty(n),
                    np.empty(n, dtype=np.int64), new_heap(4 * n + 64),
                    np.zeros(n, dtype=np.int64))


@kernel
def _heap_descent(x, o, field, Q, P, found, cnt, heap, stamp):
    """Descend x from the improving flips ``found[:cnt]`` with the small heap (lazy
    deletion: an entry is current while its stamp matches ``stamp``). Returns the steps."""
    indptr, indices, data, fixed = Q.indptr, Q.indices, Q.data, Q.fixed
    price, tol = P.price, P.tol
    cap = heap.key.size
    hv, hi, hs = heap.key, heap.var, heap.stamp
    size = np.int64(0)
    for c in range(cnt):
        i = found[c]
        size = push(heap, size, delta(x, o, field, price, i), i, stamp[i])
    steps = 0
    stop = P.stop
    while steps < P.max_steps and size > 0:
        if stop[0] != 0:
            return P.max_steps
        i = hi[0]
        if hs[0] != stamp[i] or hv[0] >= -tol:  # stale entry (or no improvement): drop it
            size = pop(heap, size)
            continue
        size = pop(heap, size)
        s = 1.0 - 2.0 * x[i]  # +1 for 0 -> 1
        x[i] = 1 - x[i]
        stamp[i] += 1
        for p in range(indptr[i], indptr[i + 1]):
            j = indices[p]
            field[j] += s * data[p]
            if fixed[j] < 0:
                stamp[j] += 1
                jj = np.int64(j)
                dj = delta(x, o, field, price, jj)
                if dj < -tol:
                    if size == cap:  # full of stale entries: keep the current ones
                        size = compact(heap, size, stamp)
                    size = push(heap, size, dj, jj, stamp[j])
        steps += 1
    return steps


@entry
def descend_tree(X, origin, Q, refs, P, work, steps_out):
    """Steepest descent on a pure QUBO, in place on X int8 (K, n); origin int8 (K, n) the
    candidates (for the price); Q :class:`~flipfix.repair.kernels.bundles.Qubo`; refs
    :class:`~flipfix.repair.solvers.greedy.start.StartRefs`; P :class:`Params`; work
    :class:`TreeWork`; steps_out int64 (K,) the moves taken."""
    tkey, titem, field, found, heap, stamp = work
    fixed = Q.fixed
    price, tol, max_steps = P.price, P.tol, P.max_steps
    indptr, indices, data = Q.indptr, Q.indices, Q.data
    K, n = X.shape
    N = tkey.size // 2
    b0 = np.int64(0)
    for p in range(N):
        titem[N + p] = p
    tree_clear(tkey, titem, b0, N)
    pinned = 0
    for i in range(n):
        pinned += fixed[i] >= 0
    stop = P.stop
    for k in range(K):
        if stop[0] != 0:  # cut short: this and the later candidates are unfinished
            steps_out[k] = max_steps
            continue
        x = X[k]
        o = origin[k]
        if pinned:
            for i in range(n):
                if fixed[i] >= 0 and x[i] != fixed[i]:
                    x[i] = fixed[i]
        init_field(route(x, refs.anchor), x, refs, Q, field, found)
        cnt = np.int64(0)
        for i in range(n):  # a plain pass first: the improving flips are few near a minimum
            if delta(x, o, field, price, i) < -tol and fixed[i] < 0:
                found[cnt] = i
                cnt += 1
        if cnt <= SMALL_START:
            steps_out[k] = _heap_descent(x, o, field, Q, P, found, cnt, heap, stamp)
            continue
        for c in range(cnt):
            i = found[c]
            tree_set(tkey, titem, b0, N, i, delta(x, o, field, price, i))
        steps = 0
        while steps < max_steps and tkey[1] < -tol:
            if stop[0] != 0:
                steps = max_steps
                break
            i = titem[1]
            s = 1.0 - 2.0 * x[i]  # +1 for 0 -> 1
            x[i] = 1 - x[i]
            tree_set(tkey, titem, b0, N, i, _INF)  # flipping back undoes an improvement
            for p in range(indptr[i], indptr[i + 1]):
                j = indices[p]
                field[j] += s * data[p]
                if fixed[j] < 0:
                    jj = np.int64(j)
                    dj = delta(x, o, field, price, jj)
                    tree_set(tkey, titem, b0, N, jj, dj if dj < -tol else _INF)
            steps += 1
        steps_out[k] = steps
        tree_drain(tkey, b0, N, found)  # empty unless max_steps stopped the descent


def descend_qubo(h, indptr, indices, data, X0, *, fixed=None, flip_price: float = 0.0,
                 tol: float = 1e-9, max_steps: int | None = None):
    """Steepest single-flip descent on a QUBO (CSR couplings) from every row of X0 (int8 (K, n)).

    Returns (X int8 (K, n), steps int64 (K,)). The fast path behind greedy_repair.
    """
    X = np.array(X0, dtype=np.int8, copy=True, order="C")
    n = X.shape[1]
    # C order and writeable (copied only when not so): one compiled kernel for every input
    fixed = (np.full(n, -1, dtype=np.int8) if fixed is None
             else np.require(fixed, dtype=np.int8, requirements=["C", "W"]))
    steps = np.zeros(X.shape[0], dtype=np.int64)
    origin = np.require(X0, dtype=np.int8, requirements=["C", "W"])
    qubo = Qubo(np.ascontiguousarray(h, np.float64), np.ascontiguousarray(indptr, np.int64),
                unsigned(indices), np.ascontiguousarray(data, np.float64), fixed)
    anchor = consensus(X, fixed)
    params = Params(float(flip_price), float(tol), int(max_steps or 100 * n + 1000), n, False, 1,
                    np.zeros(1, dtype=np.int64))
    descend_tree(X, origin, qubo, start_refs(anchor, qubo), params, tree_work(n), steps)
    return X, steps
