"""A real server on port 0: status codes, repair results, deadlines, cancellation,
streaming, health during repairs, persistence across a restart, graceful shutdown.

Expected optima come from dimod's ExactSolver (brute force over every assignment);
long-running repairs use OR-Library bqp100-1 (../shared/benchmarks/bqp, J. E. Beasley
1998), on which CP-SAT finds no optimality proof in 30 s (benchmarks README).
"""

from __future__ import annotations

import threading
import time
from concurrent.futures import ThreadPoolExecutor

import dimod
import grpc
import numpy as np
import pytest
from grpc_health.v1 import health_pb2, health_pb2_grpc
from grpc_reflection.v1alpha import reflection_pb2, reflection_pb2_grpc

from flipfix.repair.documents import forms as documents
from flipfix.repair.documents.instances import read_bqp
from flipfix.service import convert
from flipfix.service.generated import flipfix_pb2 as pb
from flipfix.service.generated import flipfix_pb2_grpc as pb_grpc
from flipfix.service.server import SERVICE_NAME, create_server

SMALL = {"vartype": "BINARY",
         "linear": {"a": -1.0, "b": -1.0, "c": -1.0, "d": 0.5, "e": -0.5},
         "quadratic": [["a", "b", 2.0], ["b", "c", 2.0], ["c", "d", -1.5], ["d", "e", 1.0],
                       ["a", "e", -0.5]],
         "offset": 0.0}
SMALL_CANDS = [{"id": "k1", "assignment": {"a": 1, "b": 0, "c": 1, "d": 1, "e": 1}},
               {"id": "k2", "assignment": {"a": 0, "b": 1, "c": 0, "d": 0, "e": 0}}]


from conftest import rpc_error as _code  # noqa: E402


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    db = tmp_path_factory.mktemp("srv") / "flipfix.sqlite3"
    srv = create_server("127.0.0.1:0", db_path=str(db), workers=1, queue_size=1,
                        max_variables=500, max_constraints=20)
    yield srv
    srv.shutdown(grace=1.0)


@pytest.fixture(scope="module")
def stub(server):
    ch = grpc.insecure_channel(server.address)
    yield pb_grpc.FlipfixStub(ch)
    ch.close()


@pytest.fixture(scope="module")
def small(stub):
    stub.CreateProblem(pb.CreateProblemRequest(name="small", model=convert.doc_to_model(SMALL)))
    p = documents.parse_problem(SMALL)
    stub.AddCandidates(pb.AddCandidatesRequest(problem="small",
                                               candidates=convert.candidates_to_batch(p, SMALL_CANDS)))
    return p


@pytest.fixture(scope="module")
def big_request(benchmarks):
    p = read_bqp(benchmarks / "bqp" / "bqp100-1.sparse")
    rng = np.random.default_rng(1)
    X = rng.integers(0, 2, size=(8, p.n), dtype=np.int8)
    cands = convert.arrays_to_batch([f"r{k}" for k in range(8)], X)
    fix = pb.Constraint(fix=pb.FixVariables(values=convert.dict_to_assignment({p.labels[0]: 1})))

    def make(time_limit=30.0, method=pb.METHOD_CPSAT):
        return pb.RepairRequest(inline=pb.InlineLibrary(model=convert.problem_to_model(p),
                                                        candidates=cands),
                                constraints=[fix],
                                options=pb.RepairOptions(method=method, time_limit=time_limit))
    return make


def _wait_idle(server, timeout=10.0) -> float:
    t0 = time.monotonic()
    while server.pool.busy and time.monotonic() - t0 < timeout:
        time.sleep(0.02)
    return time.monotonic() - t0


