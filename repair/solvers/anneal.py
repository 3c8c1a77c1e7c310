"""Annealing from start states (classical reverse annealing) on the complete late objective.

Each start (a repaired candidate, a library candidate, a best answer so far) is annealed
independently: Metropolis single-flip sweeps (:mod:`flipfix.repair.kernels.metropolis`)
that start cold at the state, heat to a turning temperature and cool back geometrically to
a quench; the best state seen at a sweep's end (least violation, then least objective) is
then handed to greedy repair (:func:`flipfix.repair.solvers.greedy.greedy_repair`), which
restores feasibility and reaches a local minimum.

Temperatures (the depth knob)
-----------------------------
Every temperature is a multiple of the model's own unit ``scale`` (default
:func:`flip_scale` of the starts: the median |change| of a single flip of the late
objective at the starts), so multiplying the model (and its soft penalties and flip price)
by 10 multiplies every temperature by 10 and leaves every Metropolis decision, hence the
answers, unchanged. With ``depth`` in (0, 1]::

    T_quench = T_QUENCH * scale                                   (0.03 scale)
    T_turn   = T_quench * (T_FULL / T_QUENCH) ** depth            (0.03 .. 3 scale)

* The quench, 0.03 scale, accepts a median-cost uphill move with probability e^-33 and
  one of a tenth of it with e^-3.3 (4 %): Metropolis is a descent there, which greedy then
  finishes exactly. Measured (bench/anneal_depths.py, equal sweeps): 0.01 spent the last
  third of a long anneal frozen on the Gset graphs (integer changes of 2 and 4) and found
  0.3-0.4 % less cut on G67; 0.1 left the random sparse models with continuous-looking
  changes too warm for the greedy pass to recover (0.15 % worse); 0.03 was the best or
  within noise of it on all three.
* The turning temperature is geometric in depth because what matters is its ratio to the
  flip costs: depth -> 0 is the quench itself (no move away from the start), depth 0.3
  turns at 0.12 scale (a few cheap flips: the start's basin), depth 0.5 at 0.3, depth 0.7
  at 0.75 (a median uphill move accepted one time in four: neighbouring basins), depth
  1.0 at 3 scale, where a median uphill move is accepted with probability e^-1/3 = 0.72
  and the state is close to uniformly random, so depth 1.0 also starts from uniformly
  random free bits (within ``max_flips`` of the origin it starts from the given state
  instead and the hot sweeps randomise it) and skips the heating: a full anneal, for late
  optima far from every start.
* Schedule over ``sweeps`` sweeps: the first ``round(HEAT * sweeps)`` heat geometrically
  from T_quench to T_turn, the rest cool geometrically from T_turn to T_quench. (Measured
  on G14 at equal sweeps: heating over 0 or 10 % of the sweeps gave the same costs within
  noise, 30 % slightly worse; 10 % is kept, the gentler of the two.)

Hard rows: equality rows with equal coefficients (one-hot, "exactly k of") are kept by
swap moves; in rows whose members' |coefficients| differ (knapsack capacities), a flip that
would break the row while it holds moves together with a member that moves the row back
(measured on the QKP instance jeu_100_25_1 with its capacity, a cardinality window, 1 % of
the items forced and a Hamming penalty, 16 chains from the best greedy-repaired candidate:
1,000 sweeps at depth 0.5 ended at a mean of -17,468 with single flips only and -17,703
with the pairs; 10,000 sweeps -17,505 and -17,811; every one of 6 portfolio runs at 1 s
now ends at -17,820.55, against -17,663 to -17,821 before). Rows whose members share one
|coefficient| (cardinality rows) get no pairs: an item out makes room for any other, and
the extra proposals cost sweeps (G67, rand5000 and rand20000 at 1 s were 0.005-0.05 %
worse with them). Every row but the swap rows is an exact penalty whose weight starts at
``scale / median |coefficient|`` and doubles after each sweep that ends with the row
violated, so it rises until the state is feasible. Fixed variables never move;
``max_flips`` is a hard radius from ``origin``.

A part of the model: ``within`` (variable indices) limits the sweeps to those variables;
the rest keep the start's values (a swap or pair partner may still move with a member of
its row). A sweep then costs about ``len(within) / free`` of a full one, so a part gets
that many times more sweeps in the same time. :func:`disagreement` picks such a part: where
two good answers differ, and the variables coupled to those (their QUBO neighbours).

Threads and stopping: the starts are split into ``workers`` contiguous blocks, each
annealed by one thread (the kernels release the GIL). A thread runs short slices of a few
milliseconds and checks ``deadline`` and ``cancel`` between them; on a stop, the start in
progress returns its best state so far and the starts not reached return unchanged (their
``sweeps`` tell). Each start draws from its own random stream (the seed and its row index),
so the answers depend on the seed alone, not on ``workers`` nor on the slicing.
"""

