"""The Timeline service and the timeline's part of every Repair and audit call.

Thin, as the rest of the service: proto -> domain, the store's timeline tables
(:mod:`flipfix.service.history`) or the core, domain -> proto.

* :class:`TimelineServicer`: events in force, the published plan, records, adoption.
* :class:`Timeline`: what the Flipfix servicer calls around a run. Before: the candidates to
  repair (``from_published_plan``), the constraints actually used (the request's, with
  published-plan references filled in, then the events in force with ``use_events``: an
  event that no longer applies to the current revision is FAILED_PRECONDITION naming it),
  the plan in force (``plan_candidate_id``, else the stored problem's published plan).
  After: conflict members traced to their events, the record written (every repair of a
  stored problem unless ``skip_record``, every audit run), its id in the reply.
"""

from __future__ import annotations

import logging
import time
from dataclasses import dataclass, field
from typing import Sequence

import numpy as np

from flipfix.repair.errors import InputError
from flipfix.repair.lowering.compiled import compile_constraints
from flipfix.repair.model.problem import Problem

from flipfix.service import convert
from flipfix.service.errors import ConflictError, NotFoundError, translate_errors
from flipfix.service.generated import flipfix_pb2 as pb
from flipfix.service.generated import timeline_pb2 as tpb
from flipfix.service.generated import timeline_pb2_grpc as tpb_grpc
from flipfix.service.auth import ANONYMOUS
from flipfix.service.auth import current as current_caller
from flipfix.service.history import EventRow, History, PublishedRow, RecordRow
from flipfix.service.store import TENANT_SEPARATOR, Store

__all__ = ["Timeline", "TimelineServicer", "Used", "TIMELINE_SERVICE_NAME", "caller_of"]

log = logging.getLogger("flipfix.timeline")

TIMELINE_SERVICE_NAME = tpb.DESCRIPTOR.services_by_name["Timeline"].full_name

#: audit RPC name -> (request field of the problem, the Record oneof field, its message)
AUDIT_RUNS = {
    "ProfileRobustness": ("robustness", tpb.RobustnessRun),
    "StressTest": ("stress", tpb.StressRun),
    "ParetoFront": ("pareto", tpb.ParetoRun),
    "CurateLibrary": ("curate", tpb.CurateRun),
}
#: the stored RPC name (history's ``rpc`` column) -> RecordSummary.recorded_rpc
RPC_ENUM = {"Repair": tpb.RECORDED_RPC_REPAIR,
            "ProfileRobustness": tpb.RECORDED_RPC_PROFILE_ROBUSTNESS,
            "StressTest": tpb.RECORDED_RPC_STRESS_TEST, "ParetoFront": tpb.RECORDED_RPC_PARETO_FRONT,
            "CurateLibrary": tpb.RECORDED_RPC_CURATE_LIBRARY}


def caller_of(context) -> str:
    """The caller's identity for the history: the bearer token's tenant and role (when the
    server checks tokens) and the authenticated peer identity (a TLS client certificate),
    as far as the call has them; "" for an anonymous call over a plain channel."""
    parts = []
    who = current_caller()
    if who is not ANONYMOUS:
        parts.append(f"token {who.tenant or '-'}/{who.role}")
    try:
        ids = context.peer_identities() if context is not None else None
    except Exception:  # a context without a transport identity
        ids = None
    if ids:
        parts.append("tls " + b",".join(ids).decode("utf-8", "replace"))
    return "; ".join(parts)


def stored_key(name: str) -> str:
    """The store's key of the calling tenant's problem ``name`` (the timeline's tables
    refer to problems by that key, so one tenant never sees another's timeline)."""
    return Store._key(current_caller().tenant, name)


def shown(key: str) -> str:
    """The problem name of a stored key, as its tenant calls it."""
    return key.rsplit(TENANT_SEPARATOR, 1)[-1]


# ------------------------------------------------------------- published plan
def _stored_x(store, name: str, cid: str, problem: Problem, field: str) -> np.ndarray:
    """Stored candidate ``cid``'s bits int8 (n,) in ``problem``'s label order (the store's
    errors as they come; ConflictError naming ``field`` when the problem changed meanwhile)."""
    _rev, _p, cands = store.library(name, ids=[cid])
    if cands.X.shape[1] != problem.n:
        raise ConflictError(field, "the problem changed during the call")
    return np.asarray(cands.X[0], dtype=np.int8)


