"""The Grow RPC's work, as it runs in a repair worker process.

Module level (the pool pickles it by reference), domain objects only, with the ``cancel``
and ``progress`` keywords every pool job gets; nothing here knows about gRPC.
"""

from __future__ import annotations

import time

from flipfix.repair.errors import InputError
from flipfix.repair.model.candidates import CandidateSet
from flipfix.repair.model.problem import Problem

__all__ = ["grow_job"]


def grow_job(problem: Problem, candidates: CandidateSet, settings, *, time_limit: float,
             constraints=(), heldout: dict | None = None, cancel=None, progress=None):
    """:func:`flipfix.repair.grow.neighbours.grow`, then (``heldout``: keyword arguments of
    :func:`flipfix.repair.grow.heldout.compare_heldout`) the held-out comparison; the hard
    ``constraints`` bound the search and hold in every scenario.

    ``time_limit`` covers both: the search gets half of it when a comparison is asked, the
    comparison what is left. The chain kernel is warmed up before the clock starts.
    Returns ``(GrowResult, HeldoutComparison | None, note)``; ``note`` says why a
    comparison asked for is missing.
    """
    from flipfix.repair.grow.heldout import compare_heldout
    from flipfix.repair.grow.neighbours import grow, warm_up

    warm_up()
    t0 = time.perf_counter()
    search = time_limit * (0.5 if heldout else 1.0)
    res = grow(problem, candidates, settings=settings, constraints=constraints,
               time_limit=search, cancel=cancel, progress=progress)
    if not heldout:
        return res, None, ""
    if not res.states:
        return res, None, "no comparison: no state was proposed"
    if cancel is not None and cancel.is_set():
        return res, None, "no comparison: cancelled"
    left = time_limit - (time.perf_counter() - t0)
    if left <= 0:
        return res, None, "no comparison: the time limit was spent by the search"
    try:
        cmp = compare_heldout(problem, candidates, res.candidate_set(), time_limit=left,
                              cancel=cancel, progress=progress, base=constraints, **heldout)
    except InputError as err:
        if err.field != "time_limit":
            raise
        return res, None, f"no comparison: {err.message}"
    return res, cmp, ""