# ------------------------------------------------------------------ basics
def test_health_and_reflection(server):
    from flipfix.service.client import FlipfixClient

    with FlipfixClient(server.address) as fx:
        fx.wait_ready(timeout=120)  # NOT_SERVING while the worker loads its kernels
    ch = grpc.insecure_channel(server.address)
    h = health_pb2_grpc.HealthStub(ch)
    for name in ("", SERVICE_NAME):
        assert h.Check(health_pb2.HealthCheckRequest(service=name), timeout=5).status == \
            health_pb2.HealthCheckResponse.SERVING
    r = reflection_pb2_grpc.ServerReflectionStub(ch)
    reply = next(iter(r.ServerReflectionInfo(iter([reflection_pb2.ServerReflectionRequest(
        list_services="")]), timeout=5)))
    names = {s.name for s in reply.list_services_response.service}
    assert SERVICE_NAME in names and "grpc.health.v1.Health" in names
    ch.close()


def test_problem_lifecycle_and_revisions(stub, small):
    info = stub.GetProblem(pb.GetProblemRequest(name="small")).info
    assert (info.revision, info.num_variables, info.num_candidates) == (1, 5, 2)
    e = _code(lambda: stub.CreateProblem(pb.CreateProblemRequest(
        name="small", model=convert.doc_to_model(SMALL))))
    assert e.code() == grpc.StatusCode.ALREADY_EXISTS
    stub.CreateProblem(pb.CreateProblemRequest(name="tmp", model=convert.doc_to_model(SMALL)))
    r = stub.ReplaceProblem(pb.ReplaceProblemRequest(name="tmp", model=convert.doc_to_model(
        {**SMALL, "offset": 2.0}), expected_revision=1))
    assert r.revision == 2
    e = _code(lambda: stub.ReplaceProblem(pb.ReplaceProblemRequest(
        name="tmp", model=convert.doc_to_model(SMALL), expected_revision=1)))
    assert e.code() == grpc.StatusCode.FAILED_PRECONDITION
    assert stub.GetProblem(pb.GetProblemRequest(name="tmp", revision=1)).model.offset == 0.0
    names = [p.name for p in stub.ListProblems(pb.ListProblemsRequest()).problems]
    assert "small" in names and "tmp" in names
    stub.DeleteProblem(pb.DeleteProblemRequest(name="tmp"))
    assert _code(lambda: stub.GetProblem(pb.GetProblemRequest(name="tmp"))).code() == \
        grpc.StatusCode.NOT_FOUND


# ------------------------------------------------------------ status codes
def test_invalid_argument_names_the_field(stub, small):
    bad_model = convert.doc_to_model(SMALL)
    bad_model.vartype = pb.VARTYPE_UNSPECIFIED
    e = _code(lambda: stub.CreateProblem(pb.CreateProblemRequest(name="bad", model=bad_model)))
    assert e.code() == grpc.StatusCode.INVALID_ARGUMENT and e.details().startswith("model.vartype")

    bad = pb.Constraint(hamming=pb.HammingPenalty(
        reference=convert.dict_to_assignment({"a": 1}), weight=-1.0))
    e = _code(lambda: stub.Repair(pb.RepairRequest(problem="small", constraints=[bad])))
    assert e.code() == grpc.StatusCode.INVALID_ARGUMENT
    assert e.details().startswith("constraints[0].hamming.weight:")

    unknown = pb.Constraint(fix=pb.FixVariables(values=convert.dict_to_assignment({"zz": 1})))
    e = _code(lambda: stub.Repair(pb.RepairRequest(problem="small", constraints=[unknown])))
    assert e.code() == grpc.StatusCode.INVALID_ARGUMENT and "constraints[0].fix.values" in e.details()


