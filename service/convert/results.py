"""Repair results: RepairResult -> RepairReply (server) and back (client).

The reply's dict form is the result's own (:meth:`flipfix.repair.result.RepairResult.to_dict`):
:func:`reply_to_dict` rebuilds the RepairResult and asks it, so there is one layout.
"""

from __future__ import annotations

from typing import Mapping

import numpy as np

from flipfix.repair.model.problem import Problem
from flipfix.repair.result import AuditRow, ParetoPoint, RepairResult, Solution
from flipfix.repair.solvers.alternatives import Alternative
from flipfix.repair.solvers.conflicts import Conflict, ConflictMember

from flipfix.service import packing
from flipfix.service.convert.candidates import array_to_packed, packed_to_array
from flipfix.service.convert.labels import py_to_value, value_to_py
from flipfix.service.generated import flipfix_pb2 as pb

__all__ = ["result_to_reply", "reply_values", "reply_to_result", "reply_to_dict"]


def _named(d: Mapping) -> list:
    return [pb.NamedValue(name=str(k), value=float(v)) for k, v in d.items()]


def _change(decision, old, new) -> pb.DecisionChange:
    """One decision change; a value is left unset where the bits broke the encoding (None)."""
    msg = pb.DecisionChange(decision=str(decision))
    if old is not None:
        msg.old_value.CopyFrom(py_to_value(old))
    if new is not None:
        msg.new_value.CopyFrom(py_to_value(new))
    return msg


def _point(p) -> pb.ParetoPoint:
    return pb.ParetoPoint(cost=float(p.cost), flips=int(p.flips), candidate_id=p.candidate_id,
                          method=p.method)


def result_to_reply(res: RepairResult, *, audit_limit: int | None = None,
                    time_limit: float = 0.0, revision: int = 0) -> pb.RepairReply:
    b = res.best
    best = pb.Solution(
        candidate_id=b.candidate_id, repaired_from=b.repaired_from,
        values=array_to_packed(np.asarray(b.x, dtype=np.int8)),
        cost=float(b.cost), objective=float(b.objective), base_energy=float(b.base_energy),
        penalties=_named(b.penalties), flips=int(b.flips), feasible=bool(b.feasible),
        violation=float(b.violation), violations=_named(b.violations), method=b.method,
        changes=[_change(d, o, n) for d, o, n in b.changes],
        decisions_changed=int(b.decisions_changed), plan_distance=b.plan_distance)
    rows = res.audit if audit_limit is None else res.audit[:audit_limit]
    reply = pb.RepairReply(
        status=res.status, message=res.message, method=res.method, seed=int(res.seed),
        seconds=float(res.seconds), time_limit=float(time_limit), best=best,
        audit=[pb.AuditRow(candidate_id=r.candidate_id, cost_before=float(r.cost_before),
                           feasible_before=bool(r.feasible_before), cost=float(r.cost_after),
                           objective=float(r.objective_after), flips=int(r.flips),
                           feasible=bool(r.feasible), violation=float(r.violation),
                           method=r.method, seconds=float(r.seconds),
                           decisions_changed=int(r.decisions_changed),
                           encoding_issues=[pb.EncodingIssue(decision=d, how=h)
                                            for d, h in r.encoding_issues]) for r in rows],
        audit_total=len(res.audit), pareto=[_point(p) for p in res.pareto],
        scaling_error=float(res.scaling_error), cpsat_status=res.cpsat_status, revision=revision)
    if res.conflict is not None:
        reply.conflict.extend(pb.ConflictMember(index=m.index, name=m.name)
                              for m in res.conflict.members)
        reply.conflict_minimal = bool(res.conflict.minimal)
    reply.alternatives.extend(pb.Alternative(
        values=array_to_packed(np.asarray(a.x, dtype=np.int8)[None, :]), cost=float(a.cost),
        objective=float(a.objective), flips=int(a.flips), source_candidate_id=a.candidate_id,
        decisions_changed=int(a.decisions_changed),
        distance_to_previous=int(a.distance_to_previous)) for a in res.alternatives)
    return reply


