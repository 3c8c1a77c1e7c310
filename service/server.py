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
  reflection are registered; health answers while repairs run.
* :meth:`RunningServer.shutdown`: health NOT_SERVING, no new calls, in-flight
  calls get ``grace`` seconds, then are cancelled (their solvers stop).
* The audit RPCs (robustness, stress test, Pareto front, curation) take
  the same path: validate and convert here, run :mod:`flipfix.service.audit_jobs` in the
  pool with the same slots, budget, deadline and cancellation, convert back.
"""

from __future__ import annotations

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
from grpc_reflection.v1alpha import reflection

from flipfix.repair.model.candidates import CandidateSet

from flipfix.repair.errors import InputError

from flipfix.service import audit_jobs
from flipfix.service import convert
from flipfix.service import grow_service
from flipfix.service.errors import ConflictError, NotFoundError, TransientError, translate_errors
from flipfix.service.generated import flipfix_pb2 as pb
from flipfix.service.generated import flipfix_pb2_grpc as pb_grpc
from flipfix.service.limits import Limits
from flipfix.service.store import Store
from flipfix.service.generated import timeline_pb2_grpc as tpb_grpc
from flipfix.service.timeline import TIMELINE_SERVICE_NAME, Timeline, TimelineServicer
from flipfix.service.worker import RepairPool

__all__ = ["create_server", "RunningServer", "ServerConfig", "SERVICE_NAME"]

log = logging.getLogger("flipfix.server")

SERVICE_NAME = pb.DESCRIPTOR.services_by_name["Flipfix"].full_name  # "flipfix.v1.Flipfix"


@dataclass
class ServerConfig:
    """Server settings; limits of None mean unlimited."""

    db_path: str = "flipfix.sqlite3"
    workers: int = 1
    queue_size: int = 4
    max_message_bytes: int = 64 * 1024 * 1024
    max_variables: int | None = 100_000
    max_candidates: int | None = 10_000
    max_constraints: int | None = 1_000
    default_time_limit: float = 5.0
    max_time_limit: float = 600.0
    default_audit_time_limit: float = 30.0  # whole stress-test run
    max_scenarios: int | None = 1_000
    max_records: int | None = 1_000  # run records kept per problem (timeline); None: all
    warm: bool = True
    #: stress tests on a Dask cluster: a scheduler address, or ``local:N`` (N worker
    #: processes started with the server); "" runs them in the repair workers
    dask: str = ""

    @property
    def limits(self) -> Limits:
        return Limits(max_variables=self.max_variables, max_candidates=self.max_candidates,
                      max_constraints=self.max_constraints)


#: Held back from a call's deadline for what is not search: the hand-over to a worker,
#: the solver's stop and its result, the reply (see :func:`deadline_budget`).
MARGIN_SHARE = 0.2
MARGIN_FIXED = 0.02  # s
MARGIN_MAX = 3.0  # s
MIN_BUDGET = 0.01  # s
#: The server stops a job still running this share of the margin before the deadline.
STOP_SHARE = 0.5
#: gRPC reports a call without a deadline as one in the far future: beyond this many
#: seconds a call counts as having none.
NO_DEADLINE = 1e6


def time_left(context) -> float | None:
    """Seconds to the call's deadline; None when it has none."""
    remaining = context.time_remaining()
    return None if remaining is None or remaining > NO_DEADLINE else remaining


def deadline_margin(remaining: float) -> float:
    """Seconds held back from ``remaining`` seconds to the deadline:
    ``min(MARGIN_MAX, MARGIN_FIXED + MARGIN_SHARE * remaining)``."""
    return min(MARGIN_MAX, MARGIN_FIXED + MARGIN_SHARE * max(0.0, remaining))


def deadline_budget(requested: float, remaining: float | None) -> float:
    """Solver budget (s) for a call with ``remaining`` seconds to its deadline (None: none).

    ``min(requested, remaining - deadline_margin(remaining))``, at least ``MIN_BUDGET``: the
    margin is proportional (a fifth of what remains plus 20 ms, at most 3 s), so a 1 s
    deadline leaves 0.78 s of search, 0.3 s leaves 0.22 s, 5 s leaves 3.98 s and 60 s
    leaves 57 s.
    """
    if remaining is None:
        return requested
    return max(MIN_BUDGET, min(requested, remaining - deadline_margin(remaining)))