def test_constraints_are_read_and_compiled_once_on_the_server(server, stub, small, monkeypatch):
    """The servicer compiles a request's constraints once and hands the result to the worker
    (which then does not compile: flipfix.repair.repair skips compiling when given ``compiled``)."""
    from flipfix.repair.lowering.compiled import Compiled
    from flipfix.service.convert import constraints as proto_constraints

    compiles, submitted = [], []
    real_compile, real_submit = proto_constraints.compile_constraints, server.pool.submit

    def counting_compile(*args, **kwargs):
        compiles.append(args)
        return real_compile(*args, **kwargs)

    def recording_submit(problem, candidates, constraints, kwargs):
        submitted.append((constraints, kwargs))
        return real_submit(problem, candidates, constraints, kwargs)

    monkeypatch.setattr(proto_constraints, "compile_constraints", counting_compile)
    monkeypatch.setattr(server.pool, "submit", recording_submit)
    cons = convert.docs_to_constraints([{"type": "fix", "values": {"a": 0}},
                                        {"type": "forbid", "assignment": {"b": 1, "c": 1}}], small)
    r = stub.Repair(pb.RepairRequest(problem="small", constraints=cons,
                                     options=pb.RepairOptions(time_limit=1.0, method=pb.METHOD_GREEDY)))
    assert r.best.feasible and "fix" in {v.name for v in r.best.violations}
    assert len(compiles) == 1 and len(submitted) == 1
    constraints, kwargs = submitted[0]
    assert constraints == () and isinstance(kwargs["compiled"], Compiled)
    assert [p.name for p in kwargs["compiled"].pieces] == ["fix", "forbid"]


def test_not_found(stub, small):
    assert _code(lambda: stub.Repair(pb.RepairRequest(problem="nope"))).code() == \
        grpc.StatusCode.NOT_FOUND
    e = _code(lambda: stub.RemoveCandidates(pb.RemoveCandidatesRequest(problem="small", ids=["ghost"])))
    assert e.code() == grpc.StatusCode.NOT_FOUND
    e = _code(lambda: stub.Repair(pb.RepairRequest(problem="small", candidate_ids=["ghost"])))
    assert e.code() == grpc.StatusCode.NOT_FOUND


def _ids(stub, name):
    return [i for b in stub.ListCandidates(pb.ListCandidatesRequest(problem=name)).batches
            for i in b.ids]


def _bad_batches(n):
    """(mutation of a good 2-candidate batch of n variables, field the error must name)."""
    good = lambda: convert.arrays_to_batch(["ok", "ok2"], np.ones((2, n), np.int8))  # noqa: E731

    def short(b):
        b.values.bits = b.values.bits[:-1]

    def padding(b):  # n = 5: 3 unused low bits per row, must stay 0
        b.values.bits = bytes([b.values.bits[0] | 1]) + b.values.bits[1:]

    def width(b):
        b.values.num_variables = n + 1

    def count(b):
        b.values.count = 3

    def provenance(b):
        b.provenance.append(pb.Provenance(source="only one"))

    def dup(b):
        b.ids[1] = "ok"

    def energy(b):
        b.provenance.extend([pb.Provenance(reported_energy=float("nan")), pb.Provenance()])

    cases = [(short, "values.bits"), (padding, "values.bits"), (width, "values.num_variables"),
             (count, "values.count"), (provenance, "provenance"), (dup, "ids[1]"),
             (energy, "provenance[0].reported_energy")]
    for mutate, field in cases:
        b = good()
        mutate(b)
        yield b, field


def test_malformed_request_stores_nothing(stub, small):
    before = _ids(stub, "small")
    for batch, field in _bad_batches(small.n):
        e = _code(lambda: stub.AddCandidates(pb.AddCandidatesRequest(problem="small",
                                                                     candidates=batch)))
        assert e.code() == grpc.StatusCode.INVALID_ARGUMENT, field
        assert e.details().startswith(f"candidates.{field}:"), (field, e.details())
    good = {"id": "ok", "assignment": {"a": 1, "b": 1, "c": 1, "d": 1, "e": 1}}
    dup = convert.candidates_to_batch(small, [good, {**SMALL_CANDS[0]}])  # k1 is taken
    e = _code(lambda: stub.AddCandidates(pb.AddCandidatesRequest(problem="small", candidates=dup)))
    assert e.code() == grpc.StatusCode.ALREADY_EXISTS and e.details().startswith("candidates.ids[1]")
    stale = convert.candidates_to_batch(small, [good])
    e = _code(lambda: stub.AddCandidates(pb.AddCandidatesRequest(problem="small", candidates=stale,
                                                                 revision=7)))
    assert e.code() == grpc.StatusCode.FAILED_PRECONDITION and e.details().startswith("revision")
    assert _ids(stub, "small") == before


