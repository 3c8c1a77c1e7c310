"""Repair and audit calls prepared from their request: the work between a request and its
pool job, written once and run in either of two places.

Preparing a call reads the stored library (the model's JSON decoded, candidates
unpacked), the timeline's published plan and events, and lowers the constraints. For a
large stored problem that is seconds of work holding the interpreter lock, so it runs in
the pool worker that then runs the job (:func:`stored_call`): the server sends the raw
request bytes and a :class:`StoreRef` (the store's address and the caller), never the
model; the worker reads the store itself (a read-only :class:`~flipfix.service.store.Store`
per process) under the caller's tenant. An inline model, a small stored problem or an
in-memory store is prepared in the server (the same functions on the servicer).

Every preparation function takes ``env`` -- anything with ``store`` (the store as the
caller's tenant sees it), ``timeline``, ``config`` (a
:class:`~flipfix.service.server.ServerConfig`) and ``dask_address`` -- and the call's
``deadline`` (``time.monotonic()``; None: none), and returns a :class:`Prepared`. Errors
are the same exceptions, naming the same fields, wherever it runs: the pool carries them
back to the server, which answers exactly as if it had prepared the call itself.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace
from typing import Any, Callable

from flipfix.repair.errors import InputError

from flipfix.service import audit_jobs, convert
from flipfix.service.auth import Principal, acting_as
from flipfix.service.deadlines import budget_until
from flipfix.service.errors import ConflictError, NotFoundError
from flipfix.service.generated import flipfix_pb2 as pb

__all__ = ["Prepared", "StoreRef", "PREPARE", "REQUESTS", "REPLIES", "stored_call",
           "stored_problem", "problem_reply", "problem_info", "stored_candidates",
           "candidates_to_add", "repair",
           "robustness", "stress", "pareto", "curation", "audit_library", "compiled_for"]


@dataclass
class Prepared:
    """A call ready for the pool: ``fn(*args, cancel=, progress=, **kwargs)`` (``fn`` None:
    :func:`flipfix.repair.repair`), the stored ``revision`` read, the solver ``budget`` (s)
    and ``keep``: what the reply needs afterwards (the timeline's ``used``, the ids)."""

    fn: Callable | None
    args: tuple
    kwargs: dict
    revision: int
    budget: float
    keep: dict = field(default_factory=dict)

    def outcome(self) -> "Prepared":
        """This without the job's inputs (what a worker sends back with the result)."""
        return replace(self, fn=None, args=(), kwargs={})


def compiled_for(env, constraints, problem):
    """The request's constraints checked against the limits and lowered once."""
    env.config.limits.constraints(constraints, "constraints")
    return convert.constraints_to_compiled(constraints, problem)


def _budget(env, requested: float, deadline: float | None) -> float:
    return budget_until(requested, deadline, max_time_limit=env.config.max_time_limit)


def stored_library(env, request: pb.RepairRequest):
    """(revision, problem, candidates) of a Repair of a stored problem."""
    return env.store.library(request.problem, ids=env.timeline.candidate_ids(request),
                             all_revisions=request.all_revisions,
                             max_candidates=env.config.max_candidates)


def audit_library(env, name: str, ids, all_revisions: bool, *, field: str = ""):
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
        return env.store.library(name, ids=ids, all_revisions=all_revisions,
                                 max_candidates=env.config.max_candidates)
    except InputError as err:
        raise type(err)(field + err.field, err.message) from None
    except NotFoundError as err:
        raise NotFoundError(field + err.field, err.message) from None


def _dask_runner(env):
    """The server's runner (its settings, e.g. ``min_bits``), or in a pool worker one for
    the same cluster address (a runner pickles as its address)."""
    runner = getattr(env, "dask_runner", None)
    if runner is None:
        from flipfix.service.cluster import DaskRunner

        runner = DaskRunner(address=env.dask_address)
    return runner


def repair(env, request: pb.RepairRequest, *, deadline: float | None,
           library: Callable | None = None) -> Prepared:
    """A Repair: options, the library (``library()``, else the stored one), the constraints
    used (request's, published plan, events in force), lowered once; the worker gets the
    result (``compiled``) and does not compile again."""
    kwargs = convert.options_to_kwargs(request.options,
                                       default_time_limit=env.config.default_time_limit)
    rev, problem, cands = library() if library is not None else stored_library(env, request)
    used = env.timeline.used(request, problem, rev, cands)  # plans, events in force
    compiled = compiled_for(env, used.constraints, problem)
    if used.plan is not None:
        kwargs["plan"] = problem.to_caller(used.plan)
    budget = kwargs["time_limit"] = _budget(env, kwargs["time_limit"], deadline)
    if env.dask_address:  # a large library's greedy stage goes to the cluster
        kwargs["candidate_runner"] = _dask_runner(env)
    # the reply needs the events and counts, not the constraints (lowered into ``compiled``)
    return Prepared(None, (problem, cands, ()), {**kwargs, "compiled": compiled}, rev, budget,
                    {"used": replace(used, constraints=[], plan=None)})


def robustness(env, request: pb.RobustnessRequest, *, deadline: float | None) -> Prepared:
    eps = convert.nonneg(request.epsilon, "epsilon")
    rev, problem, cands = audit_library(env, request.problem, request.candidate_ids,
                                        request.all_revisions)
    return Prepared(audit_jobs.robustness, (problem, cands),
                    {"epsilon": eps, "spectrum": bool(request.spectrum)}, rev, math.inf)


def stress(env, request: pb.StressRequest, *, deadline: float | None,
           field: str = "") -> Prepared:
    rev, problem, cands = audit_library(env, request.problem, request.candidate_ids,
                                        request.all_revisions, field=field)
    family, kwargs = convert.stress_to_kwargs(
        request, problem, default_time_limit=env.config.default_audit_time_limit,
        max_scenarios=env.config.max_scenarios, field=field)
    kwargs["time_limit"] = _budget(env, kwargs["time_limit"], deadline)
    if env.dask_address:
        kwargs["dask"] = env.dask_address
    return Prepared(audit_jobs.stress, (problem, cands, family), kwargs, rev,
                    kwargs["time_limit"], {"ids": cands.ids})


def pareto(env, request: pb.ParetoRequest, *, deadline: float | None) -> Prepared:
    rev, problem, cands = audit_library(env, request.problem, request.candidate_ids,
                                        request.all_revisions)
    compiled = compiled_for(env, request.constraints, problem)
    kwargs = convert.pareto_to_kwargs(request, default_time_limit=env.config.default_time_limit)
    kwargs["time_limit"] = _budget(env, kwargs["time_limit"], deadline)
    return Prepared(audit_jobs.pareto, (problem, cands, compiled), kwargs, rev,
                    kwargs["time_limit"])


def curation(env, request: pb.CurateRequest, *, deadline: float | None) -> Prepared:
    """The stress test of ``request.stress``, then the choice of ``m`` of its candidates."""
    prep = stress(env, request.stress, deadline=deadline, field="stress.")
    K = len(prep.keep["ids"])
    if not 1 <= request.m <= K:
        raise InputError("m", f"must be in [1, {K}] (the audited library), got {request.m}")
    if request.selection not in convert.SELECTION_NAMES:
        raise InputError("selection", f"unknown selection {request.selection}")
    selection = convert.SELECTION_NAMES[request.selection]
    # checked here, before the stress test runs (curate's default max_subsets)
    if selection == "exhaustive" and math.comb(K, request.m) > 200_000:
        raise InputError("selection", f"EXHAUSTIVE over C({K}, {request.m}) subsets is too "
                                      "many; use FORWARD")
    return replace(prep, fn=audit_jobs.curation,
                   kwargs={"m": int(request.m), "selection": selection,
                           "stress_options": prep.kwargs})


def repair_reply(request: pb.RepairRequest, prep: Prepared, res) -> pb.RepairReply:
    audit_limit = (request.options.audit_limit if request.options.HasField("audit_limit")
                   else None)
    return convert.result_to_reply(res, audit_limit=audit_limit, time_limit=prep.budget,
                                   revision=prep.revision)


def robustness_reply(request: pb.RobustnessRequest, prep: Prepared, rep) -> pb.RobustnessReply:
    return convert.robustness_to_reply(rep, revision=prep.revision)


def stress_reply(request: pb.StressRequest, prep: Prepared, rep) -> pb.StressReply:
    return convert.stress_to_reply(rep, matrices=request.matrices, time_limit=prep.budget,
                                   revision=prep.revision)


#: RPC name -> (reply message, its conversion from the job's result): replies that grow
#: with the library (one audit row per candidate: 0.5 s of conversion for 10,000), built
#: by the worker that prepared the call and sent as bytes (the server only parses them)
REPLIES = {"Repair": (pb.RepairReply, repair_reply),
           "ProfileRobustness": (pb.RobustnessReply, robustness_reply),
           "StressTest": (pb.StressReply, stress_reply)}

#: RPC name -> its preparation, and its request message (what :func:`stored_call` decodes).
PREPARE: dict[str, Callable[..., Prepared]] = {
    "Repair": repair, "ProfileRobustness": robustness, "StressTest": stress,
    "ParetoFront": pareto, "CurateLibrary": curation,
}
REQUESTS = {"Repair": pb.RepairRequest, "ProfileRobustness": pb.RobustnessRequest,
            "StressTest": pb.StressRequest, "ParetoFront": pb.ParetoRequest,
            "CurateLibrary": pb.CurateRequest}


# ------------------------------------------------------------------ in a worker
@dataclass(frozen=True)
class StoreRef:
    """Where a worker finds the stored problem, and whose it is: the store's address
    (a file path or a ``postgresql://`` URL), the caller, the server's settings."""

    db: str
    caller: Principal
    config: Any  # ServerConfig (picklable)
    dask_address: str = ""


@dataclass
class _WorkerEnv:
    store: Any
    timeline: Any
    config: Any
    dask_address: str


_READERS: dict = {}  # db -> (Store, Timeline), opened once per worker process


def _env(ref: StoreRef) -> _WorkerEnv:
    from flipfix.service.store import Store
    from flipfix.service.tenancy import TenantView
    from flipfix.service.timeline import Timeline

    if ref.db not in _READERS:
        store = Store.reader(ref.db)
        _READERS[ref.db] = (store, Timeline(store, max_records=ref.config.max_records,
                                            migrate=False))
    store, timeline = _READERS[ref.db]
    return _WorkerEnv(TenantView(store, ref.caller.tenant), timeline, ref.config,
                      ref.dask_address)


def stored_call(ref: StoreRef, rpc: str, raw: bytes, deadline: float | None, *,
                cancel=None, progress=None, started=None):
    """Prepare the call ``rpc`` (its request's bytes ``raw``) here, from the store, as
    ``ref.caller``; tell ``started(budget)`` when its budget clock starts; run the job.
    Returns ``(Prepared without its inputs, the job's result)``; for the RPCs of
    :data:`REPLIES`, the result is the serialized reply."""
    env = _env(ref)
    request = REQUESTS[rpc].FromString(raw)
    with acting_as(ref.caller):
        prep = PREPARE[rpc](env, request, deadline=deadline)
    if started is not None:
        started(prep.budget)
    fn = prep.fn
    if fn is None:
        from flipfix.repair import repair as fn
    out = fn(*prep.args, cancel=cancel, progress=progress, **prep.kwargs)
    if rpc in REPLIES:
        out = REPLIES[rpc][1](request, prep, out).SerializeToString()
    return prep.outcome(), out


stored_call.prepares = True  # the pool passes ``started`` (see flipfix.service.worker)


def candidates_to_add(env, request: pb.AddCandidatesRequest) -> tuple:
    """AddCandidates: ``(revision, ids, X int8 (K, n), provenance)`` of the request's batch
    read against the stored model (which must still be at ``request.revision`` if given)."""
    _info, rev, problem = env.store.get_problem(request.problem)
    if request.revision and request.revision != rev:
        raise ConflictError("revision", f"problem {request.problem!r} is at revision "
                                        f"{rev}, not {request.revision}")
    env.config.limits.candidates(request.candidates, "candidates")
    ids, X, provs = convert.batch_to_arrays(problem, request.candidates)
    return rev, ids, X, provs


def stored_candidates(ref: StoreRef, raw: bytes, *, cancel=None, progress=None) -> tuple:
    """:func:`candidates_to_add` in a worker (the stored model read there), as
    ``ref.caller``; ``raw``: the AddCandidatesRequest's bytes. The server stores them."""
    with acting_as(ref.caller):
        return candidates_to_add(_env(ref), pb.AddCandidatesRequest.FromString(raw))


def problem_info(rec) -> pb.ProblemInfo:
    """A :class:`~flipfix.service.store.ProblemRecord` as the contract's ProblemInfo."""
    return pb.ProblemInfo(name=rec.name, revision=rec.revision, num_variables=rec.num_variables,
                          num_interactions=rec.num_interactions,
                          num_candidates=rec.num_candidates, created_at=rec.created_at,
                          updated_at=rec.updated_at)


def problem_reply(env, name: str, revision: int) -> pb.GetProblemReply:
    """GetProblem: the stored model of ``revision`` (0: the current one) and its info."""
    info, rev, problem = env.store.get_problem(name, revision)
    return pb.GetProblemReply(info=problem_info(info), revision=rev,
                              model=convert.problem_to_model(problem))


def stored_problem(ref: StoreRef, name: str, revision: int, *, cancel=None, progress=None
                   ) -> bytes:
    """:func:`problem_reply` read and built in a worker, as ``ref.caller``; its bytes (the
    server sends them as they are, see :class:`flipfix.service.admission.RequestGuard`)."""
    with acting_as(ref.caller):
        return problem_reply(_env(ref), name, revision).SerializeToString()
