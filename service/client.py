"""A small Python client for the flipfix service.

    with FlipfixClient("127.0.0.1:50051") as fx:
        fx.create_problem("roster", bqm)                 # dimod BQM, Problem or JSON document
        fx.add_candidates("roster", sampleset)           # SampleSet, CandidateSet, array or JSON list
        out = fx.repair("roster", [{"type": "fix", "values": {"x3": 0}}], time_limit=2.0)
        out["best"]["cost"], out["best"]["flips"]
        [lib] = fx.list_candidates("roster")             # StoredCandidates: ids, values (K, n)

Candidates travel packed (``PackedAssignments``: one bit per variable in the problem's
label order), converted with numpy on both sides; the client fetches the problem's labels
(``get_problem``) to pack candidates for a stored problem and to read the answer.
Replies of ``repair`` are dicts in the layout of :meth:`flipfix.repair.result.RepairResult.to_dict`.
The audit methods (``robustness``, ``stress_test``, ``pareto_front``, ``curate``) return
the core's own report objects (:mod:`flipfix.repair.audit.robustness`, :mod:`flipfix.repair.audit.stress`,
:mod:`flipfix.repair.audit.pareto`, :mod:`flipfix.repair.audit.curation`), each with a ``to_dict()``:

        prof = fx.robustness("roster", epsilon=0.5)
        rep = fx.stress_test("roster", ScenarioFamily(hamming_weight=3.0), scenarios=30)
        out = fx.curate("roster", ScenarioFamily(hamming_weight=3.0), 5, keep=True)

Errors: every method raises :class:`FlipfixError` (a ``grpc.RpcError``) for a server
status and for a mistake found locally before any call (a label typo, ``time_limit=0``):
``err.code()`` (a ``grpc.StatusCode``), ``err.reason`` (``"INVALID_FIELD"``, ...: the
proto's ErrorReason without its prefix), ``err.field`` (the request path, ``""`` when none)
and ``err.details()`` (the message). Transport failures carry the reason ``""``.
"""

from __future__ import annotations

import functools
import time
from dataclasses import dataclass
from typing import Any, Callable, Iterable, Mapping, Sequence

import grpc
import numpy as np
from google.rpc import error_details_pb2
from grpc_status import rpc_status

from flipfix.repair.documents import dimod_forms, forms as documents
from flipfix.repair.errors import InputError
from flipfix.repair.model.candidates import CandidateSet
from flipfix.repair.errors import InputError
from flipfix.repair.model.problem import Problem

from flipfix.service import convert
from flipfix.service.connect import Connection, open_channel
from flipfix.service.generated import flipfix_pb2 as pb
from flipfix.service.generated import flipfix_pb2_grpc as pb_grpc

__all__ = ["FlipfixClient", "FlipfixError", "StoredCandidates", "raises_flipfix_errors"]


class FlipfixError(grpc.RpcError):
    """One error type for every failure of a client call.

    ``code()`` -> grpc.StatusCode, ``details()`` -> the message, ``reason`` (the server's
    ErrorInfo reason, e.g. ``"INVALID_FIELD"``; ``""`` for transport failures), ``field``
    (the request path to blame, ``""`` when none) and ``violations`` ([(field,
    description)] of the BadRequest detail)."""

    def __init__(self, code: grpc.StatusCode, message: str, *, reason: str = "",
                 field: str = "", violations: Sequence[tuple[str, str]] = ()):
        super().__init__(message)
        self._code, self._message = code, message
        self.reason, self.field, self.violations = reason, field, list(violations)

    def code(self) -> grpc.StatusCode:
        return self._code

    def details(self) -> str:
        return self._message

    def __str__(self) -> str:
        return f"{self._code.name}: {self._message}"

    @classmethod
    def from_rpc(cls, err: grpc.RpcError) -> "FlipfixError":
        """Read the rich status (ErrorInfo, BadRequest) of a failed call."""
        code = err.code() if callable(getattr(err, "code", None)) else grpc.StatusCode.UNKNOWN
        message = (err.details() if callable(getattr(err, "details", None)) else "") or ""
        reason, field, violations = "", "", []
        try:
            status = rpc_status.from_call(err)
        except (ValueError, AttributeError):  # a status without details, or no call
            status = None
        for detail in (status.details if status is not None else ()):
            info, bad = error_details_pb2.ErrorInfo(), error_details_pb2.BadRequest()
            if detail.Unpack(info):
                reason, field = info.reason, info.metadata.get("field", "")
            elif detail.Unpack(bad):
                violations = [(v.field, v.description) for v in bad.field_violations]
        return cls(code, message, reason=reason, field=field, violations=violations)

    @classmethod
    def from_input(cls, err: InputError) -> "FlipfixError":
        """A mistake found before any call, as the server would report it."""
        return cls(grpc.StatusCode.INVALID_ARGUMENT, f"{err.field}: {err.message}",
                   reason="INVALID_FIELD", field=err.field,
                   violations=[(err.field, err.message)])


