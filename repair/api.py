"""repair(): validate once, run a plan, score every attempt, build the result."""

from __future__ import annotations

import contextlib
import gc
import math
import threading
import time
from typing import Any, Callable, Sequence

import numpy as np

from flipfix.repair.model.candidates import CandidateSet
from flipfix.repair.lowering.compiled import Compiled, compile_constraints
from flipfix.repair.errors import InputError
from flipfix.repair.model.problem import Problem
from flipfix.repair.kernels.scores import Scorer, distances
from flipfix.repair.solvers.portfolio import (DEFAULT_MIX, Mix, answer_order, attempt_scores,
                                              run_plan)
from flipfix.repair.result import METHODS, UNSCORED, Audit, RepairResult, Solution
from flipfix.repair.solvers.alternatives import check_alternatives, pick_alternatives

__all__ = ["repair", "warm_up", "check_options", "result_seconds", "search_deadline",
           "plan_reference", "published_plan"]


def warm_up() -> None:
    """Load (or, on a machine's first run, compile) every search kernel once per process:
    greedy, the scorer and annealing. Set-up, never counted against a budget; a cold
    compile is announced on stderr first (:mod:`flipfix.repair.kernels.readiness`)."""
    from flipfix.repair.kernels import readiness

    readiness.warm_up()


def check_options(*, method: Any, time_limit: Any, max_flips: Any, flip_price: Any, seed: Any,
                  workers: Any) -> None:
    """Validate the solver options; errors name the option."""
    if method not in METHODS:
        raise InputError("method", f"must be one of {METHODS}, got {method!r}")
    if isinstance(time_limit, bool) or not isinstance(time_limit, (int, float)) or not (
            math.isfinite(time_limit) and time_limit > 0):
        raise InputError("time_limit", f"must be a positive number of seconds, got {time_limit!r}")
    if max_flips is not None and (isinstance(max_flips, bool) or not isinstance(max_flips, int)
                                  or max_flips < 0):
        raise InputError("max_flips", f"must be a whole number >= 0, got {max_flips!r}")
    if isinstance(flip_price, bool) or not isinstance(flip_price, (int, float)) or not (
            math.isfinite(flip_price) and flip_price >= 0):
        raise InputError("flip_price", f"must be a finite number >= 0, got {flip_price!r}")
    if isinstance(seed, bool) or not isinstance(seed, int) or not 0 <= seed < 2**31:
        raise InputError("seed", f"must be a whole number in [0, 2^31), got {seed!r}")
    if isinstance(workers, bool) or not isinstance(workers, int) or not 1 <= workers <= 64:
        raise InputError("workers", f"must be a whole number from 1 to 64, got {workers!r}")


def _changes(problem: Problem, before: np.ndarray, after: np.ndarray) -> list:
    if not problem.decisions:
        return []
    from flipfix.repair.model.encodings import integer_changes

    return list(integer_changes(problem, before, after))


#: seconds building a result takes (:func:`result_seconds`): a fixed part (the best answer's
#: breakdown, lists and dicts), per candidate scored (its audit entries: numpy columns), per
#: candidate scored and variable (the distances to the best answer), per variable (the
#: answer's assignment and breakdown) and per attempt on the cost-flips front (pareto=True).
#: Measured with the audit by column (bench/budget.py's models, method greedy, T = 1 s, three
#: runs each on the 2-vCPU development machine shared with other work), plus half:
#: 0.0003-0.0007 s at 1,000 variables x 100 candidates, 0.002-0.003 s at 1,000 x 10,000,
#: 0.009-0.043 s at 20,000 x 1,000, 0.015-0.041 s at 20,000 x 10,000, 0.03-0.075 s at
#: 100,000 x 1,000.
RESULT_FIXED = 0.004
RESULT_PER_CANDIDATE = 1.5e-6
RESULT_PER_CELL = 1.5e-10
RESULT_PER_VARIABLE = 4e-7
RESULT_PER_ATTEMPT = 1e-6
#: most of the search's time (from the end of lowering to the search deadline) that scoring
#: the library may take; the candidates it does not reach are reported unscored
SCORING_SHARE = 0.5


