"""The greedy driver: chunks of candidates through the compiled kernels, within a budget.

Builds the kernels' bundles once per call (the problem's arrays are cached on the
compiled problem), picks the pure-QUBO path (:mod:`~flipfix.repair.solvers.greedy.qubo`)
or the general one (:mod:`~flipfix.repair.solvers.greedy.general`), and runs chunks of
candidates, split over threads, until done, the deadline or a cancel (a timer sets the
kernels' ``stop`` flag at the deadline: a call ends at its next step).
"""

from __future__ import annotations

import threading
import time
from contextlib import contextmanager
from dataclasses import dataclass

import numpy as np

from flipfix.repair.cancel import CancelToken, as_token
from flipfix.repair.kernels.batching import thread_pool
from flipfix.repair.kernels.bundles import late_arrays, objective_tol
from flipfix.repair.lowering.compiled import Compiled
from flipfix.repair.solvers.greedy.general import descend_general, general_work
from flipfix.repair.solvers.greedy.groups import Trees, trees_for
from flipfix.repair.solvers.greedy.layout import general_arrays, groups_pay
from flipfix.repair.solvers.greedy.pairs import pair_lists
from flipfix.repair.solvers.greedy.qubo import Params, descend_tree, tree_work
from flipfix.repair.solvers.greedy.start import consensus, start_refs

__all__ = ["GreedyOutput", "clamp_fixings", "greedy_repair", "warm_up"]


@dataclass
class GreedyOutput:
    """X: int8 (K, n) repaired assignments; steps: int64 (K,) moves taken;
    done: bool (K,) whether the candidate was processed within the budget;
    seconds: float64 (K,) time spent on each candidate (its chunk's share);
    partial: bool (K,) candidates the deadline or a cancel cut short in their descent,
    after the restore: their row of X is that feasible state (not a local minimum), or,
    cut inside the restore, the candidate with its fixings applied where that alone is
    feasible (within the radius); every other unfinished row is returned unchanged."""

    X: np.ndarray
    steps: np.ndarray
    done: np.ndarray
    seconds: np.ndarray
    partial: np.ndarray


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
                 pair_width: int, max_steps: int, stop: np.ndarray):
    """run(X, O, steps): one kernel call, in place on X int8 (rows, n) and steps int64
    (rows,), at most ``max_steps`` moves per candidate, with every bundle that is
    the same for all chunks built here, once. ``stop`` int64 (1,): the kernels end at
    their next step once it is set (candidates cut short report ``max_steps`` steps)."""
    n = compiled.n
    qubo = late_arrays(compiled).qubo
    refs = start_refs(anchor, qubo)
    tol = float(objective_tol(compiled))
    if not compiled.counts and not compiled.rows and radius >= n:
        params = Params(float(flip_price), tol, max_steps, radius, False, 1, stop)

        def run(Xc, Oc, st):
            descend_tree(Xc, Oc, qubo, refs, params, tree_work(n), st)
        return run
    arrays = general_arrays(compiled)
    lay = arrays.layout
    par = 2 if radius < n else 1
    use_groups = groups_pay(lay.groups * par, int((compiled.fixed < 0).sum()))
    base, size = trees_for(lay.members, par, use_groups)
    slots = int(2 * size.sum())
    params = Params(float(flip_price), tol, max_steps, radius, use_groups, par, stop)
    counts, rows = arrays.counts, arrays.rows
    sizes = (n, counts.cp_const.size, counts.term_pen.size, rows.lo.size, lay.most)

    def run(Xc, Oc, st):
        trees = Trees(np.empty(slots), np.empty(slots, dtype=np.int64), base, size)
        descend_general(Xc, Oc, qubo, counts, rows, lay.narrow, lay.trees, trees, refs,
                        arrays.bounds, pair_lists(pair_width), params, general_work(*sizes), st)
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
    with ``done`` False (except a descent cut short after its restore: its feasible state,
    ``partial`` True); past the deadline no descent starts (a timer stops the kernels).
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
    stop = np.zeros(1, dtype=np.int64)  # set at the deadline or on cancel: kernels end
    anchor = consensus(X0, compiled.fixed) if anchor is None else anchor
    run = _kernel_call(compiled, np.require(anchor, dtype=np.int8, requirements=["C", "W"]),
                       radius=radius,
                       flip_price=flip_price, pair_width=int(pair_width), max_steps=max_steps,
                       stop=stop)
    partial = np.zeros(K, dtype=bool)
    with _stopper(stop, deadline, cancel):
        _chunks(run, compiled, X, O, steps, done, seconds, partial, deadline=deadline,
                cancel=cancel, chunk=chunk, max_steps=max_steps, workers=workers,
                progress=progress, stop=stop, radius=radius)
    return GreedyOutput(X=X, steps=steps, done=done, seconds=seconds, partial=partial)