class FlipfixServicer(pb_grpc.FlipfixServicer):
    def __init__(self, store: Store, pool: RepairPool, config: ServerConfig,
                 timeline: Timeline | None = None):
        self.store = store
        self.pool = pool
        self.config = config
        self.limits = config.limits
        self.dask_address = ""  # set by create_server when stress tests go to Dask
        self.timeline = timeline or Timeline(store, max_records=config.max_records)

    # ------------------------------------------------------------- problems
    @staticmethod
    def _info(rec) -> pb.ProblemInfo:
        return pb.ProblemInfo(name=rec.name, revision=rec.revision, num_variables=rec.num_variables,
                              num_interactions=rec.num_interactions,
                              num_candidates=rec.num_candidates, created_at=rec.created_at,
                              updated_at=rec.updated_at)

    def _problem(self, model: pb.ProblemModel, field: str):
        self.limits.model(model, field)
        return convert.model_to_problem(model, field=field)

    @translate_errors
    def CreateProblem(self, request, context):
        problem = self._problem(request.model, "model")
        return self._info(self.store.create_problem(request.name, problem))

    @translate_errors
    def ReplaceProblem(self, request, context):
        problem = self._problem(request.model, "model")
        return self._info(self.store.replace_problem(
            request.name, problem, expected_revision=request.expected_revision))

    @translate_errors
    def GetProblem(self, request, context):
        info, rev, problem = self.store.get_problem(request.name, request.revision)
        return pb.GetProblemReply(info=self._info(info), revision=rev,
                                  model=convert.problem_to_model(problem))

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
        _info, rev, problem = self.store.get_problem(request.problem)
        if request.revision and request.revision != rev:
            raise ConflictError("revision", f"problem {request.problem!r} is at revision {rev}, "
                                            f"not {request.revision}")
        self.limits.candidates(request.candidates, "candidates")
        ids, X, provs = convert.batch_to_arrays(problem, request.candidates)
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
    def _library(self, request):
        which = request.WhichOneof("library")
        if which == "problem":
            rev, problem, cands = self.store.library(
                request.problem, ids=self.timeline.candidate_ids(request),
                all_revisions=request.all_revisions, max_candidates=self.config.max_candidates)
            return rev, problem, cands
        if which == "inline":
            problem = self._problem(request.inline.model, "inline.model")
            self.limits.candidates(request.inline.candidates, "inline.candidates")
            ids, X, _ = convert.batch_to_arrays(problem, request.inline.candidates,
                                                field="inline.candidates")
            ids = [cid or f"c{k}" for k, cid in enumerate(ids)]
            return 0, problem, CandidateSet(CandidateSet._check_ids(ids, len(ids),
                                                                    "inline.candidates.ids"), X)
        raise InputError("library", "set problem (a stored problem) or inline")

    def _start(self, request, context):
        """Validate, pick the budget, submit; returns (job, budget, audit_limit, revision,
        the timeline's :class:`~flipfix.service.timeline.Used`).

        The constraints are read, checked and lowered once, here; the worker gets the
        result (``compiled``, picklable) and does not compile again.
        """
        rev, problem, cands = self._library(request)
        used = self.timeline.used(request, problem, rev)  # published plan, events in force
        compiled = self._compiled(used.constraints, problem)
        kwargs = convert.options_to_kwargs(request.options,
                                           default_time_limit=self.config.default_time_limit)
        budget = kwargs["time_limit"] = self._budget(kwargs["time_limit"], context)
        job = self._watched(self.pool.submit(problem, cands, (), {**kwargs, "compiled": compiled}),
                            context)
        audit_limit = (request.options.audit_limit if request.options.HasField("audit_limit")
                       else None)
        return job, budget, audit_limit, rev, used

    def _compiled(self, constraints, problem):
        self.limits.constraints(constraints, "constraints")
        return convert.constraints_to_compiled(constraints, problem)

    @staticmethod
    def _watched(job, context):
        """``job``, cancelled when the call ends (cancelled, timed out or done)."""
        if not context.add_callback(job.cancel):  # the call has ended already
            job.cancel()
        return job

    def _follow(self, job, context, budget: float):
        """Yield at each progress report of the job; return when it has ended.

        Blocks on the job's events (:meth:`flipfix.service.worker.Job.next_event`), each wait
        as long as the time left to the next stop. The job is asked to stop (and return its
        best so far) when its budget, counted from the moment a worker starts it, is spent
        (plus some slack when the call has no deadline: the core may overrun a little to
        finish a phase), or ``STOP_SHARE`` of the deadline margin before the deadline; a
        call that ends cancels it through :meth:`_watched`. While a stream's reader holds a
        progress message back, the stops wait for it (the core still keeps its own budget).
        """
        remaining = time_left(context)
        if remaining is None:
            slack, stop_at = max(1.0, 0.25 * budget), math.inf
        else:
            slack = 0.0
            stop_at = time.monotonic() + remaining - STOP_SHARE * deadline_margin(remaining)
        asked = False
        while True:
            waiting = asked or job.cancel_requested or stop_at == math.inf
            kind = job.next_event(None if waiting else max(0.0, stop_at - time.monotonic()))
            if kind == "done":
                return
            if kind == "started":
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

    def _wait(self, job, context, budget: float):
        """Wait for the job (see :meth:`_follow`) and return its result."""
        for _ in self._follow(job, context, budget):
            pass
        return self._result(job)

    @translate_errors
    def Repair(self, request, context):
        job, budget, audit_limit, rev, used = self._start(request, context)
        res = self._wait(job, context, budget)
        return self.timeline.finish_repair(request, convert.result_to_reply(
            res, audit_limit=audit_limit, time_limit=budget, revision=rev), used, context)

    @translate_errors
    def RepairStream(self, request, context):
        job, budget, audit_limit, rev, used = self._start(request, context)
        yield from self._stream(
            job, context, budget, lambda msg: pb.RepairEvent(progress=msg),
            lambda res: pb.RepairEvent(result=self.timeline.finish_repair(
                request, convert.result_to_reply(res, audit_limit=audit_limit,
                                                 time_limit=budget, revision=rev),
                used, context)))

    def _stream(self, job, context, budget: float, progress_event, result_event):
        """Progress messages as the worker reports (the core's phase names), then the result.

        ``progress_event(RepairProgress) -> event``, ``result_event(result) -> event``.
        """
        last = [0]

        def report():
            p = job.progress()
            if p.updates == last[0]:
                return None
            last[0] = p.updates
            msg = pb.RepairProgress(done=p.done, total=p.total, phase=p.phase or "running")
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
        try:
            if not name:
                raise InputError("problem", "must name a stored problem")
            ids = list(ids)
            seen: dict = {}
            for k, cid in enumerate(ids):
                if cid in seen:
                    raise InputError(f"candidate_ids[{k}]", f"{cid!r} is listed twice")
                seen[cid] = k
            return self.store.library(name, ids=ids, all_revisions=all_revisions,
                                      max_candidates=self.config.max_candidates)
        except InputError as err:
            raise type(err)(field + err.field, err.message) from None
        except NotFoundError as err:
            raise NotFoundError(field + err.field, err.message) from None

    def _budget(self, requested: float, context) -> float:
        return deadline_budget(min(requested, self.config.max_time_limit), time_left(context))

    def _submit_call(self, fn, args: tuple, kwargs: dict, context):
        return self._watched(self.pool.submit_call(fn, args, kwargs), context)

    @translate_errors
    def ProfileRobustness(self, request, context):
        t0 = time.perf_counter()
        rev, problem, cands = self._audit_library(request.problem, request.candidate_ids,
                                                  request.all_revisions)
        eps = convert.nonneg(request.epsilon, "epsilon")
        job = self._submit_call(audit_jobs.robustness, (problem, cands),
                                {"epsilon": eps, "spectrum": bool(request.spectrum)}, context)
        rep = self._wait(job, context, math.inf)  # vectorised, not interruptible
        reply = convert.robustness_to_reply(rep, revision=rev)
        self.timeline.record_audit("ProfileRobustness", request, reply, problem=request.problem,
                                   revision=rev, started=t0, context=context)
        return reply

    def _start_stress(self, request, context, *, field: str = ""):
        rev, problem, cands = self._audit_library(request.problem, request.candidate_ids,
                                                  request.all_revisions, field=field)
        family, kwargs = convert.stress_to_kwargs(
            request, problem, default_time_limit=self.config.default_audit_time_limit,
            max_scenarios=self.config.max_scenarios, field=field)
        kwargs["time_limit"] = self._budget(kwargs["time_limit"], context)
        if self.dask_address:
            kwargs["dask"] = self.dask_address
        return rev, problem, cands, family, kwargs

    @translate_errors
    def StressTest(self, request, context):
        t0 = time.perf_counter()
        rev, problem, cands, family, kwargs = self._start_stress(request, context)
        job = self._submit_call(audit_jobs.stress, (problem, cands, family), kwargs, context)
        rep = self._wait(job, context, kwargs["time_limit"])
        reply = convert.stress_to_reply(rep, matrices=request.matrices,
                                        time_limit=kwargs["time_limit"], revision=rev)
        self.timeline.record_audit("StressTest", request, reply, problem=request.problem,
                                   revision=rev, started=t0, seed=request.seed,
                                   status=reply.stopped, context=context)
        return reply

    @translate_errors
    def StressTestStream(self, request, context):
        t0 = time.perf_counter()
        rev, problem, cands, family, kwargs = self._start_stress(request, context)
        job = self._submit_call(audit_jobs.stress, (problem, cands, family), kwargs, context)
        budget = kwargs["time_limit"]

        def result(rep):
            reply = convert.stress_to_reply(rep, matrices=request.matrices, time_limit=budget,
                                            revision=rev)
            self.timeline.record_audit("StressTest", request, reply, problem=request.problem,
                                       revision=rev, started=t0, seed=request.seed,
                                       status=reply.stopped, context=context)
            return pb.StressEvent(result=reply)

        yield from self._stream(job, context, budget, lambda msg: pb.StressEvent(progress=msg),
                                result)

    @translate_errors
    def ParetoFront(self, request, context):
        from flipfix.repair.audit.pareto import cheapest_within, fewest_flips_within

        rev, problem, cands = self._audit_library(request.problem, request.candidate_ids,
                                                  request.all_revisions)
        compiled = self._compiled(request.constraints, problem)
        kwargs = convert.pareto_to_kwargs(request,
                                          default_time_limit=self.config.default_time_limit)
        kwargs["time_limit"] = budget = self._budget(kwargs["time_limit"], context)
        t0 = time.perf_counter()
        job = self._submit_call(audit_jobs.pareto, (problem, cands, compiled), kwargs, context)
        front = self._wait(job, context, budget)
        cheapest = fewest = None
        if request.HasField("cheapest_within_flips"):
            cheapest = cheapest_within(front, int(request.cheapest_within_flips))
        if request.HasField("fewest_flips_within_percent"):
            fewest = fewest_flips_within(front, request.fewest_flips_within_percent)
        reply = convert.pareto_to_reply(front, cheapest=cheapest, fewest=fewest,
                                        seconds=time.perf_counter() - t0, time_limit=budget,
                                        revision=rev)
        self.timeline.record_audit("ParetoFront", request, reply, problem=request.problem,
                                   revision=rev, started=t0, seed=request.seed, context=context)
        return reply

    @translate_errors
    def CurateLibrary(self, request, context):
        t0 = time.perf_counter()
        rev, problem, cands, family, kwargs = self._start_stress(request.stress, context,
                                                                 field="stress.")
        K = len(cands.ids)
        if not 1 <= request.m <= K:
            raise InputError("m", f"must be in [1, {K}] (the audited library), got {request.m}")
        if request.selection not in convert.SELECTION_NAMES:
            raise InputError("selection", f"unknown selection {request.selection}")
        selection = convert.SELECTION_NAMES[request.selection]
        # checked here, before the stress test runs (curate's default max_subsets)
        if selection == "exhaustive" and math.comb(K, request.m) > 200_000:
            raise InputError("selection", f"EXHAUSTIVE over C({K}, {request.m}) subsets is too "
                                          "many; use FORWARD")
        budget = kwargs["time_limit"]
        job = self._submit_call(audit_jobs.curation, (problem, cands, family),
                                {"m": int(request.m), "selection": selection,
                                 "stress_options": kwargs}, context)
        rep, cur = self._wait(job, context, budget)
        stress = convert.stress_to_reply(rep, matrices=request.stress.matrices,
                                         time_limit=budget, revision=rev)
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
                                               [c for c in cands.ids if c not in keep],
                                               revision=rev)
                kept = True
                message = f"kept {len(cur.kept_ids)} candidates, removed {len(removed)}"
        reply = convert.curation_to_reply(stress, cur, kept=kept, removed=removed,
                                          message=message, revision=rev)
        self.timeline.record_audit("CurateLibrary", request, reply,
                                   problem=request.stress.problem, revision=rev, started=t0,
                                   seed=request.stress.seed, status=stress.stopped,
                                   context=context)
        return reply