def _published_x(store, name: str, pub: PublishedRow, problem: Problem) -> np.ndarray:
    """The published candidate's bits int8 (n,) in ``problem``'s label order."""
    try:
        return _stored_x(store, name, pub.candidate_id, problem, "published_plan")
    except InputError as err:
        raise ConflictError("published_plan", f"the published plan {pub.candidate_id!r} does "
                                              f"not fit the current revision: {err.message}") from None


def _fill_published(c: pb.Constraint, x: np.ndarray, problem: Problem, field: str,
                    plan_id: str) -> None:
    """Write the published plan ``x`` into ``c``'s reference (in place) and clear the flag."""
    from flipfix.repair.model.encodings import decode_indices

    kind = c.WhichOneof("kind")
    msg = getattr(c, kind)
    if kind == "hamming":
        if msg.reference.values:
            raise InputError(f"{field}.hamming.reference", "must be empty with published_plan")
        values = problem.to_caller(x).tolist()
        msg.reference.CopyFrom(convert.dict_to_assignment(dict(zip(problem.labels, values))))
    else:
        if msg.reference:
            raise InputError(f"{field}.decision_change.reference",
                             "must be empty with published_plan")
        if not problem.decisions:
            raise InputError(f"{field}.decision_change.published_plan",
                             "the problem declares no decisions")
        idx = decode_indices(problem, x[None, :])[0]
        for d, m in zip(problem.decisions, idx.tolist()):
            if m < 0:
                raise ConflictError(f"{field}.decision_change.published_plan",
                                    f"decision {d.name!r} is not valid in the published plan "
                                    f"{plan_id!r}")
            msg.reference.add(decision=d.name, value=convert.py_to_value(d.values[m]))
    msg.published_plan = False


def _wants_plan(c: pb.Constraint) -> bool:
    kind = c.WhichOneof("kind")
    return kind in ("hamming", "decision_change") and getattr(c, kind).published_plan


# --------------------------------------------------------------------- the hook
@dataclass
class Used:
    """What a run used: the constraints (request's, then events'), the events applied."""

    constraints: list
    requested: int
    events: list = field(default_factory=list)  # [EventRow]
    started: float = field(default_factory=time.perf_counter)
    published: str = ""  # the published plan referred to, if any
    plan: np.ndarray | None = None  # int8 (n,): the plan in force, if any

    @property
    def event_ids(self) -> list[int]:
        return [e.id for e in self.events]


