"""Does growing help? The original and grown libraries compared on held-out scenarios.

Scenarios are drawn from the ORIGINAL library (:func:`flipfix.repair.audit.stress.draw_scenarios`,
so they do not depend on the new states) and split by index: even scenarios are the
training half, odd ones the held-out half. The union library (original candidates, then the
new states) is repaired under every scenario once (:func:`flipfix.repair.audit.stress.stress_test`;
a candidate's repair cost does not depend on the other candidates). On the training half,
the original library is curated to ``min(m, K0)`` candidates and the union to ``m``
(:func:`flipfix.repair.audit.curation.curate`); on the held-out half each curated library
serves a scenario at the lowest repair cost of its kept candidates. Reported: mean and worst
of that cost over the held-out scenarios both libraries repair feasibly, scenarios each
leaves infeasible, and wins / ties / losses of the grown library (lower / equal within
round-off / higher cost).
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from typing import Any, Callable, Mapping, Sequence

import numpy as np

from flipfix.repair.audit.curation import curate
from flipfix.repair.audit.stress import (Scenario, ScenarioFamily, default_family, draw_scenarios,
                                         stress_test)
from flipfix.repair.errors import InputError
from flipfix.repair.model.candidates import CandidateSet
from flipfix.repair.model.problem import Problem

__all__ = ["HeldoutComparison", "compare_heldout", "union"]


@dataclass
class HeldoutComparison:
    """Outcome of :func:`compare_heldout` (costs in the problem's energy units, repair cost
    as the stress test reports it: energy plus late penalties of the repaired state)."""

    m: int
    m_original: int
    scenarios: int
    train: int
    heldout: int
    original_kept: list
    grown_kept: list
    original_mean: float
    original_worst: float
    grown_mean: float
    grown_worst: float
    original_infeasible: int
    grown_infeasible: int
    wins: int
    ties: int
    losses: int
    stopped: str
    method: str
    seed: int

    def to_dict(self) -> dict[str, Any]:
        return {k: (v if not isinstance(v, float) or math.isfinite(v) else None)
                for k, v in asdict(self).items()}


def union(original: CandidateSet, new: CandidateSet) -> CandidateSet:
    """The original candidates, then the new ones (ids must not repeat)."""
    clash = set(original.ids) & set(new.ids)
    if clash:
        raise InputError("new.ids", f"repeat stored ids: {sorted(clash)[:5]}")
    return CandidateSet(tuple(original.ids) + tuple(new.ids),
                        np.vstack([original.X, new.X]).astype(np.int8))


def _served(C: np.ndarray, kept: list) -> np.ndarray:
    return C[:, kept].min(axis=1)


def compare_heldout(problem: Problem, original: CandidateSet, new: CandidateSet, *, m: int,
                    family: ScenarioFamily | None = None, scenarios: int = 20, seed: int = 0,
                    method: str = "greedy", time_limit: float = 60.0, cancel=None,
                    progress: Callable[[dict], None] | None = None,
                    repair_options: Mapping[str, Any] | None = None,
                    base: Sequence = ()) -> HeldoutComparison:
    """Compare ``original`` curated to ``min(m, K0)`` with ``original + new`` curated to ``m``
    on held-out scenarios (module docstring). ``scenarios`` >= 2 in all (half held out).
    ``base``: constraints that hold in every scenario (e.g. a knapsack's capacity), added to
    each scenario's late constraints."""
    if isinstance(scenarios, bool) or not isinstance(scenarios, (int, np.integer)) \
            or scenarios < 2:
        raise InputError("scenarios", f"must be an integer >= 2, got {scenarios!r}")
    both = union(original, new)
    if isinstance(m, bool) or not isinstance(m, (int, np.integer)) or not 1 <= m <= len(both):
        raise InputError("m", f"must be an integer in [1, {len(both)}], got {m!r}")
    fam = default_family(problem) if family is None else family
    drawn = draw_scenarios(problem, original, fam, count=int(scenarios), seed=seed)
    if base:
        drawn = [Scenario(sc.index, sc.seed, list(base) + list(sc.constraints),
                          sc.description, sc.plan) for sc in drawn]
    report = stress_test(problem, both, drawn, method=method, time_limit=time_limit,
                         cancel=cancel, progress=progress, repair_options=repair_options)
    C = report.cost_matrix()  # (S_done, K0 + K1)
    S = C.shape[0]
    tr, ho = np.arange(0, S, 2), np.arange(1, S, 2)
    if tr.size == 0 or ho.size == 0:
        raise InputError("time_limit", f"only {S} scenario(s) ran: too short for a training "
                                       f"and a held-out half")
    K0 = len(original)
    m0 = min(int(m), K0)
    cur_o = curate(C[tr][:, :K0], m0, ids=both.ids[:K0])
    cur_g = curate(C[tr], int(m), ids=both.ids)
    o = _served(C[ho], cur_o.kept_indices)
    g = _served(C[ho], cur_g.kept_indices)
    fin = np.isfinite(o) & np.isfinite(g)
    scale = 1e-9 * (1.0 + np.abs(np.where(fin, o, 0.0)))
    diff = np.where(fin, g - o, 0.0)
    return HeldoutComparison(
        m=int(m), m_original=m0, scenarios=S, train=int(tr.size), heldout=int(ho.size),
        original_kept=cur_o.kept_ids, grown_kept=cur_g.kept_ids,
        original_mean=float(o[fin].mean()) if fin.any() else math.nan,
        original_worst=float(o[fin].max()) if fin.any() else math.nan,
        grown_mean=float(g[fin].mean()) if fin.any() else math.nan,
        grown_worst=float(g[fin].max()) if fin.any() else math.nan,
        original_infeasible=int((~np.isfinite(o)).sum()),
        grown_infeasible=int((~np.isfinite(g)).sum()),
        wins=int((fin & (diff < -scale)).sum() + (np.isfinite(g) & ~np.isfinite(o)).sum()),
        ties=int((fin & (np.abs(diff) <= scale)).sum()),
        losses=int((fin & (diff > scale)).sum() + (np.isfinite(o) & ~np.isfinite(g)).sum()),
        stopped=report.stopped, method=method, seed=int(seed))
