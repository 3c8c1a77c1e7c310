"""The greedy stage of a large repair on other processes or machines, in candidate chunks.

The first stage of the greedy and portfolio plans (:mod:`flipfix.repair.solvers.portfolio`)
repairs every candidate greedily, each on its own: a candidate's descent reads only its
own row, the late problem and the start anchor (the bitwise majority,
:func:`~flipfix.repair.solvers.greedy.start.consensus`, of the best-ranked ``ANCHOR_ROWS``
candidates: one anchor for the whole stage), so how
the candidates are split into calls cannot change any answer. With a
:class:`CandidateRunner` (e.g. a Dask cluster, :class:`flipfix.service.cluster.DaskRunner`)
and a library of at least ``runner.min_bits`` candidate bits (K x n), this module sends that
stage out in chunks of ``CHUNK`` candidates (best-ranked first) and returns what came back
in time; the rest of the plan (scoring the repaired rows, local search, CP-SAT, polish)
runs here on those results.

What stays the same as the local stage: the answers (tested against the local run for
the same seed), the stage's deadline and the caller's cancel (the runner stops the
running chunks: their cancel tokens are set). What differs: a chunk that the runner stops
(at the deadline, or on a cancel) returns nothing (locally, the candidates it finished
would count),
and the first candidate gets no longer than the stage's deadline (locally it may use
the whole search's time, so that a very short budget still has one answer).

The core never imports the runner's machinery (no Dask here): the runner only moves
:func:`repair_chunk` calls and their arguments.
"""

from __future__ import annotations

import math
import time
from typing import Any, Callable, Iterator, Mapping, Protocol, Sequence

import numpy as np

from flipfix.repair.lowering.compiled import Compiled
from flipfix.repair.solvers.greedy import greedy_repair

__all__ = ["CandidateRunner", "CHUNK", "ANCHOR_ROWS", "DEFAULT_MIN_BITS", "distributes",
           "repair_chunk", "greedy_on_runner"]

#: candidates per chunk: one :func:`repair_chunk` call (a runner may group several chunks
#: in one task). Large enough that a call's start-up (the kernels' bundles, O(n + nnz))
#: is paid once per 64 descents, small enough that a deadline loses little work.
CHUNK = 64
#: the start anchor is the bitwise majority of this many best-ranked candidates
ANCHOR_ROWS = 64
#: the default ``min_bits`` of a runner: libraries of fewer candidate bits (K x n) are
#: repaired here. Below it the library's broadcast (K x n bytes) and the scheduler's
#: per-task cost outweigh the work: one candidate's greedy repair takes 15-30 us at
#: n = 1,000 when the late constraints move few bits (bench/cluster.py), so a
#: 1,000 x 1,000 library is done locally in about the time its broadcast takes.
DEFAULT_MIN_BITS = 4_000_000


class CandidateRunner(Protocol):
    """Runs chunks of a repair's greedy stage somewhere else: the core's only view of a
    cluster (same calling convention as :class:`flipfix.repair.audit.stress.ScenarioRunner`).

    ``parallel``: how many chunks run at once. ``min_bits``: the smallest library (K x n
    candidate bits) worth sending out. :meth:`map` calls
    ``fn(*shared, item, time_limit=seconds_each, cancel=<token>, **options)`` once per item
    and yields the results in item order; once ``deadline`` (a ``time.perf_counter()``
    instant) passes or ``cancel`` is set, it stops the running calls (their cancel token
    is set) and yields None for every item not completed. It is a generator: the caller
    closes it when done, which stops whatever still runs.
    """

    parallel: int
    min_bits: int

    def map(self, fn: Callable, shared: tuple, items: Sequence, *, seconds_each: float,
            deadline: float, cancel, options: Mapping[str, Any]) -> Iterator[Any]: ...


def distributes(runner: CandidateRunner | None, K: int, n: int) -> bool:
    """Whether the greedy stage of a K x n library goes to ``runner``."""
    if runner is None:
        return False
    return K * n >= int(getattr(runner, "min_bits", DEFAULT_MIN_BITS)) and K > 1


def repair_chunk(compiled: Compiled, X0: np.ndarray, anchor: np.ndarray, rows: np.ndarray, *,
                 time_limit: float, cancel=None, max_flips: int | None = None,
                 flip_price: float = 0.0):
    """Greedy repair of candidates ``rows`` (int64 (r,)) of X0 (int8 (K, n)) from ``anchor``
    (int8 (n,)), for at most ``time_limit`` seconds from now (this process's clock).

    Returns (rows int64 (r,), X int8 (r, n), steps int64 (r,), done bool (r,),
    seconds float64 (r,)), as :func:`~flipfix.repair.solvers.greedy.greedy_repair` gives them.
    """
    rows = np.asarray(rows, dtype=np.int64)
    g = greedy_repair(compiled, X0[rows], anchor=anchor, max_flips=max_flips,
                      flip_price=flip_price, deadline=time.perf_counter() + max(0.0, time_limit),
                      cancel=cancel)
    return rows, g.X, g.steps, g.done, g.seconds


def greedy_on_runner(runner: CandidateRunner, compiled: Compiled, X0: np.ndarray,
                     order: np.ndarray, *, anchor: np.ndarray, deadline: float,
                     max_flips: int | None, flip_price: float, cancel, report):
    """The greedy stage on ``runner``: candidates X0[order] (int8 (K, n); ``order`` int64,
    best-ranked first) in chunks of ``CHUNK``, until ``deadline`` (``time.perf_counter()``)
    or ``cancel``. Same return as the local stage: ({candidate: repaired x int8 (n,)} of
    those repaired, seconds float64 (K,) spent on each, total steps)."""
    K = X0.shape[0]
    chunks = [np.asarray(order[i:i + CHUNK], dtype=np.int64) for i in range(0, len(order), CHUNK)]
    rows: dict = {}
    seconds = np.zeros(K)
    steps = 0
    left = deadline - time.perf_counter()
    if left <= 0 or not chunks:
        return rows, seconds, steps
    gen = runner.map(repair_chunk, (compiled, X0, anchor), chunks,
                     seconds_each=left if math.isfinite(left) else 3600.0, deadline=deadline,
                     cancel=cancel, options={"max_flips": max_flips, "flip_price": flip_price})
    try:
        for _ in chunks:
            got = next(gen)
            if got is None:  # the deadline or a cancel: nothing more comes back
                break
            ks, X, st, done, secs = got
            seconds[ks] = secs
            steps += int(st[done].sum())
            rows.update((int(k), X[j]) for j, k in enumerate(ks.tolist()) if done[j])
            report(done=len(rows), total=K, phase="greedy")
    finally:
        gen.close()
    return rows, seconds, steps