class RunningServer:
    """A started server; ``port`` is the bound port (bind port 0 in tests)."""

    def __init__(self, server: grpc.Server, port: int, servicer: FlipfixServicer,
                 health_servicer: health.HealthServicer, pool: RepairPool, store: Store):
        self.server = server
        self.port = port
        self.servicer = servicer
        self.health = health_servicer
        self.pool = pool
        self.store = store
        self._stopped = threading.Event()
        self._lock = threading.Lock()
        self.cluster = None  # the Dask cluster (client) of stress tests, when configured

    @property
    def address(self) -> str:
        return f"127.0.0.1:{self.port}"

    def shutdown(self, grace: float = 10.0) -> None:
        """Health NOT_SERVING, refuse new calls, give in-flight ones ``grace`` s, then cancel."""
        with self._lock:
            if self._stopped.is_set():
                return
            self.health.enter_graceful_shutdown()
            stopped = self.server.stop(grace)
            stopped.wait()
            self.pool.shutdown(wait=True)
            self.store.close()
            if self.cluster is not None:
                self.cluster.close()
            self._stopped.set()

    stop = shutdown

    def wait_for_termination(self, timeout: float | None = None) -> bool:
        return self._stopped.wait(timeout)

    def __enter__(self) -> "RunningServer":
        return self

    def __exit__(self, *exc) -> None:
        self.shutdown(grace=1.0)


