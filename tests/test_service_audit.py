"""The audit RPCs and typed integer decisions over a real server on port 0.

References: the stress, Pareto and curation figures are compared with the same core
functions called in-process with the same seed (flipfix.repair.audit.stress.stress_test,
flipfix.repair.audit.front.cost_flip_front, flipfix.repair.audit.curation.curate); free-variable counts and
single-flip spectra with brute-force enumeration of every single flip through
dimod's BinaryQuadraticModel.energies; Pareto fronts with an exhaustive pairwise
dominance check; long runs use OR-Library bqp100-1 (../shared/benchmarks/bqp,
J. E. Beasley 1998).
"""

from __future__ import annotations

import itertools
import math
import time

import dimod
import grpc
import numpy as np
import pytest

from flipfix.repair.documents import forms as documents
from flipfix.repair import CandidateSet, Problem
from flipfix.repair.audit.curation import curate
from flipfix.repair.documents.instances import read_bqp
from flipfix.repair.audit.front import cost_flip_front
from flipfix.repair.audit.stress import ScenarioFamily, stress_test
from flipfix.service import convert
from flipfix.service.client import FlipfixClient
from flipfix.service.generated import flipfix_pb2 as pb
from flipfix.service.generated import flipfix_pb2_grpc as pb_grpc
from flipfix.service.server import create_server

# ----------------------------------------------------------------- planted model
# Block b has a switch z_b and a group y_b of g_b variables:
#     E_b = -R z_b + sum_i (-ALPHA y_bi + P z_b y_bi)
# Narrow state (z=1, y=0): E = -R, every flip costs >= R or P - ALPHA.
# Broad state (z=0, y=1): E = -ALPHA g, each y flip costs only ALPHA (a broad minimum).
# RIGID variables with bias -5 are always 1. Invented data (test construction).
from planted import ALPHA, planted as _planted, state as _state  # noqa: E402  (tests/planted.py)

RIGID, W = 3, 3.0
GROUPS = [4, 8]
BUDGET = 120.0  # whole-run budget: greedy needs milliseconds; figures must not depend on load
CORE_PHASES = {"greedy", "anneal", "neighbourhood", "full", "cpsat"}


def planted(groups=GROUPS) -> Problem:
    return _planted(groups, rigid=RIGID)


def state(p: Problem, broad, groups=GROUPS) -> np.ndarray:
    return _state(p, groups, broad, rigid=RIGID)


def library(p: Problem) -> CandidateSet:
    states = list(itertools.product([0, 1], repeat=len(GROUPS)))
    X = np.vstack([state(p, s) for s in states])
    ids = ["".join("B" if b else "N" for b in s) for s in states]
    return CandidateSet.from_array(p, X, ids=ids)


from conftest import rpc_error as _err  # noqa: E402


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    db = tmp_path_factory.mktemp("audit") / "flipfix.sqlite3"
    srv = create_server("127.0.0.1:0", db_path=str(db), workers=1, queue_size=2)
    yield srv
    srv.shutdown(grace=1.0)


@pytest.fixture(scope="module")
def fx(server):
    with FlipfixClient(server.address, timeout=120.0) as client:
        yield client


@pytest.fixture(scope="module")
def planted_lib(fx):
    p = planted()
    cs = library(p)
    fx.create_problem("planted", p)
    fx.add_candidates("planted", cs)
    return p, cs


def _same(a: float, b: float) -> bool:
    return (math.isnan(a) and math.isnan(b)) or a == pytest.approx(b, abs=1e-9)