def result_seconds(candidates: int, variables: int, *, attempts: int = 0,
                   decisions: int = 0) -> float:
    """Predicted seconds to build the result of ``candidates`` x ``variables`` (the reply
    keeps them back from the search): ``attempts`` repaired assignments go on the
    cost-flips front, ``decisions`` integer decisions are decoded for every candidate."""
    per_candidate = RESULT_PER_CANDIDATE * (1 + decisions)
    return (RESULT_FIXED + per_candidate * candidates
            + RESULT_PER_CELL * candidates * variables + RESULT_PER_VARIABLE * variables
            + RESULT_PER_ATTEMPT * attempts)


def search_deadline(t0: float, time_limit: float, reserve: float) -> float:
    """The deadline of the search (a ``time.perf_counter()`` value): the budget measured
    from the call's entry ``t0``, less ``reserve`` seconds kept for building the result,
    but never before ``t0`` (a budget that cannot pay for the result still searches for
    nothing and replies)."""
    return t0 + max(0.0, time_limit - reserve)


def plan_reference(compiled: Compiled):
    """The published plan the late constraints measure distance from: the reference of
    the first Hamming-type penalty (``HammingPenalty``: every label in its reference;
    ``DecisionChangePenalty``: the bits of every decision in its reference, at that value's
    code), as (positions int64, bits int8), kept by its lowering; None when there is none."""
    return next((p.reference for p in compiled.pieces if p.reference is not None), None)


_GC_LOCK = threading.Lock()
_GC_HELD = [0, False]  # calls inside, and whether the collector was on before the first


@contextlib.contextmanager
def _collector_paused():
    """Python's cyclic garbage collector off while any repair call runs (on again when
    the last one returns, if it was on): a full collection walks every object of the
    process and paused calls for 0.1-0.15 s in bench/budget.py, half a 0.2 s budget.
    Reference counting still frees everything that is not in a cycle."""
    with _GC_LOCK:
        if _GC_HELD[0] == 0:
            _GC_HELD[1] = gc.isenabled()
            gc.disable()
        _GC_HELD[0] += 1
    try:
        yield
    finally:
        with _GC_LOCK:
            _GC_HELD[0] -= 1
            if _GC_HELD[0] == 0 and _GC_HELD[1]:
                gc.enable()


def repair(
    problem: Problem, candidates: CandidateSet, constraints: Sequence[Any] = (), *,
    method: str = "portfolio", time_limit: float = 5.0, max_flips: int | None = None,
    flip_price: float = 0.0, seed: int = 0, workers: int = 1, pareto: bool = False,
    cancel: threading.Event | None = None,
    progress: Callable[[dict], None] | None = None,
    compiled: Compiled | None = None, mix: Mix = DEFAULT_MIX,
    alternatives: int = 0, alternative_distance: int = 1, alternatives_by: str = "flips",
    candidate_runner=None, plan: Any = None,
) -> RepairResult:
    """Repair every candidate under the late constraints; return the best and the audit.

    Never raises for infeasibility or an exhausted budget: see ``RepairResult.status``.
    ``compiled`` may pass a precompiled ``compile_constraints(problem, constraints)``;
    ``mix`` sets how the portfolio shares its budget (see :class:`flipfix.repair.solvers.portfolio.Mix`).
    ``workers`` is the number of search threads: CP-SAT's workers, and the threads greedy
    descends its batches with (greedy answers do not depend on it; only what fits in the
    budget does).

    The budget covers the whole call from its entry (after the one-time kernel warm-up):
    lowering the constraints, scoring the library, the search and building the result;
    ``RepairResult.seconds`` is that time.

    ``alternatives`` > 0 also returns up to that many feasible answers pairwise at least
    ``alternative_distance`` apart (``alternatives_by``: "flips" or "decisions"), cheapest
    first (:mod:`flipfix.repair.solvers.alternatives`); a fifth of the budget is kept for them.

    ``candidate_runner`` (a :class:`flipfix.repair.solvers.candidate_runner.CandidateRunner`,
    e.g. a Dask cluster): the greedy repair of each candidate of a large library runs there,
    in chunks, with the same answers; the rest of the plan runs here.

    ``plan``: the plan in force (usually the published one), the id of one of the candidates
    or an assignment (n,) in the problem's vartype and label order. The answer's ``plan_distance`` is then its
    Hamming distance from it; among answers of equal objective the one nearest to it is
    reported, and the last steps move the best answers toward it where that costs nothing
    (instead of toward their own candidates: fewest changes to what was published).
    Without it, ``plan_distance`` counts from the reference of the first Hamming-type
    penalty (:func:`plan_reference`).
    """
    # one-time costs per process, kept out of the budget: the compiled kernels (loaded
    # from the cache, or compiled on a machine's first run) and OR-Tools
    warm_up()
    if method in ("portfolio", "cpsat"):
        from flipfix.repair.solvers import cpsat  # noqa: F401
    with _collector_paused():
        return _repair(problem, candidates, constraints, method=method, time_limit=time_limit,
                       max_flips=max_flips, flip_price=flip_price, seed=seed, workers=workers,
                       pareto=pareto, cancel=cancel, progress=progress, compiled=compiled,
                       mix=mix, t0=time.perf_counter(), alternatives=alternatives,
                       alternative_distance=alternative_distance,
                       alternatives_by=alternatives_by, candidate_runner=candidate_runner,
                       plan=plan)


