"""The greedy driver: chunks of candidates through the compiled kernels, within a budget.

Builds the kernels' bundles once per call (the problem's arrays are cached on the
compiled problem), picks the pure-QUBO path (:mod:`~flipfix.repair.solvers.greedy.qubo`)
or the general one (:mod:`~flipfix.repair.solvers.greedy.general`), and runs chunks of
candidates, split over threads, until done, the deadline or a cancel (under a deadline,
in slices of capped steps that resume where they stopped).
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np

from flipfix.repair.kernels.batching import thread_pool
from flipfix.repair.kernels.bundles import late_arrays, objective_tol
from flipfix.repair.lowering.compiled import Compiled
from flipfix.repair.solvers.greedy.general import descend_general, general_work
from flipfix.repair.solvers.greedy.groups import Trees, trees_for
from flipfix.repair.solvers.greedy.layout import general_arrays, groups_pay
from flipfix.repair.solvers.greedy.pairs import pair_lists
from flipfix.repair.solvers.greedy.qubo import Params, descend_tree, tree_work
from flipfix.repair.solvers.greedy.start import consensus, start_refs

__all__ = ["GreedyOutput", "greedy_repair", "warm_up", "FIRST_SLICE"]


@dataclass
class GreedyOutput:
    """X: int8 (K, n) repaired assignments; steps: int64 (K,) moves taken;
    done: bool (K,) whether the candidate was processed within the budget;
    seconds: float64 (K,) time spent on each candidate (its chunk's share)."""

    X: np.ndarray
    steps: np.ndarray
    done: np.ndarray
    seconds: np.ndarray


def _in_parts(run, X: np.ndarray, O: np.ndarray, steps: np.ndarray, workers: int) -> None:
    """run(X, O, steps) on ``workers`` contiguous row blocks at once (in place). Each
    candidate's descent depends on that candidate alone, so the answers do not depend on
    the split."""
    parts = min(workers, X.shape[0])
    if parts <= 1:
        run(X, O, steps)
        return
    cuts = np.linspace(0, X.shape[0], parts + 1).astype(int)
    jobs = [thread_pool(parts).submit(run, X[a:b], O[a:b], steps[a:b])
            for a, b in zip(cuts[:-1], cuts[1:])]
    for j in jobs:
        j.result()


def _kernel_call(compiled: Compiled, anchor: np.ndarray, *, radius: int, flip_price: float,
                 pair_width: int, max_steps: int):
    """run(X, O, steps, cap=max_steps): one kernel call, in place on X int8 (rows, n) and
    steps int64 (rows,), at most ``cap`` moves per candidate, with every bundle that is
    the same for all chunks built here, once."""
    n = compiled.n
    qubo = late_arrays(compiled).qubo
    refs = start_refs(anchor, qubo)
    tol = float(objective_tol(compiled))
    if not compiled.counts and not compiled.rows and radius >= n:
        params = Params(float(flip_price), tol, max_steps, radius, False, 1)

        def run(Xc, Oc, st, cap=max_steps):
            P = params if cap == max_steps else params._replace(max_steps=int(cap))
            descend_tree(Xc, Oc, qubo, refs, P, tree_work(n), st)
        return run
    arrays = general_arrays(compiled)
    lay = arrays.layout
    par = 2 if radius < n else 1
    use_groups = groups_pay(lay.groups * par, int((compiled.fixed < 0).sum()))
    base, size = trees_for(lay.members, par, use_groups)
    slots = int(2 * size.sum())
    params = Params(float(flip_price), tol, max_steps, radius, use_groups, par)
    counts, rows = arrays.counts, arrays.rows
    sizes = (n, counts.cp_const.size, counts.term_pen.size, rows.lo.size, lay.most)

    def run(Xc, Oc, st, cap=max_steps):
        P = params if cap == max_steps else params._replace(max_steps=int(cap))
        trees = Trees(np.empty(slots), np.empty(slots, dtype=np.int64), base, size)
        descend_general(Xc, Oc, qubo, counts, rows, lay.narrow, lay.trees, trees, refs,
                        arrays.bounds, pair_lists(pair_width), P, general_work(*sizes), st)
    return run


def greedy_repair(compiled: Compiled, X0: np.ndarray, *, origin: np.ndarray | None = None,
                  max_flips: int | None = None, flip_price: float = 0.0,
                  deadline: float | None = None, cancel=None, chunk: int = 64,
                  pair_width: int | None = None, progress=None,
                  workers: int = 1, anchor: np.ndarray | None = None) -> GreedyOutput:
    """Repair every row of X0 (int8 (K, n), 0/1) greedily on the compiled late problem.

    ``origin`` (int8 (K, n), default X0) is what flips are counted from (radius, price).
    ``deadline`` is a ``time.perf_counter()`` value; candidates not reached by then
    (or after ``cancel`` is set), or whose descent it interrupts, are returned unchanged
    with ``done`` False; past the deadline no descent starts.
    ``progress(done, total)`` is called after each chunk.
    ``pair_width``: pair moves inside a row try the best ``pair_width`` "up" and "down"
    variables of that row; by default every pair of rows up to 32 variables long,
    the best 32 of each side in longer rows.
    ``workers``: threads that descend parts of each chunk at once; the answers do not
    depend on it.
    ``anchor`` (int8 (n,)): the reference state each candidate's start-up fields come
    from (default: :func:`consensus` of X0's rows); calls given the same anchor give each
    candidate the same answer however the candidates were split between them.
    """
    # C order and writeable (a read-only input is copied): the kernels are compiled for
    # one array type each, and a read-only array is another type to numba
    X0 = np.require(X0, dtype=np.int8, requirements=["C", "W"])
    K, n = X0.shape
    O = X0 if origin is None else np.require(origin, dtype=np.int8, requirements=["C", "W"])
    X = X0.copy()
    steps = np.zeros(K, dtype=np.int64)
    done = np.zeros(K, dtype=bool)
    seconds = np.zeros(K)
    radius = n if max_flips is None else int(max_flips)
    if pair_width is None:
        longest = int(np.diff(compiled.a_indptr).max(initial=1))
        pair_width = max(1, min(32, longest))
    max_steps = 100 * n + 1000
    anchor = consensus(X0, compiled.fixed) if anchor is None else anchor
    run = _kernel_call(compiled, np.require(anchor, dtype=np.int8, requirements=["C", "W"]),
                       radius=radius,
                       flip_price=flip_price, pair_width=int(pair_width), max_steps=max_steps)
    start = 0
    size = 1 if deadline is not None else chunk  # with a deadline: measure one, then fit
    per_cand = 0.0  # measured seconds per candidate
    pace = [0.0, 0, 0.0]  # with a deadline: seconds and steps of the kernel calls so far,
    # and the shortest call's seconds
    while start < K:
        if cancel is not None and cancel.is_set():
            break
        if deadline is not None:
            left = deadline - time.perf_counter()
            if left <= 0.0:
                break
            if per_cand > 0.0:  # a chunk should fit in what is left
                size = int(max(1, min(chunk, left / per_cand)))
        t0 = time.perf_counter()
        sl = slice(start, min(K, start + size))
        start = sl.stop
        Xc = X[sl].copy()
        st = np.zeros(Xc.shape[0], dtype=np.int64)
        if deadline is None:
            _in_parts(run, Xc, O[sl], st, workers)
            finished = np.ones(Xc.shape[0], dtype=bool)
        else:
            finished = _in_slices(run, Xc, O[sl], st, workers, deadline, max_steps, pace,
                                  cancel)
        per_cand = (time.perf_counter() - t0) / Xc.shape[0]
        X[sl] = np.where(finished[:, None], Xc, X[sl])  # unfinished: returned unchanged
        steps[sl] = np.where(finished, st, 0)
        done[sl] = finished
        seconds[sl] = per_cand
        if progress is not None:
            progress(int(done.sum()), K)
        if not finished.all():
            break
    return GreedyOutput(X=X, steps=steps, done=done, seconds=seconds)


#: steps per candidate of the first kernel call under a deadline, before any pace is known:
#: a step of the feasibility phase scans every free variable (5-50 ms at 100,000 variables
#: with a wide row, by the machine's load), so 16 steps once overran a 1 s budget by 0.5 s
FIRST_SLICE = 2


def _in_slices(run, X, O, steps, workers, deadline, max_steps, pace, cancel) -> np.ndarray:
    """:func:`_in_parts` under a deadline: each kernel call is capped at the steps that fit
    in half of what is left (at the pace measured so far, ``pace`` = [seconds, steps,
    shortest call's seconds], updated), and candidates that reach the cap continue from
    where they stopped (a descent depends only on its current state) until they finish or
    the deadline passes. No call starts when less is left than the shortest call took (a
    call's start-up, O(n) per candidate, is paid whatever its cap). Returns which rows
    finished (bool (rows,)); ``steps`` gets their steps."""
    rows = X.shape[0]
    live = np.arange(rows)
    per_part = -(-rows // max(1, min(workers, rows)))  # candidates one thread descends
    while live.size:
        left = deadline - time.perf_counter()
        if left <= pace[2] or (cancel is not None and cancel.is_set()):
            break
        if pace[1] > 0:
            fit = 0.5 * left * pace[1] / max(pace[0], 1e-9) / per_part
            cap = int(min(max_steps, max(FIRST_SLICE, fit)))
        else:
            cap = min(max_steps, FIRST_SLICE)
        sub = X[live]
        st = np.zeros(live.size, dtype=np.int64)
        t = time.perf_counter()
        _in_parts(lambda a, b, c: run(a, b, c, cap), sub, O[live], st, workers)
        took = time.perf_counter() - t
        pace[0] += took
        pace[2] = took if pace[2] == 0.0 else min(pace[2], took)
        pace[1] += int(st.sum()) // max(1, min(workers, live.size))
        X[live] = sub
        steps[live] += st
        live = live[st >= cap] if cap < max_steps else live[:0]
    finished = np.ones(rows, dtype=bool)
    finished[live] = False
    return finished


_WARM = False


def warm_up() -> None:
    """Compile (or load from the on-disk cache) every kernel on a tiny model, once per
    process, so that no request pays the compilation inside its time budget."""
    global _WARM
    if _WARM:
        return
    from flipfix.repair.lowering.compiled import compile_constraints
    from flipfix.repair.model.constraints import HammingPenalty, LinearConstraint
    from flipfix.repair.model.problem import Problem

    p = Problem.from_terms({0: -1.0, 1: 1.0, 2: 0.5}, [(0, 1, 2.0), (1, 2, -1.0)])
    X0 = np.zeros((1, 3), dtype=np.int8)
    greedy_repair(compile_constraints(p, []), X0)
    greedy_repair(compile_constraints(p, [
        HammingPenalty({0: 1, 1: 1, 2: 1}, shape="quadratic"),
        LinearConstraint({0: 1, 1: 1}, "==", 1)]), X0)
    p.energies(X0)
    p.local_fields(X0)
    _WARM = True
