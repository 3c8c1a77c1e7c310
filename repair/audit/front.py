"""The (cost, flips) front of a library under late constraints: one repair per method.

Kept apart from :mod:`flipfix.repair.audit.pareto` (pure front arithmetic, which
:func:`flipfix.repair.api.repair` itself uses) because it calls the repair.
"""

from __future__ import annotations

from typing import Any, Sequence

from flipfix.repair.api import repair
from flipfix.repair.audit.pareto import pareto_front, result_points
from flipfix.repair.errors import InputError
from flipfix.repair.lowering.compiled import Compiled, compile_constraints
from flipfix.repair.result import ParetoPoint

__all__ = ["cost_flip_front"]


def cost_flip_front(problem, candidates, constraints: Sequence[Any] = (), *,
                    methods: Sequence[str] = ("greedy", "cpsat"), time_limit: float = 5.0,
                    seed: int = 0, cancel=None, progress=None, include_unchanged: bool = True,
                    compiled: Compiled | None = None, **options) -> list[ParetoPoint]:
    """Repair the library once per method and return the front over every candidate and
    method. ``time_limit`` (seconds) is shared evenly by the methods; the constraints are
    compiled once (or given as ``compiled``); extra keyword options go to
    :func:`flipfix.repair.repair`."""
    if not methods:
        raise InputError("methods", "must name at least one method")
    if compiled is None:
        compiled = compile_constraints(problem, list(constraints))
    pts: list[ParetoPoint] = []
    for m, method in enumerate(methods):
        if cancel is not None and cancel.is_set():
            break
        res = repair(problem, candidates, (), method=method, time_limit=time_limit / len(methods),
                     seed=seed, cancel=cancel, progress=progress, compiled=compiled, **options)
        pts += result_points(res, include_unchanged=include_unchanged and m == 0)
    return pareto_front(pts)
