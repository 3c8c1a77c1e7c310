"""The audit RPCs: requests -> options of :mod:`flipfix.service.audit_jobs`, reports <-> replies."""

from __future__ import annotations

import math
from typing import Any, Sequence

from flipfix.repair.errors import InputError, LimitError
from flipfix.repair.model.problem import Problem

from flipfix.service.convert.enums import (
    METHOD_ENUM, METHOD_NAMES, REFERENCE_ENUM, REFERENCE_NAMES, SHAPE_ENUM, SHAPE_NAMES,
    STOP_ENUM, STOP_NAMES, enum_name, proto_to_solvers,
)
from flipfix.service.convert.labels import label_to_py, py_to_label
from flipfix.service.convert.options import DEFAULT_TIME_LIMIT, nonneg, time_limit
from flipfix.service.convert.results import _point
from flipfix.service.generated import flipfix_pb2 as pb

__all__ = [
    "DEFAULT_SCENARIOS", "family_to_domain", "family_to_proto", "stress_to_kwargs",
    "pareto_to_kwargs", "robustness_to_reply", "stress_to_reply", "pareto_to_reply",
    "curation_to_reply", "reply_to_robustness", "reply_to_stress", "reply_to_point",
    "reply_to_curation",
]

DEFAULT_SCENARIOS = 20


def _set_opt(msg, name: str, v: float | None) -> None:
    if v is not None and math.isfinite(v):
        setattr(msg, name, float(v))


def _get_opt(msg, name: str) -> float:
    return getattr(msg, name) if msg.HasField(name) else math.nan


def family_to_domain(f: pb.ScenarioFamily, problem: Problem, *, field: str = "family"):
    """ScenarioFamily proto -> validated :class:`flipfix.repair.audit.stress.ScenarioFamily`."""
    from flipfix.repair.audit.stress import ScenarioFamily

    reference = enum_name(REFERENCE_NAMES, f.reference, field + ".reference",
                          pb.ReferenceKind)
    shape = enum_name(SHAPE_NAMES, f.hamming_shape, field + ".hamming_shape",
                      pb.PenaltyShape)
    weights = None
    if len(f.capacity_weights):
        weights = {}
        for k, t in enumerate(f.capacity_weights):
            lab = label_to_py(t.label, f"{field}.capacity_weights[{k}].label")
            problem.lookup(lab, f"{field}.capacity_weights[{k}].label")
            if lab in weights:
                raise InputError(f"{field}.capacity_weights[{k}].label", f"{lab!r} given twice")
            weights[lab] = nonneg(t.bias, f"{field}.capacity_weights[{k}].bias")
    fam = ScenarioFamily(
        hamming_weight=float(f.hamming_weight), hamming_shape=shape,
        hamming_threshold=float(f.hamming_threshold),
        hamming_fraction=float(f.hamming_fraction) if f.hamming_fraction != 0 else 1.0,
        reference=reference,
        perturb_rate=float(f.perturb_rate) if f.HasField("perturb_rate") else 0.1,
        fix_k=int(f.fix_k), capacity_cut_percent=float(f.capacity_cut_percent),
        capacity_weights=weights, unavailable_values=int(f.unavailable_values),
        must_change=int(f.must_change))
    fam.validate(problem, field=field)
    return fam


def family_to_proto(fam) -> pb.ScenarioFamily:
    """:class:`flipfix.repair.audit.stress.ScenarioFamily` -> proto (the client's side)."""
    msg = pb.ScenarioFamily(
        hamming_weight=fam.hamming_weight, hamming_shape=SHAPE_ENUM[fam.hamming_shape],
        hamming_threshold=fam.hamming_threshold, hamming_fraction=fam.hamming_fraction,
        reference=REFERENCE_ENUM[fam.reference], perturb_rate=fam.perturb_rate,
        fix_k=int(fam.fix_k), capacity_cut_percent=fam.capacity_cut_percent,
        unavailable_values=int(fam.unavailable_values), must_change=int(fam.must_change))
    for lab, w in (fam.capacity_weights or {}).items():
        msg.capacity_weights.append(pb.LinearTerm(label=py_to_label(lab), bias=float(w)))
    return msg


def stress_to_kwargs(r: pb.StressRequest, problem: Problem, *, default_time_limit: float,
                     max_scenarios: int | None = None, field: str = "") -> tuple[Any, dict]:
    """StressRequest -> (ScenarioFamily, keyword arguments of :func:`flipfix.service.audit_jobs.stress`).

    ``time_limit`` is the requested whole-run budget (the server caps it); ``field``
    prefixes the error fields (``"stress."`` inside a CurateRequest).
    """
    fam = family_to_domain(r.family, problem, field=field + "family")
    scenarios = int(r.scenarios) or DEFAULT_SCENARIOS
    if max_scenarios is not None and scenarios > max_scenarios:
        raise LimitError(field + "scenarios", f"{scenarios} scenarios exceed the limit of {max_scenarios}")
    method = enum_name(METHOD_NAMES, r.method, field + "method", pb.Method)
    t = time_limit(r, "time_limit", field + "time_limit", default_time_limit)
    opts: dict = {"flip_price": nonneg(r.flip_price, field + "flip_price")}
    if r.HasField("max_flips"):
        opts["max_flips"] = int(r.max_flips)
    return fam, {
        "scenarios": scenarios, "seed": int(r.seed), "method": method,
        "time_limit": t,
        "epsilon": nonneg(r.epsilon, field + "epsilon"), "repair_options": opts,
    }