def published_plan(problem: Problem, candidates: CandidateSet, plan: Any) -> np.ndarray | None:
    """The ``plan`` option of :func:`repair` as int8 (n,) 0/1 (None for None): a candidate
    id of ``candidates``, or an assignment (n,) in the problem's vartype."""
    if plan is None:
        return None
    if isinstance(plan, str):
        if plan not in candidates.ids:
            raise InputError("plan", f"no candidate with id {plan!r}")
        return np.ascontiguousarray(candidates.X[candidates.ids.index(plan)], dtype=np.int8)
    values = np.asarray(plan)
    if values.shape != (problem.n,):
        raise InputError("plan", f"must be a candidate id or {problem.n} values, got shape "
                                 f"{values.shape}")
    return np.ascontiguousarray(problem.from_caller(values, field="plan"), dtype=np.int8)


def _repair(problem, candidates, constraints, *, method, time_limit, max_flips, flip_price,
            seed, workers, pareto, cancel, progress, compiled, mix, t0, alternatives=0,
            alternative_distance=1, alternatives_by="flips",
            candidate_runner=None, plan=None) -> RepairResult:
    if not isinstance(problem, Problem):
        raise InputError("problem", f"expected a Problem, got {type(problem).__name__}")
    if not isinstance(candidates, CandidateSet):
        raise InputError("candidates", f"expected a CandidateSet, got {type(candidates).__name__}")
    if candidates.X.ndim != 2 or candidates.X.shape[1] != problem.n:
        raise InputError("candidates", f"must have {problem.n} columns, got {candidates.X.shape}")
    if not isinstance(mix, Mix):
        raise InputError("mix", f"expected a flipfix.repair.solvers.portfolio.Mix, got {type(mix).__name__}")
    check_options(method=method, time_limit=time_limit, max_flips=max_flips,
                  flip_price=flip_price, seed=seed, workers=workers)
    check_alternatives(alternatives=alternatives, alternative_distance=alternative_distance,
                       alternatives_by=alternatives_by)
    if alternatives_by == "decisions" and not problem.decisions:
        raise InputError("alternatives_by", "the problem declares no decisions")
    plan_x = published_plan(problem, candidates, plan)
    if compiled is None:
        compiled = compile_constraints(problem, list(constraints))
    X0 = np.ascontiguousarray(candidates.X, dtype=np.int8)
    price = float(flip_price)
    plan_ref = (plan_reference(compiled) if plan_x is None
                else (np.arange(problem.n, dtype=np.int64), plan_x))
    t_lowered = time.perf_counter()
    # scoring the library, with what building the result will take for each candidate
    # scored, may take at most SCORING_SHARE of the time left after lowering and the
    # result's fixed part: past it, the rest of the library is reported unscored (and not
    # searched from)
    decisions = len(problem.decisions)
    fixed_part = result_seconds(0, problem.n, decisions=decisions)
    per_candidate = result_seconds(1, problem.n, attempts=2 if pareto else 0,
                                   decisions=decisions) - fixed_part
    # kept for the alternatives' own CP-SAT searches
    held = ALTERNATIVES_SHARE * float(time_limit) if alternatives else 0.0
    share = SCORING_SHARE * max(0.0, search_deadline(t0, float(time_limit), held + fixed_part)
                                - t_lowered)
    scorer = Scorer(compiled, X0, workers=workers, deadline=t_lowered + share,
                    later_per_row=per_candidate)
    # where the time went (stats): lowering, scoring the library, search, the result
    stages = {"lowering": t_lowered - t0, "scoring": time.perf_counter() - t_lowered}
    common = dict(max_flips=max_flips, pareto=pareto, plan_ref=plan_ref, plan_x=plan_x,
                  stages=stages)

    def report(**kw):
        if progress is not None:
            kw.setdefault("best_cost", None)
            progress(kw)

    if compiled.fix_conflicts:
        label, first, second = compiled.fix_conflicts[0]
        res = _build(problem, candidates, compiled, scorer, [], price, method, seed, t0,
                     status="infeasible", **common,
                     message=f"{first!r} and {second!r} fix variable {label!r} to different "
                             f"values")
        return _name_conflict(res, compiled, time_limit=time_limit, seed=seed, cancel=cancel,
                              t0=t0)
    # the front's attempts are not known yet: those of greedy plus a round of kicks
    reserve = held + fixed_part + per_candidate * scorer.scored
    plan = run_plan(compiled, X0, method=method,
                    deadline=search_deadline(t0, float(time_limit), reserve),
                    max_flips=max_flips, flip_price=price, seed=seed, workers=workers,
                    cancel=cancel, progress=report, mix=mix, scorer=scorer,
                    runner=candidate_runner, plan=plan_x)
    res = _build(problem, candidates, compiled, scorer, plan.attempts, price, method, seed, t0,
                 plan=plan, **common)
    res = _name_conflict(res, compiled, time_limit=time_limit, seed=seed, cancel=cancel, t0=t0)
    if alternatives and res.best.feasible:
        res.alternatives = _alternatives(problem, candidates, compiled, plan.attempts, res,
                                         k=alternatives, distance=alternative_distance,
                                         by_decisions=alternatives_by == "decisions",
                                         flip_price=price, max_flips=max_flips, seed=seed,
                                         workers=workers, cancel=cancel,
                                         time_limit=float(time_limit) - (time.perf_counter() - t0))
        res.seconds = time.perf_counter() - t0
    return res