def _one_error_type(method):
    """Raise :class:`FlipfixError` for a failed call or a local input mistake."""
    @functools.wraps(method)
    def wrapped(*args, **kwargs):
        try:
            return method(*args, **kwargs)
        except FlipfixError:
            raise
        except grpc.RpcError as err:
            raise FlipfixError.from_rpc(err) from None
        except InputError as err:
            raise FlipfixError.from_input(err) from None
    return wrapped


def raises_flipfix_errors(cls):
    """Class decorator: every public method of ``cls`` raises only :class:`FlipfixError`
    (for subclasses of :class:`FlipfixClient` that add methods)."""
    for name, fn in list(vars(cls).items()):
        if (callable(fn) and not isinstance(fn, (staticmethod, classmethod))
                and not name.startswith("_") and name != "close"):
            setattr(cls, name, _one_error_type(fn))
    return cls


def _last_result(stream, on_progress):
    """Pass each progress message of a server stream on; return its final result."""
    reply = None
    for ev in stream:
        if ev.HasField("progress"):
            on_progress(ev.progress)
        else:
            reply = ev.result
    if reply is None:
        raise RuntimeError("the stream ended without a result")
    return reply


@dataclass(frozen=True)
class StoredCandidates:
    """Stored candidates of one problem revision (a ListCandidates batch, pages joined).

    ``values`` is int8 (K, n) in the problem's vartype (0/1 or -1/+1), columns in
    ``problem.labels`` order (the model of ``revision``); ``provenance`` has K dicts
    ``{"source", "energy", "tags"}``.
    """

    revision: int
    problem: Problem
    ids: tuple
    values: np.ndarray
    provenance: list

    def __len__(self) -> int:
        return len(self.ids)

    def candidate_set(self) -> CandidateSet:
        """The candidates as the core's :class:`CandidateSet` (0/1 form) of ``problem``."""
        return CandidateSet(self.ids, self.problem.from_caller(self.values))

    def assignments(self) -> list[dict]:
        """``[{label: value}]`` in the caller's vartype (readable; one dict per candidate)."""
        return [dict(zip(self.problem.labels, row)) for row in self.values.tolist()]


def as_problem(model: Any) -> Problem:
    """dimod BQM, :class:`Problem` or problem JSON document -> Problem."""
    if isinstance(model, Problem):
        return model
    if isinstance(model, Mapping):
        return documents.parse_problem(model)
    return Problem.from_bqm(model)


