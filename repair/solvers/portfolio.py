"""Search plans: greedy only, CP-SAT per candidate, and the portfolio of both.

A plan returns :class:`Attempt` records (one repaired assignment each, tied to the
candidate it started from); :mod:`flipfix.repair.api` scores them and builds the result.

Portfolio, within a budget of T seconds:

1. greedy repair of every candidate, best-ranked first (it may use up to 60% of T, and
   leaves the local search time for at least ``ANNEAL_RESERVE`` sweeps);
2. local search from the best repaired answers — a share ``Mix.kicks`` of what is left:
   rounds of annealing that starts at an answer, heats to a turning depth and cools back
   (classical reverse annealing, :mod:`flipfix.repair.solvers.anneal`), or of random kicks
   followed by greedy descent; a bandit (:func:`_local_search`) gives each round to the
   arm (a depth, or the kicks) that has lowered the best objective most often; after each
   annealing round the best answer takes the regions where other good answers beat it
   (:mod:`flipfix.repair.solvers.merge`);
3. local branching: CP-SAT around the candidate(s) whose repaired results rank best,
   each hinted with its result, within ``flips + margin`` of the candidate (or within
   ``max_flips``) — ``Mix.neighbourhood_share`` of what is left;
4. an unhinted CP-SAT search of the whole late problem, asked only for solutions
   better than the best so far — the rest. A hint alone tends to keep CP-SAT in
   the hinted basin, so this search runs without one; if it proves that nothing
   better exists, the answer is optimal.

Between 1 and 2, when CP-SAT can be built in a small part of what is left, a short
unhinted whole-problem search (stage 4 run early, ``PROOF_SHARE`` of what is left) tries to
prove the best answer optimal, or the hard constraints infeasible; with a proof the search
stops there (``stats["stopped_early"]``) instead of spending the rest of the budget.

The last ``POLISH_SHARE`` of the budget (greedy and portfolio) moves the best answers back
toward their candidates: greedy descent with a tiny price per flip (:func:`_polish`), then,
in the portfolio when CP-SAT is affordable, its exact counterpart (:func:`_fewest_flips`):
CP-SAT's fewest flips from the reported candidate among assignments no costlier than the
best answer. When that CP-SAT step cannot be afforded in the tail, the tail is only
``POLISH_ALONE`` of the budget (the greedy polish) and the search keeps the rest. Given a
plan in force, the tail stays ``POLISH_SHARE`` and, between the two, anneals the reported
answer toward the plan at no cost (:func:`_toward_plan`).

Every stage works to one ``deadline`` (a ``time.perf_counter()`` value) that the caller sets
so that the reply fits its budget (:func:`flipfix.repair.api.repair` keeps back what building
the result will take). CP-SAT's set-up costs (building the model, and per solve cloning,
hinting, presolve and reading the answer back) are predicted from the model's size at the
rate last measured in this process (:class:`CpsatCosts`), so that a stage starts only when it
fits and asks CP-SAT for what is left after them. Every repaired assignment is scored once,
from its candidate's state (:class:`flipfix.repair.kernels.scores.Scorer`), and keeps its
scores (:class:`Attempt`).
"""

from __future__ import annotations

import time
from collections import deque
from dataclasses import dataclass, field

import numpy as np

from flipfix.repair.lowering.compiled import Compiled
from flipfix.repair.errors import InputError
from flipfix.repair.kernels.scores import Scorer, distances
from flipfix.repair.solvers.greedy import clamp_fixings, objective_tol, greedy_repair
from flipfix.repair.solvers.greedy.start import consensus
from flipfix.repair.solvers.candidate_runner import ANCHOR_ROWS, distributes, greedy_on_runner

__all__ = ["Attempt", "PlanOutcome", "CpsatCosts", "CPSAT_COSTS", "kick_masks", "run_plan",
           "attempt_scores", "answer_order"]

KICK_BATCH = 32
#: share of the budget kept at the end for moving the best answers back toward their candidates
POLISH_SHARE = 0.05
#: share of that tail the greedy polish may take when the fewest-flips CP-SAT step can run
#: (it gets the rest). Measured on the quick repair benchmark: the polish takes 1-19 ms; the
#: CP-SAT step needs 20-200 ms there to return its hint and did not find fewer flips in 3 s.
POLISH_GREEDY = 0.5
#: the tail when only the greedy polish can run in it (and no plan is in force)
POLISH_ALONE = 0.02
#: Given a plan in force, the tail also anneals the best answer toward it (:func:`_toward_plan`):
#: chains at depth ``PLAN_DEPTH`` whose price per flip away from the plan is ``PLAN_PRICE``
#: times the model's scale, kept only where no costlier and nearer. Measured on G11 (b) at 1 s
#: (answers at the optimum -269, 371-389 flips from the plan; 8 chains from each of 3 answers):
#: price 0.005-0.02 and depth 0.1-0.2 found equal-cost answers nearer the plan in 7-8 of 8
#: chains (down to 353-377) in 500-2,000 sweeps; at 0.04 and depth 0.2 some chains ended
#: costlier, at 0.1 all did. Its share of the tail: ``PLAN_SHARE`` of what the greedy polish
#: leaves when the CP-SAT step can run too, else all of it.
PLAN_PRICE = 0.01
PLAN_DEPTH = 0.2
PLAN_SHARE = 0.5
#: shortest time worth that anneal (its greedy pass keeps ``anneal.PASS_SECONDS`` of it)
PLAN_MIN_SECONDS = 0.004
POLISH_TOP = 8
#: shortest time worth a fewest-flips CP-SAT search (a clone and a hinted solve)
FEWEST_MIN_SECONDS = 0.01
#: relative cost slack of "no costlier" in the polish steps
COST_SLACK = 1e-9
#: share of what is left after greedy that the early proof attempt may take; it runs when
#: CP-SAT's model and its per-item set-up fit in ``PROOF_SETUP`` of what is left
PROOF_SHARE = 0.1
PROOF_SETUP = 0.05
#: most of what is left that a proof attempt's possible overrun (CP-SAT's latency) may take
PROOF_LATENCY = 0.5
#: shortest time limit of a proof attempt, when it fits in that room
PROOF_MIN_SECONDS = 0.05
#: shortest CP-SAT search worth starting after its set-up
CPSAT_MIN_SECONDS = 0.02


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
    """One repaired assignment: x int8 (n,), from candidate ``k``, by ``method``.

    ``cost``, ``violation`` (late problem) and ``flips`` (Hamming distance from candidate
    ``k``) are filled once, by whoever has them or by :func:`attempt_scores`."""

    k: int
    x: np.ndarray
    method: str
    seconds: float
    cost: float | None = None
    violation: float | None = None
    flips: int | None = None


@dataclass
class PlanOutcome:
    attempts: list
    proven_optimal: bool = False
    proven_infeasible: bool = False
    cpsat_status: str = ""
    scaling_error: float = 0.0
    stats: dict = field(default_factory=dict)


def attempt_scores(scorer: Scorer, attempts: list):
    """(ks int64, cost float64, violation float64, flips int64), each (len(attempts),), of
    every attempt; those not scored yet are scored in one batch (and keep their scores)."""
    todo = [a for a in attempts if a.cost is None]
    if todo:
        cost, viol, flips = scorer.near(np.vstack([a.x for a in todo]), [a.k for a in todo])
        for a, c, v, f in zip(todo, cost.tolist(), viol.tolist(), flips.tolist()):
            a.cost, a.violation, a.flips = c, v, f
    return (np.fromiter((a.k for a in attempts), np.int64, len(attempts)),
            np.fromiter((a.cost for a in attempts), np.float64, len(attempts)),
            np.fromiter((a.violation for a in attempts), np.float64, len(attempts)),
            np.fromiter((a.flips for a in attempts), np.int64, len(attempts)))


def _ranked(feasible: np.ndarray, objective: np.ndarray) -> np.ndarray:
    """Indices ordered: feasible first, then by objective (stable)."""
    return np.lexsort((objective, ~feasible))


def _distinct(items, key, limit: int, *, seen=()) -> list:
    """The first ``limit`` of ``items`` whose ``key(item)`` is new (not in ``seen`` nor
    an earlier item's), in order."""
    seen, kept = set(seen), []
    for item in items:
        if len(kept) == limit:
            break
        k = key(item)
        if k not in seen:
            seen.add(k)
            kept.append(item)
    return kept


def _items(compiled: Compiled) -> int:
    """Size of the CP-SAT model: products, count terms, row entries and bits."""
    return (compiled.data.size // 2 + sum(len(c.terms) for c in compiled.counts)
            + compiled.a_data.size + compiled.n)


