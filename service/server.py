"""The flipfix gRPC server: thin servicer over the store and the repair pool.

Each RPC converts the request (:mod:`flipfix.service.convert`), calls the store or the
core, and converts back; errors become status codes in :mod:`flipfix.service.errors`.

* Repairs run in a process pool (:mod:`flipfix.service.worker`) so CPU work never holds
  the gRPC threads; a full queue is RESOURCE_EXHAUSTED.
* Deadline: the solver budget is ``min(requested, remaining - margin)``, the margin a
  fifth of the time left plus 20 ms, at most 3 s (:func:`deadline_budget`), so a short
  deadline still gets the best found so far.
* Cancellation: ``context.add_callback`` cancels the job; the worker sets the
  :class:`flipfix.repair.cancel.CancelToken` the core watches (CP-SAT stops at once).
* Waits are events: the RPC blocks on the job's queue (worker start, progress, end)
  for at most the time left to its next stop; nothing polls.
* The standard health service (``""`` and ``flipfix.v1.Flipfix``) and server
  reflection (v1alpha and v1, :mod:`flipfix.service.reflection_v1`) are registered; health answers while repairs run.
* :meth:`RunningServer.shutdown`: health NOT_SERVING, no new calls, in-flight
  calls get ``grace`` seconds, then are cancelled (their solvers stop).
* The audit RPCs (robustness, stress test, Pareto front, curation) take
  the same path: validate and convert, run :mod:`flipfix.service.audit_jobs` in the
  pool with the same slots, budget, deadline and cancellation, convert back.
* Large work stays out of this process's interpreter (a long call into C holds it, and
  health checks wait): a large upload is decoded in a worker from its raw bytes
  (:mod:`flipfix.service.wire`, :mod:`flipfix.service.upload_jobs`); a call on a large
  stored problem (Repair, the audits, GetProblem, AddCandidates) is prepared, and its
  reply built, in the worker, which reads the store itself (:mod:`flipfix.service.prepared`).
"""

from __future__ import annotations

import ipaddress
import logging
import math
import threading
import time
from concurrent import futures
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass
from pathlib import Path

import grpc
from grpc_health.v1 import health, health_pb2, health_pb2_grpc

from flipfix.repair.model.candidates import CandidateSet

from flipfix.repair.errors import InputError

from flipfix.service import prepared, upload_jobs
from flipfix.service.collector import settle
# the margins are re-exported: the deadline's figures as the server applies them
from flipfix.service.deadlines import (MARGIN_FIXED, MARGIN_MAX, MARGIN_SHARE,  # noqa: F401
                                        MIN_BUDGET, NO_DEADLINE, STOP_SHARE, deadline_at,
                                        deadline_budget, deadline_margin, time_left)
from flipfix.service.admission import AdmissionConfig, DrainInterceptor, HeavyGate, RequestGuard
from flipfix.service.auth import AuthInterceptor, TokenFile
from flipfix.service.auth import current as current_caller
from flipfix.service import convert
from flipfix.service import grow_service
from flipfix.service import reflection_v1
from flipfix.service.errors import TransientError, translate_errors
from flipfix.service.generated import flipfix_pb2 as pb
from flipfix.service.generated import flipfix_pb2_grpc as pb_grpc
from flipfix.service.limits import Limits
from flipfix.service.store import Store
from flipfix.service.generated import timeline_pb2_grpc as tpb_grpc
from flipfix.service.timeline import TIMELINE_SERVICE_NAME, Timeline, TimelineServicer
from flipfix.service.tenancy import Quotas, TenantView
from flipfix.service.wire import Deferred
from flipfix.service.worker import RepairPool

__all__ = ["create_server", "RunningServer", "ServerConfig", "SERVICE_NAME"]

log = logging.getLogger("flipfix.server")

SERVICE_NAME = pb.DESCRIPTOR.services_by_name["Flipfix"].full_name  # "flipfix.v1.Flipfix"