def test_inline_packed_errors_name_the_field(stub, small):
    model = convert.doc_to_model(SMALL)
    for batch, field in _bad_batches(small.n):
        if field.startswith("ids"):  # inline ids: checked after the values (both named)
            continue
        e = _code(lambda: stub.Repair(pb.RepairRequest(
            inline=pb.InlineLibrary(model=model, candidates=batch))))
        assert e.code() == grpc.StatusCode.INVALID_ARGUMENT, field
        assert e.details().startswith(f"inline.candidates.{field}:"), (field, e.details())


@pytest.mark.parametrize("vartype", ["BINARY", "SPIN"])
def test_packed_candidates_round_trip(server, vartype):
    """AddCandidates -> ListCandidates gives back the same ids, values and provenance, and
    an inline repair reads the same values as the stored one (n = 13: padded rows)."""
    from flipfix.service.client import FlipfixClient, FlipfixError

    labels = ["s", 7, "t", 0, "u", 3, "v", 11, "w", 2, "x", 5, "y"]
    doc = {"vartype": vartype, "labels": labels,
           "linear": {str(lab): 0.1 * k for k, lab in enumerate(labels)},
           "quadratic": [[labels[k], labels[k + 1], (-1.0) ** k] for k in range(12)]}
    p = documents.parse_problem(doc)
    lo = -1 if vartype == "SPIN" else 0
    rng = np.random.default_rng(4)
    values = np.where(rng.integers(0, 2, size=(9, p.n)) == 1, 1, lo).astype(np.int8)
    name = f"round-{vartype}"
    with FlipfixClient(server.address) as fx:
        fx.create_problem(name, doc)
        ids = fx.add_candidates(name, values[:4])  # server-assigned ids
        ids += fx.add_candidates(name, values[4:], ids=[f"mine{k}" for k in range(5)])
        assert ids[:4] == ["c0", "c1", "c2", "c3"] and ids[4] == "mine0"  # counted from 0
        [lib] = fx.list_candidates(name, page_size=2)  # 5 pages joined into one run
        assert lib.ids == tuple(ids) and lib.revision == 1
        np.testing.assert_array_equal(lib.values, values)
        assert lib.assignments()[5] == dict(zip(p.labels, values[5].tolist()))
        assert lib.candidate_set().X.tolist() == p.from_caller(values).tolist()
        # stored and inline repairs of the same library agree (greedy is deterministic)
        fix = [{"type": "fix", "values": {"7": int(values[0, 1])}}]
        stored = fx.repair(name, fix, method="greedy", time_limit=2.0)
        inline = fx.repair(doc, fix, candidates=lib.candidate_set(), method="greedy",
                           time_limit=2.0)
        assert stored["best"]["assignment"] == inline["best"]["assignment"]
        assert stored["best"]["assignment"][7] == values[0, 1]
        assert set(stored["best"]["assignment"].values()) <= {lo, 1}
        assert stored["best"]["repaired_from"] in ids and stored["best"]["candidate_id"] in ids
        # the answer is reported against its nearest candidate (flips = that distance)
        ans = np.array([stored["best"]["assignment"][lab] for lab in p.labels])
        dist = (values != ans).sum(axis=1)
        assert stored["best"]["flips"] == dist.min() == dist[ids.index(stored["best"]["candidate_id"])]