from __future__ import annotations

import math
import threading
import time
from dataclasses import dataclass

import numpy as np

from flipfix.repair.errors import InputError
from flipfix.repair.kernels.batching import thread_pool
from flipfix.repair.kernels.bundles import coupling_rows, late_arrays, objective_tol
from flipfix.repair.kernels.metropolis import Moves, Plan, advance, flip_changes, new_chain
from flipfix.repair.lowering.compiled import Compiled
from flipfix.repair.solvers.greedy import greedy_repair

__all__ = ["AnnealOutput", "anneal", "disagreement", "flip_scale", "swap_rows", "sweep_pace",
           "temperatures", "warm_up", "T_QUENCH", "T_FULL", "HEAT"]

#: Quench temperature, in units of scale (see the module docstring).
T_QUENCH = 0.03
#: Turning temperature at depth 1.0, in units of scale.
T_FULL = 3.0
#: Share of the sweeps spent heating from the quench to the turning temperature.
HEAT = 0.1
#: Target length of one slice between two checks of the deadline and cancel event.
SLICE_SECONDS = 0.003
#: Time a paced anneal keeps before its ``deadline`` for the greedy pass that ends it: this
#: much, plus ``PASS_SWEEPS`` sweeps' time per start of a thread. Measured (one start per
#: thread, two threads, from states quenched after 300 sweeps): the pass took 0.6-2.1 ms,
#: about 1 ms plus two sweeps' time, on G11, rand1000, rand5000, G67 and rand20000 (and
#: 0.7-1.1 ms on a 4,000-variable model with real-valued couplings, where 1 ms plus five
#: sweeps was sometimes short by 0.1 ms). Without this reserve a last round paced to the
#: deadline left no time for the pass: rand5000 (b) at 0.1 s reported states that a greedy
#: descent improved by 0.04 % (17-24 flips).
PASS_SECONDS = 0.002
PASS_SWEEPS = 4
#: flip_scale looks at most at this many states, and about this many flips in all.
SCALE_ROWS = 16
SCALE_FLIPS = 200_000


@dataclass
class AnnealOutput:
    """X int8 (R, n): final states, after the quench and the greedy pass; sweeps int64
    (R,): sweeps actually run per start (fewer than asked when stopped); seconds: the
    call's wall time, greedy pass included; sweep_seconds: its part before the greedy pass
    (the argument checks and the Metropolis sweeps)."""

    X: np.ndarray
    sweeps: np.ndarray
    seconds: float
    sweep_seconds: float = 0.0


def temperatures(depth: float, scale: float) -> tuple[float, float]:
    """(T_quench, T_turn) for ``depth`` in (0, 1] and the model's ``scale`` (see the
    module docstring)."""
    tq = T_QUENCH * scale
    return tq, tq * (T_FULL / T_QUENCH) ** depth