# ---------------------------------------------------------------- robustness
def test_robustness_matches_brute_force_single_flips(fx, planted_lib):
    p, cs = planted_lib
    rep = fx.robustness("planted", epsilon=ALPHA, spectrum=True)
    assert rep.best_id == "NN" and rep.n_variables == p.n
    # reference: every single flip enumerated, energies from dimod's BQM
    bqm = p.to_bqm()
    for prof, x in zip(rep.profiles, cs.X):
        flips = np.repeat(x[None, :], p.n, axis=0)
        flips[np.arange(p.n), np.arange(p.n)] ^= 1
        e0 = bqm.energy(dict(zip(p.labels, map(int, x))))
        e1 = bqm.energies((flips, list(p.labels)))
        cost = np.sort(e1 - e0)
        assert prof.energy == pytest.approx(e0)
        assert prof.free_variables == int((cost <= ALPHA + 1e-9).sum())
        assert prof.spectrum == pytest.approx(cost.tolist())
        assert prof.improving == int((cost < -1e-9).sum())
        others = [int((x != y).sum()) for cid, y in zip(cs.ids, cs.X) if cid != prof.candidate_id]
        assert prof.nearest_other == min(others)
        assert prof.distance_to_best == int((x != cs.X[0]).sum())
    # the construction: a broad block of g variables contributes g free variables
    assert rep.column("free_variables") == [0, GROUPS[1], GROUPS[0], sum(GROUPS)]
    assert fx.robustness("planted").profiles[0].spectrum == []  # spectrum only on request


# -------------------------------------------------------------------- stress
def test_stress_rpc_equals_in_process_reference(fx, planted_lib):
    p, cs = planted_lib
    fam = ScenarioFamily(hamming_weight=W, fix_k=1)
    got = fx.stress_test("planted", fam, scenarios=12, seed=7, method="greedy", epsilon=ALPHA,
                         time_limit=BUDGET, matrices=True)
    # reference: the core in-process, same seed and family
    ref = stress_test(p, cs, fam, scenarios=12, seed=7, method="greedy", epsilon=ALPHA,
                      time_limit=BUDGET)
    assert got.stopped == ref.stopped == "done" and got.scenarios_done == 12
    assert got.ids == ref.ids
    for a, b in zip(got.candidates, ref.candidates):
        assert (a.wins, a.free_variables, a.worst_flips, a.failures) == \
            (b.wins, b.free_variables, b.worst_flips, b.failures)
        for name in ("energy", "win_rate", "mean_cost", "worst_cost", "mean_regret", "mean_flips"):
            assert _same(getattr(a, name), getattr(b, name)), name
    assert got.scenario_seeds == ref.scenario_seeds
    assert got.scenario_descriptions == ref.scenario_descriptions
    assert got.winners == ref.winners
    np.testing.assert_allclose(got.cost, ref.cost, atol=1e-9)
    assert got.flips == ref.flips
    assert got.feasible == ref.feasible
    assert got.pearson == pytest.approx(ref.pearson) and got.spearman == pytest.approx(ref.spearman)
    assert got.correlated == ref.correlated
    # the construction: the all-narrow optimum wins less often than the all-broad candidate
    wins = {c.candidate_id: c.wins for c in got.candidates}
    assert wins["BB"] + wins["NB"] > wins["NN"]


def test_stress_stream_sends_progress_then_the_same_result(fx, planted_lib):
    fam = ScenarioFamily(hamming_weight=W)
    seen = []
    streamed = fx.stress_test("planted", fam, scenarios=8, seed=3, epsilon=ALPHA,
                              time_limit=BUDGET, on_progress=seen.append)
    unary = fx.stress_test("planted", fam, scenarios=8, seed=3, epsilon=ALPHA, time_limit=BUDGET)
    assert seen and all(ev.current_phase == pb.PHASE_STRESS and ev.total == 8 and 1 <= ev.done <= 8 for ev in seen)
    assert [ev.done for ev in seen] == sorted(ev.done for ev in seen) and seen[-1].done == 8
    assert streamed.to_dict()["candidates"] == unary.to_dict()["candidates"]