@raises_flipfix_errors
class FlipfixClient:
    """Wraps the generated stub; ``target`` is ``HOST:PORT``. Every public method raises
    :class:`FlipfixError` only."""

    def __init__(self, target: str, *, timeout: float | None = 60.0,
                 max_message_bytes: int = 64 * 1024 * 1024, ca: str | None = None,
                 cert: str | None = None, key: str | None = None, token: str | None = None,
                 connection: Connection | None = None):
        """``ca``/``cert``/``key``: PEM files (TLS, mutual with cert and key); ``token``: the
        bearer token sent with every call; or all of it as one ``connection``
        (:mod:`flipfix.service.connect`)."""
        self.target = target
        self.timeout = timeout
        conn = connection or Connection(target, ca=ca, cert=cert, key=key, token=token)
        self.channel = open_channel(conn, options=[
            ("grpc.max_receive_message_length", max_message_bytes),
            ("grpc.max_send_message_length", max_message_bytes)])
        self.stub = pb_grpc.FlipfixStub(self.channel)

    def close(self) -> None:
        self.channel.close()

    def wait_ready(self, timeout: float | None = 300.0, *,
                   notice: Callable[[str], None] | None = None) -> None:
        """Block until the server's health is SERVING: a freshly started server reports
        NOT_SERVING while its workers load (on a machine's first run: compile) the search
        kernels. Event-driven (the standard ``grpc.health.v1.Health/Watch`` stream).
        ``notice(message)`` is called once if the server is not ready at first. Raises
        ``TimeoutError`` after ``timeout`` seconds, and ``grpc.RpcError`` (UNAVAILABLE) at once
        when nothing answers at the address."""
        import grpc
        from grpc_health.v1 import health_pb2, health_pb2_grpc

        t0 = time.monotonic()
        stream = health_pb2_grpc.HealthStub(self.channel).Watch(
            health_pb2.HealthCheckRequest(service=""), timeout=timeout)
        try:
            for reply in stream:
                if reply.status == health_pb2.HealthCheckResponse.SERVING:
                    return
                if notice is not None:
                    from flipfix.repair.kernels.readiness import EXPECTED_COLD_SECONDS

                    notice(f"flipfix: waiting for {self.target}: the server is loading its "
                           f"search kernels (a first run compiles them, about "
                           f"{EXPECTED_COLD_SECONDS:.0f} s on 2 cores)")
                    notice = None
        except grpc.RpcError as err:
            if err.code() == grpc.StatusCode.DEADLINE_EXCEEDED:
                raise TimeoutError(f"{self.target} was not ready after "
                                   f"{time.monotonic() - t0:.1f} s") from None
            raise
        finally:
            stream.cancel()
        raise TimeoutError(f"{self.target} ended the health stream before it was ready")

    def __enter__(self) -> "FlipfixClient":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    # ------------------------------------------------------------ conversion
    @staticmethod
    def _model(model: Any) -> tuple[pb.ProblemModel, Problem]:
        model = dimod_forms.as_native(model, "model")  # dimod's serialised BQM
        if dimod_forms.is_cqm(model):
            problem, rows = dimod_forms.from_cqm(model, field="model")
            if rows:
                raise InputError("model", f"the ConstrainedQuadraticModel has linear "
                                          f"constraints ({', '.join(c.name for c in rows)}), "
                                          f"which a stored problem cannot hold: repair it "
                                          f"inline (repair(cqm, ..., candidates=...)), or store "
                                          f"from_cqm(cqm)[0] and pass the rows with each repair")
            return convert.problem_to_model(problem), problem
        if isinstance(model, Mapping):  # keep the document's own terms (exact); parsed once
            problem = documents.parse_problem(model)
            return convert.doc_to_model(model, problem=problem), problem
        problem = as_problem(model)
        return convert.problem_to_model(problem), problem

    @staticmethod
    def _candidates(problem: Problem, candidates: Any, ids: Sequence[str] | None = None
                    ) -> pb.CandidateBatch:
        """A SampleSet, CandidateSet, numpy array (K, n) in the problem's vartype (columns in
        label order), candidates JSON list or dimod's serialised SampleSet -> one packed
        CandidateBatch."""
        candidates = dimod_forms.as_native(candidates, "candidates")
        if not isinstance(candidates, (CandidateSet, np.ndarray, pb.CandidateBatch)) and \
                type(candidates).__name__ != "SampleSet":
            candidates = list(candidates)
        return convert.candidates_to_batch(problem, candidates, ids=ids)

    @staticmethod
    def _constraints(problem: Problem, constraints: Iterable[Any]) -> list[pb.Constraint]:
        """Constraint protos, domain objects (:mod:`flipfix.repair.model.constraints`) or JSON
        objects -> Constraint protos (each JSON object read once)."""
        out = []
        for k, c in enumerate(constraints or []):
            if isinstance(c, pb.Constraint):
                out.append(c)
            elif isinstance(c, Mapping):
                out.append(convert.doc_to_constraint(c, problem, field=f"constraints[{k}]"))
            else:
                out.append(convert.constraint_to_proto(c, field=f"constraints[{k}]"))
        return out

    # -------------------------------------------------------------- problems
    def create_problem(self, name: str, model: Any) -> pb.ProblemInfo:
        m, _ = self._model(model)
        return self.stub.CreateProblem(pb.CreateProblemRequest(name=name, model=m),
                                       timeout=self.timeout)

    def replace_problem(self, name: str, model: Any, *, expected_revision: int = 0) -> pb.ProblemInfo:
        m, _ = self._model(model)
        return self.stub.ReplaceProblem(pb.ReplaceProblemRequest(
            name=name, model=m, expected_revision=expected_revision), timeout=self.timeout)

    def get_problem(self, name: str, revision: int = 0) -> tuple[pb.ProblemInfo, Problem]:
        """(info, the model of ``revision``; 0: the current one)."""
        return self._get_problem(name, revision)[::2]

    def _get_problem(self, name: str, revision: int = 0) -> tuple[pb.ProblemInfo, int, Problem]:
        r = self.stub.GetProblem(pb.GetProblemRequest(name=name, revision=revision),
                                 timeout=self.timeout)
        return r.info, int(r.revision), convert.model_to_problem(r.model)

    def list_problems(self) -> list[pb.ProblemInfo]:
        out, token = [], ""
        while True:
            r = self.stub.ListProblems(pb.ListProblemsRequest(page_token=token), timeout=self.timeout)
            out.extend(r.problems)
            token = r.next_page_token
            if not token:
                return out

    def delete_problem(self, name: str) -> int:
        return self.stub.DeleteProblem(pb.DeleteProblemRequest(name=name),
                                       timeout=self.timeout).candidates_deleted

    # ------------------------------------------------------------ candidates
    def add_candidates(self, name: str, candidates: Any, *, ids: Sequence[str] | None = None
                       ) -> list[str]:
        """Add a dimod SampleSet, a CandidateSet, a numpy array (K, n) of values in the
        problem's vartype (columns in label order; ``ids`` optional, else assigned) or a
        candidates JSON list, packed for the current revision (FAILED_PRECONDITION if the
        problem is replaced meanwhile)."""
        _info, rev, problem = self._get_problem(name)
        batch = self._candidates(problem, candidates, ids)
        return list(self.stub.AddCandidates(pb.AddCandidatesRequest(
            problem=name, candidates=batch, revision=rev), timeout=self.timeout).ids)

    def list_candidates(self, name: str, *, revision: int = 0, page_size: int = 0
                        ) -> list[StoredCandidates]:
        """Every stored candidate (of ``revision``; 0: of every revision), one
        :class:`StoredCandidates` per run of candidates made for the same revision."""
        out: list[StoredCandidates] = []
        models: dict[int, Problem] = {}
        token = ""
        while True:
            r = self.stub.ListCandidates(pb.ListCandidatesRequest(
                problem=name, page_size=page_size, page_token=token, revision=revision),
                timeout=self.timeout)
            for batch in r.batches:
                if batch.revision not in models:
                    models[batch.revision] = self._get_problem(name, batch.revision)[2]
                problem = models[batch.revision]
                cs, provs = convert.batch_to_candidates(batch, problem)
                if out and out[-1].revision == batch.revision:  # a run split by paging
                    last = out.pop()
                    cs = CandidateSet(last.ids + cs.ids, np.vstack([last.candidate_set().X, cs.X]))
                    provs = last.provenance + provs
                out.append(StoredCandidates(int(batch.revision), problem, cs.ids,
                                            problem.to_caller(cs.X), provs))
            token = r.next_page_token
            if not token:
                return out

    def remove_candidates(self, name: str, ids: Sequence[str]) -> int:
        return self.stub.RemoveCandidates(pb.RemoveCandidatesRequest(problem=name, ids=list(ids)),
                                          timeout=self.timeout).removed

    # ---------------------------------------------------------------- repair
    def repair_request(self, problem: str | Any, constraints: Iterable[Any] = (), *,
                       candidates: Any = None, candidate_ids: Sequence[str] = (),
                       all_revisions: bool = False, **options) -> pb.RepairRequest:
        """Build a RepairRequest: a stored problem name, or a model plus ``candidates`` inline
        (any form :meth:`add_candidates` takes, packed in the model's label order)."""
        return self._repair_request(problem, constraints, candidates=candidates,
                                    candidate_ids=candidate_ids, all_revisions=all_revisions,
                                    **options)[0]

    def _repair_request(self, problem, constraints, *, candidates=None, candidate_ids=(),
                        all_revisions=False, **options) -> tuple[pb.RepairRequest, Problem, int]:
        """(request, the model its values refer to, its revision; 0: inline). ``plan`` (in
        ``options``): the id of the plan in force (RepairRequest.plan_candidate_id)."""
        plan = options.pop("plan", None)
        if isinstance(problem, str):
            _info, rev, dom = self._get_problem(problem)
            req = pb.RepairRequest(problem=problem, candidate_ids=list(candidate_ids),
                                   all_revisions=all_revisions)
            rows: list = []
        else:
            if candidates is None:
                raise InputError("inline.candidates", "an inline repair needs candidates")
            if dimod_forms.is_cqm(problem):  # its linear constraints go first, as hard rows
                dom, rows = dimod_forms.from_cqm(problem, field="model")
                m = convert.problem_to_model(dom)
            else:
                (m, dom), rows = self._model(problem), []
            rev = 0
            req = pb.RepairRequest(inline=pb.InlineLibrary(
                model=m, candidates=self._candidates(dom, candidates)))
        req.constraints.extend(self._constraints(dom, [*rows, *(constraints or [])]))
        req.options.CopyFrom(convert.kwargs_to_options(**options))
        if plan is not None:
            if not isinstance(plan, str):
                raise InputError("plan_candidate_id", "must be a candidate id (a string)")
            req.plan_candidate_id = plan
        return req, dom, rev

    def repair(self, problem: str | Any, constraints: Iterable[Any] = (), *,
               timeout: float | None = None,
               on_progress: Callable[[pb.RepairProgress], None] | None = None, **kwargs) -> dict:
        """Repair and return the result dict; ``on_progress`` switches to the streaming RPC."""
        return self._repair(problem, constraints, timeout, on_progress, kwargs)[0]

    def repair_sampleset(self, problem: str | Any, constraints: Iterable[Any] = (), *,
                         timeout: float | None = None,
                         on_progress: Callable[[pb.RepairProgress], None] | None = None,
                         **kwargs) -> tuple[Any, dict]:
        """:meth:`repair`, with the answer also as a one-row ``dimod.SampleSet``
        (:func:`flipfix.repair.documents.dimod_forms.to_sampleset`): (sampleset, result dict)."""
        out, dom = self._repair(problem, constraints, timeout, on_progress, kwargs)
        return dimod_forms.to_sampleset(out, dom), out

    def _repair(self, problem, constraints, timeout, on_progress, kwargs) -> tuple[dict, Problem]:
        """(the result dict, the model its values refer to)."""
        req, dom, rev = self._repair_request(problem, constraints, **kwargs)
        timeout = timeout if timeout is not None else self.timeout
        if on_progress is None:
            reply = self.stub.Repair(req, timeout=timeout)
        else:
            reply = _last_result(self.stub.RepairStream(req, timeout=timeout), on_progress)
        dom = self._reply_model(reply, problem, dom, rev)
        return convert.reply_to_dict(reply, dom), dom

    def _reply_dict(self, reply: pb.RepairReply, problem: str | Any, dom: Problem, rev: int,
                    ) -> dict:
        """The reply as a result dict, read with the model of the reply's revision."""
        return convert.reply_to_dict(reply, self._reply_model(reply, problem, dom, rev))

    def _reply_model(self, reply, problem: str | Any, dom: Problem, rev: int) -> Problem:
        if isinstance(problem, str) and reply.revision != rev:  # replaced meanwhile
            return self._get_problem(problem, reply.revision)[2]
        return dom

    # ----------------------------------------------------------------- audit
    @staticmethod
    def _family(family: Any) -> tuple[pb.ScenarioFamily, dict]:
        """ScenarioFamily (core), a dict of its fields, or the proto -> (proto, dict)."""
        from flipfix.repair.audit.stress import ScenarioFamily

        if isinstance(family, pb.ScenarioFamily):
            return family, {}
        if isinstance(family, Mapping):
            family = ScenarioFamily(**family)
        if not isinstance(family, ScenarioFamily):
            raise InputError("family", "expected a flipfix.repair.audit.stress.ScenarioFamily, "
                                       f"got {type(family).__name__}")
        return convert.family_to_proto(family), family.to_dict()


    def robustness(self, name: str, *, epsilon: float = 0.0, spectrum: bool = False,
                   candidate_ids: Sequence[str] = (), all_revisions: bool = False,
                   timeout: float | None = None):
        """The robustness profile of a stored library: :class:`flipfix.repair.audit.robustness.RobustnessReport`."""
        r = self.stub.ProfileRobustness(pb.RobustnessRequest(
            problem=name, candidate_ids=list(candidate_ids), all_revisions=all_revisions,
            epsilon=epsilon, spectrum=spectrum), timeout=timeout or self.timeout)
        return convert.reply_to_robustness(r)

    def stress_request(self, name: str, family: Any, *, scenarios: int = 20, seed: int = 0,
                       method: str = "greedy", time_limit: float | None = None,
                       epsilon: float = 0.0,
                       max_flips: int | None = None, flip_price: float = 0.0,
                       candidate_ids: Sequence[str] = (), all_revisions: bool = False,
                       matrices: bool = False) -> pb.StressRequest:
        fam, _ = self._family(family)
        req = pb.StressRequest(problem=name, candidate_ids=list(candidate_ids),
                               all_revisions=all_revisions, family=fam, scenarios=scenarios,
                               seed=seed, method=convert.method_number(method), epsilon=epsilon,
                               flip_price=flip_price, matrices=matrices)
        if time_limit is not None:
            req.time_limit = convert.check_time_limit(float(time_limit), "time_limit")
        if max_flips is not None:
            req.max_flips = int(max_flips)
        return req

    def stress_test(self, name: str, family: Any, *, timeout: float | None = None,
                    on_progress: Callable[[pb.RepairProgress], None] | None = None, **options):
        """The what-if stress test of a stored library: :class:`flipfix.repair.audit.stress.StressReport`.

        ``options`` as :meth:`stress_request`; ``on_progress`` switches to the streaming
        RPC (one progress message per scenario, phase ``"stress"``).
        """
        req = self.stress_request(name, family, **options)
        _, fam_doc = self._family(family)
        timeout = timeout if timeout is not None else self.timeout
        if on_progress is None:
            return convert.reply_to_stress(self.stub.StressTest(req, timeout=timeout),
                                           family=fam_doc)
        reply = _last_result(self.stub.StressTestStream(req, timeout=timeout), on_progress)
        return convert.reply_to_stress(reply, family=fam_doc)

    def pareto_front(self, name: str, constraints: Iterable[Any], *,
                     methods: Sequence[str] = ("greedy", "cpsat"), time_limit: float | None = None,
                     seed: int = 0, include_unchanged: bool = True,
                     cheapest_within_flips: int | None = None,
                     fewest_flips_within_percent: float | None = None,
                     candidate_ids: Sequence[str] = (), all_revisions: bool = False,
                     timeout: float | None = None) -> dict:
        """The (cost, flips) front: ``{"front": [ParetoPoint], "cheapest_within": ParetoPoint |
        None, "fewest_flips_within": ParetoPoint | None, "seconds", "time_limit", "revision"}``."""
        _info, dom = self.get_problem(name)
        req = pb.ParetoRequest(problem=name, candidate_ids=list(candidate_ids),
                               all_revisions=all_revisions,
                               constraints=self._constraints(dom, constraints),
                               methods=[convert.method_number(m, f"methods[{k}]")
                                        for k, m in enumerate(methods)],
                               seed=seed, exclude_unchanged=not include_unchanged)
        if time_limit is not None:
            req.time_limit = convert.check_time_limit(float(time_limit), "time_limit")
        if cheapest_within_flips is not None:
            req.cheapest_within_flips = int(cheapest_within_flips)
        if fewest_flips_within_percent is not None:
            req.fewest_flips_within_percent = float(fewest_flips_within_percent)
        r = self.stub.ParetoFront(req, timeout=timeout or self.timeout)
        return {"front": [convert.reply_to_point(p) for p in r.front],
                "cheapest_within": convert.reply_to_point(r.cheapest_within)
                if r.HasField("cheapest_within") else None,
                "fewest_flips_within": convert.reply_to_point(r.fewest_flips_within)
                if r.HasField("fewest_flips_within") else None,
                "seconds": r.seconds, "time_limit": r.time_limit, "revision": int(r.revision)}

    def curate(self, name: str, family: Any, m: int, *, keep: bool = False,
               selection: str = "forward", timeout: float | None = None, **options) -> dict:
        """Choose ``m`` candidates by the stress test; ``keep=True`` removes the others from the
        store. ``{"stress": StressReport, "curation": CurationResult | None, "kept": bool,
        "removed_ids": [...], "message": str, "revision": int}``."""
        if selection not in convert.SELECTION_ENUM:
            raise InputError("selection", f"must be forward or exhaustive, got {selection}")
        req = pb.CurateRequest(stress=self.stress_request(name, family, **options), m=m,
                               selection=convert.SELECTION_ENUM[selection], keep=keep)
        _, fam_doc = self._family(family)
        r = self.stub.CurateLibrary(req, timeout=timeout if timeout is not None else self.timeout)
        return {"stress": convert.reply_to_stress(r.stress, family=fam_doc),
                "curation": convert.reply_to_curation(r, m, selection),
                "kept": bool(r.kept), "removed_ids": list(r.removed_ids), "message": r.message,
                "revision": int(r.revision)}