class Timeline:
    """The timeline's part of the Flipfix servicer's calls (see the module doc)."""

    def __init__(self, store, *, max_records: int | None = 1000, migrate: bool = True):
        """``migrate``: bring the timeline's tables up to date (False: a reader of a
        store another process keeps, e.g. in a pool worker)."""
        self.store = store
        self.history = History(store, max_records=max_records, migrate=migrate)

    # ----------------------------------------------------------- before a run
    def candidate_ids(self, request: pb.RepairRequest) -> list[str]:
        """The candidate ids to repair: the published plan first with from_published_plan."""
        ids = list(request.candidate_ids)
        if request.from_published_plan:
            if request.WhichOneof("library") != "problem":
                raise InputError("from_published_plan", "only for a stored problem")
            pub = self.history.published(stored_key(request.problem))
            ids = [pub.candidate_id] + [i for i in ids if i != pub.candidate_id]
        return ids

    def resolve(self, name: str | None, constraints: Sequence[pb.Constraint], problem: Problem,
                *, field: str = "constraints", pub: PublishedRow | None = None
                ) -> list[pb.Constraint]:
        """Copies of ``constraints`` with published-plan references filled in (``name``: the
        stored problem, None for an inline one, where the flag is refused; ``pub``: the
        published plan already read for this call, else it is read here)."""
        out, x = [], None
        for k, c in enumerate(constraints):
            f = f"{field}[{k}]" if field == "constraints" else field
            if not _wants_plan(c):
                out.append(c)
                continue
            if name is None:
                raise InputError(f"{f}.{c.WhichOneof('kind')}.published_plan",
                                 "only for a stored problem")
            if x is None:
                pub = pub or self.history.published(name)
                x = _published_x(self.store, name, pub, problem)
            c2 = pb.Constraint()
            c2.CopyFrom(c)
            _fill_published(c2, x, problem, f, pub.candidate_id)
            out.append(c2)
        return out

    def used(self, request: pb.RepairRequest, problem: Problem, revision: int,
             candidates=None) -> Used:
        """The constraints a repair uses (see the module doc); events checked one by one;
        the plan in force (:meth:`plan_in_force`; ``candidates``: the library repaired)."""
        stored = request.WhichOneof("library") == "problem"
        name = stored_key(request.problem) if stored else None
        if request.use_events and not stored:
            raise InputError("use_events", "only for a stored problem")
        if request.options.alternatives_by_decisions and not problem.decisions:
            raise InputError("options.alternatives_by_decisions",
                             "the problem declares no decisions")
        events: list = []
        if request.use_events:
            rev, events = self.history.events(name)
        pub = None  # read once: every reference of the call is to the same plan
        if stored and (request.from_published_plan or any(map(_wants_plan, request.constraints))
                       or any(_wants_plan(pb.Constraint.FromString(e.payload)) for e in events)):
            pub = self.history.published(name)
        cons = self.resolve(name, request.constraints, problem, pub=pub)
        for e in events:
            cons.append(self.check_event(name, e, problem, rev, field="use_events", pub=pub))
        plan, from_pub = self.plan_in_force(request, problem, candidates, name, pub)
        if pub is None and from_pub is not None:
            pub = from_pub
        return Used(cons, len(request.constraints), events,
                    published=pub.candidate_id if pub is not None else "", plan=plan)

    def plan_in_force(self, request: pb.RepairRequest, problem: Problem, candidates,
                      name: str | None, pub: PublishedRow | None):
        """(int8 (n,) bits or None, the published plan row when the plan is it): the
        request's ``plan_candidate_id`` (among ``candidates``, else a stored candidate of
        the current revision), else a stored problem's published plan when one is set and
        fits the current revision (a stale or missing one is no plan, not an error)."""
        cid = request.plan_candidate_id
        if cid:
            ids = list(candidates.ids) if candidates is not None else []
            if cid in ids:
                return np.asarray(candidates.X[ids.index(cid)], dtype=np.int8), None
            if name is None:
                raise InputError("plan_candidate_id",
                                 f"no candidate with id {cid!r} among the inline candidates")
            try:
                return _stored_x(self.store, name, cid, problem, "plan_candidate_id"), None
            except NotFoundError:
                raise NotFoundError("plan_candidate_id", f"problem {shown(name)!r} has no "
                                                         f"candidate {cid!r}") from None
            except InputError as err:
                raise InputError("plan_candidate_id", err.message) from None
        if name is None:
            return None, None
        try:
            pub = pub or self.history.published(name)
            return _published_x(self.store, name, pub, problem), pub
        except (NotFoundError, ConflictError):
            return None, None

    def check_event(self, name: str, e: EventRow, problem: Problem, revision: int, *,
                    field: str, pub: PublishedRow | None = None) -> pb.Constraint:
        """The event's constraint resolved for ``problem``; ConflictError naming ``field``
        and the event when it no longer applies."""
        c = pb.Constraint.FromString(e.payload)
        try:
            (c,) = self.resolve(name, [c], problem, field="constraint", pub=pub)
            check_constraint(c, problem, "constraint")
        except (InputError, NotFoundError, ConflictError) as err:
            raise ConflictError(field, f"event {e.id} {e.name!r} (added for revision "
                                       f"{e.revision}) no longer applies to revision {revision}: "
                                       f"{err.field}: {err.message}; withdraw it") from None
        return c

    # ------------------------------------------------------------ after a run
    def finish_repair(self, request: pb.RepairRequest, reply: pb.RepairReply, used: Used,
                      context) -> pb.RepairReply:
        """Trace conflict members to events, record the run (stored problems, unless
        skip_record); returns ``reply`` with record_id set."""
        ids = used.event_ids
        reply.event_ids.extend(ids)
        for m in reply.conflict:
            if m.index >= used.requested:
                m.event_id = ids[m.index - used.requested]
        if request.WhichOneof("library") != "problem" or request.skip_record:
            return reply
        b = reply.best
        events = tpb.ListEventsReply(events=[self.event_proto(e) for e in used.events])
        try:
            reply.record_id = self.history.add_record(
                stored_key(request.problem), kind="repair", rpc="Repair", revision=reply.revision,
                seconds=time.perf_counter() - used.started, seed=reply.seed,
                status=convert.STATUS_NAMES.get(reply.repair_status, ""),
                request=request.SerializeToString(), reply=reply.SerializeToString(),
                best_cost=b.cost, flips=b.flips, decisions_changed=b.decisions_changed,
                feasible=b.feasible, event_ids=ids, events=events.SerializeToString(),
                caller=caller_of(context), published=used.published)
        except (NotFoundError, *self.store.integrity_errors) as err:  # deleted during the run
            log.warning("repair of %r not recorded: %s", request.problem, err)
        return reply

    def record_audit(self, rpc: str, request, reply, *, problem: str, revision: int,
                     started: float, seed: int = 0, status: str = "done", context=None) -> None:
        """Record one audit run (its request and reply) of the calling tenant's ``problem``."""
        problem = stored_key(problem)
        try:
            self.history.add_record(problem, kind="audit", rpc=rpc, revision=revision,
                                    seconds=time.perf_counter() - started, seed=seed,
                                    status=status or "done", request=request.SerializeToString(),
                                    reply=reply.SerializeToString(), caller=caller_of(context))
        except (NotFoundError, *self.store.integrity_errors) as err:
            log.warning("%s of %r not recorded: %s", rpc, problem, err)

    # ---------------------------------------------------------------- protos
    def event_proto(self, e: EventRow, *, state: int | None = None, problem_message: str = ""
                    ) -> tpb.Event:
        return tpb.Event(
            id=e.id, problem=shown(e.problem), constraint=pb.Constraint.FromString(e.payload),
            state=state if state is not None else (
                tpb.EVENT_STATE_IN_FORCE if e.in_force else tpb.EVENT_STATE_WITHDRAWN),
            added_at=e.added_at, added_by=e.added_by, revision=e.revision,
            withdrawn_at=e.withdrawn_at, withdrawn_by=e.withdrawn_by,
            problem_message=problem_message)