def test_repair_stream_passes_the_core_phase_names(fx, planted_lib):
    cons = [{"type": "hamming", "reference": {"z0": 0, "y0_0": 1}, "weight": 1.0},
            {"type": "fix", "values": {"z1": 0}}]
    for method, want in (("cpsat", {"cpsat"}), ("portfolio", set())):
        phases = []
        out = fx.repair("planted", cons, method=method, time_limit=1.0,
                        on_progress=lambda ev: phases.append(
                            convert.PHASE_NAMES.get(ev.current_phase, "?")))
        assert out["best"]["feasible"]
        assert phases and set(phases) <= CORE_PHASES, phases  # never the old "running"
        assert want <= set(phases)


# -------------------------------------------------------------------- pareto
def test_pareto_rpc_matches_in_process_front_and_is_non_dominated(fx, planted_lib):
    p, cs = planted_lib
    ref_doc = {lab: 0 for lab in p.labels}
    doc = [{"type": "hamming", "reference": ref_doc, "weight": 2.0}]
    got = fx.pareto_front("planted", doc, methods=("greedy",), time_limit=BUDGET, seed=1,
                          cheapest_within_flips=5, fewest_flips_within_percent=10.0)
    ref = cost_flip_front(p, cs, documents.parse_constraints(doc, p), methods=("greedy",),
                          time_limit=BUDGET, seed=1)
    assert [(q.cost, q.flips, q.candidate_id, q.method) for q in got["front"]] == \
        [(q.cost, q.flips, q.candidate_id, q.method) for q in ref]
    front = got["front"]
    # exhaustive pairwise check: no point dominates another
    for a, b in itertools.permutations(front, 2):
        assert not (a.cost <= b.cost and a.flips <= b.flips and (a.cost, a.flips) != (b.cost, b.flips))
    ok5 = [q for q in front if q.flips <= 5]
    assert got["cheapest_within"] == min(ok5, key=lambda q: (q.cost, q.flips))
    best = min(q.cost for q in front)
    near = [q for q in front if q.cost <= best + 0.1 * abs(best)]
    assert got["fewest_flips_within"] == min(near, key=lambda q: (q.flips, q.cost))


# ------------------------------------------------------------------ curation
def _ids(stub, name):
    return [i for b in stub.ListCandidates(pb.ListCandidatesRequest(problem=name)).batches
            for i in b.ids]


def test_curation_keep_persists_across_restart(tmp_path):
    db = str(tmp_path / "curate.sqlite3")
    p = planted()
    cs = library(p)
    fam = ScenarioFamily(hamming_weight=W)
    with create_server("127.0.0.1:0", db_path=db, warm=False) as a:
        with FlipfixClient(a.address, timeout=120.0) as fx:
            fx.create_problem("lib", p)
            fx.add_candidates("lib", cs)
            dry = fx.curate("lib", fam, 2, scenarios=10, seed=5, epsilon=ALPHA, time_limit=BUDGET)
            assert not dry["kept"] and dry["removed_ids"] == []
            assert sum(map(len, fx.list_candidates("lib"))) == 4
            out = fx.curate("lib", fam, 2, keep=True, scenarios=10, seed=5, epsilon=ALPHA,
                            time_limit=BUDGET)
    # reference: curate() over the in-process stress test's cost matrix, same seed
    ref = stress_test(p, cs, fam, scenarios=10, seed=5, method="greedy", epsilon=ALPHA,
                      time_limit=BUDGET)
    want = curate(ref.cost_matrix(), 2, ids=ref.ids)
    cur = out["curation"]
    assert out["kept"] and cur.kept_ids == want.kept_ids == dry["curation"].kept_ids
    assert cur.mean_gap == pytest.approx(want.mean_gap)
    assert cur.relative_gap == pytest.approx(want.relative_gap)
    assert sorted(out["removed_ids"]) == sorted(set(cs.ids) - set(want.kept_ids))
    with create_server("127.0.0.1:0", db_path=db, warm=False) as b:
        stub = pb_grpc.FlipfixStub(grpc.insecure_channel(b.address))
        assert sorted(_ids(stub, "lib")) == sorted(want.kept_ids)