def create_server(address: str = "127.0.0.1:0", config: ServerConfig | None = None,
                  **overrides) -> RunningServer:
    """Build, bind and start the server; returns a :class:`RunningServer` (``.port``)."""
    config = config or ServerConfig()
    for k, v in overrides.items():
        if not hasattr(config, k):
            raise TypeError(f"unknown server option {k!r}")
        setattr(config, k, v)
    store = Store(config.db_path)
    try:
        timeline = Timeline(store, max_records=config.max_records)
    except BaseException:
        store.close()
        raise
    pool = RepairPool(workers=config.workers, queue_size=config.queue_size, warm=config.warm)
    options = [("grpc.max_receive_message_length", config.max_message_bytes),
               ("grpc.max_send_message_length", config.max_message_bytes),
               ("grpc.so_reuseport", 0)]
    # threads: one per repair slot (they wait on the pool) plus room for quick calls
    server = grpc.server(futures.ThreadPoolExecutor(max_workers=pool.slots + 8,
                                                    thread_name_prefix="flipfix-rpc"),
                         options=options)
    servicer = FlipfixServicer(store, pool, config, timeline)
    pb_grpc.add_FlipfixServicer_to_server(servicer, server)
    grow_name = grow_service.register(servicer, server)
    tpb_grpc.add_TimelineServicer_to_server(TimelineServicer(timeline), server)
    health_servicer = health.HealthServicer()
    health_pb2_grpc.add_HealthServicer_to_server(health_servicer, server)
    names = (SERVICE_NAME, grow_name, TIMELINE_SERVICE_NAME, health_pb2.DESCRIPTOR.services_by_name["Health"].full_name,
             reflection.SERVICE_NAME)
    reflection.enable_server_reflection(names, server)
    try:
        port = server.add_insecure_port(address)
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
        from flipfix.service.cluster import connect

        try:
            cluster = connect(config.dask, field="dask")
        except Exception:
            server.stop(0)
            pool.shutdown(wait=False)
            store.close()
            raise
        servicer.dask_address = cluster.address
    server.start()
    # NOT_SERVING until the workers' kernels are warm (a first run compiles them); the
    # whole server ("") turns SERVING last, once every named service does
    served = (SERVICE_NAME, TIMELINE_SERVICE_NAME, "")
    for name in served:
        health_servicer.set(name, health_pb2.HealthCheckResponse.NOT_SERVING)
    pool.when_ready(lambda: [health_servicer.set(name, health_pb2.HealthCheckResponse.SERVING)
                             for name in served])
    log.info("flipfix listening on port %d (db %s)", port, Path(config.db_path))
    running = RunningServer(server, port, servicer, health_servicer, pool, store)
    running.cluster = cluster
    return running