def pareto_to_kwargs(r: pb.ParetoRequest, *, default_time_limit: float = DEFAULT_TIME_LIMIT
                     ) -> dict:
    """ParetoRequest options -> keyword arguments of :func:`flipfix.service.audit_jobs.pareto`."""
    methods = [enum_name(METHOD_NAMES, m, f"methods[{k}]", pb.Method)
               for k, m in enumerate(r.methods)]
    if r.seed >= 2**31:
        raise InputError("seed", f"must be below 2^31, got {r.seed}")
    t = time_limit(r, "time_limit", "time_limit", default_time_limit)
    if r.HasField("fewest_flips_within_percent"):
        nonneg(r.fewest_flips_within_percent, "fewest_flips_within_percent")
    return {"methods": tuple(methods) or ("greedy", "cpsat"),
            "time_limit": t, "seed": int(r.seed),
            "include_unchanged": not r.exclude_unchanged}


# replies (server side) ------------------------------------------------------
def robustness_to_reply(rep, *, revision: int = 0) -> pb.RobustnessReply:
    """:class:`flipfix.repair.audit.robustness.RobustnessReport` -> RobustnessReply."""
    return pb.RobustnessReply(
        epsilon=rep.epsilon, best_id=rep.best_id, num_variables=rep.n_variables,
        num_decisions=rep.n_decisions, revision=revision,
        profiles=[pb.CandidateProfile(
            candidate_id=p.candidate_id, energy=p.energy, free_variables=p.free_variables,
            free_decisions=p.free_decisions, improving=p.improving,
            min_flip_cost=p.min_flip_cost, within_1pct=p.within_1pct, within_5pct=p.within_5pct,
            distance_to_best=p.distance_to_best, nearest_other=p.nearest_other,
            nearest_other_id=p.nearest_other_id, spectrum=[float(v) for v in p.spectrum])
            for p in rep.profiles])


def stress_to_reply(rep, *, matrices: bool = False, time_limit: float = 0.0,
                    revision: int = 0) -> pb.StressReply:
    """:class:`flipfix.repair.audit.stress.StressReport` -> StressReply (NaN figures left unset)."""
    out = pb.StressReply(
        method_used=METHOD_ENUM[rep.method], seed=rep.seed, epsilon=rep.epsilon,
        scenarios_requested=rep.scenarios_requested, scenarios_done=rep.scenarios_done,
        stop_reason=STOP_ENUM[rep.stopped], message=rep.message, seconds=rep.seconds, time_limit=time_limit,
        correlated=rep.correlated, revision=revision)
    _set_opt(out, "pearson", rep.pearson)
    _set_opt(out, "spearman", rep.spearman)
    for c in rep.candidates:
        row = pb.CandidateStress(candidate_id=c.candidate_id, energy=c.energy,
                                 free_variables=c.free_variables,
                                 free_decisions=c.free_decisions, wins=c.wins,
                                 win_rate=c.win_rate if math.isfinite(c.win_rate) else 0.0,
                                 worst_flips=c.worst_flips, failures=c.failures)
        for name in ("mean_cost", "worst_cost", "mean_regret", "mean_flips"):
            _set_opt(row, name, getattr(c, name))
        out.candidates.append(row)
    for s, d, b, w in zip(rep.scenario_seeds, rep.scenario_descriptions, rep.scenario_best,
                          rep.winners):
        sc = pb.StressScenario(seed=int(s), description=d, winners=list(w))
        _set_opt(sc, "best_cost", b)
        out.scenarios.append(sc)
    if matrices:
        for c, f, ok in zip(rep.cost, rep.flips, rep.feasible):
            out.rows.append(pb.StressRow(cost=[float(v) for v in c], flips=[int(v) for v in f],
                                         feasible=[bool(v) for v in ok]))
    return out


def pareto_to_reply(front, *, cheapest=None, fewest=None, seconds: float = 0.0,
                    time_limit: float = 0.0, revision: int = 0) -> pb.ParetoReply:
    out = pb.ParetoReply(front=[_point(p) for p in front], seconds=seconds,
                         time_limit=time_limit, revision=revision)
    if cheapest is not None:
        out.cheapest_within.CopyFrom(_point(cheapest))
    if fewest is not None:
        out.fewest_flips_within.CopyFrom(_point(fewest))
    return out