@dataclass
class ServerConfig:
    """Server settings; limits of None mean unlimited."""

    db_path: str = "flipfix.sqlite3"
    workers: int = 2
    queue_size: int = 64
    max_message_bytes: int = 64 * 1024 * 1024
    max_variables: int | None = 100_000
    max_candidates: int | None = 10_000
    max_constraints: int | None = 1_000
    default_time_limit: float = 5.0
    max_time_limit: float = 600.0
    default_audit_time_limit: float = 30.0  # whole stress-test run
    max_scenarios: int | None = 1_000
    max_records: int | None = 1_000  # run records kept per problem (timeline); None: all
    max_couplings: int | None = 2_000_000
    #: heavy calls (uploads, reads of models, the conversion part of repairs and audits)
    #: converted at once, and how many may wait (:mod:`flipfix.service.admission`)
    heavy_calls: int = 2
    heavy_queue: int = 64
    memory_mb: float = 2048.0
    memory_factor: float = 25.0
    #: requests (and stored problems) smaller than this are light: converted in the
    #: server without a place in the gate; larger uploads are decoded, and calls on larger
    #: stored problems prepared, in a pool worker (:mod:`flipfix.service.prepared`)
    light_bytes: int = 64 * 1024
    #: TLS: the server's certificate chain and key (PEM files); with ``tls_client_ca``
    #: clients must present a certificate signed by it (mutual TLS)
    tls_cert: str | None = None
    tls_key: str | None = None
    tls_client_ca: str | None = None
    #: bind a non-loopback address without TLS and tokens (refused otherwise)
    allow_insecure_public_bind: bool = False
    #: JSON-lines token file (:mod:`flipfix.service.auth`); None: no authentication
    token_file: str | None = None
    #: serve gRPC reflection (to authenticated callers when tokens are on)
    reflection: bool = True
    #: per-tenant quotas (None: unlimited): stored problems, candidates, MiB
    quota_problems: int | None = None
    quota_candidates: int | None = None
    quota_mb: float | None = None
    warm: bool = True
    #: stress tests on a Dask cluster: a scheduler address, or ``local:N`` (N worker
    #: processes started with the server); "" runs them in the repair workers
    dask: str = ""

    @property
    def limits(self) -> Limits:
        return Limits(max_variables=self.max_variables, max_candidates=self.max_candidates,
                      max_constraints=self.max_constraints, max_couplings=self.max_couplings)

    @property
    def quotas(self) -> Quotas:
        return Quotas(problems=self.quota_problems, candidates=self.quota_candidates,
                      bytes=None if self.quota_mb is None else int(self.quota_mb * 1024 * 1024))

    @property
    def admission(self) -> AdmissionConfig:
        return AdmissionConfig(capacity=self.heavy_calls, queue=self.heavy_queue,
                               memory_bytes=int(self.memory_mb * 1024 * 1024),
                               memory_factor=self.memory_factor, light_bytes=self.light_bytes)


def _deferred_model(method: str) -> tuple[str, tuple[str, int]]:
    """The method path and its request's ``model`` field (name, number)."""
    rpc = pb.DESCRIPTOR.services_by_name["Flipfix"].methods_by_name[method]
    return f"/{SERVICE_NAME}/{method}", ("model", rpc.input_type.fields_by_name["model"].number)


#: Uploads whose model a large request leaves undecoded in the server (:mod:`wire`).
DEFERRED = dict(map(_deferred_model, ("CreateProblem", "ReplaceProblem")))


#: Methods whose reply a worker may send as bytes, passed through as they are.
RAW_REPLIES = frozenset({f"/{SERVICE_NAME}/GetProblem"})