def check_constraint(c: pb.Constraint, problem: Problem, field: str) -> None:
    """Read and lower one constraint against ``problem``; errors name ``field.<kind>...``."""
    dom = convert.constraint_to_domain(c, field=field)
    compile_constraints(problem, [dom], paths=[f"{field}.{c.WhichOneof('kind')}"])


def _summary(r: RecordRow) -> tpb.RecordSummary:
    s = tpb.RecordSummary(
        id=r.id, problem=shown(r.problem),
        kind=tpb.RECORD_KIND_REPAIR if r.kind == "repair" else tpb.RECORD_KIND_AUDIT,
        recorded_rpc=RPC_ENUM.get(r.rpc, tpb.RECORDED_RPC_UNSPECIFIED), revision=r.revision,
        recorded_at=r.recorded_at, caller=r.caller, seconds=r.seconds, seed=r.seed, flips=r.flips,
        decisions_changed=r.decisions_changed, event_ids=list(r.event_ids),
        adopted_candidate_id=r.adopted_candidate_id, feasible=r.feasible,
        published_candidate_id=r.published)
    # the stored status is the core's name: a repair's status, or an audit's stop reason
    if r.kind == "repair":
        s.repair_status = convert.STATUS_ENUM.get(r.status, pb.REPAIR_STATUS_UNSPECIFIED)
    else:
        s.stop_reason = convert.STOP_ENUM.get(r.status, pb.STOP_REASON_UNSPECIFIED)
    if r.best_cost is not None:
        s.best_cost = r.best_cost
    return s


def _published(p: PublishedRow) -> tpb.PublishedPlan:
    return tpb.PublishedPlan(problem=shown(p.problem), candidate_id=p.candidate_id, revision=p.revision,
                             published_at=p.published_at, published_by=p.published_by)


