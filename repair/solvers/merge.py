"""Merging good answers region by region.

Two good answers of a model with local couplings usually differ in several separate
places: one got one part of the model right, the other another part. Where they differ,
the variables split into regions that no coupling joins (:mod:`flipfix.repair.kernels.regions`);
replacing a region of the better answer by the other's values changes the QUBO part of
its objective independently of every other region. :func:`merge` therefore takes from
each donor every region that lowers the answer's objective; measured on the Gset graph
G11 with a weak Hamming penalty (bench/repair_vs_rerun.py's event a_weak, 8 annealing
chains of 5,000 sweeps from the best repaired candidate, three repetitions): the best
chain -530.5, -530.1 and -530.3, merged -531.0, -531.0 and -532.0 (1-6 ms a merge).
On denser graphs (G14) the differences form one region and merging seldom gains.

Each donor costs one pass over the couplings (:func:`region_changes` gives every region's
exact change of the QUBO part and the flip price at once) and a few exact scores
(``score``, the caller's objective): the improving regions are taken together when
``score`` agrees, else one at a time (at most ``ONE_BY_ONE``), each kept only when it
lowers the score of the answer so far, so count penalties and hard rows, which tie
regions together, are respected.
"""

from __future__ import annotations

import time
from typing import Callable

import numpy as np

from flipfix.repair.kernels.bundles import coupling_rows, late_arrays, objective_tol
from flipfix.repair.kernels.regions import regions
from flipfix.repair.lowering.compiled import Compiled
from flipfix.repair.solvers.anneal import swap_rows

__all__ = ["merge", "region_changes"]

#: When the regions that lower the QUBO part, taken together, do not lower the exact score
#: (count penalties or rows tie them), at most this many are then tried one at a time.
ONE_BY_ONE = 16


def merge(compiled: Compiled, x: np.ndarray, donors: np.ndarray, *,
          score: Callable[[np.ndarray], np.ndarray], price: float = 0.0,
          origin: np.ndarray | None = None, deadline: float | None = None
          ) -> tuple[np.ndarray, float, int]:
    """Merge the regions of ``donors`` (int8 (R, n)) that improve it into ``x`` (int8 (n,)).

    ``score(X)`` (X int8 (B, n)) returns the exact objective of each row, float64 (B,),
    +inf where a row is not allowed (infeasible, too far from its candidate). Each region's
    change of the QUBO part plus ``price`` per flip away from ``origin`` (int8 (n,)) is
    computed for all regions of a donor at once (:func:`region_changes`); the regions that
    lower it are taken together when ``score`` agrees, else one at a time (at most
    ``ONE_BY_ONE``), each kept only when ``score`` falls. Donors are taken in the given
    order, each against the answer merged so far. Returns (the merged answer int8 (n,),
    its score, how many regions were taken); x itself (a copy) when nothing improves it.
    ``deadline`` (``time.perf_counter()`` value): no donor starts after it.
    """
    x = np.array(x, dtype=np.int8)
    donors = np.asarray(donors, dtype=np.int8).reshape(-1, x.size)
    q = late_arrays(compiled).qubo
    partner, rows = swap_rows(compiled)
    tol = objective_tol(compiled)
    best = float(score(x[None, :])[0])
    taken = 0
    for y in donors:
        if deadline is not None and time.perf_counter() >= deadline:
            break
        label, count = regions(q.indptr, q.indices, partner, rows, q.fixed, x, y)
        if count == 0:
            continue
        change = region_changes(compiled, x, y, label, count, price=price, origin=origin)
        better = np.flatnonzero(change < -tol)
        if better.size == 0:
            continue
        better = better[np.argsort(change[better], kind="stable")]
        both = x.copy()
        at = np.isin(label, better)
        both[at] = y[at]
        s = float(score(both[None, :])[0])
        if s < best:
            x, best, taken = both, s, taken + better.size
            continue
        for r in better[:ONE_BY_ONE]:  # count penalties or rows tie the regions
            trial = x.copy()
            at = label == r
            trial[at] = y[at]
            s = float(score(trial[None, :])[0])
            if s < best:
                x, best, taken = trial, s, taken + 1
    return x, best, taken


def region_changes(compiled: Compiled, x: np.ndarray, y: np.ndarray, label: np.ndarray,
                   count: int, *, price: float = 0.0,
                   origin: np.ndarray | None = None) -> np.ndarray:
    """float64 (count,): for each region r (``label`` int64 (n,) from
    :func:`flipfix.repair.kernels.regions.regions`), the change of the QUBO part of the
    objective, plus ``price`` per flip away from ``origin`` (int8 (n,)), when x (int8
    (n,)) takes y's values on r alone. Exact for that part: with ``d = y - x`` and the
    local field ``f = h + J x``, the change is ``sum_r d_i f_i`` plus the couplings inside
    r, ``sum_{i<j in r} J_ij d_i d_j`` (no coupling joins two regions)."""
    q = late_arrays(compiled).qubo
    owner = coupling_rows(compiled)
    xf = x.astype(np.float64)
    d = y.astype(np.float64) - xf
    field = q.h + np.bincount(owner, weights=q.data * xf[q.indices], minlength=x.size)
    inside = label >= 0
    change = np.bincount(label[inside], weights=(d * field)[inside], minlength=count)
    lo, hi = label[owner], label[q.indices]
    same = (lo >= 0) & (lo == hi)  # each coupling twice (J symmetric): half of each
    change += np.bincount(lo[same], weights=0.5 * q.data[same] * d[owner[same]]
                          * d[q.indices[same]], minlength=count)
    if price and origin is not None:
        away = (y != origin).astype(np.float64) - (x != origin)
        change += price * np.bincount(label[inside], weights=away[inside], minlength=count)
    return change