class FlipfixServicer(pb_grpc.FlipfixServicer):
    def __init__(self, store: Store, pool: RepairPool, config: ServerConfig,
                 timeline: Timeline | None = None, gate: HeavyGate | None = None):
        self._store = store
        self.pool = pool
        self.config = config
        self.limits = config.limits
        self.dask_address = ""  # set by create_server when stress tests go to Dask
        self.dask_runner = None  # and the runner of a large repair's greedy stage
        self.timeline = timeline or Timeline(store, max_records=config.max_records)
        self.gate = gate or HeavyGate(config.admission)

    @property
    def store(self) -> TenantView:
        """The store as the calling tenant sees it (:mod:`flipfix.service.tenancy`)."""
        return TenantView(self._store, current_caller().tenant)

    def _heavy(self, request, context, what: str, problem: str = ""):
        """A place in the heavy-call gate for this call (waits at most to its deadline);
        ``problem``: the stored problem it reads (its model's bytes count too)."""
        size = (request.size if isinstance(request, Deferred) else request.ByteSize()) + (
            self.store.model_bytes(problem) if problem else 0)
        return self.gate.admit(size, what, timeout=time_left(context))

    # ------------------------------------------------------------- problems
    _info = staticmethod(prepared.problem_info)

    def _problem(self, model: pb.ProblemModel, field: str):
        self.limits.model(model, field)
        return convert.model_to_problem(model, field=field)

    def _upload(self, request, context, what: str):
        """(Problem, stored JSON or None) of an uploaded ``request.model``: a large one is
        converted in a pool worker (:mod:`flipfix.service.upload_jobs`) -- from the raw bytes
        when the request guard left it undecoded (:mod:`flipfix.service.wire`) -- a small
        one here."""
        if isinstance(request, Deferred):
            job = self._submit_call(upload_jobs.model_to_stored,
                                    (request.raw, self.limits, "model"),
                                    {"span": request.span, "what": what}, context)
            return self._wait(job, context, math.inf)
        if request.model.ByteSize() < self.gate.config.light_bytes:
            return self._problem(request.model, "model"), None
        return self._in_worker(request.model, "model", context)

    def _converted(self, model: pb.ProblemModel, field: str, context):
        """The Problem of ``model`` (an inline one), converted in a worker when large."""
        if model.ByteSize() < self.gate.config.light_bytes:
            return self._problem(model, field)
        return self._in_worker(model, field, context)[0]

    def _in_worker(self, model: pb.ProblemModel, field: str, context):
        job = self._submit_call(upload_jobs.model_to_stored,
                                (model.SerializeToString(), self.limits, field), {}, context)
        return self._wait(job, context, math.inf)

    @translate_errors
    def CreateProblem(self, request, context):
        Store._check_name(request.name)  # before the conversion, not after
        with self._heavy(request, context, "CreateProblem"):
            problem, encoded = self._upload(request, context, "CreateProblem")
            return self._info(self.store.create_problem(request.name, problem, encoded=encoded))

    @translate_errors
    def ReplaceProblem(self, request, context):
        with self._heavy(request, context, "ReplaceProblem"):
            problem, encoded = self._upload(request, context, "ReplaceProblem")
            return self._info(self.store.replace_problem(
                request.name, problem, expected_revision=request.expected_revision,
                encoded=encoded))

    @translate_errors
    def GetProblem(self, request, context):
        if self._prepares_in_worker(request.name):  # read, converted and encoded there
            job = self._submit_call(prepared.stored_problem,
                                    (self._ref(), request.name, request.revision), {}, context)
            return self._wait(job, context, math.inf)  # bytes, sent as they are
        with self._heavy(request, context, "GetProblem", request.name):
            return prepared.problem_reply(self, request.name, request.revision)

    @translate_errors
    def ListProblems(self, request, context):
        infos, token = self.store.list_problems(page_size=request.page_size,
                                                page_token=request.page_token)
        return pb.ListProblemsReply(problems=[self._info(i) for i in infos], next_page_token=token)

    @translate_errors
    def DeleteProblem(self, request, context):
        return pb.DeleteProblemReply(candidates_deleted=self.store.delete_problem(request.name))

    # ----------------------------------------------------------- candidates
    @translate_errors
    def AddCandidates(self, request, context):
        if self._prepares_in_worker(request.problem):  # the model is read there
            job = self._submit_call(prepared.stored_candidates,
                                    (self._ref(), request.SerializeToString()), {}, context)
            rev, ids, X, provs = self._wait(job, context, math.inf)
            out = self.store.add_candidates(request.problem, rev, ids, X, provs)
            return pb.AddCandidatesReply(ids=out, revision=rev)
        with self._heavy(request, context, "AddCandidates", request.problem):
            rev, ids, X, provs = prepared.candidates_to_add(self, request)
            out = self.store.add_candidates(request.problem, rev, ids, X, provs)
            return pb.AddCandidatesReply(ids=out, revision=rev)

    @translate_errors
    def ListCandidates(self, request, context):
        recs, token = self.store.list_candidates(request.problem, page_size=request.page_size,
                                                 page_token=request.page_token,
                                                 revision=request.revision)
        return pb.ListCandidatesReply(batches=convert.records_to_batches(recs),
                                      next_page_token=token)

    @translate_errors
    def RemoveCandidates(self, request, context):
        return pb.RemoveCandidatesReply(removed=self.store.remove_candidates(request.problem,
                                                                             list(request.ids)))

    # --------------------------------------------------------------- repair
    def _library(self, request, context):
        which = request.WhichOneof("library")
        if which == "problem":
            return prepared.stored_library(self, request)
        if which == "inline":
            problem = self._converted(request.inline.model, "inline.model", context)
            self.limits.candidates(request.inline.candidates, "inline.candidates")
            ids, X, _ = convert.batch_to_arrays(problem, request.inline.candidates,
                                                field="inline.candidates")
            ids = [cid or f"c{k}" for k, cid in enumerate(ids)]
            return 0, problem, CandidateSet(CandidateSet._check_ids(ids, len(ids),
                                                                    "inline.candidates.ids"), X)
        raise InputError("library", "set problem (a stored problem) or inline")

    def _prepares_in_worker(self, name: str) -> bool:
        """Whether a call on the caller's stored problem ``name`` is prepared in the pool
        worker that runs it (:mod:`flipfix.service.prepared`): its store is one other
        processes can open and it holds ``light_bytes`` or more (model revisions and
        candidates) -- reading and decoding it here would hold the interpreter lock."""
        return (bool(name) and self._store.path != ":memory:"
                and self.store.stored_bytes(name) >= self.gate.config.light_bytes)

    def _ref(self) -> prepared.StoreRef:
        """The store and the caller, for a worker that reads the store itself."""
        return prepared.StoreRef(self._store.path, current_caller(), self.config,
                                 self.dask_address)

    def _prepared_call(self, rpc: str, request, context, name: str, prepare):
        """Submit the call ``rpc``: prepared in a worker from the store (see
        :meth:`_prepares_in_worker`), else here by ``prepare(deadline)`` holding a place in
        the heavy-call gate. Returns ``(job, Prepared or None)``; None: the job's result
        is ``(Prepared, result)`` (:meth:`_settled`)."""
        deadline = deadline_at(context)
        if self._prepares_in_worker(name):
            return self._submit_call(prepared.stored_call,
                                     (self._ref(), rpc, request.SerializeToString(), deadline),
                                     {}, context), None
        with self._heavy(request, context, rpc, name):
            prep = prepare(deadline)
            if prep.fn is None:
                job = self.pool.submit(*prep.args, prep.kwargs)
            else:
                job = self.pool.submit_call(prep.fn, prep.args, prep.kwargs)
            return self._watched(job, context), prep

    @staticmethod
    def _settled(result, prep):
        """(Prepared, the job's result) of a job from :meth:`_prepared_call`."""
        return result if prep is None else (prep, result)

    def _reply(self, rpc: str, request, result, prep):
        """(Prepared, reply) of a job of :data:`prepared.REPLIES`: built here, or parsed
        from the bytes the worker built."""
        prep, out = self._settled(result, prep)
        cls, build = prepared.REPLIES[rpc]
        return prep, (cls.FromString(out) if isinstance(out, bytes) else build(request, prep, out))

    def _start(self, request, context):
        """Validate, pick the budget, submit; returns (job, Prepared or None).

        The constraints are read, checked and lowered once, in the server or in the worker
        (:func:`flipfix.service.prepared.repair`); the job gets the result (``compiled``,
        picklable) and does not compile again. Prepared here, the conversion holds a
        place in the heavy-call gate; the search waits in the pool's queue.
        """
        name = request.problem if request.WhichOneof("library") == "problem" else ""
        return self._prepared_call(
            "Repair", request, context, name,
            lambda deadline: prepared.repair(self, request, deadline=deadline,
                                             library=lambda: self._library(request, context)))

    def _compiled(self, constraints, problem):
        return prepared.compiled_for(self, constraints, problem)

    @staticmethod
    def _watched(job, context):
        """``job``, cancelled when the call ends (cancelled, timed out or done)."""
        if not context.add_callback(job.cancel):  # the call has ended already
            job.cancel()
        return job

    def _follow(self, job, context, budget: float | None):
        """Yield at each progress report of the job; return when it has ended.

        Blocks on the job's events (:meth:`flipfix.service.worker.Job.next_event`), each wait
        as long as the time left to the next stop. The job is asked to stop (and return its
        best so far) when its budget, counted from the moment a worker starts it, is spent
        (plus some slack when the call has no deadline: the core may overrun a little to
        finish a phase), or ``STOP_SHARE`` of the deadline margin before the deadline; a
        call that ends cancels it through :meth:`_watched`. While a stream's reader holds a
        progress message back, the stops wait for it (the core still keeps its own budget).
        ``budget`` None: the job reports it as it starts (:mod:`flipfix.service.prepared`).
        """
        remaining = time_left(context)
        if remaining is None:
            stop_at = math.inf
        else:
            stop_at = time.monotonic() + remaining - STOP_SHARE * deadline_margin(remaining)
        asked = False
        while True:
            waiting = asked or job.cancel_requested or stop_at == math.inf
            kind = job.next_event(None if waiting else max(0.0, stop_at - time.monotonic()))
            if kind == "done":
                return
            if kind == "started":
                if budget is None:  # a job that prepared itself reports its budget
                    budget = math.inf if job.budget is None else job.budget
                slack = max(1.0, 0.25 * budget) if remaining is None else 0.0
                stop_at = min(stop_at, job.started_at + budget + slack)
            elif kind == "progress":
                yield
            elif kind is None:  # a stop time has come
                job.cancel()
                asked = True

    def _result(self, job):
        """The ended job's result (its exception re-raised)."""
        try:
            return job.future.result()
        except futures.CancelledError:
            raise TransientError("repair", "the repair was cancelled before it started") from None
        except BrokenProcessPool:
            self.pool.restart_if_broken()
            raise

    def _wait(self, job, context, budget: float | None):
        """Wait for the job (see :meth:`_follow`) and return its result."""
        for _ in self._follow(job, context, budget):
            pass
        return self._result(job)

    def _repair_reply(self, request, context, result, prep):
        prep, reply = self._reply("Repair", request, result, prep)
        return self.timeline.finish_repair(request, reply, prep.keep["used"], context)

    @staticmethod
    def _budget_of(prep) -> float | None:
        return None if prep is None else prep.budget

    @translate_errors
    def Repair(self, request, context):
        job, prep = self._start(request, context)
        result = self._wait(job, context, self._budget_of(prep))
        return self._repair_reply(request, context, result, prep)

    @translate_errors
    def RepairStream(self, request, context):
        job, prep = self._start(request, context)
        yield from self._stream(
            job, context, self._budget_of(prep), lambda msg: pb.RepairEvent(progress=msg),
            lambda result: pb.RepairEvent(result=self._repair_reply(request, context, result,
                                                                    prep)))

    def _stream(self, job, context, budget: float | None, progress_event, result_event):
        """Progress messages as the worker reports (the core's phase names), then the result.

        ``progress_event(RepairProgress) -> event``, ``result_event(result) -> event``.
        """
        last = [0]

        def report():
            p = job.progress()
            if p.updates == last[0]:
                return None
            last[0] = p.updates
            msg = pb.RepairProgress(done=p.done, total=p.total,
                                    current_phase=convert.PHASE_ENUM.get(p.phase or "", 0))
            if p.best_cost is not None and math.isfinite(p.best_cost):
                msg.best_cost = p.best_cost
            return progress_event(msg)

        for _ in self._follow(job, context, budget):
            event = report()
            if event is not None:
                yield event
        event = report()  # the last report, when its message came after the job ended
        if event is not None:
            yield event
        yield result_event(self._result(job))

    # ---------------------------------------------------------------- audit
    def _audit_library(self, name: str, ids, all_revisions: bool, *, field: str = ""):
        """(revision, problem, candidates) of a stored library; errors under ``field``."""
        return prepared.audit_library(self, name, ids, all_revisions, field=field)

    def _budget(self, requested: float, context) -> float:
        return deadline_budget(min(requested, self.config.max_time_limit), time_left(context))

    def _submit_call(self, fn, args: tuple, kwargs: dict, context):
        return self._watched(self.pool.submit_call(fn, args, kwargs), context)

    def _audit(self, rpc: str, request, context, name: str):
        """(job, Prepared or None) of an audit call (see :meth:`_prepared_call`)."""
        return self._prepared_call(rpc, request, context, name, lambda deadline: prepared.PREPARE[
            rpc](self, request, deadline=deadline))

    @translate_errors
    def ProfileRobustness(self, request, context):
        t0 = time.perf_counter()
        job, prep = self._audit("ProfileRobustness", request, context, request.problem)
        # vectorised, not interruptible
        prep, reply = self._reply("ProfileRobustness", request,
                                  self._wait(job, context, self._budget_of(prep)), prep)
        self.timeline.record_audit("ProfileRobustness", request, reply, problem=request.problem,
                                   revision=prep.revision, started=t0, context=context)
        return reply

    def _stress_reply(self, request, context, result, prep, t0):
        prep, reply = self._reply("StressTest", request, result, prep)
        self.timeline.record_audit("StressTest", request, reply, problem=request.problem,
                                   revision=prep.revision, started=t0, seed=request.seed,
                                   status=convert.STOP_NAMES.get(reply.stop_reason, ""),
                                   context=context)
        return reply

    @translate_errors
    def StressTest(self, request, context):
        t0 = time.perf_counter()
        job, prep = self._audit("StressTest", request, context, request.problem)
        return self._stress_reply(request, context,
                                  self._wait(job, context, self._budget_of(prep)), prep, t0)

    @translate_errors
    def StressTestStream(self, request, context):
        t0 = time.perf_counter()
        job, prep = self._audit("StressTest", request, context, request.problem)
        yield from self._stream(
            job, context, self._budget_of(prep), lambda msg: pb.StressEvent(progress=msg),
            lambda result: pb.StressEvent(result=self._stress_reply(request, context, result,
                                                                    prep, t0)))

    @translate_errors
    def ParetoFront(self, request, context):
        from flipfix.repair.audit.pareto import cheapest_within, fewest_flips_within

        t0 = time.perf_counter()
        job, prep = self._audit("ParetoFront", request, context, request.problem)
        prep, front = self._settled(self._wait(job, context, self._budget_of(prep)), prep)
        cheapest = fewest = None
        if request.HasField("cheapest_within_flips"):
            cheapest = cheapest_within(front, int(request.cheapest_within_flips))
        if request.HasField("fewest_flips_within_percent"):
            fewest = fewest_flips_within(front, request.fewest_flips_within_percent)
        reply = convert.pareto_to_reply(front, cheapest=cheapest, fewest=fewest,
                                        seconds=time.perf_counter() - t0, time_limit=prep.budget,
                                        revision=prep.revision)
        self.timeline.record_audit("ParetoFront", request, reply, problem=request.problem,
                                   revision=prep.revision, started=t0, seed=request.seed,
                                   context=context)
        return reply

    @translate_errors
    def CurateLibrary(self, request, context):
        t0 = time.perf_counter()
        job, prep = self._audit("CurateLibrary", request, context, request.stress.problem)
        prep, (rep, cur) = self._settled(self._wait(job, context, self._budget_of(prep)), prep)
        rev, ids = prep.revision, prep.keep["ids"]
        stress = convert.stress_to_reply(rep, matrices=request.stress.matrices,
                                         time_limit=prep.budget, revision=rev)
        kept, removed, message = False, [], ""
        if cur is None:
            message = "no scenario completed: nothing chosen"
        elif request.keep:
            if rep.stopped != "done":
                message = (f"not kept: only {rep.scenarios_done} of {rep.scenarios_requested} "
                           f"scenarios ran ({rep.message})")
            elif not context.is_active():
                message = "not kept: the call ended before the store was changed"
            else:
                keep = set(cur.kept_ids)
                removed = self.store.keep_only(request.stress.problem, cur.kept_ids,
                                               [c for c in ids if c not in keep],
                                               revision=rev)
                kept = True
                message = f"kept {len(cur.kept_ids)} candidates, removed {len(removed)}"
        reply = convert.curation_to_reply(stress, cur, kept=kept, removed=removed,
                                          message=message, revision=rev)
        self.timeline.record_audit("CurateLibrary", request, reply,
                                   problem=request.stress.problem, revision=rev, started=t0,
                                   seed=request.stress.seed,
                                   status=convert.STOP_NAMES.get(stress.stop_reason, ""),
                                   context=context)
        return reply


