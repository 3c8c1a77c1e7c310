"""Python's cyclic garbage collector in a long-running process of the service.

A full collection walks every object the collector tracks. A server or pool worker that has
imported the core, OR-Tools and gRPC and loaded the compiled kernels tracks 100,000-165,000
objects, and a full collection there paused the process for 50-126 ms (measured with
``gc.callbacks`` during ``python -m bench.deadlines``). Such a pause before a call's budget is
set takes it from the budget: a 1 s gRPC deadline then left 0.64 s of search instead of 0.78 s.
:func:`settle` collects once and moves every object alive at that point (modules, kernels,
the server's own structures) to the collector's permanent generation, so that later
collections walk only what calls create.
"""

from __future__ import annotations

import gc

__all__ = ["settle"]


def settle() -> None:
    """Collect what is garbage now, then freeze what is left out of later collections
    (``gc.freeze``). Call it once a process has loaded what it keeps for its lifetime."""
    gc.collect()
    gc.freeze()
