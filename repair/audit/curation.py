"""Curation: keep M candidates that keep the stress-test repair cost lowest.

Given repair costs ``C`` float64 (S, K) (scenario x candidate, +inf where a
repair was infeasible), a kept subset T serves scenario s at ``min_{k in T} C[s, k]``.
The objective of T is, lexicographically, the number of scenarios T leaves
without a feasible repair, then the sum over the other scenarios of that cost.

Forward selection adds, one at a time, the candidate that lowers the
objective most (ties: lowest library index). Over scenarios every candidate
of the library can serve, the benefit ``sum_s (u_s - min_{k in T} C[s, k])``
(``u_s`` the worst cost in scenario s) is a monotone submodular function, so
forward selection keeps at least (1 - 1/e) of the best possible benefit (Nemhauser,
Wolsey and Fisher, 1978). ``method="exhaustive"`` searches every subset of
size M when there are at most ``max_subsets`` of them.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass, field
from typing import Any, Sequence

import numpy as np

from flipfix.repair.errors import InputError

__all__ = ["CurationResult", "curate", "subset_objective", "select_forward", "select_exhaustive"]


@dataclass
class CurationResult:
    """The kept candidates and how much worse they are than the full library.

    ``kept_ids`` in selection order (forward) or library order (exhaustive).
    ``uncovered`` counts scenarios the subset cannot repair feasibly while the
    full library can. ``mean_gap`` / ``worst_gap`` are the mean and largest
    per-scenario excess of the subset's best repair cost over the full
    library's (energy units, over scenarios both repair); ``relative_gap`` is
    the total excess over the total ``|cost|`` of the full library (a fraction).
    ``curve`` holds the total cost after each forward step (1..M).
    """

    method: str
    m: int
    kept_ids: list
    kept_indices: list
    scenarios: int
    total_cost: float
    full_total_cost: float
    uncovered: int
    mean_gap: float
    worst_gap: float
    relative_gap: float
    curve: list = field(default_factory=list)

    def to_dict(self) -> dict[str, Any]:
        def num(v):
            return float(v) if math.isfinite(v) else None

        return {"method": self.method, "m": self.m, "kept_ids": list(self.kept_ids),
                "kept_indices": [int(i) for i in self.kept_indices], "scenarios": self.scenarios,
                "total_cost": num(self.total_cost), "full_total_cost": num(self.full_total_cost),
                "uncovered": self.uncovered, "mean_gap": num(self.mean_gap),
                "worst_gap": num(self.worst_gap), "relative_gap": num(self.relative_gap),
                "curve": [num(v) for v in self.curve]}


def _matrix(cost: Any) -> np.ndarray:
    C = np.asarray(cost, dtype=np.float64)
    if C.ndim != 2 or C.shape[0] == 0 or C.shape[1] == 0:
        raise InputError("cost", f"must be a non-empty (scenarios, candidates) matrix, got shape {C.shape}")
    if np.isnan(C).any():
        raise InputError("cost", "contains NaN (use +inf for an infeasible repair)")
    return C


def subset_objective(C: np.ndarray, subset: Sequence[int]) -> tuple[int, float]:
    """(scenarios without a feasible repair, sum of best costs over the others) of ``subset``."""
    best = C[:, list(subset)].min(axis=1)
    fin = np.isfinite(best)
    return int((~fin).sum()), float(best[fin].sum())


def select_forward(C: np.ndarray, m: int) -> tuple[list, list]:
    """Forward selection of m columns of C (S, K): (indices, total cost after each step)."""
    S, K = C.shape
    chosen: list = []
    curve: list = []
    cur = np.full(S, np.inf)
    for _ in range(m):
        cand = np.minimum(cur[:, None], C)  # (S, K) best cost if column k is added
        fin = np.isfinite(cand)
        uncovered = (~fin).sum(axis=0)
        total = np.where(fin, cand, 0.0).sum(axis=0)
        uncovered[chosen] = S + 1  # never re-pick
        key = np.lexsort((np.arange(K), total, uncovered))  # lexicographic, ties: lowest index
        k = int(key[0])
        chosen.append(k)
        cur = cand[:, k]
        curve.append(float(total[k]))
    return chosen, curve


def select_exhaustive(C: np.ndarray, m: int, *, max_subsets: int = 200_000) -> list:
    """Best subset of m columns by :func:`subset_objective` (ties: lexicographically first)."""
    K = C.shape[1]
    if math.comb(K, m) > max_subsets:
        raise InputError("m", f"C({K}, {m}) = {math.comb(K, m)} subsets exceed max_subsets={max_subsets}")
    best, best_key = None, None
    for sub in itertools.combinations(range(K), m):
        key = subset_objective(C, sub)
        if best_key is None or key < best_key:
            best, best_key = list(sub), key
    return best


def curate(cost: Any, m: int, *, ids: Sequence[str] | None = None, method: str = "forward",
           max_subsets: int = 200_000) -> CurationResult:
    """Keep ``m`` candidates; ``cost`` is (S, K) with +inf for infeasible repairs,
    e.g. ``StressReport.cost_matrix()`` (then pass ``ids=report.ids``)."""
    C = _matrix(cost)
    S, K = C.shape
    if isinstance(m, bool) or not isinstance(m, (int, np.integer)) or not 1 <= m <= K:
        raise InputError("m", f"must be an integer in [1, {K}], got {m!r}")
    ids = [f"c{k}" for k in range(K)] if ids is None else [str(i) for i in ids]
    if len(ids) != K:
        raise InputError("ids", f"has {len(ids)} ids for {K} candidates")
    if method == "forward":
        kept, curve = select_forward(C, int(m))
    elif method == "exhaustive":
        kept = select_exhaustive(C, int(m), max_subsets=max_subsets)
        curve = []
    else:
        raise InputError("method", f"must be 'forward' or 'exhaustive', got {method!r}")
    sub = C[:, kept].min(axis=1)
    full = C.min(axis=1)
    both = np.isfinite(sub) & np.isfinite(full)
    gap = sub[both] - full[both]
    total_sub = float(sub[np.isfinite(sub)].sum())
    total_full = float(full[np.isfinite(full)].sum())
    denom = float(np.abs(full[both]).sum())
    return CurationResult(
        method=method, m=int(m), kept_ids=[ids[k] for k in kept], kept_indices=list(kept),
        scenarios=S, total_cost=total_sub, full_total_cost=total_full,
        uncovered=int((np.isfinite(full) & ~np.isfinite(sub)).sum()),
        mean_gap=float(gap.mean()) if gap.size else 0.0,
        worst_gap=float(gap.max()) if gap.size else 0.0,
        relative_gap=float(gap.sum() / denom) if denom > 0 else 0.0, curve=curve,
    )