class CpsatCosts:
    """CP-SAT's fixed costs, as measured in this process.

    ``build``: seconds per model item to build the model
    (:class:`flipfix.repair.solvers.cpsat.LateModel`); it follows each real build (the
    larger of the measurement and half the previous estimate, so one quick build does not
    halve the margin). Prior: 55-70 us measured at 1,000 to 10,000 variables on the 2-vCPU
    development machine under load (15 us when it was quiet).
    ``setup``: seconds per model item one search spends on our side beyond CP-SAT's time
    limit (cloning, hinting, reading the answer back): 20-30 us measured there.
    ``latency``: how far CP-SAT itself may run past its time limit, by worker count (one,
    or more): the largest of the last ``LATENCY_WINDOW`` searches that ran to their limit,
    and never less than the floor. With two workers about one unhinted search in four
    overran by 0.04-0.23 s whatever the model's size (bqp100-1), while many short hinted
    searches in a row did not (so a window alone forgets it); one worker: at most 0.01 s.
    Floors: 0.01 s (one worker) and 0.15 s (more).
    """

    LATENCY_WINDOW = 8

    def __init__(self, build: float = 70e-6, setup: float = 30e-6,
                 latency: tuple = (0.01, 0.15)):
        self.build = build
        self.setup = setup
        self.floor = {True: latency[0], False: latency[1]}
        self.latencies = {one: deque(maxlen=self.LATENCY_WINDOW) for one in (True, False)}

    def latency(self, workers: int) -> float:
        one = workers <= 1
        return max([self.floor[one], *self.latencies[one]])

    def build_seconds(self, compiled: Compiled) -> float:
        return self.build * _items(compiled)

    def setup_seconds(self, compiled: Compiled, workers: int = 1) -> float:
        """Predicted seconds a search runs beyond the time limit CP-SAT is given."""
        return self.latency(workers) + self.setup * _items(compiled)

    def built(self, compiled: Compiled, seconds: float) -> None:
        """A build of ``compiled`` took ``seconds``."""
        self.build = max(seconds / max(1, _items(compiled)), 0.5 * self.build)

    def overran(self, compiled: Compiled, workers: int, seconds: float) -> None:
        """A search that ran to its limit took ``seconds`` more than the limit CP-SAT had."""
        self.latencies[workers <= 1].append(max(0.0, seconds - self.setup * _items(compiled)))


#: the process-wide estimates (:class:`CpsatCosts`)
CPSAT_COSTS = CpsatCosts()


def build_cost(compiled: Compiled) -> float:
    """Predicted seconds to build the CP-SAT model (:data:`CPSAT_COSTS`)."""
    return CPSAT_COSTS.build_seconds(compiled)


def _cpsat_affordable(compiled: Compiled, seconds: float, built: bool = False,
                      workers: int = 1) -> bool:
    """Whether a CP-SAT search on ``workers`` (built first unless ``built``) fits in ``seconds``."""
    need = CPSAT_COSTS.setup_seconds(compiled, workers) + CPSAT_MIN_SECONDS
    return need + (0.0 if built else build_cost(compiled)) < seconds


class _LazyCpsat:
    """The CP-SAT model, built on first use and only when the budget can pay for it;
    every search on ``workers`` threads.

    (Imported late: ortools brings protobuf, which plain greedy runs avoid.)
    """

    def __init__(self, compiled: Compiled, stats: dict, workers: int = 1):
        self.compiled = compiled
        self.model = None
        self.stats = stats
        self.workers = workers

    def affordable(self, seconds: float, workers: int | None = None) -> bool:
        """Whether a search on ``workers`` threads (default the model's), and the build if
        not done yet, fits in ``seconds``."""
        return _cpsat_affordable(self.compiled, seconds, built=self.model is not None,
                                 workers=workers or self.workers)

    def ready(self, deadline: float, workers: int | None = None) -> bool:
        """Built (or now built), and a search on ``workers`` threads still fits before
        ``deadline``."""
        if self.model is None:
            from flipfix.repair.solvers.cpsat import LateModel

            if not self.affordable(deadline - time.perf_counter(), workers):
                self.stats["cpsat_skipped"] = "budget too short to build the CP-SAT model"
                return False
            self.model = LateModel(self.compiled)
            CPSAT_COSTS.built(self.compiled, self.model.build_seconds)
            self.stats["cpsat_build_seconds"] = round(self.model.build_seconds, 4)
        return self.affordable(deadline - time.perf_counter(), workers)

    def limit(self, seconds: float, workers: int | None = None) -> float:
        """The time limit to give CP-SAT (on ``workers`` threads, default the model's) so
        that a search with its set-up takes ``seconds``."""
        return max(0.01, seconds - CPSAT_COSTS.setup_seconds(self.compiled,
                                                             workers or self.workers))

    def _timed(self, run, time_limit: float, **kwargs):
        r = run(time_limit=time_limit, **kwargs)
        if r.status in ("feasible", "unknown"):  # it ran to its limit: the rest is set-up
            CPSAT_COSTS.overran(self.compiled, kwargs.get("workers", 1), r.seconds - time_limit)
        return r

    def solve(self, *, time_limit: float, **kwargs):
        """A search that, set-up included, takes about ``time_limit`` seconds."""
        return self._timed(self.model.solve, self.limit(time_limit, kwargs.get("workers")),
                           **kwargs)

    def fewest_flips(self, *, time_limit: float, **kwargs):
        return self._timed(self.model.fewest_flips,
                           self.limit(time_limit, kwargs.get("workers")), **kwargs)


def run_plan(compiled: Compiled, X0: np.ndarray, *, method: str, deadline: float,
             max_flips: int | None, flip_price: float, seed: int, workers: int,
             cancel=None, progress=None, mix: Mix = DEFAULT_MIX,
             scorer: Scorer | None = None, runner=None,
             plan: np.ndarray | None = None) -> PlanOutcome:
    """Run one plan on the candidates X0 (int8 (K, n)) until ``deadline`` (a
    ``time.perf_counter()`` value); see the module docstring.

    greedy and portfolio keep the last ``POLISH_SHARE`` of the time (``POLISH_ALONE``
    when CP-SAT cannot run in it) to move the best answers back toward their candidates
    where that costs nothing (:func:`_polish`, then in the portfolio :func:`_fewest_flips`).
    ``scorer`` (default: built here) scores the library and every attempt; only the
    candidates it scored (a prefix of X0) are searched from. Candidates no attempt starts
    from get none (:func:`flipfix.repair.api.repair` reports them as they are).
    ``runner``: where a large library's greedy stage runs
    (:mod:`flipfix.repair.solvers.candidate_runner`). ``plan`` (int8 (n,)): the plan in
    force; the last steps then also move the best answers toward it at no cost (the greedy
    polish, an anneal priced by the distance from the plan: :func:`_toward_plan`), and the
    tail is ``POLISH_SHARE`` even when CP-SAT cannot run in it.
    """
    out = PlanOutcome(attempts=[])
    if scorer is None:
        scorer = Scorer(compiled, X0, workers=workers)
    X0 = X0[:scorer.scored]  # the search starts only from candidates the scorer reached
    time_limit = max(0.0, deadline - time.perf_counter())
    tail = POLISH_SHARE
    cp = _LazyCpsat(compiled, out.stats, workers)
    if method == "greedy" or (method == "portfolio" and plan is None and not cp.affordable(
            (1.0 - POLISH_GREEDY) * POLISH_SHARE * time_limit)):
        tail = POLISH_ALONE  # no CP-SAT step nor plan in the tail: only the greedy polish
    share = 1.0 if method == "cpsat" else 1.0 - tail
    _search(compiled, X0, out, cp, scorer, method=method,
            deadline=deadline - (1.0 - share) * time_limit, max_flips=max_flips,
            flip_price=flip_price, seed=seed, workers=workers, cancel=cancel,
            progress=progress, mix=mix, runner=runner)

    def cancelled() -> bool:
        return cancel is not None and cancel.is_set()

    if method == "cpsat" or cancelled():
        return out
    left = deadline - time.perf_counter()
    # the CP-SAT step shares the tail only when it can run in it (model built or affordable)
    exact = method == "portfolio" and cp.affordable((1.0 - POLISH_GREEDY) * left)
    polish_deadline = time.perf_counter() + POLISH_GREEDY * left if exact else deadline
    _polish(compiled, X0, out, scorer, deadline=polish_deadline, max_flips=max_flips,
            flip_price=flip_price, workers=workers, plan=plan)
    if method == "portfolio" and plan is not None and not cancelled():
        left = deadline - time.perf_counter()
        _toward_plan(compiled, X0, out, scorer, plan,
                     deadline=time.perf_counter() + (PLAN_SHARE * left if exact else left),
                     max_flips=max_flips, flip_price=flip_price, seed=seed, workers=workers,
                     cancel=cancel)
    if method == "portfolio" and not cancelled():
        _fewest_flips(cp, compiled, X0, out, scorer, deadline=deadline, max_flips=max_flips,
                      flip_price=flip_price, seed=seed, workers=workers, cancel=cancel,
                      plan=plan)
    return out


