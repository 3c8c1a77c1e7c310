"""Python client of the Timeline service (events, published plan, records, adoption).

    with TimelineClient("127.0.0.1:50051") as tl:
        tl.set_published_plan("workshop", "c1")
        tl.add_event("workshop", {"type": "forbid_values", "name": "mill down Tuesday",
                                  "decision": "job3", "values": ["tue"]})
        out = tl.repair("workshop", use_events=True, from_published_plan=True,
                        stay_close=2.0, time_limit=2.0)
        tl.adopt("workshop", out["record_id"], publish=True)
        tl.list_records("workshop")

It is a :class:`flipfix.service.client.FlipfixClient` too (same channel), so the problem
and candidate calls are at hand. Replies are dicts (proto field names; 64-bit integers
as numbers); a repair's dict is the result's own layout plus ``record_id``, ``event_ids``
and, per conflict member, the ``event_id`` it came from (0: sent with the request).
Errors are ``grpc.RpcError`` with the status codes listed in the protos.
"""

from __future__ import annotations

from typing import Any, Iterable, Mapping

from google.protobuf.json_format import MessageToDict

from flipfix.service import convert
from flipfix.service.client import FlipfixClient
from flipfix.service.generated import flipfix_pb2 as pb
from flipfix.service.generated import timeline_pb2 as tpb
from flipfix.service.generated import timeline_pb2_grpc as tpb_grpc

__all__ = ["TimelineClient", "as_dict"]


def as_dict(msg) -> dict:
    """A message as a dict: proto field names, defaults included, 64-bit ints as numbers."""
    out = MessageToDict(msg, preserving_proto_field_name=True,
                        always_print_fields_with_no_presence=True)
    return _ints(out)


def _ints(v):
    """MessageToDict writes 64-bit integers as strings; numbers read better in JSON."""
    if isinstance(v, dict):
        return {k: _ints(x) for k, x in v.items()}
    if isinstance(v, list):
        return [_ints(x) for x in v]
    if isinstance(v, str) and v.isdigit() and len(v) < 20:
        return int(v)
    return v


class TimelineClient(FlipfixClient):
    """The Flipfix client plus the Timeline stub on the same channel."""

    def __init__(self, target: str, **kwargs):
        super().__init__(target, **kwargs)
        self.timeline = tpb_grpc.TimelineStub(self.channel)

    def _constraint(self, problem: str, constraint: Any) -> pb.Constraint:
        if isinstance(constraint, pb.Constraint):
            return constraint
        _info, _rev, dom = self._get_problem(problem)
        if isinstance(constraint, Mapping):  # errors name "constraint...", as the server's do
            return convert.doc_to_constraint(constraint, dom, field="constraint")
        return convert.constraint_to_proto(constraint, field="constraint")

    # ----------------------------------------------------------------- events
    def add_event(self, problem: str, constraint: Any) -> dict:
        """Add an event: a Constraint proto, a domain constraint or a JSON object (its
        ``name`` names the event)."""
        req = tpb.AddEventRequest(problem=problem, constraint=self._constraint(problem, constraint))
        return as_dict(self.timeline.AddEvent(req, timeout=self.timeout))

    def withdraw_event(self, problem: str, event_id: int) -> dict:
        return as_dict(self.timeline.WithdrawEvent(
            tpb.WithdrawEventRequest(problem=problem, event_id=int(event_id)), timeout=self.timeout))

    def list_events(self, problem: str, *, include_withdrawn: bool = False) -> dict:
        """``{"events": [...], "revision": n}``; each event has its ``state``."""
        return as_dict(self.timeline.ListEvents(
            tpb.ListEventsRequest(problem=problem, include_withdrawn=include_withdrawn),
            timeout=self.timeout))

    # --------------------------------------------------------- published plan
    def set_published_plan(self, problem: str, candidate_id: str) -> dict:
        return as_dict(self.timeline.SetPublishedPlan(
            tpb.SetPublishedPlanRequest(problem=problem, candidate_id=candidate_id),
            timeout=self.timeout))

    def published_plan(self, problem: str) -> dict:
        return as_dict(self.timeline.GetPublishedPlan(
            tpb.GetPublishedPlanRequest(problem=problem), timeout=self.timeout))

    # ---------------------------------------------------------------- records
    def list_records(self, problem: str, *, limit: int | None = None) -> list[dict]:
        """Record summaries, newest first (every page, or the newest ``limit``)."""
        out, token = [], ""
        while True:
            size = 0 if limit is None else min(1000, limit - len(out))
            rep = self.timeline.ListRecords(tpb.ListRecordsRequest(
                problem=problem, page_size=size, page_token=token), timeout=self.timeout)
            out.extend(as_dict(r) for r in rep.records)
            token = rep.next_page_token
            if not token or (limit is not None and len(out) >= limit):
                return out

    def get_record(self, problem: str, record_id: int) -> tpb.Record:
        """One record in full, as the message (``as_dict`` makes it a dict)."""
        return self.timeline.GetRecord(tpb.GetRecordRequest(problem=problem,
                                                            record_id=int(record_id)),
                                       timeout=self.timeout)

    def adopt(self, problem: str, record_id: int, *, candidate_id: str = "",
              publish: bool = False) -> dict:
        return as_dict(self.timeline.Adopt(tpb.AdoptRequest(
            problem=problem, record_id=int(record_id), candidate_id=candidate_id,
            publish=publish), timeout=self.timeout))

    # ----------------------------------------------------------------- repair
    def repair(self, problem: str | Any, constraints: Iterable[Any] = (), *,
               use_events: bool = False, from_published_plan: bool = False,
               stay_close: float = 0.0, by_decisions: bool = False, skip_record: bool = False,
               timeout: float | None = None, **kwargs) -> dict:
        """Repair (see :meth:`FlipfixClient.repair`) with the timeline's options:
        ``use_events`` applies the events in force, ``from_published_plan`` repairs the
        published plan, ``stay_close`` > 0 adds a penalty of that weight per changed bit
        (``by_decisions``: per changed decision) from the published plan. The dict adds
        ``record_id``, ``event_ids`` and each conflict member's ``event_id``;
        ``alternatives``, ``alternative_distance`` and ``alternatives_by_decisions`` ask for
        feasible alternatives (RepairOptions)."""
        req, dom, rev = self._repair_request(problem, constraints, **kwargs)
        req.use_events = use_events
        req.from_published_plan = from_published_plan
        req.skip_record = skip_record
        if stay_close:
            c = req.constraints.add(name="stay close to the published plan")
            if by_decisions:
                c.decision_change.weight = float(stay_close)
                c.decision_change.published_plan = True
            else:
                c.hamming.weight = float(stay_close)
                c.hamming.published_plan = True
        reply = self.stub.Repair(req, timeout=timeout if timeout is not None else self.timeout)
        return reply_dict(self._reply_dict(reply, problem, dom, rev), reply)


def reply_dict(out: dict, reply: pb.RepairReply) -> dict:
    """The result dict of ``reply`` plus the timeline's fields of the reply."""
    out["record_id"] = int(reply.record_id)
    out["event_ids"] = [int(e) for e in reply.event_ids]
    if out.get("conflict"):
        for m, pm in zip(out["conflict"]["members"], reply.conflict):
            m["event_id"] = int(pm.event_id)
    return out