def test_malformed_curation_stores_nothing_and_names_the_field(fx, planted_lib, server):
    stub = pb_grpc.FlipfixStub(grpc.insecure_channel(server.address))
    before = _ids(stub, "planted")
    fam = convert.family_to_proto(ScenarioFamily(hamming_weight=W))

    def curate_req(m=2, **stress):
        s = pb.StressRequest(problem="planted", family=fam, scenarios=3, time_limit=BUDGET)
        for k, v in stress.items():
            if k == "family":
                s.family.CopyFrom(v)
            elif k == "candidate_ids":
                s.candidate_ids.extend(v)
            else:
                setattr(s, k, v)
        return pb.CurateRequest(stress=s, m=m, keep=True)

    cases = [
        (curate_req(m=0), grpc.StatusCode.INVALID_ARGUMENT, "m:"),
        (curate_req(m=5), grpc.StatusCode.INVALID_ARGUMENT, "m:"),
        (curate_req(family=pb.ScenarioFamily()), grpc.StatusCode.INVALID_ARGUMENT, "stress.family:"),
        (curate_req(family=pb.ScenarioFamily(hamming_weight=1.0, hamming_shape=pb.PENALTY_SHAPE_TABLE)),
         grpc.StatusCode.INVALID_ARGUMENT, "stress.family.hamming_shape:"),
        (curate_req(epsilon=-1.0), grpc.StatusCode.INVALID_ARGUMENT, "stress.epsilon:"),
        (curate_req(candidate_ids=["NN", "NN"]), grpc.StatusCode.INVALID_ARGUMENT,
         "stress.candidate_ids[1]:"),
        (curate_req(candidate_ids=["ghost"]), grpc.StatusCode.NOT_FOUND, "stress.candidate_ids[0]:"),
        (curate_req(problem="nope"), grpc.StatusCode.NOT_FOUND, "stress.problem:"),
    ]
    for req, code, field in cases:
        e = _err(lambda: stub.CurateLibrary(req, timeout=30))
        assert e.code() == code and e.details().startswith(field), (field, e.details())
    assert _ids(stub, "planted") == before


# -------------------------------------------------------------- status codes
def test_audit_status_codes(fx, planted_lib, server):
    stub = pb_grpc.FlipfixStub(grpc.insecure_channel(server.address))
    fam = convert.family_to_proto(ScenarioFamily(hamming_weight=W))
    for call in (lambda: stub.ProfileRobustness(pb.RobustnessRequest(problem="nope")),
                 lambda: stub.StressTest(pb.StressRequest(problem="nope", family=fam)),
                 lambda: list(stub.StressTestStream(pb.StressRequest(problem="nope", family=fam))),
                 lambda: stub.ParetoFront(pb.ParetoRequest(problem="nope"))):
        e = _err(call)
        assert e.code() == grpc.StatusCode.NOT_FOUND and e.details().startswith("problem:")
    e = _err(lambda: stub.ProfileRobustness(pb.RobustnessRequest(problem="planted", candidate_ids=["x"])))
    assert e.code() == grpc.StatusCode.NOT_FOUND and e.details().startswith("candidate_ids[0]:")
    bad_weight = pb.ScenarioFamily(hamming_weight=1.0)
    bad_weight.capacity_cut_percent = 10.0
    bad_weight.capacity_weights.append(pb.LinearTerm(label=pb.Label(str="nowhere"), bias=1.0))
    invalid = [
        (lambda: stub.ProfileRobustness(pb.RobustnessRequest(problem="")), "problem:"),
        (lambda: stub.ProfileRobustness(pb.RobustnessRequest(problem="planted", epsilon=-0.5)),
         "epsilon:"),
        (lambda: stub.StressTest(pb.StressRequest(
            problem="planted", family=pb.ScenarioFamily(hamming_weight=1.0, hamming_fraction=2.0))),
         "family.hamming_fraction:"),
        (lambda: stub.StressTest(pb.StressRequest(problem="planted", family=bad_weight)),
         "family.capacity_weights[0].label:"),
        (lambda: stub.StressTest(pb.StressRequest(problem="planted", family=fam, time_limit=-1.0)),
         "time_limit:"),
        (lambda: stub.ParetoFront(pb.ParetoRequest(problem="planted", seed=2**31)), "seed:"),
        (lambda: stub.ParetoFront(pb.ParetoRequest(problem="planted", constraints=[pb.Constraint(
            hamming=pb.HammingPenalty(reference=convert.dict_to_assignment({"z0": 1}),
                                      weight=-1.0))])), "constraints[0].hamming.weight:"),
    ]
    for call, field in invalid:
        e = _err(call)
        assert e.code() == grpc.StatusCode.INVALID_ARGUMENT and e.details().startswith(field), \
            (field, e.details())


