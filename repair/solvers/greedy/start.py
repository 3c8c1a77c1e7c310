"""Start-up: a candidate's fields from the nearest of three reference states.

Candidates of one library tend to agree on most bits, so every call builds, once, the
fields of their bitwise majority (the anchor, :func:`consensus`) and of all-ones; a
candidate's fields ``h + J x`` are then a reference's fields plus a scatter over the bits
where it differs from that reference: the anchor, all-zeros (fields h) or all-ones,
whichever differs in fewest bits (:func:`route`).
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

from flipfix.repair.solvers.greedy.jit import entry, kernel

__all__ = ["StartRefs", "start_refs", "consensus", "route", "init_field"]


class StartRefs(NamedTuple):
    """What every candidate of one call starts from, n variables, nnz couplings.

    anchor int8 (n,) the bitwise majority with the fixings; afield float64 (n,) its fields
    h + J anchor; full float64 (n,) h + J 1; ndata float64 (nnz,) -data (no multiply by a
    flip's sign in the scatter); zeros, ones int8 (n,).
    """

    anchor: np.ndarray
    afield: np.ndarray
    full: np.ndarray
    ndata: np.ndarray
    zeros: np.ndarray
    ones: np.ndarray


@entry
def _reference_fields(anchor, Q, full, afield):
    """full = h + J 1 and afield = h + J anchor, float64 (n,), in place."""
    h, indptr, indices, data = Q.h, Q.indptr, Q.indices, Q.data
    for i in range(h.size):
        f = h[i]
        a = h[i]
        for p in range(indptr[i], indptr[i + 1]):
            f += data[p]
            a += data[p] * anchor[indices[p]]
        full[i] = f
        afield[i] = a


def start_refs(anchor: np.ndarray, qubo) -> StartRefs:
    """The references of ``anchor`` int8 (n,) on ``qubo``
    (:class:`~flipfix.repair.kernels.bundles.Qubo`), built once per call."""
    n = qubo.h.size
    full, afield = np.empty(n), np.empty(n)
    _reference_fields(anchor, qubo, full, afield)
    return StartRefs(anchor, afield, full, -qubo.data, np.zeros(n, dtype=np.int8),
                     np.ones(n, dtype=np.int8))


@entry
def _column_ones(X, out):
    """out int32 (n,) += the number of ones in each column of X (int8 (K, n), 0/1). A
    compiled loop: numpy's ``X.sum(axis=0)`` widens every int8 on the way and took ~0.4 us
    a row."""
    K, n = X.shape
    for k in range(K):
        for i in range(n):
            out[i] += X[k, i]


def consensus(X: np.ndarray, fixed: np.ndarray) -> np.ndarray:
    """Bitwise majority of the rows of X (int8 (K, n), C order) with the fixings applied:
    int8 (n,).

    The kernels start each candidate's fields from this anchor's when it is the nearer
    route (candidates of one library tend to agree on most bits)."""
    ones = np.zeros(X.shape[1], dtype=np.int32)
    _column_ones(X, ones)
    a = (2 * ones.astype(np.int64) >= X.shape[0]).astype(np.int8)
    pinned = fixed >= 0
    a[pinned] = fixed[pinned]
    return a


@kernel
def route(x, anchor):
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


@kernel
def init_field(way, x, refs, Q, field, found):
    """field float64 (n,) = h + J x (Q :class:`~flipfix.repair.kernels.bundles.Qubo`, J
    symmetric) by ``way`` (:func:`route`): the reference state and its fields from
    ``refs`` (:class:`StartRefs`), then a scatter of the bits where x differs from it.
    Returns how many differ; their positions are left in ``found[:count]`` (int64)."""
    h, indptr, indices, data = Q.h, Q.indptr, Q.indices, Q.data
    ndata = refs.ndata
    if way == 0:
        ref, base = refs.anchor, refs.afield
    elif way == 1:
        ref, base = refs.zeros, h
    else:
        ref, base = refs.ones, refs.full
    for i in range(x.size):
        field[i] = base[i]
    # the positions where x and ref differ, ascending, branch-free: a differing bit is a
    # coin toss for the branch predictor, and a mispredicted branch per bit cost more
    # than the store
    count = 0
    for j in range(x.size):
        found[count] = j
        count += x[j] != ref[j]
    for q in range(count):
        j = found[q]
        d = data if x[j] == 1 else ndata
        for p in range(indptr[j], indptr[j + 1]):
            field[indices[p]] += d[p]
    return count