#: the conflict search's time when the budget is spent (a small model needs a few
#: milliseconds; a busy machine more), for hard parts up to CONFLICT_SMALL entries
CONFLICT_MIN_SECONDS = 0.25
#: conflict models (variables plus row entries plus fixings) larger than this get only what
#: is left of the budget, and none when that cannot pay for building its model
#: (CONFLICT_BUILD_SECONDS per entry): at 100,000 variables its build and first solve took
#: 0.45-1.3 s (bench/budget.py), past a 0.1 s budget's reply
CONFLICT_SMALL = 10_000
#: seconds per entry of building the conflict search's CP-SAT model (0.53 s for 100,000
#: variables and 1,000 fixings, bench/budget.py under load)
CONFLICT_BUILD_SECONDS = 5e-6
#: share of the budget kept for the alternatives' CP-SAT searches when they are asked for
ALTERNATIVES_SHARE = 0.2


def _alternatives(problem, candidates, compiled, attempts, res, *, k, distance, by_decisions,
                  flip_price, max_flips, seed, workers, cancel, time_limit) -> list:
    """The best answer, every attempt and the scored candidates no attempt started from (as
    they are) as the pool of :func:`pick_alternatives`; the alternatives get their candidate
    ids and caller-form assignments."""
    X0 = np.ascontiguousarray(candidates.X, dtype=np.int8)
    best_k = candidates.ids.index(res.best.repaired_from) if res.best.repaired_from else -1
    idle = np.flatnonzero(res.audit.method == "unrepaired")  # scored, as they are
    pool = np.vstack([res.best.x] + [a.x for a in attempts] + [X0[idle]])
    origins = np.concatenate([[best_k], [a.k for a in attempts], idle]).astype(np.int64)
    out = pick_alternatives(compiled, X0, pool, k=k, distance=distance,
                            by_decisions=by_decisions, flip_price=flip_price,
                            max_flips=max_flips, origins=origins,
                            time_limit=max(0.0, time_limit), seed=seed, workers=workers,
                            cancel=cancel)
    for a in out:
        a.candidate_id = candidates.ids[a.source]
        a.assignment = dict(zip(problem.labels, problem.to_caller(a.x).tolist()))
    return out