def _feasible(compiled: Compiled, X: np.ndarray) -> np.ndarray:
    """Whether each row of X int8 (r, n) keeps the fixings and the hard rows (within each
    row's tolerance, as the kernels count it): bool (r,). O(r x (n + nnz))."""
    arrays = late_arrays(compiled)
    fixed, rows = arrays.qubo.fixed, arrays.rows
    pinned = fixed >= 0
    ok = (X[:, pinned] == fixed[pinned]).all(axis=1)
    if rows.lo.size and rows.a_col.size:
        filled = np.diff(rows.a_ptr) > 0
        act = np.zeros((X.shape[0], rows.lo.size))
        act[:, filled] = np.add.reduceat(X[:, rows.a_col] * rows.a_val, rows.a_ptr[:-1][filled],
                                         axis=1)
        over = np.maximum(rows.lo - act, act - rows.hi)
        ok &= (over <= rows.rtol).all(axis=1)
    elif rows.lo.size:
        ok &= ((rows.lo <= rows.rtol) & (-rows.hi <= rows.rtol)).all()
    return ok


def clamp_fixings(compiled: Compiled, X: np.ndarray, O: np.ndarray, rows: np.ndarray,
                       radius: int, *, settle: bool = False) -> np.ndarray:
    """Rows ``rows`` of X (int8 (r, n), in place) with their fixed variables set to their
    values and, with ``settle``, where a hard row is then broken and its free members share
    one |coefficient| (a cardinality row), the fewest of them flipped toward its bounds, the
    cheapest single flips first (:func:`_settle_rows`, O(n + nnz) per row): kept where that
    makes them feasible within ``radius`` flips of their origins O (int8 (r, n)). A descent
    the deadline cut in its restore still yields a feasible answer, if not a locally optimal
    one. The other rows are left as they are. Returns bool (len(rows),): which were set."""
    fixed = late_arrays(compiled).qubo.fixed
    pinned = fixed >= 0
    C = X[rows]
    C[:, pinned] = fixed[pinned]
    ok = _feasible(compiled, C)
    if settle and not ok.all():
        for j in np.flatnonzero(~ok):
            C[j] = _settle_rows(compiled, C[j])
        ok = _feasible(compiled, C)
    ok &= (C != O[rows]).sum(axis=1) <= radius
    X[rows[ok]] = C[ok]
    return ok


def _settle_rows(compiled: Compiled, x: np.ndarray) -> np.ndarray:
    """x (int8 (n,)) with each broken hard row whose free members share one |coefficient|
    brought inside its bounds by the fewest flips of those members, the ones whose single
    flip costs least at x first (QUBO and count penalties, :func:`flip_changes`; rows in
    order, each from the state the ones before left). Other broken rows are left broken."""
    from flipfix.repair.kernels.metropolis import flip_changes

    late = late_arrays(compiled)
    fixed, R = late.qubo.fixed, late.rows
    x = x.copy()
    free = np.flatnonzero(fixed < 0).astype(np.int64)
    cost = np.full(x.size, np.inf)
    out = np.empty((1, free.size))
    flip_changes(late.qubo, late.counts, late.rows, free, x[None, :], out)
    cost[free] = out[0]
    for i in range(R.lo.size):
        cols, vals = R.a_col[R.a_ptr[i]:R.a_ptr[i + 1]], R.a_val[R.a_ptr[i]:R.a_ptr[i + 1]]
        act = float(vals @ x[cols])
        need = R.lo[i] - act if act < R.lo[i] - R.rtol[i] else (
            R.hi[i] - act if act > R.hi[i] + R.rtol[i] else 0.0)
        mine = fixed[cols] < 0
        if need == 0.0 or not mine.any():
            continue
        size = np.abs(vals[mine])
        if not np.allclose(size, size[0]):
            continue
        step = vals * (1 - 2 * x[cols].astype(np.float64))  # each member's flip, signed
        useful = mine & (np.sign(step) == np.sign(need))
        k = int(np.ceil(abs(need) / size[0] - 1e-9))
        pick = cols[useful][np.argsort(cost[cols[useful]], kind="stable")[:k]]
        if pick.size == k:
            x[pick] = 1 - x[pick]
    return x


