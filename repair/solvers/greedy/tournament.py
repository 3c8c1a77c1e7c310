"""Tournament trees: the greedy kernels' best-flip selection.

A tournament tree over N (a power of two) leaves lives in flat arrays from offset b0:
``tkey`` float64 and ``titem`` int64, node r at b0 + r (r = 1 .. 2N-1; the root is r = 1;
leaf p at b0 + N + p). A leaf holds its item's key (+inf when the item is not a
candidate), each inner node the smaller child's key and item, the left one on ties, so
the lowest leaf wins ties (deterministic). Many trees can share the flat arrays at
different offsets. Setting a key repairs the path to the root and stops at the first
node that does not change: O(log N) at worst, a level or two when little changes.
Offsets, sizes and leaves are int64 at every call site (one compiled specialisation).
"""

from __future__ import annotations

import numpy as np

from flipfix.repair.solvers.greedy.jit import kernel

__all__ = ["tree_clear", "tree_drain", "tree_set"]


@kernel
def tree_clear(tkey, titem, b0, N):
    """Every leaf +inf. The leaves' items (``titem[b0 + N + p]``) are the caller's to set,
    once: they never change."""
    for r in range(1, 2 * N):
        tkey[b0 + r] = np.inf
    for r in range(N - 1, 0, -1):
        titem[b0 + r] = titem[b0 + 2 * r]


@kernel
def tree_set(tkey, titem, b0, N, p, value):
    """Set leaf p's key and repair the path to the root, stopping where nothing changes."""
    r = N + p
    if tkey[b0 + r] == value:
        return
    tkey[b0 + r] = value
    r >>= 1
    while r >= 1:
        l = b0 + 2 * r
        c = l + 1 if tkey[l + 1] < tkey[l] else l
        v = b0 + r
        if tkey[v] == tkey[c] and titem[v] == titem[c]:
            return
        tkey[v] = tkey[c]
        titem[v] = titem[c]
        r >>= 1


@kernel
def tree_drain(tkey, b0, N, stack):
    """Every leaf +inf again, visiting only the nodes that hold a finite key: cheap when
    few leaves are set. ``stack`` int64 (>= log2(N) + 2,) is scratch. Inner nodes whose
    key becomes +inf may keep a stale item; nothing reads the item of a +inf node."""
    if tkey[b0 + 1] == np.inf:
        return
    top = 0
    stack[top] = 1
    top += 1
    while top > 0:
        top -= 1
        r = stack[top]
        tkey[b0 + r] = np.inf
        if r < N:
            for c in (2 * r + 1, 2 * r):
                if tkey[b0 + c] != np.inf:
                    stack[top] = c
                    top += 1
