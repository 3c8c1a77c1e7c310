"""The audit RPCs' work, as it runs in a repair worker process.

Each function is module level (the pool pickles it by reference), takes domain
objects only, accepts the ``cancel`` (``threading.Event``) and ``progress``
keywords every pool job gets (:meth:`flipfix.service.worker.RepairPool.submit_call`), and
returns the core's plain result objects; the servicer converts them to replies.
Nothing here knows about gRPC.
"""

from __future__ import annotations

from typing import Sequence

from flipfix.repair.lowering.compiled import Compiled
from flipfix.repair.model.candidates import CandidateSet
from flipfix.repair.model.problem import Problem

__all__ = ["robustness", "stress", "pareto", "curation"]


def robustness(problem: Problem, candidates: CandidateSet, *, epsilon: float, spectrum: bool,
               cancel=None, progress=None):
    """:func:`flipfix.repair.audit.robustness.robustness_profile` (vectorised; not interruptible)."""
    from flipfix.repair.audit.robustness import robustness_profile

    if progress is not None:
        progress({"done": 0, "total": len(candidates.ids), "best_cost": None,
                  "phase": "robustness"})
    return robustness_profile(problem, candidates, epsilon=epsilon, spectrum=spectrum)


def stress(problem: Problem, candidates: CandidateSet, family, *, scenarios: int, seed: int,
           method: str, time_limit: float, epsilon: float, repair_options: dict,
           dask: str = "", cancel=None, progress=None):
    """:func:`flipfix.repair.audit.stress.stress_test`; ``time_limit`` covers the whole run.

    ``dask``: a Dask scheduler's address; the scenarios then run on its workers
    (:class:`flipfix.service.cluster.DaskRunner`, one client per worker process, kept).
    """
    from flipfix.repair.audit.stress import stress_test

    runner = _dask_runner(dask) if dask else None
    return stress_test(problem, candidates, family, scenarios=scenarios, seed=seed,
                       method=method, time_limit=time_limit, epsilon=epsilon, cancel=cancel,
                       progress=progress, repair_options=repair_options, runner=runner)


def _dask_runner(address: str):
    from flipfix.service.cluster import DaskRunner, client_at

    return DaskRunner(client_at(address))


def pareto(problem: Problem, candidates: CandidateSet, compiled: Compiled, *,
           methods: Sequence[str], time_limit: float, seed: int, include_unchanged: bool,
           cancel=None, progress=None):
    """:func:`flipfix.repair.audit.front.cost_flip_front`: one repair of the library per method,
    under the constraints the server compiled once (``compiled``)."""
    from flipfix.repair.audit.front import cost_flip_front

    return cost_flip_front(problem, candidates, compiled=compiled, methods=tuple(methods),
                           time_limit=time_limit, seed=seed, cancel=cancel, progress=progress,
                           include_unchanged=include_unchanged)


def curation(problem: Problem, candidates: CandidateSet, family, *, m: int, selection: str,
             stress_options: dict, cancel=None, progress=None):
    """The stress test, then :func:`flipfix.repair.audit.curation.curate` on its cost matrix.

    Returns ``(StressReport, CurationResult | None)``; None when no scenario ran.
    """
    from flipfix.repair.audit.curation import curate

    report = stress(problem, candidates, family, cancel=cancel, progress=progress,
                    **stress_options)
    if report.scenarios_done == 0:
        return report, None
    return report, curate(report.cost_matrix(), m, ids=report.ids, method=selection)
