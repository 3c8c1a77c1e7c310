"""A small binary min-heap with lazy deletion, for descents with few improving flips.

An entry is (key, variable, stamp); it is current while its stamp equals the variable's
stamp (the caller bumps a variable's stamp whenever its key changes), so stale entries
are dropped when they reach the top instead of being searched for. Order: smaller key
first, then the lower variable index (deterministic ties).
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

from flipfix.repair.solvers.greedy.jit import kernel

__all__ = ["Heap", "new_heap", "push", "pop", "compact"]


class Heap(NamedTuple):
    """key float64 (cap,), var int64 (cap,), stamp int64 (cap,): entries ``[:size]``
    (the size is the caller's)."""

    key: np.ndarray
    var: np.ndarray
    stamp: np.ndarray


def new_heap(cap: int) -> Heap:
    """An empty heap of capacity ``cap`` (uninitialised arrays)."""
    return Heap(np.empty(cap), np.empty(cap, dtype=np.int64), np.empty(cap, dtype=np.int64))


@kernel
def _less(heap, a, b):
    hv, hi = heap.key, heap.var
    return hv[a] < hv[b] or (hv[a] == hv[b] and hi[a] < hi[b])


@kernel
def _swap(heap, a, b):
    hv, hi, hs = heap
    hv[a], hv[b] = hv[b], hv[a]
    hi[a], hi[b] = hi[b], hi[a]
    hs[a], hs[b] = hs[b], hs[a]


@kernel
def _sift_down(heap, size, p):
    while True:
        c = 2 * p + 1
        if c >= size:
            return
        if c + 1 < size and _less(heap, c + 1, c):
            c += 1
        if not _less(heap, c, p):
            return
        _swap(heap, c, p)
        p = c


@kernel
def push(heap, size, value, var, stamp):
    """Add (value, var, stamp) to the ``size`` entries; returns the new size."""
    heap.key[size] = value
    heap.var[size] = var
    heap.stamp[size] = stamp
    c = size
    while c > 0:
        p = (c - 1) // 2
        if not _less(heap, c, p):
            break
        _swap(heap, c, p)
        c = p
    return size + 1


@kernel
def pop(heap, size):
    """Drop the top entry of ``size``; returns the new size."""
    size -= 1
    root = np.int64(0)
    _swap(heap, root, size)
    _sift_down(heap, size, root)
    return size


@kernel
def compact(heap, size, stamp):
    """Drop the stale entries (``stamp`` int64 (n,): each variable's current stamp) and
    re-heapify; returns the new size."""
    hv, hi, hs = heap
    keep = np.int64(0)
    for e in range(size):
        i = hi[e]
        if hs[e] == stamp[i]:
            hv[keep] = hv[e]
            hi[keep] = i
            hs[keep] = hs[e]
            keep += 1
    for p in range(keep // 2 - 1, -1, -1):
        _sift_down(heap, keep, p)
    return keep