def test_limits_are_resource_exhausted(stub):
    big = {"vartype": "BINARY", "linear": {f"v{i}": 1.0 for i in range(501)}}
    e = _code(lambda: stub.CreateProblem(pb.CreateProblemRequest(name="big",
                                                                 model=convert.doc_to_model(big))))
    assert e.code() == grpc.StatusCode.RESOURCE_EXHAUSTED and "model" in e.details()
    fix = pb.Constraint(fix=pb.FixVariables(values=convert.dict_to_assignment({"a": 1})))
    e = _code(lambda: stub.Repair(pb.RepairRequest(problem="small", constraints=[fix] * 21)))
    assert e.code() == grpc.StatusCode.RESOURCE_EXHAUSTED and e.details().startswith("constraints")


# ------------------------------------------------------------------ repair
def test_repair_matches_brute_force(stub, small):
    # late constraints: a must be 0, and a linear penalty on distance from k1 (weight 0.25)
    ref = SMALL_CANDS[0]["assignment"]
    cons = convert.docs_to_constraints([{"type": "fix", "values": {"a": 0}},
                                        {"type": "hamming", "reference": ref, "weight": 0.25}], small)
    r = stub.Repair(pb.RepairRequest(problem="small", constraints=cons,
                                     options=pb.RepairOptions(time_limit=2.0, seed=3)))
    # reference: dimod.ExactSolver over all 2^5 assignments of the penalised model
    bqm = dimod.BinaryQuadraticModel({k: v for k, v in SMALL["linear"].items()},
                                     {(u, v): b for u, v, b in SMALL["quadratic"]}, 0.0, "BINARY")
    for lab, val in ref.items():  # 0.25 * [x != ref]  =  0.25 * (x if ref == 0 else 1 - x)
        bqm.add_linear(lab, 0.25 if val == 0 else -0.25)
        bqm.offset += 0.0 if val == 0 else 0.25
    ss = dimod.ExactSolver().sample(bqm)
    feasible = [d.energy for d in ss.data(["sample", "energy"]) if d.sample["a"] == 0]
    assert r.best.feasible and r.repair_status in (pb.REPAIR_STATUS_OPTIMAL,
                                                   pb.REPAIR_STATUS_FEASIBLE)
    assert r.best.cost == pytest.approx(min(feasible), abs=1e-9)
    got = convert.reply_to_dict(r, small)["best"]["assignment"]
    assert got["a"] == 0
    origin = {c["id"]: c["assignment"] for c in SMALL_CANDS}[r.best.candidate_id]
    assert r.best.flips == sum(got[k] != origin[k] for k in origin)
    assert r.audit_total == 2 and len(r.audit) == 2 and r.revision == 1
    limited = stub.Repair(pb.RepairRequest(problem="small", constraints=cons, options=pb.RepairOptions(
        time_limit=1.0, audit_limit=1)))
    assert len(limited.audit) == 1 and limited.audit_total == 2


def test_stream_ends_in_the_result(stub, small):
    cons = convert.docs_to_constraints([{"type": "fix", "values": {"b": 1}}], small)
    events = list(stub.RepairStream(pb.RepairRequest(
        problem="small", constraints=cons, options=pb.RepairOptions(time_limit=1.0)), timeout=30))
    assert events and events[-1].HasField("result")
    assert all(ev.HasField("progress") for ev in events[:-1])
    assert len(events) >= 2, "at least one progress message before the result"
    unary = stub.Repair(pb.RepairRequest(problem="small", constraints=cons,
                                         options=pb.RepairOptions(time_limit=1.0)))
    assert events[-1].result.best.cost == pytest.approx(unary.best.cost)
    assert events[-1].result.best.feasible