def _name_conflict(res: RepairResult, compiled: Compiled, *, time_limit, seed, cancel, t0
                   ) -> RepairResult:
    """Without a feasible answer, name a minimal set of hard late constraints that conflict
    (:mod:`flipfix.repair.solvers.conflicts`, in what is left of the budget, at least
    CONFLICT_MIN_SECONDS when the hard part is small, else only what is left); a proved
    conflict makes the status "infeasible" and the message names it. A cancel stops it with
    what it has proved."""
    if (res.status not in ("infeasible", "no_feasible_found") or not compiled.has_hard
            or (cancel is not None and cancel.is_set())):
        return res
    from flipfix.repair.solvers.conflicts import name_conflict

    left = float(time_limit) - (time.perf_counter() - t0)
    entries = compiled.n + compiled.a_data.size + int((compiled.fixed >= 0).sum())
    if entries <= CONFLICT_SMALL:
        left = max(CONFLICT_MIN_SECONDS, left)
    elif left <= CONFLICT_BUILD_SECONDS * entries:
        return res  # its model's build alone would pass the budget: the reply stays in it
    conflict = name_conflict(compiled, time_limit=left, seed=seed, cancel=cancel)
    if conflict.status == "conflict":  # a proof: a search that found nothing is now "infeasible"
        res.conflict = conflict
        res.message = (f"{res.message}; {conflict.message}" if res.status == "infeasible"
                       and res.message else conflict.message)
        res.status = "infeasible"
    res.seconds = time.perf_counter() - t0
    return res