def _alternative(a: pb.Alternative, problem: Problem | None, k: int) -> Alternative:
    n = problem.n if problem is not None else int(a.values.num_variables)
    x = packed_to_array(a.values, n, field=f"alternatives[{k}].values", count=1)[0]
    return Alternative(x, a.cost, a.objective, -1, int(a.flips), int(a.decisions_changed),
                       int(a.distance_to_previous), "", a.source_candidate_id,
                       None if problem is None
                       else dict(zip(problem.labels, map(int, problem.to_caller(x)))))


def reply_values(r: pb.RepairReply, problem: Problem) -> np.ndarray:
    """The best answer of a reply as int8 (n,) in 0/1 form, ``problem.labels`` order
    (``problem``: the model repaired, i.e. of revision ``r.revision`` or the inline one)."""
    return packed_to_array(r.best.values, problem.n, field="best.values", count=1)[0]


def _value(msg: pb.RepairReply, name: str):
    return value_to_py(getattr(msg, name), name) if msg.HasField(name) else None


def reply_to_result(r: pb.RepairReply, problem: Problem | None = None) -> RepairResult:
    """A RepairReply -> :class:`flipfix.repair.result.RepairResult` (``stats`` empty; the audit
    as the reply carries it, i.e. cut at ``audit_limit``).

    ``problem`` (the model repaired) gives the labels and vartype of ``best.assignment``;
    without it ``best.assignment`` is empty (the packed values need the label order) and
    ``best.x`` is read with the reply's own ``num_variables``.
    """
    b = r.best
    if problem is not None:
        x = reply_values(r, problem)
        assignment = dict(zip(problem.labels, map(int, problem.to_caller(x))))
    else:
        x = packing.unpack_rows(b.values.bits, 1, int(b.values.num_variables),
                                field="best.values")[0]
        assignment = {}
    best = Solution(
        candidate_id=b.candidate_id, x=x, assignment=assignment, cost=b.cost,
        objective=b.objective, base_energy=b.base_energy,
        penalties={p.name: p.value for p in b.penalties}, flips=int(b.flips),
        feasible=bool(b.feasible), violation=b.violation,
        violations={p.name: p.value for p in b.violations}, method=b.method,
        changes=[(c.decision, _value(c, "old_value"), _value(c, "new_value")) for c in b.changes],
        decisions_changed=int(b.decisions_changed), repaired_from=b.repaired_from,
        plan_distance=b.plan_distance if b.HasField("plan_distance") else None)
    audit = [AuditRow(candidate_id=a.candidate_id, cost_before=a.cost_before,
                      feasible_before=bool(a.feasible_before), cost_after=a.cost,
                      objective_after=a.objective, flips=int(a.flips), feasible=bool(a.feasible),
                      violation=a.violation, method=a.method, seconds=a.seconds,
                      decisions_changed=int(a.decisions_changed),
                      encoding_issues=[(e.decision, e.how) for e in a.encoding_issues])
             for a in r.audit]
    return RepairResult(
        status=r.status, best=best, audit=audit, seed=int(r.seed), method=r.method,
        seconds=r.seconds, message=r.message,
        pareto=[ParetoPoint(cost=p.cost, flips=int(p.flips), candidate_id=p.candidate_id,
                            method=p.method) for p in r.pareto],
        scaling_error=r.scaling_error, cpsat_status=r.cpsat_status,
        conflict=Conflict("conflict", tuple(ConflictMember(m.index, m.name) for m in r.conflict),
                          bool(r.conflict_minimal), message=r.message) if r.conflict else None,
        alternatives=[_alternative(a, problem, k) for k, a in enumerate(r.alternatives)])


def reply_to_dict(r: pb.RepairReply, problem: Problem | None = None) -> dict:
    """A RepairReply -> :meth:`RepairResult.to_dict` of the same result (the CLI's JSON);
    without ``problem`` the dict has no ``best.assignment`` (no labels: not guessed)."""
    out = reply_to_result(r, problem).to_dict()
    if problem is None:
        del out["best"]["assignment"]
    return out