# -------------------------------------------------------- deadline, cancel
@pytest.fixture(scope="module")
def big(fx, benchmarks):
    p = read_bqp(benchmarks / "bqp" / "bqp100-1.sparse")
    X = np.random.default_rng(4).integers(0, 2, size=(4, p.n)).astype(np.int8)
    fx.create_problem("bqp100", p)
    fx.add_candidates("bqp100", CandidateSet.from_array(p, X))
    return p


def _wait_idle(server, timeout=10.0) -> float:
    t0 = time.monotonic()
    while server.pool.busy and time.monotonic() - t0 < timeout:
        time.sleep(0.02)
    return time.monotonic() - t0


def test_stress_deadline_caps_the_budget_and_still_answers(fx, big, server):
    _wait_idle(server)
    stub = pb_grpc.FlipfixStub(grpc.insecure_channel(server.address))
    req = fx.stress_request("bqp100", ScenarioFamily(hamming_weight=1.0, fix_k=3), scenarios=40,
                            method="cpsat", time_limit=60.0)
    t0 = time.monotonic()
    rep = stub.StressTest(req, timeout=4.0)
    assert time.monotonic() - t0 < 4.0
    assert 0 < rep.time_limit < 4.0  # min(requested 60 s, deadline - margin)
    assert rep.stop_reason != pb.STOP_REASON_UNSPECIFIED and rep.scenarios_done >= 1
    assert rep.seconds < 4.0 and len(rep.candidates) == 4


def test_cancelled_stress_stream_stops_its_worker(fx, big, server, planted_lib):
    _wait_idle(server)
    stub = pb_grpc.FlipfixStub(grpc.insecure_channel(server.address))
    req = fx.stress_request("bqp100", ScenarioFamily(hamming_weight=1.0, fix_k=3), scenarios=20,
                            method="cpsat", time_limit=60.0)
    call = stub.StressTestStream(req, timeout=120)
    t0 = time.monotonic()
    while not server.pool.busy and time.monotonic() - t0 < 5:
        time.sleep(0.01)
    time.sleep(0.5)
    # other calls stay responsive while the stress test runs in the pool
    t = time.monotonic()
    fx.get_problem("planted")
    assert time.monotonic() - t < 1.0
    call.cancel()
    waited = _wait_idle(server, timeout=10)
    assert server.pool.busy == 0 and waited < 5.0, f"worker still busy {waited:.1f}s after cancel"
    with pytest.raises(grpc.RpcError) as e:
        list(call)
    assert e.value.code() == grpc.StatusCode.CANCELLED


# --------------------------------------------------------- typed decisions
DECISION_DOC = {
    "vartype": "BINARY",
    "linear": {"a0": -1.0, "a1": -2.0, "a2": 0.5, "w1": 0.25, "w2": -0.75, "free": 1.0},
    "quadratic": [["a0", "w1", 1.0], ["a2", "free", -1.0]],
    "decisions": [
        {"name": "A", "encoding": "one_hot", "variables": ["a0", "a1", "a2"],
         "values": [1, "two", 3.5]},
        {"name": "B", "encoding": "domain_wall", "variables": ["w1", "w2"], "values": [10, 20, 30]},
    ],
}