class RunningServer:
    """A started server; ``port`` is the bound port (bind port 0 in tests)."""

    def __init__(self, server: grpc.Server, port: int, servicer: FlipfixServicer,
                 health_servicer: health.HealthServicer, pool: RepairPool, store: Store,
                 drain: DrainInterceptor):
        self.server = server
        self.port = port
        self.servicer = servicer
        self.health = health_servicer
        self.pool = pool
        self.store = store
        self.drain = drain
        self.draining = drain.draining
        self._stopped = threading.Event()
        self._lock = threading.Lock()
        self.cluster = None  # the Dask cluster (client) of stress tests, when configured

    @property
    def address(self) -> str:
        return f"127.0.0.1:{self.port}"

    tokens: TokenFile | None = None

    def reload_tokens(self) -> bool:
        """Read the token file again (SIGHUP); False when it did not read (old tokens stay)."""
        return self.tokens.reload() if self.tokens is not None else False

    def begin_shutdown(self) -> None:
        """From now on new calls (health checks aside) get UNAVAILABLE at once; health
        answers NOT_SERVING. Safe to call from a signal handler (sets flags only)."""
        self.draining.set()

    def shutdown(self, grace: float = 10.0) -> None:
        """Health NOT_SERVING, refuse new calls (UNAVAILABLE), give in-flight ones ``grace``
        s (woken as soon as the last ends), then cancel them: their solvers stop, the
        workers exit, the store closes."""
        self.draining.set()
        with self._lock:
            if self._stopped.is_set():
                return
            t = [time.perf_counter()]

            def lap() -> float:
                t.append(time.perf_counter())
                return t[-1] - t[-2]

            self.health.enter_graceful_shutdown()
            idle = self.drain.wait_idle(grace)
            drained = lap()
            self.server.stop(0).wait()  # cancels what is left; their jobs are cancelled
            stopped = lap()
            self.pool.shutdown(wait=True, terminate=not idle)
            pooled = lap()
            self.store.close()
            if self.cluster is not None:
                self.cluster.close()
            log.info("shutdown: calls %s in %.2f s, server stopped in %.2f s, workers in "
                     "%.2f s %s, store in %.2f s", "ended" if idle else "cut", drained, stopped,
                     pooled, self.pool.shutdown_seconds, lap())
            self._stopped.set()

    stop = shutdown

    def wait_for_termination(self, timeout: float | None = None) -> bool:
        return self._stopped.wait(timeout)

    def __enter__(self) -> "RunningServer":
        return self

    def __exit__(self, *exc) -> None:
        self.shutdown(grace=1.0)