def _search(compiled: Compiled, X0: np.ndarray, out: PlanOutcome, cp: _LazyCpsat,
            scorer: Scorer, *, method: str, deadline: float, max_flips: int | None,
            flip_price: float, seed: int, workers: int, cancel=None, progress=None,
            mix: Mix = DEFAULT_MIX, runner=None) -> PlanOutcome:
    """Run the search stages of one plan on the candidates X0 (int8 (K, n)) into ``out``
    until ``deadline``; see the module docstring. ``cp`` is the (lazily built) CP-SAT
    model, ``scorer`` scores the library and the attempts."""
    t0 = time.perf_counter()
    time_limit = max(0.0, deadline - t0)
    K, n = X0.shape
    report = progress or (lambda **kw: None)

    def stopped() -> bool:
        return (cancel is not None and cancel.is_set()) or time.perf_counter() >= deadline

    if method == "cpsat":
        _per_candidate_cpsat(cp, compiled, X0, out, scorer, deadline=deadline,
                             max_flips=max_flips, flip_price=flip_price, seed=seed,
                             workers=workers, cancel=cancel, report=report)
        return out

    g_deadline = deadline if method == "greedy" else t0 + mix.greedy * time_limit
    # most promising candidates first, so a short budget is spent where it pays most
    cost, viol = scorer.cost[:K].copy(), scorer.violation[:K].copy()
    first = _ranked(viol == 0.0, cost)
    then, probe = None, {}
    if method == "portfolio" and mix.kicks > 0.0:
        def then(x):  # the later batches leave the search ANNEAL_RESERVE probe sweeps
            from flipfix.repair.solvers.anneal import sweep_pace
            probe["pace"] = sweep_pace(compiled, x, deadline=deadline)
            return deadline - ANNEAL_RESERVE * probe["pace"]
    flips = np.zeros(K, dtype=np.int64)
    if stopped():  # nothing starts after the deadline: the candidates stay as they are
        out.stats["greedy_done"] = out.stats["greedy_moves"] = 0
        return out
    rows, seconds, steps = _greedy_stage(compiled, X0, first, deadline=g_deadline,
                                         first_deadline=deadline,
                                         max_flips=max_flips, flip_price=flip_price,
                                         cancel=cancel, workers=workers, report=report,
                                         runner=runner, then=then)
    fin = np.fromiter(rows, np.int64, len(rows))  # the candidates greedy repaired
    done = np.zeros(K, dtype=bool)
    done[fin] = True
    # each repaired candidate is scored from its own state; the others are as they were
    if fin.size:
        cost[fin], viol[fin], flips[fin] = scorer.near(np.vstack(list(rows.values())), fin)
    out.attempts.extend(Attempt(k, rows[k], "greedy", float(seconds[k]), float(cost[k]),
                                float(viol[k]), int(flips[k])) for k in fin.tolist())
    out.stats["greedy_done"] = int(done.sum())
    out.stats["greedy_moves"] = int(steps)
    ok = viol[fin] == 0.0
    # progress shows the best repaired cost as soon as greedy has one
    report(done=int(done.sum()), total=K, phase="greedy",
           best_cost=float(cost[fin][ok].min()) if ok.any() else None)
    if method == "greedy" or stopped():
        return out

    feasible = viol == 0.0
    obj = cost + flip_price * flips
    # ---- early proof: CP-SAT on the whole problem, when that is cheap; a proof ends the search
    if _early_proof(cp, compiled, X0, out, scorer, feasible=feasible, obj=obj, deadline=deadline,
                    max_flips=max_flips, flip_price=flip_price, seed=seed, workers=workers,
                    cancel=cancel, t0=t0):
        return out

    # each repaired candidate's current answer (the kicks change it; only those are read)
    cur = Answers(fin, np.vstack([rows[k] for k in fin.tolist()]) if fin.size
                  else np.empty((0, n), dtype=np.int8))
    left = deadline - time.perf_counter()
    local_share = mix.kicks
    if mix.kicks > 0 and not cp.affordable((1.0 - mix.kicks) * left):
        local_share = 1.0  # CP-SAT could not even be built in its share: this stage takes it all
    local_deadline = time.perf_counter() + local_share * left
    _local_search(compiled, X0, cur, obj, feasible, flips, done, out, scorer,
                  deadline=local_deadline, max_flips=max_flips, flip_price=flip_price,
                  seed=seed, cancel=cancel, workers=workers, report=report,
                  pace=probe.get("pace"))
    if stopped():
        return out
    order = [int(k) for k in _ranked(feasible, obj) if done[k]]
    seen: set = set()
    tops = []
    for k in order:
        key = cur[k].tobytes()
        if key not in seen:
            seen.add(key)
            tops.append(k)
        if len(tops) >= mix.neighbourhoods:
            break
    margin = int(np.clip(n // 10, 5, 50))
    # ---- stage 3: neighbourhoods of the best candidates, hinted with their repaired result
    best_obj = float(obj[tops[0]]) if tops and feasible[tops[0]] else None
    tops = tops[: mix.neighbourhoods]
    share = (deadline - time.perf_counter()) * (mix.neighbourhood_share if mix.full_search else 1.0)
    share /= max(1, len(tops))
    for rank, k in enumerate(tops):
        if stopped() or not cp.ready(deadline):
            break
        radius = max_flips if max_flips is not None else min(n, int(flips[k]) + margin)
        budget = min(share, deadline - time.perf_counter())
        r = cp.solve(hint=cur[k], center=X0[k], radius=radius, flip_price=flip_price,
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
    _full_search(cp, X0, out, anchor=anchor, best_obj=best_obj,
                 time_limit=deadline - time.perf_counter(), max_flips=max_flips,
                 flip_price=flip_price, seed=seed + mix.neighbourhoods, workers=workers,
                 cancel=cancel)
    report(done=K, total=K, phase="full", best_cost=best_obj)
    return out


class Answers:
    """Each repaired candidate's current answer, by candidate index: ``X`` int8 (R, n) holds
    the answers of the R candidates ``ks`` (int64 (R,)), in that order. Reads ``a[k]`` and
    ``a[[k1, k2, ...]]`` and writes ``a[k] = x`` as a (K, n) array would, without one:
    filling the rows of a fresh (K, n) array for 2,000 of 10,000 candidates of 20,000
    variables took 0.2-0.7 s on the 2-core machine (its pages are first touched there)."""

    def __init__(self, ks: np.ndarray, X: np.ndarray):
        self.X = X
        self.row = {int(k): i for i, k in enumerate(np.asarray(ks).tolist())}

    def __getitem__(self, k):
        if isinstance(k, (int, np.integer)):
            return self.X[self.row[int(k)]]
        return self.X[[self.row[int(j)] for j in k]]

    def __setitem__(self, k: int, x: np.ndarray) -> None:
        self.X[self.row[int(k)]] = x


#: Once the first candidate is repaired, a short probe times a Metropolis sweep from its
#: answer (:func:`flipfix.repair.solvers.anneal.sweep_pace`: two sweeps and a chain's
#: set-up, 1.7-3.4x a long chain's sweep on bench/repair_vs_rerun.py's models), and the
#: greedy stage's later batches end in time to leave the search at least this many probe
#: sweeps. The local search only starts from the few best answers; on a large model at a
#: short budget, repairing the rest of the library took the sweeps the answer needed.
#: Measured (quiet machine, T = 0.1 s, against no reserve, i.e. all 50 candidates
#: repaired; 8 seeds): rand20000 b -921,192 against -919,742 (the re-run: -920,677 and
#: -921,247 in two full runs), G67 a_weak -6,443.3 against -6,424.8, G67 b -3,338.5 against
#: -3,317.6; 6 seeds: rand20000 c -1,123,246 against -1,120,910; rand5000 and the small
#: models the same within noise. The candidates it does not reach are reported as they are
#: ("unrepaired"); from 1 s on every candidate of bench/repair_vs_rerun.py's models is
#: repaired (at 100,000 variables, 1 s, only the first: bench/RESULTS.md).
ANNEAL_RESERVE = 300
#: When the search's time holds at most this many probe sweeps, the local search skips its
#: first pass over the arms (probes whose fixed costs are most of a short stage) and runs
#: one long round at the first arm (unhedged: far fewer sweeps than ``HEDGE_MIN_SWEEPS``).
#: Measured (T = 0.1 s, 16 seeds, means, against the first pass, both then hedged): G67
#: a_weak -6,455.4 against -6,439.4, G67 b -3,347.9 against -3,337.3, rand20000 a_weak -1,123,312 against -1,123,143; rand20000 b
#: -920,919 against -921,139 and rand5000 b -231,983.6 against -231,983.8 (within noise).
NO_EXPLORE_SWEEPS = 500


#: candidates in the first greedy batch; each next batch is twice the last
GREEDY_FIRST_BATCH = 16


def _greedy_stage(compiled, X0, order, *, deadline, first_deadline, max_flips, flip_price,
                  cancel, workers, report, runner=None, then=None):
    """Greedy repair of the candidates X0[order] in that order: the first alone until
    ``first_deadline`` (the whole search's: with no repaired answer nothing else can start
    from one), then the others in batches of doubling size (from ``GREEDY_FIRST_BATCH``;
    at most what half of the time left fits at the last batch's pace) until ``deadline``:
    each batch's set-up (its copies, its consensus) is paid only for candidates the time
    reaches. ``then`` (optional): called with the first candidate's repaired x once it is
    done; the later batches end by the earlier of its answer (a ``time.perf_counter()``
    value) and ``deadline`` (a stage on ``runner`` does not call it). Returns
    ({candidate: repaired x int8 (n,)} of those
    repaired, seconds float64 (K,) spent on each, total steps). Every batch starts from one
    anchor, so the answers do not depend on the batches; a large library goes to ``runner``."""
    anchor = consensus(X0[order[:ANCHOR_ROWS]], compiled.fixed)
    if distributes(runner, *X0.shape):
        return greedy_on_runner(runner, compiled, X0, order, anchor=anchor, deadline=deadline,
                                max_flips=max_flips, flip_price=flip_price, cancel=cancel,
                                report=report)
    K = X0.shape[0]
    rows: dict = {}
    seconds = np.zeros(K)
    steps = 0
    pos, size = 0, 1
    each = 0.0  # seconds per candidate of the last batch, set-up included
    while pos < K and time.perf_counter() < (first_deadline if pos == 0 else deadline):
        if each > 0.0:  # a batch's set-up (copies, consensus: O(size x n)) ends in time
            size = max(1, min(size, int(0.5 * (deadline - time.perf_counter()) / each)))
        batch = order[pos:pos + size]
        t = time.perf_counter()
        g = greedy_repair(compiled, X0[batch], anchor=anchor, max_flips=max_flips,
                          flip_price=flip_price,
                          deadline=first_deadline if pos == 0 else deadline, cancel=cancel,
                          workers=workers,
                          progress=lambda d, tot, at=pos: report(done=at + d, total=K,
                                                                 phase="greedy"))
        seconds[batch] = g.seconds
        each = (time.perf_counter() - t) / batch.size
        steps += int(g.steps.sum())
        # a descent the deadline cut short still gives its feasible state (g.partial)
        rows.update((int(k), g.X[j]) for j, k in enumerate(batch.tolist())
                    if g.done[j] or g.partial[j])
        if not g.done.all() or (cancel is not None and cancel.is_set()):
            break
        if pos == 0 and then is not None:
            deadline = min(deadline, then(g.X[0]))
        pos, size = pos + size, GREEDY_FIRST_BATCH if pos == 0 else 2 * size
    if not rows and K:  # the time ran out before the first descent: the first candidate
        # with the fixings applied (and cardinality rows settled) is an answer if feasible
        k = int(order[0])
        X = X0[k:k + 1].copy()
        radius = compiled.n if max_flips is None else int(max_flips)
        if clamp_fixings(compiled, X, X0[k:k + 1], np.zeros(1, np.int64), radius,
                         settle=True)[0]:
            rows[k] = X[0]
    return rows, seconds, steps


def _full_search(cp, X0, out, *, anchor, best_obj, time_limit, max_flips, flip_price, seed,
                 workers, cancel):
    """CP-SAT on the whole problem (or within ``max_flips`` of candidate ``anchor``),
    unhinted, asked only for answers better than ``best_obj`` (any, when None); a proof
    sets ``out.proven_optimal`` / ``out.proven_infeasible``."""
    full_space = max_flips is None
    upper = None
    if best_obj is not None:
        upper = best_obj - max(1e-9, 1e-9 * abs(best_obj))
    r = cp.solve(hint=None, center=X0[anchor], radius=None if full_space else max_flips,
                 flip_price=flip_price, upper=upper, time_limit=time_limit, workers=workers,
                 seed=seed, cancel=cancel)
    out.scaling_error = max(out.scaling_error, r.scaling_error)
    out.cpsat_status = r.status
    out.stats["full_search_status"] = r.status
    if r.x is not None:
        # attribute an unhinted answer to the candidate nearest to it
        near = int(np.argmin(distances(X0, r.x))) if not flip_price else anchor
        out.attempts.append(Attempt(near, r.x, "cpsat", r.seconds))
        if r.status == "optimal" and full_space and not flip_price:
            out.proven_optimal = True
    elif r.status == "infeasible" and full_space:
        if upper is None:
            out.proven_infeasible = True
        elif not flip_price:
            out.proven_optimal = True  # nothing better than best_obj exists


def _early_proof(cp, compiled, X0, out, scorer, *, feasible, obj, deadline, max_flips,
                 flip_price, seed, workers, cancel, t0) -> bool:
    """Right after greedy, when CP-SAT's model and set-up cost at most ``PROOF_SETUP`` of
    what is left: :func:`_full_search` for ``PROOF_SHARE`` of it. Returns True (and records
    ``stats["stopped_early"]``) when it proved the best answer optimal or the hard
    constraints infeasible; only a whole-space search without a flip price can."""
    if max_flips is not None or flip_price:
        return False
    left = deadline - time.perf_counter()
    build = 0.0 if cp.model is not None else build_cost(compiled)
    if build + CPSAT_COSTS.setup * _items(compiled) > PROOF_SETUP * left:
        return False  # the model is too large for a proof to be likely in this budget
    # a search that runs to its limit may overrun it by CPSAT_COSTS.latency (0.15 s or more
    # on several workers, 0.01 s on one), and the later stages absorb it: on one worker
    # when several would not fit in PROOF_LATENCY of what is left (a small model is proved
    # at once either way, so a short budget still gets its proof)
    workers = cp.workers
    if CPSAT_COSTS.latency(workers) > PROOF_LATENCY * left:
        workers = 1
    if CPSAT_COSTS.latency(workers) > PROOF_LATENCY * left or not cp.ready(deadline, workers):
        return False
    left = deadline - time.perf_counter()
    proof_seconds = PROOF_SHARE * left
    if PROOF_MIN_SECONDS + CPSAT_COSTS.latency(workers) <= PROOF_LATENCY * left:
        proof_seconds = max(proof_seconds, PROOF_MIN_SECONDS)
    ok = np.flatnonzero(feasible)
    best = int(ok[np.argmin(obj[ok])]) if ok.size else None
    anchor = best if best is not None else int(np.argmin(scorer.violation[:X0.shape[0]]))
    _full_search(cp, X0, out, anchor=anchor,
                 best_obj=None if best is None else float(obj[best]),
                 # CP-SAT itself gets PROOF_SHARE of what is left (at least PROOF_MIN_SECONDS
                 # when that and the overrun fit the gate's room: its start alone took 30 ms
                 # on a loaded machine); its set-up and possible overrun come on top
                 time_limit=(proof_seconds + CPSAT_COSTS.setup_seconds(compiled, workers)),
                 max_flips=None, flip_price=0.0, seed=seed, workers=workers, cancel=cancel)
    if not (out.proven_optimal or out.proven_infeasible):
        return False
    what = "optimal" if out.proven_optimal else "infeasible"
    out.stats["stopped_early"] = (f"CP-SAT proved the answer {what} "
                                  f"{time.perf_counter() - t0:.3f} s into the search")
    return True


def _objective(out, scorer, flip_price):
    """Over every attempt: (ks, cost, feasible, objective, flips) arrays."""
    ks, cost, viol, flips = attempt_scores(scorer, out.attempts)
    return ks, cost, viol == 0.0, cost + flip_price * flips, flips


def answer_order(*, ks, obj, viol, flips, plan=None, x_of=None) -> np.ndarray:
    """Indices of the answers (arrays ks, obj, viol, flips of equal length (A,)), the
    reported one first: feasible first (violation 0), then objective, then violation, then
    flips from the answer's candidate, then the candidate's place ``ks`` in the library (ties
    do not depend on the order the stages ran in). Given the plan in force (``plan`` int8
    (n,); ``x_of(i)``: answer i's bits), the answers level with the first (same objective
    and violation) go nearest to the plan first; only their distances are computed."""
    order = np.lexsort((ks, flips, obj, viol, viol > 0.0))
    if plan is not None and order.size:
        first = order[0]
        top = order[(viol[order] == viol[first]) & (obj[order] == obj[first])]
        near = distances(np.vstack([x_of(int(i)) for i in top]), plan)
        order[:top.size] = top[np.lexsort((ks[top], flips[top], near))]
    return order


def _polish(compiled, X0, out, scorer, *, deadline, max_flips, flip_price, workers=1,
            plan=None):
    """Move the best answers back toward their candidates where the cost does not rise;
    given the plan in force (``plan`` int8 (n,)), then toward it the same way.

    Greedy descent from each of the ``POLISH_TOP`` best answers with a tiny extra price
    per flip away from the target: only flips that cost (next to) nothing and come nearer
    to it are taken. A result is kept (an attempt of the answer's candidate) when it is
    feasible, within ``max_flips`` of its candidate, and either cheaper (an answer that a
    cut search left short of a local minimum) or no costlier and nearer the target.
    """
    _move_toward(compiled, X0, out, scorer, None, deadline=deadline, max_flips=max_flips,
                 flip_price=flip_price, workers=workers)
    if plan is not None:
        _move_toward(compiled, X0, out, scorer, plan, deadline=deadline, max_flips=max_flips,
                     flip_price=flip_price, workers=workers)


def _move_toward(compiled, X0, out, scorer, target, *, deadline, max_flips, flip_price,
                 workers):
    """One pass of :func:`_polish`: toward each answer's own candidate (``target`` None:
    the flip price counts from there, the greedy radius is ``max_flips``) or toward the
    plan ``target`` (int8 (n,): only the tiny price; the flip price and ``max_flips`` are
    checked from the candidate afterwards)."""
    if not out.attempts or time.perf_counter() >= deadline:
        return
    ks, _, feas, obj, flips = _objective(out, scorer, flip_price)
    picked = _distinct((i for i in _ranked(feas, obj).tolist() if feas[i]),
                       lambda i: (int(ks[i]), out.attempts[i].x.tobytes()), POLISH_TOP)
    if not picked:
        return
    X = np.vstack([out.attempts[i].x for i in picked])
    eps = 1e3 * objective_tol(compiled)
    if target is None:
        origin, price, radius = X0[ks[picked]], flip_price + eps, max_flips
    else:
        origin, price, radius = np.repeat(target[None, :], len(picked), axis=0), eps, None
    g = greedy_repair(compiled, X, origin=origin, max_flips=radius, flip_price=price,
                      deadline=deadline, chunk=4, workers=workers)
    cost2, viol2, flips2 = scorer.near(g.X, ks[picked])
    obj2 = cost2 + flip_price * flips2
    nearer = (flips2 < flips[picked] if target is None
              else distances(g.X, target) < distances(X, target))
    inside = np.ones(len(picked), bool) if max_flips is None else flips2 <= max_flips
    stat = "polished" if target is None else "toward_plan"
    for pos, i in enumerate(picked):
        slack = COST_SLACK * max(1.0, abs(obj[i]))
        cheaper = obj2[pos] < obj[i] - slack
        level = nearer[pos] and obj2[pos] <= obj[i] + slack
        if g.done[pos] and viol2[pos] == 0.0 and inside[pos] and (cheaper or level):
            src = out.attempts[i]
            label = "greedy" if src.method == "greedy" else f"{src.method}+greedy"
            out.attempts.append(Attempt(int(ks[i]), g.X[pos].copy(), label, float(g.seconds[pos]),
                                        float(cost2[pos]), float(viol2[pos]), int(flips2[pos])))
            out.stats[stat] = out.stats.get(stat, 0) + 1


def _reported(out, scorer, *, flip_price, max_flips, plan):
    """The answer :func:`flipfix.repair.api.repair` reports among ``out.attempts`` (as
    ``api._build`` picks it, :func:`answer_order`), only feasible ones within ``max_flips``
    of their candidates counting: (its index, and ks, cost, objective, flips over every
    attempt), or None when none counts."""
    ks, cost, feas, obj, flips = _objective(out, scorer, flip_price)
    if max_flips is not None:
        feas = feas & (flips <= max_flips)
    if not feas.any():
        return None
    b = int(answer_order(ks=ks, obj=obj, viol=np.where(feas, 0.0, 1.0), flips=flips, plan=plan,
                         x_of=lambda i: out.attempts[i].x)[0])
    return b, ks, cost, obj, flips


def _toward_plan(compiled, X0, out, scorer, plan, *, deadline, max_flips, flip_price, seed,
                 workers, cancel):
    """Anneal the reported answer toward the plan in force (``plan`` int8 (n,)) until
    ``deadline``: one chain per worker, at ``PLAN_DEPTH``, paying ``PLAN_PRICE`` times the
    model's scale per flip away from the plan, so that among states of equal cost the chains
    drift toward it (the greedy polish moves single free variables only; equal-cost answers
    of a model like G11 are not joined by such flips). A result is kept, as an attempt of the
    answer's candidate, when it is feasible, within ``max_flips`` of that candidate, no
    costlier (its objective from the candidate) and nearer the plan; the cost is never
    traded. ``out.stats["toward_plan_anneal"]`` counts the kept results."""
    from flipfix.repair.solvers.anneal import anneal, flip_scale

    if not out.attempts or deadline - time.perf_counter() < PLAN_MIN_SECONDS or not (
            compiled.fixed < 0).any():
        return
    found = _reported(out, scorer, flip_price=flip_price, max_flips=max_flips, plan=plan)
    if found is None:
        return
    b, ks, _, obj, _ = found
    xb, k = out.attempts[b].x, int(ks[b])
    chains = max(1, workers)
    starts = np.repeat(xb[None, :], chains, axis=0)
    scale = flip_scale(compiled, starts[:1])
    res = anneal(compiled, starts, depth=PLAN_DEPTH, sweeps=100, seed=seed + 7,
                 origin=np.repeat(plan[None, :], chains, axis=0),
                 flip_price=PLAN_PRICE * scale, scale=scale, workers=workers,
                 deadline=deadline, until=deadline, cancel=cancel)
    order = [k] * chains
    cost2, viol2, flips2 = scorer.near(res.X, order)
    obj2 = cost2 + flip_price * flips2
    near = distances(res.X, plan)
    d0 = int((xb != plan).sum())
    bound = float(obj[b]) + COST_SLACK * max(1.0, abs(float(obj[b])))
    for pos in range(chains):
        if (viol2[pos] == 0.0 and near[pos] < d0 and obj2[pos] <= bound
                and (max_flips is None or flips2[pos] <= max_flips)):
            out.attempts.append(Attempt(k, res.X[pos].copy(), "anneal", res.seconds / chains,
                                        float(cost2[pos]), 0.0, int(flips2[pos])))
            out.stats["toward_plan_anneal"] = out.stats.get("toward_plan_anneal", 0) + 1


def _fewest_flips(cp, compiled, X0, out, scorer, *, deadline, max_flips, flip_price, seed,
                  workers, cancel, plan=None):
    """CP-SAT: the fewest flips at the best cost (:meth:`flipfix.repair.solvers.cpsat.LateModel.fewest_flips`).

    The best answer is the one :func:`flipfix.repair.api.repair` reports (:func:`answer_order`);
    the step is centred on the candidate the report counts
    flips from (the nearest one, its own candidate on ties), hinted with the answer and
    bounded by its objective measured from that candidate. A result is kept (as an attempt
    of that candidate) when it is feasible, no costlier (within ``COST_SLACK``) and has fewer
    flips. ``out.stats["fewest_flips_status"]`` records the CP-SAT status ("optimal": no
    assignment that cheap has fewer flips) or why the step was skipped.

    Given the plan in force (``plan`` int8 (n,)), the step is centred on the plan instead:
    the assignment nearest to it among those no costlier than the answer (its cost bounds the
    search; a result is kept, as an attempt of the answer's candidate, when its objective
    from that candidate is no higher, it is within ``max_flips`` of it and nearer the plan);
    ``fewest_flips_center`` is then "plan" and the flips in the stats count from the plan.
    """
    stats = out.stats
    if not out.attempts:
        stats["fewest_flips_status"] = "skipped: nothing repaired"
        return
    left = deadline - time.perf_counter()
    if cp.model is None and not cp.affordable(left):
        stats["fewest_flips_status"] = "skipped: budget too short to build the CP-SAT model"
        return
    if left < FEWEST_MIN_SECONDS or not cp.ready(deadline):
        stats["fewest_flips_status"] = "skipped: no time left"
        return
    found = _reported(out, scorer, flip_price=flip_price, max_flips=max_flips, plan=plan)
    if found is None:
        stats["fewest_flips_status"] = "skipped: no feasible answer"
        return
    b, ks, cost, obj, flips = found
    xb = out.attempts[b].x
    if plan is None:
        dist = distances(X0, xb)
        origin = int(ks[b])
        k = origin if dist[origin] == dist.min() else int(np.argmin(dist))
        center, d0, price = X0[k], int(dist[k]), flip_price
        upper = bound = float(cost[b]) + flip_price * d0  # <= obj[b]: its objective from k
    else:
        stats["fewest_flips_center"] = "plan"
        center, k, d0, price = plan, int(ks[b]), int((xb != plan).sum()), 0.0
        upper, bound = float(cost[b]), float(obj[b])
    stats["fewest_flips_before"] = d0
    if d0 == 0:
        stats["fewest_flips_status"] = "skipped: already unchanged"
        return
    r = cp.fewest_flips(center=center, upper=upper, hint=xb, radius=d0,
                        flip_price=price, slack=COST_SLACK,
                        time_limit=deadline - time.perf_counter(), workers=workers,
                        seed=seed, cancel=cancel)
    out.scaling_error = max(out.scaling_error, r.scaling_error)
    stats["fewest_flips_status"] = r.status
    stats["fewest_flips_seconds"] = round(r.seconds, 4)
    if r.x is None:
        return
    cost2, viol2, flips2 = scorer.near(r.x, k)
    obj2 = cost2[0] + flip_price * flips2[0]
    d2 = int((r.x != center).sum())
    if (viol2[0] == 0.0 and d2 < d0 and (max_flips is None or flips2[0] <= max_flips)
            and obj2 <= bound + COST_SLACK * max(1.0, abs(bound))):
        src = out.attempts[b].method
        label = src if src.endswith("cpsat") else f"{src}+cpsat"
        out.attempts.append(Attempt(k, r.x.copy(), label, r.seconds, float(cost2[0]),
                                    float(viol2[0]), int(flips2[0])))
        stats["fewest_flips"] = d2


def kick_masks(rng: np.random.Generator, rows: int, width: int, top: int) -> np.ndarray:
    """bool (rows, width): in each row, r distinct True positions, r uniform in
    min(2, top) .. top (top <= width), the r smallest of a row of random keys."""
    size = rng.integers(min(2, top), top + 1, size=rows)
    keys = rng.random((rows, width))
    low = np.partition(keys, top - 1, axis=1)[:, :top]
    low.sort(axis=1)
    return keys <= low[np.arange(rows), size - 1][:, None]


#: The local-search stage's arms: annealing from the best answers at these turning depths
#: (bench/anneal_depths.py: 0.15-0.5 paid near good candidates, 0.5-0.7 far from them), and
#: random kicks each followed by greedy descent. The first rounds try each arm in this order,
#: and ties of the bandit go to the earlier arm: 0.5 first, the depth whose long chains were
#: the best or within noise of it on G11 (both events), rand1000 (both) at equal sweeps.
ARMS = (("anneal", 0.5), ("anneal", 0.3), ("anneal", 0.7), ("anneal", 0.15), ("kicks", None))
#: Sweeps of an arm's first annealing round (it measures the sweep time).
FIRST_SWEEPS = 16
#: After the first pass over the arms, each round aims at ``ROUND_GROWTH`` times the last
#: round's time (at least ``MIN_ROUND`` s); a round that would leave less than itself takes
#: all that is left. Rounds thus double, and the last takes about half the stage: longer
#: chains, fewer restarts as the budget grows. (Measured, bench/repair_vs_rerun.py's G11
#: and rand1000 rows at 0.1 s on one worker timed by CPU: rounds of a fifth of what was
#: left, shrinking toward the deadline, left G11 a long annealing chain short: -267.7 and
#: -528.5 mean over 6 seeds on events b and a_weak, against -268.7 and -529.1 doubling.)
ROUND_GROWTH = 2.0
MIN_ROUND = 0.005
#: The first pass over the arms ends once it has taken this share of the stage; the arms it
#: did not reach sit out the stage. Unloaded, the pass takes 3-8 ms and 0.1 of the stage
#: covers it from T = 0.1 s on; on the loaded 2-core machine (load 7-8) each probe took 1-8
#: ms and the pass up to a quarter of a 0.1 s stage: stopping it at 0.1 of the stage gave
#: G11 b / a_weak and rand1000 b / a_weak at T = 0.1 s means of -264.7 / -527.5 / -45640 /
#: -56772.8 against -262.3 / -526.6 / -45624 / -56761.8 (6 runs each, interleaved).
EXPLORE_SHARE = 0.1
#: After the first pass over the arms, when one chain could run at most this many sweeps in
#: the time the stage has left, the rest of the stage is one round (one chain per worker) at
#: the best annealing arm: such models are short of sweeps, and a chain gains more from
#: being longer than from the restarts that doubling rounds would buy. Measured (quiet
#: machine, bench/repair_vs_rerun.py's models at T = 5 s, 3 seeds each, means): rand20000
#: a_weak (about 23,000 sweeps left) -1,125,071 as one round against -1,124,858 doubling
#: (the re-run: -1,125,029); G67 a_weak (about 40,000) -6,512.3 against -6,513.7, the same
#: within noise. 5 seeds at T = 0.1 s: G67 a_weak -6,432.3 against -6,422.1, G11 b -268.6
#: against -268.4, rand1000 a_weak -56,784.1 against -56,785.6; rand5000 b at 5 s (about
#: 98,000 sweeps left) keeps doubling. 1 s, 3 seeds: rand20000 a_weak -1,125,021 against
#: -1,124,765, b -922,787 against -922,665.
LONG_CHAIN_SWEEPS = 50_000
#: The last round hedges its bet on the bandit's record: half its chains (one of two
#: workers) turn at this depth when the chosen arm is shallower. Short rounds reward
#: shallow depths (a few cheap flips improve a fresh answer at once), but a long chain can
#: need to cross wider barriers: the demo's event (b) at T = 0.1 s ended in the 238.91
#: basin in 7 of 19 runs (seeds 0-9, 0 ten times) with the last round at 0.5 or 0.3;
#: with every round at 0.3: 12 of 12 runs stuck; at 0.7 or at 1.0: 12 of 12 runs found
#: 235.1, the optimum CP-SAT finds at 10 T.
HEDGE_DEPTH = 0.7
#: The hedge needs long chains: a chain turning deeper needs more sweeps to cool back, and
#: short ones at ``HEDGE_DEPTH`` ended costlier than at the chosen depth. So the last round
#: hedges only when its chains have time for at least this many sweeps at the measured pace.
#: Measured (T = 0.1 s, quiet machine, means, hedged against not): G67 a_weak (a round of a
#: few hundred sweeps) -6,469.7 against -6,478.6 (16 seeds) and -6,470.1 against -6,477.3
#: (24); G14 a_weak (about 10,000) -3,020.3 and -3,021.7 (24 seeds twice) against -3,021.4
#: (24) and -3,022.4 (48); G11 a_weak and G14 b within noise. The demo's event (b) (about
#: 41,000 sweeps) needs it: 235.2 hedged (24 seeds), 236.9 with no hedge (16). At T = 1 s
#: (6 seeds; 4,000-15,000 sweeps) G67 a_weak and b, rand5000 a_weak and b and rand20000 b
#: were the same within noise without it; G14 at 1 s (about 100,000) gains from it.
HEDGE_MIN_SWEEPS = 20_000
#: A long last round (at least ``FOCUS_MIN_SWEEPS`` sweeps a chain at the measured pace)
#: comes in two parts. Its chains run as above for the first ``FOCUS_SPLIT`` of its time;
#: then every chain restarts from the better of their answers and anneals, at
#: ``FOCUS_DEPTH``, only the variables the chains' answers disagree on and their QUBO
#: neighbours (``FOCUS_RING`` rings: :func:`flipfix.repair.solvers.anneal.disagreement`).
#: Where two good chains agree the answer is likely settled; the part they dispute gets
#: the rest of the time, in sweeps that cost its share of a full one. Measured (one
#: round of two chains from the two best repaired candidates against a first part of half
#: the sweeps then the part, equal wall time, 6 seeds, means; bench/repair_vs_rerun.py's
#: models): G67 a_weak at 6,000 sweeps -6,498.1 against -6,508.3 (part 3,900 of 10,000
#: variables), G67 b -3,370.2 against -3,374.3, rand5000 b at 10,000 sweeps -232,133.3
#: against -232,149.0, rand20000 b at 3,000 sweeps -922,735 against -922,814 (4 seeds);
#: without the ring the part was too narrow on rand20000 b (-922,659), with two rings too
#: wide on rand5000 b (-232,111); at 400 sweeps on G67 no difference beyond noise.
FOCUS_MIN_SWEEPS = 2000
FOCUS_SPLIT = 0.5
FOCUS_DEPTH = 0.5
FOCUS_RING = 1
#: After every annealing round the best answer takes, region by region, what the round's
#: chains and the next best answers (``MERGE_POOL`` in all) got better than it
#: (:mod:`flipfix.repair.solvers.merge`). The last round ends ``MERGE_RESERVE`` times the
#: longest merge so far before the stage's end, so that its own merge fits. (0: no merging.)
MERGE_POOL = 8
MERGE_RESERVE = 1.5
#: Fewest sweeps of a round whose pace that rule trusts (a 16-sweep first round is mostly
#: fixed costs: it measured 2-3 times the time per sweep of a long chain).
RATE_SWEEPS = 64


def _local_search(compiled, X0, cur, obj, feasible, flips, done, out, scorer, *, deadline,
                  max_flips, flip_price, seed, cancel, workers, report, pace=None):
    """Rounds of annealing from the best answers (classical reverse annealing,
    :func:`flipfix.repair.solvers.anneal.anneal`) or of kicks (:func:`_kicks`) until
    ``deadline``, in place on each candidate's current answer ``cur`` and its scores.

    Which arm runs is a bandit's choice (UCB1 over ``ARMS``): a round's reward is 1 when it
    lowered the best feasible objective, else 0, so the budget moves to what improves.
    Rounds grow (``ROUND_GROWTH``): the last ones are long chains, and the last of all
    (about half the stage) goes to the arm with the best record, without exploration. A
    model short of sweeps (``LONG_CHAIN_SWEEPS``: large models, short budgets) gets one
    long round at the best annealing arm as soon as the first pass is over and a round has
    measured the pace; given ``pace`` (seconds per sweep of the probe of
    :func:`flipfix.repair.solvers.anneal.sweep_pace`) and time for at most
    ``NO_EXPLORE_SWEEPS`` of them, that round is the first and only one.
    An annealing round runs one chain per worker thread from the best distinct current
    answers (the best again when there are fewer; on large models one long chain beat
    several short ones at equal time), each
    chain attributed to the candidate its start belongs to (flips and price from it). The
    temperature unit is the model's own (:func:`flipfix.repair.solvers.anneal.flip_scale`
    of the starts), measured once. A long last round ends on the part its chains disagree
    on (``FOCUS_MIN_SWEEPS``). Records rounds and wins per arm in ``out.stats``, and the
    size of each such part (``focus_parts``).
    """
    from flipfix.repair.solvers.anneal import disagreement, flip_scale

    stopped = lambda: (cancel is not None and cancel.is_set()) or time.perf_counter() >= deadline
    pulls = np.zeros(len(ARMS))
    wins = np.zeros(len(ARMS))
    per_sweep = {}  # arm -> measured seconds per sweep of one chain
    sweep_only = {}  # arm -> the same, the Metropolis sweeps alone (no greedy pass, no scoring)
    scale = None
    chains = max(1, workers)
    rnd = 0
    last_round = 0.0
    t_stage = time.perf_counter()
    explored = -1.0  # the round the first pass over the arms ended early, if it did
    merge_seconds = 0.0  # the longest merge of a round's answers so far
    recent = deque(maxlen=MERGE_POOL)  # the last rounds' answers, kept or not: merge donors

    def take(res, order):
        """Keep each chain's answer where it is feasible and cheaper than its candidate's."""
        new_cost, new_viol, new_flips = scorer.near(res.X, order)
        new_obj = new_cost + flip_price * new_flips
        inside = np.ones(len(order), bool) if max_flips is None else new_flips <= max_flips
        each = res.seconds / max(1, len(order))
        for pos, k in enumerate(order):
            if new_viol[pos] == 0.0 and inside[pos] and (
                    not feasible[k] or new_obj[pos] < obj[k] - 1e-9):
                cur[k] = res.X[pos]
                obj[k], feasible[k], flips[k] = new_obj[pos], True, new_flips[pos]
                out.attempts.append(Attempt(k, res.X[pos].copy(), "anneal", each,
                                            float(new_cost[pos]), 0.0, int(new_flips[pos])))

    while not stopped():
        ranked = [int(k) for k in _ranked(feasible, obj) if done[k]]
        if not ranked:
            break
        best_before = min((obj[k] for k in ranked if feasible[k]), default=np.inf)
        left = deadline - time.perf_counter()
        want = max(MIN_ROUND, ROUND_GROWTH * last_round)
        final = left < 2.0 * want
        if final:  # no stub of a round at the end
            want = left
        mean = wins / np.maximum(pulls, 1)
        if rnd < len(ARMS) and explored < 0.0:
            spent = time.perf_counter() - t_stage
            if rnd > 0 and spent > EXPLORE_SHARE * (deadline - t_stage):
                explored = float(rnd)  # the arms not tried yet sit out this stage
        if rnd == 0 and pace is not None and left / pace <= NO_EXPLORE_SWEEPS:
            final, want, a = True, left, 0
            per_sweep[0] = pace  # a first guess: the chains are paced by the clock
        elif rnd < len(ARMS) and explored < 0.0:
            a = rnd
        elif sweep_only and _short_of_sweeps(sweep_only, left):
            final, want = True, left  # one long chain per worker at the best annealing arm
            a = max(sweep_only, key=lambda i: (mean[i], -i))
        elif final:  # exploring is worth nothing in the last round: the best record takes it
            a = int(np.argmax(np.where(pulls > 0, mean, -np.inf)))
        else:
            bonus = np.sqrt(2.0 * np.log(rnd) / np.maximum(pulls, 1))
            a = int(np.argmax(np.where(pulls > 0, mean + bonus, -np.inf)))
        kind, depth = ARMS[a]
        round_end = time.perf_counter() + want
        t_round = time.perf_counter()
        if kind == "kicks":
            _kicks(compiled, X0, cur, obj, feasible, flips, done, out, scorer,
                   deadline=min(round_end, deadline), max_flips=max_flips,
                   flip_price=flip_price, seed=seed + rnd, cancel=cancel, workers=workers)
        else:
            seen, order = set(), []
            for k in ranked:
                key = cur[k].tobytes()
                if key not in seen:
                    seen.add(key)
                    order.append(k)
                if len(order) == chains:
                    break
            # fewer distinct answers than chains: the best again (each chain its own stream)
            order = [order[i % len(order)] for i in range(chains)]
            if scale is None:
                scale = flip_scale(compiled, cur[order])
            if a in per_sweep:
                sweeps = int(np.clip((round_end - time.perf_counter()) / per_sweep[a], 4, 10**7))
            else:
                sweeps = FIRST_SWEEPS
            # paced by the clock (``until``): the chain cools by the round's end even when
            # the sweeps run slower than measured (a cut chain returns a warm state)
            # a long last round hedges: half its chains turn at HEDGE_DEPTH or deeper
            hedge = final and len(order) >= 2 and sweeps >= HEDGE_MIN_SWEEPS
            depths = [depth, max(depth, HEDGE_DEPTH)] if hedge else [depth]
            until = None if a not in per_sweep else min(round_end, deadline)
            if until is not None and final:  # the last merge fits before the deadline
                until -= MERGE_RESERVE * merge_seconds
            focus = (until is not None and final and len(order) >= 2
                     and want / per_sweep[a] >= FOCUS_MIN_SWEEPS)
            if focus:  # the round's first part as usual, then the part its chains disagree on
                until = t_round + FOCUS_SPLIT * want
                sweeps = int(FOCUS_SPLIT * sweeps)
            t = time.perf_counter()
            res = _anneal_at(compiled, cur[order], depths=depths, sweeps=sweeps,
                             seed=seed + rnd, origin=X0[order], flip_price=flip_price,
                             max_flips=max_flips, scale=scale, workers=workers,
                             deadline=deadline, cancel=cancel, until=until)
            ran = int(res.sweeps.max(initial=0))
            if ran > 0:
                per_sweep[a] = max(1e-7, (time.perf_counter() - t) / ran)
                if ran >= RATE_SWEEPS:  # long enough for its fixed costs not to count
                    sweep_only[a] = max(1e-9, res.sweep_seconds / ran)
            take(res, order)
            made = [res.X]
            if focus and not stopped():
                part = disagreement(compiled, res.X, ring=FOCUS_RING)
                # the part's share of a full sweep (all of it when the answers agree)
                share = (part.size / max(1, int((compiled.fixed < 0).sum()))
                         if part.size else 1.0)
                kb = min(order, key=lambda k: (not feasible[k], obj[k]))
                again = [kb] * len(order)
                res = _anneal_at(compiled, cur[again], depths=[FOCUS_DEPTH],
                                 sweeps=max(4, int((round_end - time.perf_counter())
                                                   / (per_sweep[a] * share))),
                                 seed=seed + rnd + 104729, origin=X0[again],
                                 flip_price=flip_price, max_flips=max_flips, scale=scale,
                                 workers=workers, deadline=deadline, cancel=cancel,
                                 until=min(round_end, deadline) - MERGE_RESERVE * merge_seconds,
                                 within=part if part.size else None)
                take(res, again)
                made.append(res.X)
                out.stats["focus_parts"] = out.stats.get("focus_parts", []) + [int(part.size)]
            if not stopped():
                t = time.perf_counter()
                made = np.vstack(made)
                _merge_answers(compiled, X0, cur, obj, feasible, flips, done, out, scorer,
                               [*made, *reversed(recent)], max_flips=max_flips,
                               flip_price=flip_price, deadline=deadline, cancel=cancel)
                recent.extend(made)
                merge_seconds = max(merge_seconds, time.perf_counter() - t)
        best_after = min((obj[k] for k in ranked if feasible[k]), default=np.inf)
        last_round = time.perf_counter() - t_round
        pulls[a] += 1
        wins[a] += best_after < best_before
        rnd += 1
        report(done=len(ranked), total=X0.shape[0], phase="anneal",
               best_cost=None if not np.isfinite(best_after) else float(best_after))
        if final:  # it had all that was left (its chains end early enough for their pass)
            break
    out.stats["local_rounds"] = {_arm_name(arm): int(n) for arm, n in zip(ARMS, pulls) if n}
    out.stats["local_wins"] = {_arm_name(arm): int(w) for arm, w in zip(ARMS, wins) if w}


def _merge_answers(compiled, X0, cur, obj, feasible, flips, done, out, scorer, made, *,
                   max_flips, flip_price, deadline, cancel):
    """Merge into the best current answer the regions where other good answers beat it
    (:func:`flipfix.repair.solvers.merge.merge`): the states ``made`` (int8 (n,) each: the
    round's answers, then earlier ones) first, then the next best distinct current answers,
    ``MERGE_POOL`` donors in all. The merged answer, after a greedy pass, replaces the best
    answer's candidate's current answer when its objective (from that candidate) is lower.
    Counts the regions taken in ``out.stats["merged"]``; returns whether it lowered the
    best objective."""
    from flipfix.repair.solvers.merge import merge

    ranked = [int(k) for k in _ranked(feasible, obj) if done[k] and feasible[k]]
    if not ranked or MERGE_POOL < 1:
        return False
    kb = ranked[0]
    donors = _distinct([*made, *(cur[k] for k in ranked[1:])], lambda y: y.tobytes(),
                       MERGE_POOL, seen=[cur[kb].tobytes()])
    if not donors:
        return False

    def score(X):
        cost, viol, fl = scorer.near(X, np.full(X.shape[0], kb))
        bad = (viol > 0.0) if max_flips is None else (viol > 0.0) | (fl > max_flips)
        return np.where(bad, np.inf, cost + flip_price * fl)

    t = time.perf_counter()
    x, best, taken = merge(compiled, cur[kb], np.vstack(donors), score=score,
                           price=flip_price, origin=X0[kb], deadline=deadline)
    if not taken or not best < obj[kb] - 1e-9:
        return False
    g = greedy_repair(compiled, x[None, :], origin=X0[kb][None, :], max_flips=max_flips,
                      flip_price=flip_price, deadline=deadline, cancel=cancel)
    if g.done[0] and score(g.X)[0] < best:
        x = g.X[0]
    cost, _, fl = scorer.near(x[None, :], [kb])
    cur[kb] = x
    obj[kb], flips[kb] = float(cost[0] + flip_price * fl[0]), int(fl[0])
    out.attempts.append(Attempt(kb, x.copy(), "anneal", time.perf_counter() - t,
                                float(cost[0]), 0.0, int(fl[0])))
    out.stats["merged"] = out.stats.get("merged", 0) + taken
    return True


def _anneal_at(compiled, starts, *, depths: list, workers: int, seed: int, origin, **kw):
    """:func:`flipfix.repair.solvers.anneal.anneal` of the starts (int8 (R, n)) split into
    ``len(depths)`` contiguous groups, group i at ``depths[i]`` (its own seed), the groups
    at once on their share of the ``workers``; one group is one plain call."""
    from concurrent.futures import ThreadPoolExecutor

    from flipfix.repair.solvers.anneal import AnnealOutput, anneal

    if len(depths) == 1:
        return anneal(compiled, starts, depth=depths[0], workers=workers, seed=seed,
                      origin=origin, **kw)
    groups = np.array_split(np.arange(starts.shape[0]), len(depths))
    each = max(1, workers // len(depths))
    # a pool of its own: the calls inside may use the shared kernel pools
    with ThreadPoolExecutor(len(depths), thread_name_prefix="flipfix-hedge") as pool:
        parts = [pool.submit(anneal, compiled, starts[g], depth=d, workers=each,
                             seed=seed + 7919 * i, origin=origin[g], **kw)
                 for i, (g, d) in enumerate(zip(groups, depths))]
        outs = [p.result() for p in parts]
    return AnnealOutput(X=np.vstack([o.X for o in outs]),
                        sweeps=np.concatenate([o.sweeps for o in outs]),
                        seconds=max(o.seconds for o in outs),
                        sweep_seconds=max(o.sweep_seconds for o in outs))


def _short_of_sweeps(per_sweep: dict, left: float) -> bool:
    """Whether one chain at the fastest measured annealing arm (seconds per sweep, by arm)
    could run at most ``LONG_CHAIN_SWEEPS`` sweeps in ``left`` seconds."""
    return left / min(per_sweep.values()) <= LONG_CHAIN_SWEEPS


def _arm_name(arm) -> str:
    kind, depth = arm
    return kind if depth is None else f"{kind}@{depth:g}"


def _kicks(compiled, X0, cur, obj, feasible, flips, done, out, scorer, *, deadline, max_flips,
           flip_price, seed, cancel, workers=1):
    """Iterated local search on the best repaired solutions, in place on ``cur``, ``obj``,
    ``feasible`` and ``flips`` (each candidate's current answer and its scores).

    Each round takes the best ``KICK_BATCH`` candidates' current solutions, flips a
    random handful of free variables in each (seeded), descends greedily (on ``workers``
    threads: the same answers, sooner) and keeps a result when it is feasible and better
    for its candidate. Returns (rounds, kept).
    """
    rng = np.random.default_rng(seed)
    free = np.flatnonzero(compiled.fixed < 0)
    n = compiled.n
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
        new_cost, new_viol, new_flips = scorer.near(g.X, order)
        new_obj = new_cost + flip_price * new_flips
        inside = np.ones(len(order), dtype=bool) if max_flips is None else new_flips <= max_flips
        for pos, k in enumerate(order):
            if not (g.done[pos] and new_viol[pos] == 0.0 and inside[pos]):
                continue
            if not feasible[k] or new_obj[pos] < obj[k] - 1e-9:
                cur[k] = g.X[pos]
                obj[k] = new_obj[pos]
                feasible[k] = True
                flips[k] = new_flips[pos]
                out.attempts.append(Attempt(k, g.X[pos].copy(), "greedy", float(g.seconds[pos]),
                                            float(new_cost[pos]), 0.0, int(new_flips[pos])))
                kept += 1
        rounds += 1
    return rounds, kept


def _per_candidate_cpsat(cp, compiled, X0, out, scorer, *, deadline, max_flips, flip_price, seed,
                         workers, cancel, report):
    """CP-SAT from each candidate (hinted with it), best-ranked candidates first."""
    K = X0.shape[0]
    order = [int(k) for k in _ranked(scorer.violation[:K] == 0.0, scorer.cost[:K])]
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
            out.attempts.append(Attempt(k, X0[k].copy(), "unrepaired", r.seconds,
                                        float(scorer.cost[k]), float(scorer.violation[k]), 0))
        report(done=pos + 1, total=K, phase="cpsat")
        full = max_flips is None
        if full and r.status == "optimal" and not flip_price:
            out.proven_optimal = True
        if full and r.status == "infeasible":
            out.proven_infeasible = True
    if flip_price and statuses and all(s == "optimal" for s in statuses) and reached.all():
        out.proven_optimal = max_flips is None