def test_typed_decisions_round_trip(fx, server):
    assert "decisions_json" not in pb.ProblemModel.DESCRIPTOR.fields_by_name
    stub = pb_grpc.FlipfixStub(grpc.insecure_channel(server.address))
    model = convert.doc_to_model(DECISION_DOC)
    assert [d.encoding for d in model.decisions] == [pb.ENCODING_ONE_HOT, pb.ENCODING_DOMAIN_WALL]
    stub.CreateProblem(pb.CreateProblemRequest(name="decisions", model=model))
    got = stub.GetProblem(pb.GetProblemRequest(name="decisions")).model
    back = convert.model_to_problem(got)
    want = documents.parse_problem(DECISION_DOC)
    assert back.decisions == want.decisions
    assert [v.WhichOneof("kind") for v in got.decisions[0].values] == ["int", "str", "num"]
    assert [convert.label_to_py(v, "v") for v in got.decisions[1].variables] == ["w1", "w2"]
    # the decisions travel with the stored problem: an integer-level constraint repairs
    cands = [{"id": "c", "assignment": {"a0": 1, "a1": 0, "a2": 0, "w1": 0, "w2": 0, "free": 0}}]
    fx.add_candidates("decisions", cands)
    out = fx.repair("decisions", [{"type": "force_value", "decision": "A", "value": "two"},
                                  {"type": "force_value", "decision": "B", "value": 20}],
                    time_limit=1.0)
    b = out["best"]
    assert b["feasible"] and (b["assignment"]["a1"], b["assignment"]["w1"], b["assignment"]["w2"]) \
        == (1, 1, 0)
    assert b["decisions_changed"] == 2
    # bad decisions name the proto field
    bad = convert.doc_to_model(DECISION_DOC)
    bad.decisions[0].encoding = pb.ENCODING_UNSPECIFIED
    e = _err(lambda: stub.CreateProblem(pb.CreateProblemRequest(name="bad", model=bad)))
    assert e.code() == grpc.StatusCode.INVALID_ARGUMENT
    assert e.details().startswith("model.decisions[0].encoding:")
    bad = convert.doc_to_model(DECISION_DOC)
    del bad.decisions[1].variables[1]
    e = _err(lambda: stub.CreateProblem(pb.CreateProblemRequest(name="bad", model=bad)))
    assert e.code() == grpc.StatusCode.INVALID_ARGUMENT
    assert e.details().startswith("model.decisions[1].variables")
    assert "bad" not in [p.name for p in fx.list_problems()]


def test_decisions_free_moves_over_the_service(fx):
    # A's one-hot swap a0 -> a1 lowers the energy, so decision A is free at epsilon 0 from a0=1;
    # reference: the energies of the two code words, from dimod's BQM
    p = documents.parse_problem(DECISION_DOC)
    bqm = p.to_bqm()
    base = {"a0": 1, "a1": 0, "a2": 0, "w1": 1, "w2": 1, "free": 0}
    swap = {**base, "a0": 0, "a1": 1}
    assert bqm.energy(swap) < bqm.energy(base)
    fx.add_candidates("decisions", [{"id": "d", "assignment": base}])
    rep = fx.robustness("decisions", candidate_ids=["d"])
    assert rep.n_decisions == 2 and rep.profiles[0].free_decisions >= 1


# ------------------------------------------------------------------ the CLI
def test_audit_cli_through_the_server(fx, planted_lib, server, tmp_path, capsys):
    from flipfix.service.cli import main

    out_json = tmp_path / "audit.json"
    rc = main(["audit", "planted", "--server", server.address, "--scenarios", "6", "--weight",
               str(W), "--epsilon", str(ALPHA), "--pareto-methods", "greedy", "--keep", "2",
               "--json", str(out_json)])
    text = capsys.readouterr().out
    assert rc == 0 and "stress test: 6/6 scenarios" in text and "keep 2:" in text
    assert out_json.exists() and sum(map(len, fx.list_candidates("planted"))) == 4  # no --commit
    rc = main(["audit", "nope", "--server", server.address, "--scenarios", "2"])
    assert rc == 2 and "PROBLEM" in capsys.readouterr().err


