"""Pareto front of repair cost and number of flips (both minimised).

A point p dominates q when ``p.cost <= q.cost`` and ``p.flips <= q.flips`` with
at least one strict. The front is the set of points no other point dominates,
listed by increasing flips (hence decreasing cost). Comparisons are exact (no
tolerance): a repair that is 1e-12 cheaper with more flips is a real trade-off.

Helpers answer a planner's two questions: "the cheapest repair within F flips"
and "the fewest flips within p % of the best cost". The front of a whole library
under late constraints is :func:`flipfix.repair.audit.front.cost_flip_front`.
"""

from __future__ import annotations

import math
from typing import Any, Iterable, Sequence

import numpy as np

from flipfix.repair.errors import InputError, nonnegative
from flipfix.repair.result import ParetoPoint

__all__ = ["pareto_front", "as_points", "cheapest_within", "fewest_flips_within",
           "result_points", "run_points"]


def _point(item: Any, pos: int) -> ParetoPoint | None:
    """One item -> ParetoPoint, or None when it is an infeasible repair."""
    f = f"points[{pos}]"
    if isinstance(item, ParetoPoint):
        return item
    if isinstance(item, dict):
        if not item.get("feasible", True):
            return None
        cost = item.get("cost", item.get("cost_after"))
        return _checked(cost, item.get("flips"), item.get("candidate_id", ""),
                        item.get("method", ""), f)
    if isinstance(item, (tuple, list)):
        if len(item) < 2 or len(item) > 4:
            raise InputError(f, "must be (cost, flips[, candidate_id[, method]])")
        rest = list(item[2:]) + [""] * (4 - len(item))
        return _checked(item[0], item[1], rest[0], rest[1], f)
    if hasattr(item, "flips"):
        if not getattr(item, "feasible", True):
            return None
        cost = getattr(item, "cost_after", None)
        if cost is None:
            cost = getattr(item, "cost", None)
        return _checked(cost, item.flips, getattr(item, "candidate_id", ""),
                        getattr(item, "method", ""), f)
    raise InputError(f, f"cannot read cost and flips from {type(item).__name__}")


def _checked(cost: Any, flips: Any, cid: Any, method: Any, f: str) -> ParetoPoint:
    if isinstance(cost, bool) or cost is None:
        raise InputError(f + ".cost", f"{cost!r} is not a number")
    try:
        c = float(cost)
    except (TypeError, ValueError):
        raise InputError(f + ".cost", f"{cost!r} is not a number") from None
    if math.isnan(c):
        raise InputError(f + ".cost", "is NaN")
    try:
        ok = not isinstance(flips, bool) and int(flips) == flips and int(flips) >= 0
    except (TypeError, ValueError):
        ok = False
    if not ok:
        raise InputError(f + ".flips", f"must be an integer >= 0, got {flips!r}")
    return ParetoPoint(cost=c, flips=int(flips), candidate_id=str(cid), method=str(method))


def as_points(points: Iterable[Any]) -> list[ParetoPoint]:
    """Normalise points; accepts ParetoPoint, AuditRow / Solution (``feasible`` ones
    only), dicts with cost (or cost_after) and flips, or tuples
    ``(cost, flips[, candidate_id[, method]])``."""
    out = []
    for pos, item in enumerate(points):
        p = _point(item, pos)
        if p is not None:
            out.append(p)
    return out


def pareto_front(points: Iterable[Any], *, keep_duplicates: bool = False) -> list[ParetoPoint]:
    """Non-dominated (cost, flips) points, by increasing flips.

    Points with identical (cost, flips) do not dominate each other; by default the
    first one in input order is kept, with ``keep_duplicates=True`` all are.
    Infeasible rows (``feasible`` False) are ignored. O(N log N).
    """
    pts = as_points(points)
    order = sorted(range(len(pts)), key=lambda k: (pts[k].flips, pts[k].cost, k))
    front: list[ParetoPoint] = []
    best = math.inf
    for k in order:
        p = pts[k]
        if p.cost < best:
            front.append(p)
            best = p.cost
        elif keep_duplicates and front and p.cost == front[-1].cost and p.flips == front[-1].flips:
            front.append(p)
    return front


def cheapest_within(points: Sequence[Any], max_flips: int) -> ParetoPoint | None:
    """The cheapest point with ``flips <= max_flips`` (ties: fewer flips), or None."""
    if isinstance(max_flips, bool) or int(max_flips) != max_flips or max_flips < 0:
        raise InputError("max_flips", f"must be an integer >= 0, got {max_flips!r}")
    ok = [p for p in as_points(points) if p.flips <= max_flips]
    return min(ok, key=lambda p: (p.cost, p.flips)) if ok else None


def fewest_flips_within(points: Sequence[Any], percent: float) -> ParetoPoint | None:
    """Fewest flips among points costing at most ``best + percent/100 * |best|``
    (ties: cheaper), or None when there are no points."""
    pct = nonnegative(percent, "percent")
    pts = as_points(points)
    if not pts:
        return None
    best = min(p.cost for p in pts)
    limit = best + pct / 100.0 * abs(best)
    ok = [p for p in pts if p.cost <= limit]
    return min(ok, key=lambda p: (p.flips, p.cost))


def result_points(result: Any, *, include_unchanged: bool = True) -> list[ParetoPoint]:
    """The (cost, flips) points of a :class:`flipfix.repair.result.RepairResult`: every feasible
    audit row, plus (``include_unchanged``) each candidate that was already feasible,
    at its cost before repair and 0 flips (method ``"unchanged"``)."""
    pts = as_points(result.audit)
    if include_unchanged:
        pts += [ParetoPoint(float(r.cost_before), 0, r.candidate_id, "unchanged")
                for r in result.audit if r.feasible_before]
    return pts


def run_points(X0: np.ndarray, ids: Sequence[str], cost0: np.ndarray, feasible0: np.ndarray,
               A: np.ndarray, origin: np.ndarray, cost: np.ndarray, feasible: np.ndarray,
               methods: Sequence[str]) -> list[ParetoPoint]:
    """Every feasible (cost, flips) point a repair run knows, for :func:`pareto_front`.

    First each library candidate that is feasible as it is (``X0`` int8 (K, n), its
    ``cost0`` float64 (K,), ``feasible0`` bool (K,)) at 0 flips, method ``"unchanged"``;
    then each feasible attempt (``A`` int8 (N, n) repaired from candidates ``origin``
    int64 (N,) by ``methods[i]``, ``cost`` float64 (N,), ``feasible`` bool (N,)). An
    attempt's flips are counted from the library candidate nearest to it (its origin on
    ties), the rule the reported best answer follows: the fewest changes that reach it
    from any plan the user keeps.
    """
    from flipfix.repair.audit.robustness import hamming_to_rows

    pts = [ParetoPoint(float(cost0[k]), 0, str(ids[k]), "unchanged")
           for k in np.flatnonzero(feasible0)]
    keep = np.flatnonzero(feasible)
    if keep.size:
        D = hamming_to_rows(A[keep], X0)  # (N', K)
        near = D.min(axis=1)
        own = D[np.arange(keep.size), origin[keep]]
        cand = np.where(own == near, origin[keep], np.argmin(D, axis=1))
        pts += [ParetoPoint(float(cost[i]), int(f), str(ids[k]), methods[i])
                for i, f, k in zip(keep, near, cand)]
    return pts