class TimelineServicer(tpb_grpc.TimelineServicer):
    """The Timeline RPCs over :class:`Timeline` (its history and the store)."""

    def __init__(self, timeline: Timeline):
        self.timeline = timeline
        self.history = timeline.history
        self.store = timeline.store

    @staticmethod
    def _name(request) -> str:
        if not request.problem:
            raise InputError("problem", "must name a stored problem")
        return stored_key(request.problem)

    @translate_errors
    def AddEvent(self, request, context):
        name = self._name(request)
        _info, rev, problem = self.store.get_problem(name)
        c = request.constraint
        if c.WhichOneof("kind") is None:
            raise InputError("constraint", "no constraint kind set")
        (resolved,) = self.timeline.resolve(name, [c], problem, field="constraint")
        check_constraint(resolved, problem, "constraint")
        event_name = c.name or c.WhichOneof("kind")
        e = self.history.add_event(name, event_name, c.SerializeToString(), revision=rev,
                                   caller=caller_of(context))
        return self.timeline.event_proto(e)

    @translate_errors
    def WithdrawEvent(self, request, context):
        name = self._name(request)
        if not request.event_id:
            raise InputError("event_id", "must name an event (ids start at 1)")
        e = self.history.withdraw_event(name, request.event_id, caller=caller_of(context))
        return self.timeline.event_proto(e)

    @translate_errors
    def ListEvents(self, request, context):
        name = self._name(request)
        _info, rev, problem = self.store.get_problem(name)
        _rev, events = self.history.events(name, include_withdrawn=request.include_withdrawn)
        out = []
        for e in events:
            if not e.in_force:
                out.append(self.timeline.event_proto(e))
                continue
            try:
                self.timeline.check_event(name, e, problem, rev, field="events")
                out.append(self.timeline.event_proto(e))
            except ConflictError as err:
                out.append(self.timeline.event_proto(e, state=tpb.EVENT_STATE_INVALID,
                                                     problem_message=err.message))
        return tpb.ListEventsReply(events=out, revision=rev)

    @translate_errors
    def SetPublishedPlan(self, request, context):
        return _published(self.history.publish(self._name(request), request.candidate_id,
                                               caller=caller_of(context)))

    @translate_errors
    def GetPublishedPlan(self, request, context):
        return _published(self.history.published(self._name(request)))

    @translate_errors
    def ListRecords(self, request, context):
        recs, token = self.history.records(self._name(request), page_size=request.page_size,
                                           page_token=request.page_token)
        return tpb.ListRecordsReply(records=[_summary(r) for r in recs], next_page_token=token)

    @translate_errors
    def GetRecord(self, request, context):
        if not request.record_id:
            raise InputError("record_id", "must name a record (ids start at 1)")
        r = self.history.record(self._name(request), request.record_id)
        out = tpb.Record(summary=_summary(r))
        if r.events:
            out.events.extend(tpb.ListEventsReply.FromString(r.events).events)
        if r.kind == "repair":
            out.repair.CopyFrom(tpb.RepairRun(request=pb.RepairRequest.FromString(r.request),
                                              reply=pb.RepairReply.FromString(r.reply)))
        else:
            which, cls = AUDIT_RUNS[r.rpc]
            run = cls()
            run.request.ParseFromString(r.request)
            run.reply.ParseFromString(r.reply)
            getattr(out, which).CopyFrom(run)
        return out

    @translate_errors
    def Adopt(self, request, context):
        name = self._name(request)
        if not request.record_id:
            raise InputError("record_id", "must name a record (ids start at 1)")
        rec = self.history.record(name, request.record_id)
        if rec.kind != "repair":
            raise ConflictError("record_id", f"record {rec.id} is an audit run ({rec.rpc}); "
                                             "only a repair's answer can be adopted")
        reply = pb.RepairReply.FromString(rec.reply)
        _info, _rev, problem = self.store.get_problem(name, rec.revision)
        x = convert.packed_to_array(reply.best.values, problem.n, field="best.values", count=1)[0]
        events = ", ".join(map(str, rec.event_ids)) or "none"
        prov = {"source": f"adopted from record {rec.id}: repaired from candidate "
                          f"{reply.best.repaired_from!r} under events {events}",
                "energy": float(reply.best.base_energy),
                "tags": ["adopted", f"record:{rec.id}", f"repaired_from:{reply.best.repaired_from}"]
                + [f"event:{e}" for e in rec.event_ids]}
        cid, rev, pub = self.history.adopt(
            name, rec.id, x=x, candidate_id=request.candidate_id or f"adopted-{rec.id}",
            provenance=prov, publish=request.publish, caller=caller_of(context), expected=rec)
        return tpb.AdoptReply(candidate_id=cid, revision=rev, published=pub is not None,
                              provenance=pb.Provenance(source=prov["source"],
                                                       reported_energy=prov["energy"],
                                                       tags=prov["tags"]))