# ---------------------------------------------------------------- per problem
def _moves(compiled: Compiled) -> Moves:
    """The swap rows, the row weight units and the free variables (cached on compiled)."""
    cached = getattr(compiled, "_anneal_moves", None)
    if cached is not None:
        return cached
    rows = late_arrays(compiled).rows
    n, m = compiled.n, rows.lo.size
    partner = np.full(n, -1, dtype=np.int64)
    wunit = np.ones(m)
    pairs = np.zeros(m, dtype=np.bool_)
    for r in range(m):
        a, b = rows.a_ptr[r], rows.a_ptr[r + 1]
        vals = rows.a_val[a:b]
        mags = np.abs(vals[vals != 0.0])
        if mags.size:
            wunit[r] = 1.0 / float(np.median(mags))
            pairs[r] = mags.size >= 2 and bool((mags != mags[0]).any())
        swap = (b - a >= 2 and rows.lo[r] == rows.hi[r] and np.isfinite(rows.lo[r])
                and vals[0] != 0.0 and np.all(vals == vals[0]))
        if swap:
            cols = rows.a_col[a:b]
            cols = cols[partner[cols] < 0]
            partner[cols] = r
    free = np.flatnonzero(compiled.fixed < 0).astype(np.int64)
    cached = Moves(free, partner, wunit, pairs)
    compiled._anneal_moves = cached
    return cached


def swap_rows(compiled: Compiled) -> tuple[np.ndarray, int]:
    """(partner int64 (n,), m): each variable's swap row (an equality row with equal
    coefficients, whose members the sweeps move only in swaps), -1 if none, and the number
    of hard rows m (swap rows are numbered among them)."""
    return _moves(compiled).partner, int(late_arrays(compiled).rows.lo.size)