def is_loopback(address: str) -> bool:
    """Whether ``HOST:PORT`` binds only the loopback interface."""
    host = address.rsplit(":", 1)[0].strip("[]") if ":" in address else address
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def _credentials(config: ServerConfig):
    """gRPC server credentials for the TLS files of ``config`` (None: no TLS)."""
    if not (config.tls_cert or config.tls_key or config.tls_client_ca):
        return None
    if not (config.tls_cert and config.tls_key):
        raise InputError("--tls-cert" if not config.tls_cert else "--tls-key",
                         "TLS needs both --tls-cert and --tls-key")

    def read(path: str, option: str) -> bytes:
        try:
            return Path(path).read_bytes()
        except OSError as err:
            raise InputError(option, f"cannot read {path}: {err.strerror or err}") from None

    ca = read(config.tls_client_ca, "--tls-client-ca") if config.tls_client_ca else None
    return grpc.ssl_server_credentials(
        [(read(config.tls_key, "--tls-key"), read(config.tls_cert, "--tls-cert"))],
        root_certificates=ca, require_client_auth=ca is not None)


def _check_bind(address: str, config: ServerConfig) -> None:
    """Refuse a non-loopback address without TLS and tokens unless explicitly allowed."""
    if is_loopback(address) or config.allow_insecure_public_bind:
        return
    missing = [what for what, ok in (("TLS (--tls-cert/--tls-key)", config.tls_cert),
                                     ("tokens (--token-file)", config.token_file)) if not ok]
    if missing:
        raise InputError("--host", f"refusing to serve {address} beyond this machine without "
                                   f"{' and '.join(missing)}; give them, or "
                                   "--allow-insecure-public-bind to accept the risk")