def test_deadline_caps_the_budget_and_still_answers(server, stub, big_request):
    _wait_idle(server)
    t0 = time.monotonic()
    r = stub.Repair(big_request(time_limit=30.0, method=pb.METHOD_PORTFOLIO), timeout=4.0)
    elapsed = time.monotonic() - t0
    assert elapsed < 4.0
    assert 0 < r.time_limit < 4.0  # min(requested 30 s, deadline - margin)
    assert r.best.feasible and r.repair_status == pb.REPAIR_STATUS_FEASIBLE


def test_cancelled_call_stops_its_worker_and_health_stays_responsive(server, stub, big_request):
    _wait_idle(server)
    fut = stub.Repair.future(big_request(time_limit=30.0), timeout=60)
    t0 = time.monotonic()
    while not server.pool.busy and time.monotonic() - t0 < 5:
        time.sleep(0.01)
    time.sleep(0.5)
    # health answers quickly while the worker is busy
    h = health_pb2_grpc.HealthStub(grpc.insecure_channel(server.address))
    for _ in range(3):
        t = time.monotonic()
        status = h.Check(health_pb2.HealthCheckRequest(service=SERVICE_NAME), timeout=2).status
        assert status == health_pb2.HealthCheckResponse.SERVING
        assert time.monotonic() - t < 0.5
    assert server.pool.busy == 1
    fut.cancel()
    assert fut.cancelled() or _code(fut.result).code() == grpc.StatusCode.CANCELLED
    waited = _wait_idle(server, timeout=10)
    assert server.pool.busy == 0 and waited < 5.0, f"worker still busy {waited:.1f}s after cancel"


def test_full_queue_is_resource_exhausted(server, stub, big_request):
    _wait_idle(server)
    futs = [stub.Repair.future(big_request(time_limit=30.0), timeout=60) for _ in range(2)]
    t0 = time.monotonic()
    while server.pool.busy < 2 and time.monotonic() - t0 < 5:
        time.sleep(0.01)
    e = _code(lambda: stub.Repair(big_request(time_limit=1.0), timeout=10))
    assert e.code() == grpc.StatusCode.RESOURCE_EXHAUSTED
    for f in futs:
        f.cancel()
    _wait_idle(server)


# -------------------------------------------------------- restart, shutdown
def test_persistence_across_restart(tmp_path):
    db = str(tmp_path / "p.sqlite3")
    p = documents.parse_problem(SMALL)
    with create_server("127.0.0.1:0", db_path=db, warm=False) as a:
        s = pb_grpc.FlipfixStub(grpc.insecure_channel(a.address))
        s.CreateProblem(pb.CreateProblemRequest(name="keep", model=convert.doc_to_model(SMALL)))
        ids = s.AddCandidates(pb.AddCandidatesRequest(
            problem="keep", candidates=convert.candidates_to_batch(p, SMALL_CANDS))).ids
        s.ReplaceProblem(pb.ReplaceProblemRequest(name="keep", model=convert.doc_to_model(SMALL)))
        before = s.ListCandidates(pb.ListCandidatesRequest(problem="keep"))
    with create_server("127.0.0.1:0", db_path=db, warm=False) as b:
        s = pb_grpc.FlipfixStub(grpc.insecure_channel(b.address))
        got = s.GetProblem(pb.GetProblemRequest(name="keep"))
        assert got.info.revision == 2 and got.info.num_candidates == 2
        after = s.ListCandidates(pb.ListCandidatesRequest(problem="keep"))
        [batch] = after.batches
        assert list(ids) == list(batch.ids) and batch.revision == 1
        assert after == before
        cs, _ = convert.batch_to_candidates(batch, p)
        assert cs.X.tolist() == [[SMALL_CANDS[k]["assignment"][lab] for lab in p.labels]
                                 for k in range(2)]