def test_input_errors_from_a_worker_keep_their_field():
    # a plain InputError does not survive pickling (its args are the joined message); the
    # pool's wrappers do, so an error raised in a worker still names its field
    import pickle

    from flipfix.repair.errors import InputError, LimitError
    from flipfix.service.errors import status_for
    from flipfix.service.worker import WorkerInputError, WorkerLimitError

    for cls, base, code in ((WorkerInputError, InputError, grpc.StatusCode.INVALID_ARGUMENT),
                            (WorkerLimitError, LimitError, grpc.StatusCode.RESOURCE_EXHAUSTED)):
        e = pickle.loads(pickle.dumps(cls("family.fix_k", "too many")))
        assert isinstance(e, base) and (e.field, e.message) == ("family.fix_k", "too many")
        assert status_for(e) == (code, "family.fix_k: too many" if base is InputError else str(e))


def test_audit_cli_through_the_server_on_decisions(fx, server, tmp_path, capsys):
    """A one-hot roster (tests/roster.py) stored in the service: the default scenarios are
    decision level (a value becomes unavailable) there as in-process, with the same figures;
    the decision options travel too; the JSON reports free variables and free decisions (the
    service's own CandidateStress.free_decisions) as counted by enumeration of one-step
    decision moves."""
    import json

    from roster import cheapest_plans, free_decisions, plan_bits, roster

    from flipfix.repair.documents.forms import problem_document
    from flipfix.service.cli import main

    p, pref = roster()
    plans = cheapest_plans(pref, 6)
    X = np.vstack([plan_bits(q) for q in plans])
    ids = [f"r{k}" for k in range(6)]
    fx.create_problem("roster", p)
    fx.add_candidates("roster", CandidateSet.from_array(p, X, ids=ids))
    (tmp_path / "p.json").write_text(json.dumps(problem_document(p)))
    (tmp_path / "c.json").write_text(json.dumps(
        [{"id": i, "assignment": dict(zip(p.labels, row))}
         for i, row in zip(ids, p.to_caller(X).tolist())]))
    opts = ["--scenarios", "3", "--pareto-methods", "greedy", "--quiet"]
    remote, local = tmp_path / "remote.json", tmp_path / "local.json"
    assert main(["audit", "roster", "--server", server.address, *opts, "--json", str(remote)]) == 0
    assert main(["audit", str(tmp_path / "p.json"), str(tmp_path / "c.json"), *opts,
                 "--json", str(local)]) == 0
    capsys.readouterr()
    got, want_doc = (json.loads(f.read_text())["stress"] for f in (remote, local))
    assert got["family"]["unavailable_values"] == 1 and got["family"]["hamming_weight"] == 0
    for a, b in zip(got["candidates"], want_doc["candidates"]):
        for key in ("candidate_id", "wins", "mean_cost", "worst_cost", "free_variables",
                    "free_decisions", "failures"):
            assert a[key] == b[key], key
    want = [free_decisions(q, pref) for q in plans]
    assert max(want) > 0
    assert [c["free_decisions"] for c in got["candidates"]] == want
    assert [c["free_variables"] for c in got["candidates"]] == [0] * len(plans)
    js = tmp_path / "both.json"
    assert main(["audit", "roster", "--server", server.address, *opts, "--unavailable", "1",
                 "--must-change", "1", "--json", str(js)]) == 0
    fam = json.loads(js.read_text())["stress"]["family"]
    assert (fam["unavailable_values"], fam["must_change"]) == (1, 1)
