"""The regions where two states differ: their differing free variables split into groups
that no coupling joins.

Two free variables that both differ between states x and y belong to one region when a
QUBO coupling joins them, or when both sit in one swap row (an equality row with equal
coefficients, such as a one-hot group: taking one of its members from y without the
others would break it), directly or through a chain of such links. Regions are the
connected components of that graph (a union-find over its edges, with path halving).

Replacing one region of x by y's values changes the QUBO part of x's objective by an
amount that does not depend on the other regions (no coupling crosses two regions), so
every region can be judged on its own; count penalties and the other hard rows do tie
regions together, which :mod:`flipfix.repair.solvers.merge` checks exactly.
"""

from __future__ import annotations

import numpy as np

from flipfix.repair.kernels.jit import entry, kernel

__all__ = ["regions", "warm_up"]


@kernel
def _find(parent, i):
    while parent[i] != i:
        parent[i] = parent[parent[i]]
        i = parent[i]
    return i


@kernel
def _union(parent, i, j):
    a = _find(parent, i)
    b = _find(parent, j)
    if a != b:
        if a < b:
            parent[b] = a
        else:
            parent[a] = b


@entry
def _regions(indptr, indices, partner, fixed, x, y, parent, first, label):
    n = x.size
    for i in range(n):
        parent[i] = i if (fixed[i] < 0 and x[i] != y[i]) else -1
    for r in range(first.size):
        first[r] = -1
    for i in range(n):
        if parent[i] < 0:
            continue
        for p in range(indptr[i], indptr[i + 1]):
            j = indices[p]
            if parent[j] >= 0:
                _union(parent, i, j)
        r = partner[i]
        if r >= 0:
            if first[r] < 0:
                first[r] = i
            else:
                _union(parent, i, first[r])
    count = 0
    for i in range(n):  # roots first get their numbers in index order
        label[i] = -1
        if parent[i] >= 0 and _find(parent, i) == i:
            label[i] = count
            count += 1
    for i in range(n):
        if parent[i] >= 0 and parent[i] != i:
            label[i] = label[_find(parent, i)]
    return count


def regions(indptr: np.ndarray, indices: np.ndarray, partner: np.ndarray, rows: int,
            fixed: np.ndarray, x: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, int]:
    """(label int64 (n,), count): each free variable where x and y (int8 (n,)) differ gets
    the number (0..count-1) of its region, every other variable -1. ``indptr`` int64
    (n+1,), ``indices`` (nnz,): the QUBO couplings (CSR, symmetric); ``partner`` int64 (n,):
    each variable's swap row (0..rows-1), or -1; ``fixed`` int8 (n,): -1 where free."""
    n = x.size
    label = np.empty(n, dtype=np.int64)
    count = _regions(indptr, indices, partner, fixed, np.ascontiguousarray(x, np.int8),
                     np.ascontiguousarray(y, np.int8), np.empty(n, dtype=np.int64),
                     np.empty(max(1, rows), dtype=np.int64), label)
    return label, int(count)


def warm_up() -> None:
    """Compile (or load from numba's on-disk cache) the regions kernel on a tiny model."""
    indptr = np.array([0, 1, 2, 2], dtype=np.int64)
    indices = np.array([1, 0], dtype=np.int32).view(np.uint32)
    regions(indptr, indices, np.full(3, -1, dtype=np.int64), 0, np.full(3, -1, dtype=np.int8),
            np.zeros(3, dtype=np.int8), np.ones(3, dtype=np.int8))