@contextmanager
def _stopper(stop: np.ndarray, deadline: float | None, cancel):
    """Set ``stop[0]`` when ``deadline`` (a ``time.perf_counter()`` value) passes (a
    timer thread) or ``cancel`` (a CancelToken or Event) is set, while the block runs: a
    kernel call then ends at its next step instead of at its step cap."""

    def fire():
        stop[0] = 1

    timer = None
    if deadline is not None:
        timer = threading.Timer(max(0.0, deadline - time.perf_counter()), fire)
        timer.daemon = True
        timer.start()
    try:
        # a plain Event is followed by a waiting thread: only up to a deadline
        if isinstance(cancel, CancelToken) or (cancel is not None and deadline is not None):
            with as_token(cancel).subscribed(fire, timeout=None if deadline is None else
                                             max(0.0, deadline - time.perf_counter())):
                yield
        else:
            yield
    finally:
        if timer is not None:
            timer.cancel()


def _chunks(run, compiled, X, O, steps, done, seconds, partial, *, deadline, cancel, chunk,
            max_steps, workers, progress, stop, radius):
    """The chunk loop of :func:`greedy_repair` (in place on X, steps, done, seconds)."""
    K = X.shape[0]
    start = 0
    size = 1 if deadline is not None else chunk  # with a deadline: measure one, then fit
    per_cand = 0.0  # measured seconds per candidate
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
            # cut short by a cancel: those report max_steps
            finished = st < max_steps if stop[0] else np.ones(Xc.shape[0], dtype=bool)
        else:
            finished = _until(run, Xc, O[sl], st, workers, deadline, cancel, stop, max_steps)
        per_cand = (time.perf_counter() - t0) / Xc.shape[0]
        cut = np.flatnonzero(~finished)
        if cut.size:  # cut short in the descent (feasible): kept; others returned unchanged
            kept = _feasible(compiled, Xc[cut])
            if not kept.all():  # cut inside the restore: its state with the fixings applied
                kept[~kept] = clamp_fixings(compiled, Xc, O[sl], cut[~kept], radius)
            partial[sl][cut[kept]] = True
            keep = finished.copy()
            keep[cut[kept]] = True
        else:
            keep = finished
        X[sl] = np.where(keep[:, None], Xc, X[sl])
        steps[sl] = np.where(finished, st, 0)
        done[sl] = finished
        seconds[sl] = per_cand
        if progress is not None:
            progress(int(done.sum()), K)
        if not finished.all():
            break


def _until(run, X, O, steps, workers, deadline, cancel, stop, max_steps) -> np.ndarray:
    """:func:`_in_parts` under a deadline: one kernel call, which the ``stop`` flag (set by
    the driver's timer at the deadline, or by a cancel) ends at its next step; candidates
    it cut short or never reached report ``max_steps`` steps. No call starts past the
    deadline. Returns which rows finished (bool (rows,)); ``steps`` gets their steps."""
    rows = X.shape[0]
    if (deadline - time.perf_counter() <= 0.0 or stop[0]
            or (cancel is not None and cancel.is_set())):
        return np.zeros(rows, dtype=bool)
    _in_parts(run, X, O, steps, workers)
    return steps < max_steps


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