def curation_to_reply(stress: pb.StressReply, cur, *, kept: bool = False,
                      removed: Sequence[str] = (), message: str = "",
                      revision: int = 0) -> pb.CurateReply:
    """A StressReply plus :class:`flipfix.repair.audit.curation.CurationResult` (or None) -> CurateReply."""
    out = pb.CurateReply(stress=stress, kept=kept, removed_ids=list(removed), message=message,
                         revision=revision)
    if cur is not None:
        out.kept_ids.extend(cur.kept_ids)
        out.scenarios = cur.scenarios
        out.total_cost, out.full_total_cost = cur.total_cost, cur.full_total_cost
        out.uncovered = cur.uncovered
        out.mean_gap, out.worst_gap, out.relative_gap = cur.mean_gap, cur.worst_gap, cur.relative_gap
        out.curve.extend(cur.curve)
    return out


# replies -> domain objects (client side) -----------------------------------
def reply_to_robustness(r: pb.RobustnessReply):
    """RobustnessReply -> :class:`flipfix.repair.audit.robustness.RobustnessReport`."""
    from flipfix.repair.audit.robustness import CandidateProfile, RobustnessReport

    return RobustnessReport(
        epsilon=r.epsilon, best_id=r.best_id, n_variables=r.num_variables,
        n_decisions=r.num_decisions,
        profiles=[CandidateProfile(
            candidate_id=p.candidate_id, energy=p.energy, free_variables=p.free_variables,
            free_decisions=p.free_decisions, improving=p.improving,
            min_flip_cost=p.min_flip_cost, within_1pct=p.within_1pct, within_5pct=p.within_5pct,
            distance_to_best=p.distance_to_best, nearest_other=p.nearest_other,
            nearest_other_id=p.nearest_other_id, spectrum=list(p.spectrum)) for p in r.profiles])


def reply_to_stress(r: pb.StressReply, *, family: dict | None = None):
    """StressReply -> :class:`flipfix.repair.audit.stress.StressReport` (matrices empty unless requested)."""
    from flipfix.repair.audit.stress import CandidateStress, StressReport

    return StressReport(
        family=dict(family or {}), method=METHOD_NAMES[r.method_used], seed=int(r.seed), epsilon=r.epsilon,
        scenarios_requested=r.scenarios_requested, scenarios_done=r.scenarios_done,
        stopped=STOP_NAMES.get(r.stop_reason, ""), seconds=r.seconds,
        candidates=[CandidateStress(
            candidate_id=c.candidate_id, energy=c.energy, free_variables=c.free_variables,
            free_decisions=c.free_decisions, wins=c.wins, win_rate=c.win_rate, mean_cost=_get_opt(c, "mean_cost"),
            worst_cost=_get_opt(c, "worst_cost"), mean_regret=_get_opt(c, "mean_regret"),
            mean_flips=_get_opt(c, "mean_flips"), worst_flips=c.worst_flips,
            failures=c.failures) for c in r.candidates],
        scenario_seeds=[int(s.seed) for s in r.scenarios],
        scenario_descriptions=[s.description for s in r.scenarios],
        scenario_best=[_get_opt(s, "best_cost") for s in r.scenarios],
        winners=[list(s.winners) for s in r.scenarios],
        cost=[list(row.cost) for row in r.rows], flips=[list(row.flips) for row in r.rows],
        feasible=[list(row.feasible) for row in r.rows],
        pearson=r.pearson if r.HasField("pearson") else None,
        spearman=r.spearman if r.HasField("spearman") else None,
        correlated=r.correlated, message=r.message)


def reply_to_point(p: pb.ParetoPoint):
    from flipfix.repair.result import ParetoPoint

    return ParetoPoint(cost=p.cost, flips=int(p.flips), candidate_id=p.candidate_id,
                       method=proto_to_solvers(p.solvers))


def reply_to_curation(r: pb.CurateReply, m: int, selection: str = "forward"):
    """CurateReply -> :class:`flipfix.repair.audit.curation.CurationResult` (None when nothing was chosen).

    ``kept_indices`` are positions in the audited library (the stress report's order).
    """
    from flipfix.repair.audit.curation import CurationResult

    if not r.kept_ids:
        return None
    pos = {c.candidate_id: k for k, c in enumerate(r.stress.candidates)}
    return CurationResult(
        method=selection, m=m, kept_ids=list(r.kept_ids),
        kept_indices=[pos.get(i, -1) for i in r.kept_ids], scenarios=r.scenarios,
        total_cost=r.total_cost, full_total_cost=r.full_total_cost, uncovered=r.uncovered,
        mean_gap=r.mean_gap, worst_gap=r.worst_gap, relative_gap=r.relative_gap,
        curve=list(r.curve))