def flip_scale(compiled: Compiled, X: np.ndarray) -> float:
    """The model's temperature unit: the median |change of the late objective| (QUBO plus
    count penalties) of a single flip of a free variable, over the states X (int8 (R, n);
    at most ``SCALE_ROWS`` of them, evenly spaced, and about ``SCALE_FLIPS`` flips). > 0:
    when every such change is zero, the median of the non-zero ones; when all are zero, the
    largest |coefficient| of the model; 1.0 for a model without any."""
    X = _states(compiled, X, "X")
    late = late_arrays(compiled)
    free = _moves(compiled).free
    if X.shape[0] and free.size:
        rows = max(1, min(SCALE_ROWS, X.shape[0], SCALE_FLIPS // free.size))
        pick = np.unique(np.linspace(0, X.shape[0] - 1, rows).round().astype(np.int64))
        out = np.empty((pick.size, free.size))
        flip_changes(late.qubo, late.counts, late.rows, free, np.ascontiguousarray(X[pick]),
                     out)
        mags = np.abs(out).ravel()
        med = float(np.median(mags))
        if med > 0.0:
            return med
        if (mags > 0.0).any():
            return float(np.median(mags[mags > 0.0]))
    steps = [np.abs(np.diff(c.table)).max(initial=0.0) for c in compiled.counts]
    big = max(np.abs(compiled.h).max(initial=0.0), np.abs(compiled.data).max(initial=0.0),
              max(steps, default=0.0))
    return float(big) if big > 0.0 else 1.0


def disagreement(compiled: Compiled, X: np.ndarray, *, ring: int = 1) -> np.ndarray:
    """int64 (ascending): the free variables on which the rows of X (int8 (R, n), R >= 1)
    do not all agree, grown ``ring`` times by their QUBO neighbours (the variables coupled
    to one of them). Empty when the rows agree everywhere."""
    X = _states(compiled, X, "X")
    if int(ring) != ring or ring < 0:
        raise InputError("ring", f"must be an integer >= 0, got {ring!r}")
    free = compiled.fixed < 0
    mask = ((X != X[:1]).any(axis=0) if X.shape[0] else np.zeros(compiled.n, bool)) & free
    q = late_arrays(compiled).qubo
    owner = coupling_rows(compiled)
    for _ in range(int(ring)):
        grown = mask.copy()
        grown[q.indices[mask[owner]]] = True
        mask = grown & free
    return np.flatnonzero(mask).astype(np.int64)


# ------------------------------------------------------------------ checks
def _states(compiled: Compiled, X, name: str) -> np.ndarray:
    X = np.asarray(X)
    if X.ndim != 2 or X.shape[1] != compiled.n:
        raise InputError(name, f"must have shape (R, {compiled.n}), got {X.shape}")
    if X.size and (X.min() < 0 or X.max() > 1):
        raise InputError(name, "must hold 0/1 values")
    return np.ascontiguousarray(X, dtype=np.int8)


def _check(compiled, starts, origin, depth, sweeps, flip_price, max_flips, scale, workers):
    starts = _states(compiled, starts, "starts")
    if origin is None:
        origin = starts.copy()
    else:
        origin = np.asarray(origin)
        if origin.ndim == 1:
            origin = np.broadcast_to(origin, (starts.shape[0], origin.size))
        origin = _states(compiled, origin, "origin")
        if origin.shape != starts.shape:
            raise InputError("origin", f"must have the shape of starts {starts.shape}")
    if not (isinstance(depth, (int, float, np.floating)) and 0.0 < float(depth) <= 1.0):
        raise InputError("depth", f"must be in (0, 1], got {depth!r}")
    if int(sweeps) != sweeps or sweeps < 0:
        raise InputError("sweeps", f"must be an integer >= 0, got {sweeps!r}")
    if not (math.isfinite(flip_price) and flip_price >= 0.0):
        raise InputError("flip_price", f"must be a finite number >= 0, got {flip_price!r}")
    if max_flips is not None and (int(max_flips) != max_flips or max_flips < 0):
        raise InputError("max_flips", f"must be an integer >= 0, got {max_flips!r}")
    if scale is not None and not (math.isfinite(scale) and scale > 0.0):
        raise InputError("scale", f"must be a finite number > 0, got {scale!r}")
    if int(workers) != workers or workers < 1:
        raise InputError("workers", f"must be an integer >= 1, got {workers!r}")
    return starts, origin


def _block(late, moves, plan, X, O, a, b, tol, sweeps_out, stop, until=None, deadline=None):
    """Anneal starts a..b-1 of X in place, slice by slice, until done or ``stop()``. With
    ``until`` (a timed plan), each slice paces the start in progress so that it reaches its
    quench when its share of the time left (an equal share per start left) ends; and
    before ``deadline``, by the time the greedy pass will take (``PASS_SECONDS``,
    ``PASS_SWEEPS``)."""
    q, c, r = late
    ch = new_chain(X.shape[1], c.cp_const.size, c.term_pen.size, r.lo.size)
    pos = np.array([a, 0, 0], dtype=np.int64)
    per_sweep = max(1, moves.free.size)
    budget = 2 * per_sweep  # the first slice: a start and a sweep or so
    while pos[0] < b:
        if stop():
            break
        t0 = time.perf_counter()
        used = advance(q, c, r, moves, plan, X, O, ch, pos, b, budget, tol, sweeps_out)
        now = time.perf_counter()
        dt = now - t0
        rate = used / dt if dt > 0 else 4.0 * budget / SLICE_SECONDS
        budget = int(min(4 * budget, max(1, rate * SLICE_SECONDS)))
        if until is not None and pos[2] == 1 and pos[0] < b:
            sweep = per_sweep / max(rate, 1e-9)  # seconds
            end = until if deadline is None else min(
                until, deadline - PASS_SECONDS - PASS_SWEEPS * (b - a) * sweep)
            sweeps_left = max(0.0, end - now) / sweep / (b - pos[0])
            ch.sched[1] = max(0.0, 1.0 - ch.sched[0]) / max(1.0, sweeps_left)
    if pos[0] < b and pos[2] == 1:  # stopped inside a start: its best state so far
        X[pos[0]] = ch.best
        sweeps_out[pos[0]] = pos[1]


def anneal(compiled: Compiled, starts: np.ndarray, *, depth: float, sweeps: int, seed: int,
           origin: np.ndarray | None = None, flip_price: float = 0.0,
           max_flips: int | None = None, scale: float | None = None, workers: int = 1,
           deadline: float | None = None, until: float | None = None,
           cancel: threading.Event | None = None,
           within: np.ndarray | None = None) -> AnnealOutput:
    """Anneal every row of ``starts`` (int8 (R, n), 0/1), then repair it greedily.

    ``depth`` in (0, 1]: how far from the start the anneal may wander (see the module
    docstring for the temperatures); ``sweeps``: Metropolis sweeps per start; ``seed``:
    the same seed gives the same answers whatever ``workers`` is. ``origin`` (int8 (R, n)
    or (n,), default the starts): what ``flip_price`` per flip and the ``max_flips``
    radius count from. ``scale``: the temperature unit (default :func:`flip_scale` of the
    starts; pass it when calling many times on one problem). ``deadline``
    (``time.perf_counter()`` value) and ``cancel`` stop the sweeps promptly; the greedy
    pass honours both as well (a state it does not reach is returned as the anneal left
    it: the best it saw, never more violated nor costlier than its start).

    ``until`` (``time.perf_counter()`` value): pace the schedule by the clock instead: each
    start follows the same temperatures, heating then cooling, but spread so that it
    reaches the quench when its share of the time to ``until`` ends (the starts of one
    thread share it equally), and early enough before ``deadline`` for the greedy pass
    (``PASS_SECONDS``); ``sweeps`` is then only the first guess of the pace. A chain
    sized in sweeps that the deadline cuts short returns a state from the middle of its
    schedule; a paced chain cools in time even when the machine slows down. The answers
    then depend on the timing, not on the seed alone.

    ``within`` (int, (w,), indices of variables): sweep only these (the free ones among
    them); every other variable keeps its start's value through the sweeps (a swap or pair
    partner excepted), and the greedy pass afterwards may move any free variable.
    """
    t0 = time.perf_counter()
    starts, O = _check(compiled, starts, origin, depth, sweeps, flip_price, max_flips, scale,
                       workers)
    if within is not None:
        within = np.asarray(within)
        if within.ndim != 1 or (within.size and (not np.issubdtype(within.dtype, np.integer)
                                                 or within.min() < 0
                                                 or within.max() >= compiled.n)):
            raise InputError("within", f"must be a 1-D array of variable indices in "
                                       f"0..{compiled.n - 1}")
    X, done = _sweep_rows(compiled, starts, O, depth=depth, sweeps=sweeps, seed=seed,
                          flip_price=flip_price, max_flips=max_flips, scale=scale,
                          workers=workers, deadline=deadline, until=until, cancel=cancel,
                          within=within)
    t1 = time.perf_counter()
    g = greedy_repair(compiled, X, origin=O, max_flips=max_flips, flip_price=float(flip_price),
                      workers=int(workers), deadline=deadline, cancel=cancel)
    return AnnealOutput(X=g.X, sweeps=done, seconds=time.perf_counter() - t0,
                        sweep_seconds=t1 - t0)


def _sweep_rows(compiled: Compiled, starts: np.ndarray, O: np.ndarray, *, depth, sweeps,
                seed, flip_price, max_flips, scale, workers, deadline, until, cancel,
                within=None):
    """The Metropolis part of :func:`anneal` (checked arguments): (X int8 (R, n) the
    states it leaves, sweeps int64 (R,) done per start)."""
    R, n = starts.shape
    X = starts.copy()
    pinned = compiled.fixed >= 0
    X[:, pinned] = compiled.fixed[pinned]
    done = np.zeros(R, dtype=np.int64)
    late = late_arrays(compiled)
    moves = _moves(compiled)
    if within is not None:
        moves = moves._replace(free=np.intersect1d(moves.free, within).astype(np.int64))
    radius = n if max_flips is None else int(max_flips)
    if scale is None:
        scale = flip_scale(compiled, starts)
    if R and sweeps > 0 and moves.free.size:
        tq, tt = temperatures(float(depth), float(scale))
        randomise = float(depth) >= 1.0 and radius >= n
        plan = Plan(int(sweeps), 0 if randomise else int(round(HEAT * sweeps)), tq, tt,
                    float(flip_price), radius, np.uint64(int(seed) & (2 ** 64 - 1)),
                    randomise, float(scale), until is not None)
        tol = objective_tol(compiled)

        def stop():
            return ((cancel is not None and cancel.is_set())
                    or (deadline is not None and time.perf_counter() >= deadline))

        parts = min(int(workers), R)
        cuts = np.linspace(0, R, parts + 1).astype(np.int64)
        args = (late, moves, plan, X, O)
        if parts == 1:
            _block(*args, 0, R, tol, done, stop, until, deadline)
        else:
            jobs = [thread_pool(parts).submit(_block, *args, int(a), int(b), tol, done, stop,
                                                 until, deadline)
                    for a, b in zip(cuts[:-1], cuts[1:])]
            for j in jobs:
                j.result()
    return X, done


def sweep_pace(compiled: Compiled, x: np.ndarray, *, sweeps: int = 2,
               deadline: float | None = None) -> float:
    """Seconds one Metropolis sweep over the free variables takes, measured on state x
    (int8 (n,), left as it is): ``sweeps`` sweeps at depth 0.5 and the model's scale at x,
    the chain's set-up included (so a little more than a sweep of a long chain). A
    ``deadline`` (``time.perf_counter()`` value) cuts the probe after its sweep in progress;
    the time is then divided by the sweeps done (at least one)."""
    X = _states(compiled, np.asarray(x).reshape(1, -1), "x")
    scale = flip_scale(compiled, X)
    t = time.perf_counter()
    _, done = _sweep_rows(compiled, X, X.copy(), depth=0.5, sweeps=sweeps, seed=0,
                          flip_price=0.0, max_flips=None, scale=scale, workers=1,
                          deadline=deadline, until=None, cancel=None)
    return max(1e-9, (time.perf_counter() - t) / max(1, int(done[0])))


_WARM = False


def warm_up(*, greedy_pass: bool = True) -> None:
    """Compile (or load from numba's on-disk cache) the annealing kernels on a tiny model
    with every kind of late structure, once per process. ``greedy_pass`` False: the
    Metropolis kernels only, not the greedy pass that ends an anneal (a process that
    fills the cache beside another one compiling greedy; this process is then not marked
    warm)."""
    global _WARM
    if _WARM:
        return
    from flipfix.repair.lowering.compiled import compile_constraints
    from flipfix.repair.model.constraints import (FixVariables, HammingPenalty,
                                                  LinearConstraint)
    from flipfix.repair.model.problem import Problem

    p = Problem.from_terms({0: -1.0, 1: 1.0, 2: 0.5, 3: 0.0},
                           [(0, 1, 2.0), (1, 2, -1.0), (2, 3, 1.0)])
    comp = compile_constraints(p, [
        HammingPenalty({0: 1, 1: 1, 2: 1}, shape="quadratic"),
        LinearConstraint({0: 1, 1: 1}, "==", 1), LinearConstraint({2: 1, 3: 2}, "<=", 2),
        FixVariables({3: 0})])
    X0 = np.zeros((2, 4), dtype=np.int8)
    from flipfix.repair.kernels.regions import warm_up as regions_warm_up

    regions_warm_up()  # the local search merges its chains' answers region by region
    if not greedy_pass:
        _sweep_rows(comp, X0, X0.copy(), depth=0.5, sweeps=2, seed=0, flip_price=0.1,
                    max_flips=3, scale=None, workers=1, deadline=None, until=None, cancel=None)
        return
    anneal(comp, X0, depth=0.5, sweeps=2, seed=0, max_flips=3, flip_price=0.1)
    _WARM = True
