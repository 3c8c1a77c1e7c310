"""Search plans: greedy only, CP-SAT per candidate, and the portfolio of both.

A plan returns :class:`Attempt` records (one repaired assignment each, tied to the
candidate it started from); :mod:`flipfix.repair.api` scores them and builds the result.

Portfolio, within a budget of T seconds:

1. greedy repair of every candidate, best-ranked first (it may use up to 60% of T);
2. iterated local search: random kicks of a few free variables applied to the best
   repaired solutions, each followed by greedy descent, improvements kept — a share
   ``Mix.kicks`` of what is left;
3. local branching: CP-SAT around the candidate(s) whose repaired results rank best,
   each hinted with its result, within ``flips + margin`` of the candidate (or within
   ``max_flips``) — ``Mix.neighbourhood_share`` of what is left;
4. an unhinted CP-SAT search of the whole late problem, asked only for solutions
   better than the best so far — the rest. A hint alone tends to keep CP-SAT in
   the hinted basin, so this search runs without one; if it proves that nothing
   better exists, the answer is optimal.

The last ``POLISH_SHARE`` of the budget (greedy and portfolio) moves the best answers back
toward their candidates: greedy descent with a tiny price per flip (:func:`_polish`), then,
in the portfolio when CP-SAT is affordable, its exact counterpart (:func:`_fewest_flips`):
CP-SAT's fewest flips from the reported candidate among assignments no costlier than the
best answer.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field

import numpy as np

from flipfix.repair.lowering.compiled import Compiled
from flipfix.repair.errors import InputError
from flipfix.repair.solvers.greedy import objective_tol, greedy_repair

__all__ = ["Attempt", "PlanOutcome", "kick_masks", "run_plan"]

KICK_BATCH = 32
#: share of the budget kept at the end for moving the best answers back toward their candidates
POLISH_SHARE = 0.05
#: share of that tail the greedy polish may take when the fewest-flips CP-SAT step can run
#: (it gets the rest). Measured on the quick repair benchmark: the polish takes 1-19 ms; the
#: CP-SAT step needs 20-200 ms there to return its hint and did not find fewer flips in 3 s.
POLISH_GREEDY = 0.5
POLISH_TOP = 8
#: shortest time worth a fewest-flips CP-SAT search (a clone and a hinted solve)
FEWEST_MIN_SECONDS = 0.01
#: relative cost slack of "no costlier" in the polish steps
COST_SLACK = 1e-9


@dataclass(frozen=True)
class Mix:
    """How the portfolio shares its budget.

    The defaults follow bench/mix.py (bench/RESULTS.md): over 5 instances x 4 scenarios x
    3 budgets, giving the kicks everything after greedy found the best cost in 18-20 of 20
    rows per budget, the CP-SAT stages alone in at most 9 (mostly ties); these defaults in
    16-20 rows (latest run: 17, 20 and 19 at 0.1, 1 and 5 s). CP-SAT keeps a small share
    because only it proves optimality or infeasibility.

    greedy: most of the budget greedy repair may take; kicks: share of the rest for
    iterated local search; neighbourhoods: how many local-branching CP-SAT runs, which
    get ``neighbourhood_share`` of what is left after the kicks; full_search: whether the
    unhinted whole-problem CP-SAT search gets the remainder.
    """

    greedy: float = 0.6
    kicks: float = 0.8
    neighbourhoods: int = 1
    neighbourhood_share: float = 0.5
    full_search: bool = True

    def __post_init__(self):
        for name in ("greedy", "kicks", "neighbourhood_share"):
            v = getattr(self, name)
            if not 0.0 <= v <= 1.0:
                raise InputError(f"mix.{name}", f"must be a share from 0 to 1, got {v!r}")
        if self.neighbourhoods < 0:
            raise InputError("mix.neighbourhoods", "must be >= 0")


DEFAULT_MIX = Mix()


@dataclass
class Attempt:
    """One repaired assignment: x int8 (n,), from candidate ``k``, by ``method``."""

    k: int
    x: np.ndarray
    method: str
    seconds: float


@dataclass
class PlanOutcome:
    attempts: list
    proven_optimal: bool = False
    proven_infeasible: bool = False
    cpsat_status: str = ""
    scaling_error: float = 0.0
    stats: dict = field(default_factory=dict)


def _objective(compiled: Compiled, X: np.ndarray, X0: np.ndarray, price: float):
    ev = compiled.evaluate(X)
    flips = (X != X0).sum(axis=1)
    return ev, ev.cost + price * flips, flips


def _ranked(feasible: np.ndarray, objective: np.ndarray) -> np.ndarray:
    """Indices ordered: feasible first, then by objective (stable)."""
    return np.lexsort((objective, ~feasible))


def build_cost(compiled: Compiled) -> float:
    """Rough seconds to build the CP-SAT model (measured here: ~25 us per product or term)."""
    items = compiled.data.size // 2 + sum(len(c.terms) for c in compiled.counts)
    return 25e-6 * (items + compiled.a_data.size + compiled.n)


def _cpsat_affordable(compiled: Compiled, seconds: float) -> bool:
    return build_cost(compiled) + 0.05 < seconds


class _LazyCpsat:
    """The CP-SAT model, built on first use and only when the budget can pay for it.

    (Imported late: ortools brings protobuf, which plain greedy runs avoid.)
    """

    def __init__(self, compiled: Compiled, stats: dict):
        self.compiled = compiled
        self.model = None
        self.stats = stats

    def ready(self, deadline: float) -> bool:
        if self.model is None:
            from flipfix.repair.solvers.cpsat import LateModel

            if time.perf_counter() + build_cost(self.compiled) >= deadline:
                self.stats["cpsat_skipped"] = "budget too short to build the CP-SAT model"
                return False
            self.model = LateModel(self.compiled)
            self.stats["cpsat_build_seconds"] = round(self.model.build_seconds, 4)
        return time.perf_counter() < deadline - 0.005

    def solve(self, **kwargs):
        return self.model.solve(**kwargs)


def run_plan(compiled: Compiled, X0: np.ndarray, *, method: str, time_limit: float,
             max_flips: int | None, flip_price: float, seed: int, workers: int,
             cancel=None, progress=None, mix: Mix = DEFAULT_MIX) -> PlanOutcome:
    """Run one plan on the candidates X0 (int8 (K, n)); see the module docstring.

    greedy and portfolio keep the last ``POLISH_SHARE`` of the budget to move the best
    answers back toward their candidates where that costs nothing (:func:`_polish`, then
    in the portfolio :func:`_fewest_flips`).
    """
    t0 = time.perf_counter()
    deadline = t0 + time_limit
    share = 1.0 if method == "cpsat" else 1.0 - POLISH_SHARE
    out = PlanOutcome(attempts=[])
    cp = _LazyCpsat(compiled, out.stats)
    _search(compiled, X0, out, cp, method=method, time_limit=share * time_limit,
            max_flips=max_flips, flip_price=flip_price, seed=seed, workers=workers,
            cancel=cancel, progress=progress, mix=mix)

    def cancelled() -> bool:
        return cancel is not None and cancel.is_set()

    if method == "cpsat" or cancelled():
        return out
    left = deadline - time.perf_counter()
    # the CP-SAT step shares the tail only when it can run in it (model built or affordable)
    exact = method == "portfolio" and (cp.model is not None or _cpsat_affordable(compiled, left))
    polish_deadline = time.perf_counter() + POLISH_GREEDY * left if exact else deadline
    _polish(compiled, X0, out, deadline=polish_deadline, max_flips=max_flips,
            flip_price=flip_price, workers=workers)
    if method == "portfolio" and not cancelled():
        _fewest_flips(cp, compiled, X0, out, deadline=deadline, max_flips=max_flips,
                      flip_price=flip_price, seed=seed, workers=workers, cancel=cancel)
    return out


def _search(compiled: Compiled, X0: np.ndarray, out: PlanOutcome, cp: _LazyCpsat, *,
            method: str, time_limit: float, max_flips: int | None, flip_price: float,
            seed: int, workers: int, cancel=None, progress=None,
            mix: Mix = DEFAULT_MIX) -> PlanOutcome:
    """Run the search stages of one plan on the candidates X0 (int8 (K, n)) into ``out``;
    see the module docstring. ``cp`` is the (lazily built) CP-SAT model."""
    t0 = time.perf_counter()
    deadline = t0 + time_limit
    K, n = X0.shape
    report = progress or (lambda **kw: None)

    def stopped() -> bool:
        return (cancel is not None and cancel.is_set()) or time.perf_counter() >= deadline

    if method == "cpsat":
        _per_candidate_cpsat(cp, compiled, X0, out, deadline=deadline, max_flips=max_flips,
                             flip_price=flip_price, seed=seed, workers=workers, cancel=cancel,
                             report=report)
        return out

    g_deadline = deadline if method == "greedy" else t0 + mix.greedy * time_limit
    # most promising candidates first, so a short budget is spent where it pays most
    ev0, obj0, _ = _objective(compiled, X0, X0, 0.0)
    first = _ranked(ev0.feasible, obj0)
    g = greedy_repair(compiled, X0[first], max_flips=max_flips, flip_price=flip_price,
                      deadline=g_deadline, cancel=cancel, workers=workers,
                      progress=lambda d, tot: report(done=d, total=tot, phase="greedy"))
    back = np.argsort(first)
    g.X, g.steps, g.done, g.seconds = g.X[back], g.steps[back], g.done[back], g.seconds[back]
    for k in range(K):
        out.attempts.append(Attempt(k, g.X[k], "greedy" if g.done[k] else "unrepaired",
                                    float(g.seconds[k])))
    out.stats["greedy_done"] = int(g.done.sum())
    out.stats["greedy_moves"] = int(g.steps.sum())
    if method == "greedy" or stopped():
        return out

    ev, obj, flips = _objective(compiled, g.X, X0, flip_price)
    cur = g.X.copy()
    left = deadline - time.perf_counter()
    kick_share = mix.kicks
    if mix.kicks > 0 and not _cpsat_affordable(compiled, (1.0 - mix.kicks) * left):
        kick_share = 1.0  # CP-SAT could not even be built in its share: kicks take it all
    kick_deadline = time.perf_counter() + kick_share * left
    rounds, kept = _kicks(compiled, X0, cur, obj, ev.feasible, g.done, out,
                          deadline=kick_deadline, max_flips=max_flips, flip_price=flip_price,
                          seed=seed, cancel=cancel, workers=workers)
    out.stats["kick_rounds"] = rounds
    out.stats["kick_improvements"] = kept
    report(done=K, total=K, phase="kicks")
    if stopped():
        return out
    ev, obj, flips = _objective(compiled, cur, X0, flip_price)
    g.X = cur
    order = [int(k) for k in _ranked(ev.feasible, obj) if g.done[k]]
    seen: set = set()
    tops = []
    for k in order:
        key = g.X[k].tobytes()
        if key not in seen:
            seen.add(key)
            tops.append(k)
        if len(tops) >= mix.neighbourhoods:
            break
    margin = int(np.clip(n // 10, 5, 50))
    # ---- stage 3: neighbourhoods of the best candidates, hinted with their repaired result
    best_obj = float(obj[tops[0]]) if tops and ev.feasible[tops[0]] else None
    tops = tops[: mix.neighbourhoods]
    share = (deadline - time.perf_counter()) * (mix.neighbourhood_share if mix.full_search else 1.0)
    share /= max(1, len(tops))
    for rank, k in enumerate(tops):
        if stopped() or not cp.ready(deadline):
            break
        radius = max_flips if max_flips is not None else min(n, int(flips[k]) + margin)
        budget = min(share, deadline - time.perf_counter())
        r = cp.solve(hint=g.X[k], center=X0[k], radius=radius, flip_price=flip_price,
                     time_limit=budget, workers=workers, seed=seed + rank, cancel=cancel)
        out.scaling_error = max(out.scaling_error, r.scaling_error)
        out.cpsat_status = r.status
        if r.x is not None:
            out.attempts.append(Attempt(k, r.x, "cpsat", r.seconds))
            if best_obj is None or r.objective < best_obj:
                best_obj = r.objective
        report(done=K, total=K, phase="neighbourhood", best_cost=best_obj)
    # ---- stage 4: the whole problem, unhinted, only improving solutions
    if stopped() or not mix.full_search or not cp.ready(deadline):
        return out
    anchor = tops[0] if tops else (order[0] if order else 0)
    full_space = max_flips is None
    upper = None
    if best_obj is not None:
        upper = best_obj - max(1e-9, 1e-9 * abs(best_obj))
    r = cp.solve(hint=None, center=X0[anchor], radius=None if full_space else max_flips,
                 flip_price=flip_price, upper=upper, time_limit=deadline - time.perf_counter(),
                 workers=workers, seed=seed + mix.neighbourhoods, cancel=cancel)
    out.scaling_error = max(out.scaling_error, r.scaling_error)
    out.cpsat_status = r.status
    out.stats["full_search_status"] = r.status
    if r.x is not None:
        # attribute an unhinted answer to the candidate nearest to it
        near = int(np.argmin((X0 != r.x).sum(axis=1))) if not flip_price else anchor
        out.attempts.append(Attempt(near, r.x, "cpsat", r.seconds))
        if r.status == "optimal" and full_space and not flip_price:
            out.proven_optimal = True
    elif r.status == "infeasible" and full_space:
        if upper is None:
            out.proven_infeasible = True
        elif not flip_price:
            out.proven_optimal = True  # nothing better than best_obj exists
    report(done=K, total=K, phase="full", best_cost=best_obj)
    return out


def _polish(compiled, X0, out, *, deadline, max_flips, flip_price, workers=1):
    """Move the best answers back toward their candidates where the cost does not rise.

    Greedy descent from each of the ``POLISH_TOP`` best answers with a tiny extra price
    per flip away from its candidate: only flips that cost (next to) nothing and undo a
    change are taken. A result is kept when it is feasible, no costlier and has fewer flips.
    """
    if not out.attempts:
        return
    A = np.vstack([a.x for a in out.attempts])
    ks = np.asarray([a.k for a in out.attempts])
    ev, obj, flips = _objective(compiled, A, X0[ks], flip_price)
    order = [int(i) for i in _ranked(ev.feasible, obj) if ev.feasible[i]]
    picked, seen = [], set()
    for i in order:
        key = (int(ks[i]), A[i].tobytes())
        if key not in seen:
            seen.add(key)
            picked.append(i)
        if len(picked) == POLISH_TOP:
            break
    if not picked:
        return
    eps = 1e3 * objective_tol(compiled)
    g = greedy_repair(compiled, A[picked], origin=X0[ks[picked]], max_flips=max_flips,
                      flip_price=flip_price + eps, deadline=deadline, chunk=4, workers=workers)
    ev2, obj2, flips2 = _objective(compiled, g.X, X0[ks[picked]], flip_price)
    for pos, i in enumerate(picked):
        slack = COST_SLACK * max(1.0, abs(obj[i]))
        if (g.done[pos] and ev2.feasible[pos] and flips2[pos] < flips[i]
                and obj2[pos] <= obj[i] + slack):
            src = out.attempts[i]
            label = "greedy" if src.method == "greedy" else f"{src.method}+greedy"
            out.attempts.append(Attempt(int(ks[i]), g.X[pos].copy(), label, float(g.seconds[pos])))
            out.stats["polished"] = out.stats.get("polished", 0) + 1


def _fewest_flips(cp, compiled, X0, out, *, deadline, max_flips, flip_price, seed, workers,
                  cancel):
    """CP-SAT: the fewest flips at the best cost (:meth:`flipfix.repair.solvers.cpsat.LateModel.fewest_flips`).

    The best answer is the one :func:`flipfix.repair.api.repair` reports (feasible, then objective,
    then flips from its candidate); the step is centred on the candidate the report counts
    flips from (the nearest one, its own candidate on ties), hinted with the answer and
    bounded by its objective measured from that candidate. A result is kept (as an attempt
    of that candidate) when it is feasible, no costlier (within ``COST_SLACK``) and has fewer
    flips. ``out.stats["fewest_flips_status"]`` records the CP-SAT status ("optimal": no
    assignment that cheap has fewer flips) or why the step was skipped.
    """
    stats = out.stats
    if not out.attempts:
        return
    left = deadline - time.perf_counter()
    if cp.model is None and not _cpsat_affordable(compiled, left):
        stats["fewest_flips_status"] = "skipped: budget too short to build the CP-SAT model"
        return
    if left < FEWEST_MIN_SECONDS or not cp.ready(deadline):
        stats["fewest_flips_status"] = "skipped: no time left"
        return
    A = np.vstack([a.x for a in out.attempts])
    ks = np.asarray([a.k for a in out.attempts])
    ev, obj, flips = _objective(compiled, A, X0[ks], flip_price)
    feas = ev.feasible if max_flips is None else ev.feasible & (flips <= max_flips)
    if not feas.any():
        stats["fewest_flips_status"] = "skipped: no feasible answer"
        return
    b = int(np.lexsort((flips, obj, ~feas))[0])  # as flipfix.repair.api._build picks the best
    dist = (X0 != A[b][None, :]).sum(axis=1)
    origin = int(ks[b])
    k = origin if dist[origin] == dist.min() else int(np.argmin(dist))
    d0 = int(dist[k])
    stats["fewest_flips_before"] = d0
    if d0 == 0:
        stats["fewest_flips_status"] = "skipped: already unchanged"
        return
    upper = float(ev.cost[b]) + flip_price * d0  # <= obj[b]: its objective from candidate k
    r = cp.model.fewest_flips(center=X0[k], upper=upper, hint=A[b], radius=d0,
                              flip_price=flip_price, slack=COST_SLACK,
                              time_limit=deadline - time.perf_counter(), workers=workers,
                              seed=seed, cancel=cancel)
    out.scaling_error = max(out.scaling_error, r.scaling_error)
    stats["fewest_flips_status"] = r.status
    stats["fewest_flips_seconds"] = round(r.seconds, 4)
    if r.x is None:
        return
    ev2, obj2, flips2 = _objective(compiled, r.x[None, :], X0[k][None, :], flip_price)
    if (ev2.feasible[0] and flips2[0] < d0
            and obj2[0] <= upper + COST_SLACK * max(1.0, abs(upper))):
        src = out.attempts[b].method
        label = src if src.endswith("cpsat") else f"{src}+cpsat"
        out.attempts.append(Attempt(k, r.x.copy(), label, r.seconds))
        stats["fewest_flips"] = int(flips2[0])


def kick_masks(rng: np.random.Generator, rows: int, width: int, top: int) -> np.ndarray:
    """bool (rows, width): in each row, r distinct True positions, r uniform in
    min(2, top) .. top (top <= width), the r smallest of a row of random keys."""
    size = rng.integers(min(2, top), top + 1, size=rows)
    keys = rng.random((rows, width))
    low = np.partition(keys, top - 1, axis=1)[:, :top]
    low.sort(axis=1)
    return keys <= low[np.arange(rows), size - 1][:, None]


def _kicks(compiled, X0, cur, obj, feasible, done, out, *, deadline, max_flips, flip_price,
           seed, cancel, workers=1):
    """Iterated local search on the best repaired solutions, in place on ``cur`` / ``obj``.

    Each round takes the best ``KICK_BATCH`` candidates' current solutions, flips a
    random handful of free variables in each (seeded), descends greedily (on ``workers``
    threads: the same answers, sooner) and keeps a result when it is feasible and better
    for its candidate. Returns (rounds, kept).
    """
    rng = np.random.default_rng(seed)
    free = np.flatnonzero(compiled.fixed < 0)
    K, n = cur.shape
    if free.size == 0:
        return 0, 0
    rounds = kept = 0
    top_kick = min(free.size, max(2, n // 10))
    last = None  # seconds the last round's descents took
    while time.perf_counter() < deadline and not (cancel is not None and cancel.is_set()):
        order = [int(k) for k in _ranked(feasible, obj) if done[k]][:KICK_BATCH]
        if not order:
            break
        starts = cur[order].copy()
        starts[:, free] ^= kick_masks(rng, len(order), free.size, top_kick).astype(np.int8)
        # one kernel call per round while a round fits easily in what is left; near the
        # deadline the kernel fits the batch to it (measuring one candidate first)
        t = time.perf_counter()
        near_end = last is None or t + 2.0 * last >= deadline
        g = greedy_repair(compiled, starts, origin=X0[order], max_flips=max_flips,
                          flip_price=flip_price, deadline=deadline if near_end else None,
                          cancel=cancel, chunk=len(order), workers=workers)
        last = time.perf_counter() - t
        ev, new_obj, new_flips = _objective(compiled, g.X, X0[order], flip_price)
        inside = np.ones(len(order), dtype=bool) if max_flips is None else new_flips <= max_flips
        for pos, k in enumerate(order):
            if not (g.done[pos] and ev.feasible[pos] and inside[pos]):
                continue
            if not feasible[k] or new_obj[pos] < obj[k] - 1e-9:
                cur[k] = g.X[pos]
                obj[k] = new_obj[pos]
                feasible[k] = True
                out.attempts.append(Attempt(k, g.X[pos].copy(), "greedy", float(g.seconds[pos])))
                kept += 1
        rounds += 1
    return rounds, kept


def _per_candidate_cpsat(cp, compiled, X0, out, *, deadline, max_flips, flip_price, seed, workers,
                         cancel, report):
    """CP-SAT from each candidate (hinted with it), best-ranked candidates first."""
    K = X0.shape[0]
    ev, obj, _ = _objective(compiled, X0, X0, 0.0)
    order = [int(k) for k in _ranked(ev.feasible, obj)]
    reached = np.zeros(K, dtype=bool)
    statuses = []
    overrun = 0.0  # how far past its limit a solve ran, on average (set-up, presolve)
    for pos, k in enumerate(order):
        left = deadline - time.perf_counter()
        if left <= overrun + 0.005 or (cancel is not None and cancel.is_set()):
            break
        if not cp.ready(deadline):
            break
        left = deadline - time.perf_counter()
        budget = max(0.005, left / (K - pos) - overrun)
        r = cp.solve(hint=X0[k], center=X0[k], radius=max_flips, flip_price=flip_price,
                     time_limit=budget, workers=workers, seed=seed, cancel=cancel)
        reached[k] = True
        overrun = (overrun * pos + max(0.0, r.seconds - budget)) / (pos + 1)
        statuses.append(r.status)
        out.scaling_error = max(out.scaling_error, r.scaling_error)
        out.cpsat_status = r.status
        if r.x is not None:
            out.attempts.append(Attempt(k, r.x, "cpsat", r.seconds))
        else:
            out.attempts.append(Attempt(k, X0[k].copy(), "unrepaired", r.seconds))
        report(done=pos + 1, total=K, phase="cpsat")
        full = max_flips is None
        if full and r.status == "optimal" and not flip_price:
            out.proven_optimal = True
        if full and r.status == "infeasible":
            out.proven_infeasible = True
    for k in np.flatnonzero(~reached):
        out.attempts.append(Attempt(int(k), X0[k].copy(), "unrepaired", 0.0))
    if flip_price and statuses and all(s == "optimal" for s in statuses) and reached.all():
        out.proven_optimal = max_flips is None
