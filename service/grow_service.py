"""The Grow service: thin servicer over the core's library growing.

Same path as the audit RPCs of :mod:`flipfix.service.server`: the library comes from the
store (the current revision), the request is converted and checked here
(:mod:`flipfix.service.convert.grow`), the work runs in the repair worker pool
(:func:`flipfix.service.grow_jobs.grow_job`) with the same admission (a full queue is
RESOURCE_EXHAUSTED), budget (``min(time_limit, deadline - margin)``) and cancellation (the
call's end cancels the job). With ``keep``, the proposed states are added to the store in
one transaction, only when the search finished and the call is still live.
"""

from __future__ import annotations

import numpy as np

from flipfix.service import grow_jobs
from flipfix.service.convert import grow as convert_grow
from flipfix.service.errors import translate_errors
from flipfix.service.generated import grow_pb2 as gpb
from flipfix.service.generated import grow_pb2_grpc as gpb_grpc

__all__ = ["GrowServicer", "GROW_SERVICE_NAME", "register"]

GROW_SERVICE_NAME = gpb.DESCRIPTOR.services_by_name["Grow"].full_name  # "flipfix.v1.Grow"


class GrowServicer(gpb_grpc.GrowServicer):
    """Serves Grow with the store, pool and helpers of a
    :class:`flipfix.service.server.FlipfixServicer`."""

    def __init__(self, base):
        self.base = base

    def _start(self, request, context):
        b = self.base
        # the library's read and conversion pass the heavy-call gate, as a repair's do
        with b._heavy(request, context, "Propose", request.problem):
            rev, problem, cands = b._audit_library(request.problem, request.candidate_ids, False)
            b.limits.constraints(request.constraints, "constraints")
            settings, constraints, heldout, t = convert_grow.request_to_job(
                request, problem, cands, default_time_limit=b.config.default_audit_time_limit,
                max_scenarios=b.config.max_scenarios)
            budget = b._budget(t, context)
            job = b._submit_call(grow_jobs.grow_job, (problem, cands, settings),
                                 {"constraints": constraints, "time_limit": budget,
                                  "heldout": heldout}, context)
        return job, budget, rev

    def _finish(self, request, context, result, budget: float, rev: int) -> gpb.GrowReply:
        res, cmp, message = result
        kept, added = False, []
        if request.keep:
            if res.stopped != "done":
                message = f"not kept: the search stopped early ({res.stopped})"
            elif not res.states:
                message = "not kept: no state was proposed"
            elif not context.is_active():
                message = "not kept: the call ended before the store was changed"
            else:
                X = np.vstack([s.x for s in res.states])
                added = self.base.store.add_candidates(
                    request.problem, rev, [s.id for s in res.states], X,
                    [s.provenance(res.settings) for s in res.states], field="states")
                kept = True
                message = "; ".join(m for m in (f"kept {len(added)} new candidates", message) if m)
        return convert_grow.result_to_reply(res, cmp, time_limit=budget, revision=rev,
                                            kept=kept, added=added, message=message)

    @translate_errors
    def Propose(self, request, context):
        job, budget, rev = self._start(request, context)
        return self._finish(request, context, self.base._wait(job, context, budget), budget, rev)

    @translate_errors
    def ProposeStream(self, request, context):
        job, budget, rev = self._start(request, context)
        yield from self.base._stream(
            job, context, budget, lambda msg: gpb.GrowEvent(progress=msg),
            lambda result: gpb.GrowEvent(result=self._finish(request, context, result, budget,
                                                             rev)))


def register(base, server) -> str:
    """Add the Grow service (over ``base``, a FlipfixServicer) to ``server``; returns its
    full name for reflection."""
    gpb_grpc.add_GrowServicer_to_server(GrowServicer(base), server)
    return GROW_SERVICE_NAME