def _build(problem, candidates, compiled, scorer, attempts, price, method, seed, t0, *, pareto,
           max_flips=None, status=None, message="", plan=None, plan_ref=None, plan_x=None,
           stages=None) -> RepairResult:
    """The result from every attempt's scores (see :func:`flipfix.repair.solvers.portfolio.attempt_scores`):
    the best, the audit (by column, :class:`flipfix.repair.result.Audit`), the front; only the
    best is evaluated by part. Scored candidates no attempt started from stand as they are
    ("unrepaired"); those the scorer did not reach are reported "unscored" (NaN figures) and
    are not compared with the answer. ``stages``: seconds of the stages before, completed
    here and kept in ``stats["seconds"]``."""
    t_build = time.perf_counter()
    X0 = scorer.X0
    K = X0.shape[0]
    ns = scorer.scored
    A = len(attempts)
    ks, cost, viol, flips = attempt_scores(scorer, attempts)
    methods = [a.method for a in attempts]
    # the scored candidates no attempt started from: as they are
    tried = np.zeros(K, dtype=bool)
    tried[ks] = True
    idle = np.flatnonzero(~tried[:ns])
    if idle.size:
        ks = np.concatenate([ks, idle])
        cost = np.concatenate([cost, scorer.cost[idle]])
        viol = np.concatenate([viol, scorer.violation[idle]])
        flips = np.concatenate([flips, np.zeros(idle.size, dtype=np.int64)])
        methods += ["unrepaired"] * idle.size

    def x_of(i: int) -> np.ndarray:
        return attempts[i].x if i < A else X0[ks[i]]

    if max_flips is not None:  # the cap is hard: flips past it count as violation
        viol = viol + np.maximum(0, flips - max_flips)
    feas = viol == 0.0
    obj = cost + price * flips
    order = answer_order(ks=ks, obj=obj, viol=viol, flips=flips, plan=plan_x, x_of=x_of)
    b = int(order[0])
    xb = x_of(b)
    origin = int(ks[b])
    # the answer is reported against the scored library candidate nearest to it (the one it
    # was repaired from on ties): the smallest change from any plan the user keeps. Audit
    # rows stay per origin: each row is what that candidate's own repair reached.
    dist = distances(X0[:ns], xb)
    bk = origin if dist[origin] == dist.min() else int(np.argmin(dist))
    # best per candidate (feasible first, then objective, then flips): its first in order
    first = np.full(K, -1, dtype=np.int64)
    seen, at = np.unique(ks[order], return_index=True)
    first[seen] = order[at]
    seconds = np.bincount(ks[:A], weights=[a.seconds for a in attempts], minlength=K)
    issues: dict = {}
    changed = np.zeros(K, dtype=np.int64)
    if problem.decisions:  # broken encodings are repair input; the audit names them
        from flipfix.repair.model.encodings import check_candidates, decode_indices

        for i in check_candidates(problem, X0):
            issues.setdefault(i.candidate, []).append((i.decision, i.how))
        after = np.vstack([x_of(a) if a >= 0 else X0[k] for k, a in enumerate(first.tolist())])
        M0, M1 = decode_indices(problem, X0), decode_indices(problem, after)
        changed = ((M0 != M1) | (M0 < 0)).sum(axis=1)  # as integer_changes counts them
    reached = first >= 0  # every scored candidate (attempted or idle); no unscored one
    pick = np.where(reached, first, 0)
    nan = np.full(K, np.nan)
    method_col = np.array(methods, dtype=object)[pick] if methods else np.empty(K, object)
    method_col[~reached] = UNSCORED
    audit = Audit(candidates.ids, encoding_issues=issues,
                  cost_before=scorer.cost, feasible_before=scorer.violation == 0.0,
                  cost_after=np.where(reached, cost[pick], nan),
                  objective_after=np.where(reached, obj[pick], nan),
                  flips=np.where(reached, flips[pick], 0),
                  feasible=reached & feas[pick], violation=np.where(reached, viol[pick], nan),
                  method=method_col, seconds=seconds, decisions_changed=changed)
    ids = candidates.ids
    ev = compiled.evaluate(xb[None, :])
    # a decision's validity row is listed only when the answer breaks it
    violations = {name: float(v[0]) for name, v in ev.violations.items()
                  if v[0] or name not in compiled.encoding_names}
    if max_flips is not None:
        violations["max_flips"] = float(max(0, int(flips[b]) - max_flips))
    changes = _changes(problem, X0[bk], xb)
    best = Solution(
        candidate_id=ids[bk], x=xb.copy(),
        assignment=dict(zip(problem.labels, problem.to_caller(xb).tolist())),
        cost=float(ev.cost[0]), objective=float(ev.cost[0] + price * dist[bk]),
        base_energy=float(ev.base[0]), repaired_from=ids[origin],
        penalties={name: float(v[0]) for name, v in ev.penalties.items()}, flips=int(dist[bk]),
        feasible=bool(feas[b]), violation=float(sum(violations.values())),
        violations=violations, method=methods[b], changes=changes,
        decisions_changed=len(changes),
        plan_distance=None if plan_ref is None else int((xb[plan_ref[0]] != plan_ref[1]).sum()))
    if status is None:
        if best.feasible:
            status = "optimal" if plan is not None and plan.proven_optimal else "feasible"
        elif plan is not None and plan.proven_infeasible:
            status = "infeasible"
            message = "CP-SAT proved that no assignment meets the hard constraints"
        else:
            status = "no_feasible_found"
            message = ("no feasible assignment found within the budget; best is the "
                       "least-violating one")
    if ns < K:
        note = (f"{K - ns} of {K} candidates were not scored within the budget (audit method "
                f"{UNSCORED!r}, NaN costs): the search started from the first {ns}")
        message = f"{message}; {note}" if message else note
    points = []
    if pareto:
        from flipfix.repair.audit.pareto import pareto_front, run_points

        AX = (np.vstack([a.x for a in attempts]) if attempts
              else np.empty((0, problem.n), dtype=np.int8))
        points = pareto_front(run_points(X0[:ns], ids[:ns], scorer.cost[:ns],
                                         scorer.violation[:ns] == 0.0, AX, ks[:A], cost[:A],
                                         feas[:A], methods[:A]))
    stats = plan.stats if plan is not None else {}
    if ns < K:
        stats["unscored"] = K - ns
    if stages is not None:
        done = time.perf_counter()
        stats["seconds"] = {**stages, "search": t_build - t0 - sum(stages.values()),
                            "result": done - t_build}
    return RepairResult(
        status=status, best=best, audit=audit, seed=seed, method=method,
        seconds=time.perf_counter() - t0, message=message, pareto=points,
        scaling_error=plan.scaling_error if plan is not None else 0.0,
        cpsat_status=plan.cpsat_status if plan is not None else "", stats=stats)
