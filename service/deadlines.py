"""A call's deadline: how much of the time left goes to the solver, and when to stop it.

Pure functions of the seconds left (no gRPC here): the server uses them on its calls'
contexts, and a pool worker that prepares a call itself (:mod:`flipfix.service.prepared`)
on the call's absolute deadline (``time.monotonic()`` is one clock for every process of
the machine).
"""

from __future__ import annotations

import time

__all__ = ["MARGIN_SHARE", "MARGIN_FIXED", "MARGIN_MAX", "MIN_BUDGET", "STOP_SHARE",
           "NO_DEADLINE", "time_left", "deadline_at", "deadline_margin", "deadline_budget",
           "budget_until"]

#: Held back from a call's deadline for what is not search: the hand-over to a worker,
#: the solver's stop and its result, the reply (see :func:`deadline_budget`).
MARGIN_SHARE = 0.2
MARGIN_FIXED = 0.02  # s
MARGIN_MAX = 3.0  # s
MIN_BUDGET = 0.01  # s
#: The server stops a job still running this share of the margin before the deadline.
STOP_SHARE = 0.5
#: gRPC reports a call without a deadline as one in the far future: beyond this many
#: seconds a call counts as having none.
NO_DEADLINE = 1e6


def time_left(context) -> float | None:
    """Seconds to the call's deadline; None when it has none."""
    remaining = context.time_remaining()
    return None if remaining is None or remaining > NO_DEADLINE else remaining


def deadline_margin(remaining: float) -> float:
    """Seconds held back from ``remaining`` seconds to the deadline:
    ``min(MARGIN_MAX, MARGIN_FIXED + MARGIN_SHARE * remaining)``."""
    return min(MARGIN_MAX, MARGIN_FIXED + MARGIN_SHARE * max(0.0, remaining))


def deadline_budget(requested: float, remaining: float | None) -> float:
    """Solver budget (s) for a call with ``remaining`` seconds to its deadline (None: none).

    ``min(requested, remaining - deadline_margin(remaining))``, at least ``MIN_BUDGET``: the
    margin is proportional (a fifth of what remains plus 20 ms, at most 3 s), so a 1 s
    deadline leaves 0.78 s of search, 0.3 s leaves 0.22 s, 5 s leaves 3.98 s and 60 s
    leaves 57 s.
    """
    if remaining is None:
        return requested
    return max(MIN_BUDGET, min(requested, remaining - deadline_margin(remaining)))


def deadline_at(context) -> float | None:
    """The call's deadline on the ``time.monotonic()`` clock; None when it has none."""
    left = time_left(context)
    return None if left is None else time.monotonic() + left


def budget_until(requested: float, deadline: float | None, *, max_time_limit: float) -> float:
    """:func:`deadline_budget` of ``min(requested, max_time_limit)`` for a call whose
    deadline (``time.monotonic()``; None: none) is ``deadline``, from now."""
    remaining = None if deadline is None else deadline - time.monotonic()
    return deadline_budget(min(requested, max_time_limit), remaining)