def create_server(address: str = "127.0.0.1:0", config: ServerConfig | None = None,
                  **overrides) -> RunningServer:
    """Build, bind and start the server; returns a :class:`RunningServer` (``.port``).

    A bad TLS or bind setting is an InputError naming the option (nothing is started).
    """
    config = config or ServerConfig()
    for k, v in overrides.items():
        if not hasattr(config, k):
            raise TypeError(f"unknown server option {k!r}")
        setattr(config, k, v)
    _check_bind(address, config)
    credentials = _credentials(config)
    tokens = TokenFile(config.token_file) if config.token_file else None
    store = Store(config.db_path, quotas=config.quotas)
    try:
        timeline = Timeline(store, max_records=config.max_records)
    except BaseException:
        store.close()
        raise
    pool = RepairPool(workers=config.workers, queue_size=config.queue_size, warm=config.warm)
    gate = HeavyGate(config.admission)
    drain = DrainInterceptor(threading.Event())
    options = [("grpc.max_receive_message_length", config.max_message_bytes),
               ("grpc.max_send_message_length", config.max_message_bytes),
               ("grpc.so_reuseport", 0)]
    # threads: one per repair slot (they wait on the pool), one per heavy call running or
    # waiting at the gate, plus room for quick calls and health checks
    threads = pool.slots + config.heavy_calls + config.heavy_queue + 8
    server = grpc.server(futures.ThreadPoolExecutor(max_workers=threads,
                                                    thread_name_prefix="flipfix-rpc"),
                         options=options,
                         interceptors=[drain] + ([AuthInterceptor(tokens)] if tokens else [])
                         + [RequestGuard(gate, DEFERRED, RAW_REPLIES)])
    servicer = FlipfixServicer(store, pool, config, timeline, gate)
    pb_grpc.add_FlipfixServicer_to_server(servicer, server)
    grow_name = grow_service.register(servicer, server)
    tpb_grpc.add_TimelineServicer_to_server(TimelineServicer(timeline), server)
    health_servicer = health.HealthServicer()
    health_pb2_grpc.add_HealthServicer_to_server(health_servicer, server)
    names = (SERVICE_NAME, grow_name, TIMELINE_SERVICE_NAME,
             health_pb2.DESCRIPTOR.services_by_name["Health"].full_name)
    if config.reflection:
        reflection_v1.enable_server_reflection(names, server)  # v1alpha and v1
    try:
        port = (server.add_secure_port(address, credentials) if credentials is not None
                else server.add_insecure_port(address))
    except RuntimeError as err:
        pool.shutdown(wait=False)
        store.close()
        raise OSError(f"cannot bind {address}: {err}") from None
    if port == 0:
        pool.shutdown(wait=False)
        store.close()
        raise OSError(f"cannot bind {address}")
    cluster = None
    if config.dask:
        from flipfix.service.cluster import DaskRunner, connect

        try:
            cluster = connect(config.dask, field="dask")
        except Exception:
            server.stop(0)
            pool.shutdown(wait=False)
            store.close()
            raise
        servicer.dask_address = cluster.address
        servicer.dask_runner = DaskRunner(address=cluster.address)  # pickles as the address
    server.start()
    # NOT_SERVING until the workers' kernels are warm (a first run compiles them); the
    # whole server ("") turns SERVING last, once every named service does
    served = (SERVICE_NAME, TIMELINE_SERVICE_NAME, "")
    for name in served:
        health_servicer.set(name, health_pb2.HealthCheckResponse.NOT_SERVING)
    pool.when_ready(lambda: [health_servicer.set(name, health_pb2.HealthCheckResponse.SERVING)
                             for name in served])
    log.info("flipfix listening on port %d (db %s)", port, store.where)
    srv = RunningServer(server, port, servicer, health_servicer, pool, store, drain)
    srv.tokens = tokens
    srv.cluster = cluster
    settle()  # the server's structures are built: later collections skip them
    return srv
