"""repair(): validate once, run a plan, score every attempt, build the result."""

from __future__ import annotations

import math
import threading
import time
from typing import Any, Callable, Sequence

import numpy as np

from flipfix.repair.model.candidates import CandidateSet
from flipfix.repair.lowering.compiled import Compiled, compile_constraints
from flipfix.repair.errors import InputError
from flipfix.repair.model.problem import Problem
from flipfix.repair.solvers.portfolio import DEFAULT_MIX, Mix, run_plan
from flipfix.repair.result import METHODS, AuditRow, RepairResult, Solution

__all__ = ["repair", "check_options"]


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


def repair(
    problem: Problem, candidates: CandidateSet, constraints: Sequence[Any] = (), *,
    method: str = "portfolio", time_limit: float = 5.0, max_flips: int | None = None,
    flip_price: float = 0.0, seed: int = 0, workers: int = 1, pareto: bool = False,
    cancel: threading.Event | None = None,
    progress: Callable[[dict], None] | None = None,
    compiled: Compiled | None = None, mix: Mix = DEFAULT_MIX,
) -> RepairResult:
    """Repair every candidate under the late constraints; return the best and the audit.

    Never raises for infeasibility or an exhausted budget: see ``RepairResult.status``.
    ``compiled`` may pass a precompiled ``compile_constraints(problem, constraints)``;
    ``mix`` sets how the portfolio shares its budget (see :class:`flipfix.repair.solvers.portfolio.Mix`).
    ``workers`` is the number of search threads: CP-SAT's workers, and the threads greedy
    descends its batches with (greedy answers do not depend on it; only what fits in the
    budget does).
    """
    # one-time costs per process, kept out of the budget: the compiled kernels (loaded
    # from the cache, or compiled on a machine's first run) and OR-Tools
    from flipfix.repair.solvers.greedy import warm_up

    warm_up()
    if method in ("portfolio", "cpsat"):
        from flipfix.repair.solvers import cpsat  # noqa: F401
    t0 = time.perf_counter()
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
    if compiled is None:
        compiled = compile_constraints(problem, list(constraints))
    X0 = np.ascontiguousarray(candidates.X, dtype=np.int8)
    K = X0.shape[0]
    price = float(flip_price)

    def report(**kw):
        if progress is not None:
            kw.setdefault("best_cost", None)
            progress(kw)

    if compiled.fix_conflicts:
        label, name = compiled.fix_conflicts[0]
        return _build(problem, candidates, compiled, [], price, method, seed, t0,
                      max_flips=max_flips,
                      status="infeasible", pareto=pareto,
                      message=f"variable {label!r} is fixed to both values ({name})")
    plan = run_plan(compiled, X0, method=method, time_limit=float(time_limit),
                    max_flips=max_flips, flip_price=price, seed=seed, workers=workers,
                    cancel=cancel, progress=report, mix=mix)
    return _build(problem, candidates, compiled, plan.attempts, price, method, seed, t0,
                  max_flips=max_flips,
                  pareto=pareto, plan=plan)


def _build(problem, candidates, compiled, attempts, price, method, seed, t0, *, pareto,
           max_flips=None,
           status=None, message="", plan=None) -> RepairResult:
    X0 = candidates.X
    K = X0.shape[0]
    ev0 = compiled.evaluate(X0)
    if not attempts:  # nothing ran: report the candidates as they are
        from flipfix.repair.solvers.portfolio import Attempt

        attempts = [Attempt(k, X0[k].copy(), "unrepaired", 0.0) for k in range(K)]
    A = np.vstack([a.x for a in attempts]).astype(np.int8)
    ks = np.asarray([a.k for a in attempts])
    ev = compiled.evaluate(A)
    flips = (A != X0[ks]).sum(axis=1)
    if max_flips is not None:  # the cap is hard: flips past it count as violation
        over = np.maximum(0, flips - max_flips).astype(np.float64)
        ev.violations["max_flips"] = over
        ev.violation = ev.violation + over
    # feasible first, then objective, then violation, then flips
    b = int(np.lexsort((flips, ev.cost + price * flips, ev.violation, ~ev.feasible))[0])
    origin = int(ks[b])
    # the answer is reported against the library candidate nearest to it (the one it was
    # repaired from on ties): the smallest change from any plan the user keeps. Audit
    # rows stay per origin: each row is what that candidate's own repair reached.
    dist = (X0 != A[b][None, :]).sum(axis=1)
    bk = origin if dist[origin] == dist.min() else int(np.argmin(dist))
    obj = ev.cost + price * flips
    feas = ev.feasible
    # best per candidate: feasible first, then objective, then flips
    order = np.lexsort((flips, obj, ev.violation, ~feas))
    chosen: dict = {}
    seconds = np.zeros(K)
    for a_idx, a in enumerate(attempts):
        seconds[a.k] += a.seconds
    for a_idx in order:
        chosen.setdefault(int(ks[a_idx]), int(a_idx))
    issues: dict = {}
    if problem.decisions:  # broken encodings are repair input; the audit names them
        from flipfix.repair.model.encodings import check_candidates

        for i in check_candidates(problem, X0):
            issues.setdefault(i.candidate, []).append((i.decision, i.how))
    audit = []
    for k in range(K):
        a_idx = chosen[k]
        changed = len(_changes(problem, X0[k], A[a_idx])) if problem.decisions else 0
        audit.append(AuditRow(
            candidate_id=candidates.ids[k], cost_before=float(ev0.cost[k]),
            feasible_before=bool(ev0.feasible[k]), cost_after=float(ev.cost[a_idx]),
            objective_after=float(obj[a_idx]), flips=int(flips[a_idx]),
            feasible=bool(feas[a_idx]), violation=float(ev.violation[a_idx]),
            method=attempts[a_idx].method, seconds=float(seconds[k]),
            decisions_changed=changed, encoding_issues=issues.get(k, [])))
    changes = _changes(problem, X0[bk], A[b])
    best = Solution(
        candidate_id=candidates.ids[bk], x=A[b].copy(),
        assignment=dict(zip(problem.labels, map(int, problem.to_caller(A[b])))),
        cost=float(ev.cost[b]), objective=float(ev.cost[b] + price * dist[bk]),
        base_energy=float(ev.base[b]), repaired_from=candidates.ids[origin],
        penalties={k: float(v[b]) for k, v in ev.penalties.items()}, flips=int(dist[bk]),
        feasible=bool(feas[b]), violation=float(ev.violation[b]),
        violations={k: float(v[b]) for k, v in ev.violations.items()},
        method=attempts[b].method, changes=changes, decisions_changed=len(changes))
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
    points = []
    if pareto:
        from flipfix.repair.audit.pareto import pareto_front, run_points

        points = pareto_front(run_points(X0, candidates.ids, ev0.cost, ev0.feasible, A, ks,
                                         ev.cost, feas, [a.method for a in attempts]))
    return RepairResult(
        status=status, best=best, audit=audit, seed=seed, method=method,
        seconds=time.perf_counter() - t0, message=message, pareto=points,
        scaling_error=plan.scaling_error if plan is not None else 0.0,
        cpsat_status=plan.cpsat_status if plan is not None else "",
        stats=plan.stats if plan is not None else {})