def test_graceful_shutdown(tmp_path, big_request):
    srv = create_server("127.0.0.1:0", db_path=str(tmp_path / "g.sqlite3"), workers=1)
    ch = grpc.insecure_channel(srv.address)
    stub = pb_grpc.FlipfixStub(ch)
    fut = stub.Repair.future(big_request(time_limit=30.0), timeout=60)
    t0 = time.monotonic()
    while not srv.pool.busy and time.monotonic() - t0 < 10:
        time.sleep(0.01)
    stopper = threading.Thread(target=srv.shutdown, kwargs={"grace": 1.0})
    stopper.start()
    time.sleep(0.2)
    req = health_pb2.HealthCheckRequest(service=SERVICE_NAME)
    assert srv.health.Check(req, None).status == health_pb2.HealthCheckResponse.NOT_SERVING
    e = _code(lambda: stub.ListProblems(pb.ListProblemsRequest(), timeout=2))
    assert e.code() == grpc.StatusCode.UNAVAILABLE  # no new calls
    stopper.join(timeout=20)
    assert not stopper.is_alive(), "shutdown did not finish"
    # the in-flight call ended (cancelled after the grace period), its worker stopped
    assert _code(fut.result).code() in (grpc.StatusCode.CANCELLED, grpc.StatusCode.UNAVAILABLE)
    assert time.monotonic() - t0 < 15
    ch.close()


@pytest.mark.parametrize("vartype", ["BINARY", "SPIN"])
def test_reply_carries_the_core_solution_both_ways(vartype):
    """result_to_reply -> bytes -> reply_to_dict gives RepairResult.to_dict()'s best (packed
    answer, candidate_id, repaired_from) exactly."""
    from flipfix.repair import CandidateSet, repair

    doc = {**SMALL, "vartype": vartype}
    p = documents.parse_problem(doc)
    lo = -1 if vartype == "SPIN" else 0
    vals = [[1 if v else lo for v in c["assignment"].values()] for c in SMALL_CANDS]
    cands = CandidateSet.from_array(p, np.array(vals), ids=["k1", "k2"])
    cons = [documents.parse_constraint({"type": "fix", "values": {"a": lo, "c": lo}}, p,
                                       field="c")]
    res = repair(p, cands, cons, method="greedy", time_limit=1.0)
    reply = pb.RepairReply.FromString(convert.result_to_reply(res).SerializeToString())
    assert reply.best.repaired_from == res.best.repaired_from != ""
    got, want = convert.reply_to_dict(reply, p)["best"], res.to_dict()["best"]
    assert want["plan_distance"] is None  # no constraint names a plan
    assert got == want and got["assignment"]["a"] == lo
    assert "assignment" not in convert.reply_to_dict(reply)["best"]  # no labels: not guessed


def test_client_sends_sample_sets_and_arrays_packed(server):
    """A dimod SampleSet goes in packed with its energies as provenance; a short array row
    is refused by the client's own check, naming the field."""
    from flipfix.repair.errors import InputError
    from flipfix.service.client import FlipfixClient, FlipfixError

    bqm = dimod.BinaryQuadraticModel({"a": 1.0, "b": -1.0}, {("a", "b"): 2.0, ("b", "c"): -1.0},
                                     0.0, "SPIN")
    ss = dimod.ExactSolver().sample(bqm)  # all 8 spin states with dimod's energies
    with FlipfixClient(server.address) as fx:
        fx.create_problem("ss", bqm)
        ids = fx.add_candidates("ss", ss)
        [lib] = fx.list_candidates("ss")
        assert lib.ids == tuple(ids) and len(ids) == 8
        order = [ss.variables.index(lab) for lab in lib.problem.labels]
        np.testing.assert_array_equal(lib.values, ss.record.sample[:, order])
        assert [pr["energy"] for pr in lib.provenance] == pytest.approx(list(ss.record.energy))
        with pytest.raises(FlipfixError) as e:  # found locally, reported as the server would
            fx.add_candidates("ss", np.ones((2, 2), dtype=np.int8))
        assert e.value.field == "candidates" and e.value.reason == "INVALID_FIELD"
        assert e.value.code() == grpc.StatusCode.INVALID_ARGUMENT
