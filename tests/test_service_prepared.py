"""Calls prepared in the pool worker (the worker reads the stored problem itself: Repair,
the audits, GetProblem) answer
exactly as calls prepared in the server: same answers, same status codes, same messages
naming the same fields, same tenant isolation -- on SQLite and on PostgreSQL.

``light_bytes=0`` makes a server prepare every call on a stored problem in the worker;
the default prepares these small problems in the server. Each check runs on both and the
two must agree; the expected statuses are written out too (NOT_FOUND naming the field,
FAILED_PRECONDITION naming the event, INVALID_ARGUMENT naming the positional path). The
best repair of the 3-variable model is checked against enumeration of all 8 assignments
(brute force).
"""

from __future__ import annotations

import itertools

import grpc
import numpy as np
import pytest

from flipfix.service import auth, convert, wire
from flipfix.service.client import FlipfixClient
from flipfix.service.generated import flipfix_pb2 as pb
from flipfix.service.server import create_server
from flipfix.service.generated import timeline_pb2 as tpb
from flipfix.service.generated import timeline_pb2_grpc as tpb_grpc
from flipfix.service.token_cli import make_token

from conftest import rpc_error

NORTH = {"vartype": "BINARY", "linear": {"a": -1.0, "b": -1.0, "c": 0.5},
         "quadratic": [["a", "b", 2.0], ["b", "c", -1.0]]}
SOUTH = {"vartype": "BINARY", "linear": {"a": 1.0, "b": 1.0, "c": -3.0}, "quadratic": []}
CANDS = [{"id": "k1", "assignment": {"a": 1, "b": 0, "c": 1}},
         {"id": "k2", "assignment": {"a": 0, "b": 1, "c": 0}}]
GREEDY = {"method": "greedy", "time_limit": 1.0}


def _brute(doc: dict, fixed: dict) -> float:
    """The least energy of ``doc`` over all 0/1 assignments that keep ``fixed``."""
    best = float("inf")
    for bits in itertools.product((0, 1), repeat=3):
        x = dict(zip("abc", bits))
        if any(x[k] != v for k, v in fixed.items()):
            continue
        e = sum(w * x[k] for k, w in doc["linear"].items())
        e += sum(w * x[u] * x[v] for u, v, w in doc["quadratic"])
        best = min(best, e)
    return best


@pytest.fixture(params=["sqlite", "postgresql"])
def db(request, tmp_path):
    if request.param == "sqlite":
        return lambda name: str(tmp_path / f"{name}.sqlite3")
    pg = request.getfixturevalue("postgres")
    return lambda name: pg.new_database()


def _outcome(call):
    """("OK", value) or (status name, details) of ``call()``."""
    try:
        return "OK", call()
    except grpc.RpcError as err:
        return err.code().name, err.details()


def _fix(values: dict, name: str = "") -> pb.Constraint:
    return pb.Constraint(name=name, fix=pb.FixVariables(values=convert.dict_to_assignment(values)))


def _repair(client, problem: str, constraints=(), **fields) -> pb.RepairRequest:
    """Repair over the stub itself (the client's repair reads the model first)."""
    return client.stub.Repair(pb.RepairRequest(
        problem=problem, constraints=list(constraints),
        options=pb.RepairOptions(method=pb.METHOD_GREEDY, time_limit=1.0), **fields), timeout=60)


def _script(address: str, tokens: dict) -> dict:
    """Every call of the comparison against one server; their outcomes by name."""
    out = {}
    with FlipfixClient(address, token=tokens["north"], timeout=60) as north, \
            FlipfixClient(address, token=tokens["south"], timeout=60) as south:
        north.create_problem("p", NORTH)
        north.add_candidates("p", CANDS)
        south.create_problem("p", SOUTH)  # the same name, another tenant's problem
        south.add_candidates("p", CANDS)
        south.create_problem("south-only", SOUTH)
        south.add_candidates("south-only", CANDS)
        a1 = [_fix({"a": 1})]
        out["north"] = _outcome(lambda: _repair(north, "p", a1).best.base_energy)
        out["south"] = _outcome(lambda: _repair(south, "p", a1).best.base_energy)
        out["other tenant"] = _outcome(lambda: _repair(north, "south-only"))
        out["missing"] = _outcome(lambda: _repair(north, "ghost"))
        out["missing id"] = _outcome(lambda: _repair(north, "p", candidate_ids=["k1", "no"]))
        out["bad label"] = _outcome(lambda: _repair(north, "p", [_fix({"zz": 1})]))
        out["robustness other tenant"] = _outcome(lambda: north.stub.ProfileRobustness(
            pb.RobustnessRequest(problem="south-only")))
        out["curate no family"] = _outcome(lambda: north.stub.CurateLibrary(pb.CurateRequest(
            stress=pb.StressRequest(problem="p", scenarios=2), m=5)))
        out["pareto bad label"] = _outcome(lambda: north.stub.ParetoFront(pb.ParetoRequest(
            problem="p", constraints=[_fix({"zz": 1})])))
        out["add at old revision"] = _outcome(lambda: north.stub.AddCandidates(
            pb.AddCandidatesRequest(problem="p", revision=7, candidates=convert.arrays_to_batch(
                ["k9"], np.zeros((1, 3), dtype=np.int8)))))
        out["add other tenant"] = _outcome(lambda: north.stub.AddCandidates(
            pb.AddCandidatesRequest(problem="south-only", candidates=convert.arrays_to_batch(
                ["k9"], np.zeros((1, 3), dtype=np.int8)))))
        got = north.stub.GetProblem(pb.GetProblemRequest(name="p"))
        out["get"] = ("OK", (got.revision, got.info.num_candidates, got.model))
        out["get other tenant"] = _outcome(lambda: north.stub.GetProblem(
            pb.GetProblemRequest(name="south-only")))
        out["get revision 9"] = _outcome(lambda: north.stub.GetProblem(
            pb.GetProblemRequest(name="p", revision=9)))
        rob = north.stub.ProfileRobustness(pb.RobustnessRequest(problem="p"))
        out["robustness"] = ("OK", [(p.candidate_id, p.energy) for p in rob.profiles])
        # an event that stops applying when the problem moves to a revision without 'c'
        tl = tpb_grpc.TimelineStub(north.channel)
        tl.AddEvent(tpb.AddEventRequest(problem="p", constraint=_fix({"c": 0}, "c off")))
        out["events"] = _outcome(lambda: _repair(north, "p", use_events=True).best.base_energy)
        tl.SetPublishedPlan(tpb.SetPublishedPlanRequest(problem="p", candidate_id="k2"))
        near = pb.Constraint(hamming=pb.HammingPenalty(published_plan=True, weight=10.0))
        out["published"] = _outcome(lambda: (lambda r: (r.best.repaired_from, r.best.flips))(
            _repair(north, "p", [near], from_published_plan=True)))
        north.replace_problem("p", {"vartype": "BINARY", "linear": {"a": -1.0, "b": 1.0}})
        north.add_candidates("p", [{"id": "r2", "assignment": {"a": 0, "b": 1}}])
        out["moved events"] = _outcome(lambda: _repair(north, "p", use_events=True))
        out["old candidates"] = _outcome(lambda: _repair(north, "p", all_revisions=True))
        out["revision 2"] = _outcome(lambda: _repair(north, "p").best.base_energy)
    return out


@pytest.fixture()
def tokens(tmp_path):
    path = str(tmp_path / "tokens.jsonl")
    return {"path": path, **{t: make_token(path, tenant=t, role="planner")
                             for t in ("north", "south")}}


def test_calls_prepared_in_the_worker_answer_as_in_the_server(db, tokens):
    outcomes = []
    for where, light in (("server", 64 * 1024), ("worker", 0)):
        with create_server("127.0.0.1:0", db_path=db(where), workers=1, warm=False,
                           token_file=tokens["path"], light_bytes=light) as srv:
            outcomes.append(_script(srv.address, tokens))
            with auth.acting_as(auth.Principal("north", "planner")):
                assert srv.servicer._prepares_in_worker("p") == (where == "worker")
    here, there = outcomes
    assert here == there
    assert here["north"] == ("OK", _brute(NORTH, {"a": 1}))
    assert here["south"] == ("OK", _brute(SOUTH, {"a": 1}))
    assert here["other tenant"] == ("NOT_FOUND", "problem: no problem named 'south-only'")
    assert here["robustness other tenant"] == ("NOT_FOUND",
                                               "problem: no problem named 'south-only'")
    assert here["missing"] == ("NOT_FOUND", "problem: no problem named 'ghost'")
    assert here["get"][1][:2] == (1, 2)
    assert here["add at old revision"] == ("FAILED_PRECONDITION",
                                           "revision: problem 'p' is at revision 1, not 7")
    assert here["add other tenant"] == ("NOT_FOUND", "name: no problem named 'south-only'")
    assert convert.model_to_problem(here["get"][1][2]).labels == ("a", "b", "c")
    assert here["get other tenant"] == ("NOT_FOUND", "name: no problem named 'south-only'")
    assert here["get revision 9"] == ("NOT_FOUND", "revision: problem 'p' has no revision 9")
    assert here["missing id"] == ("NOT_FOUND", "candidate_ids[1]: problem 'p' has no "
                                               "candidate 'no'")
    assert here["bad label"][0] == "INVALID_ARGUMENT"
    assert here["bad label"][1].startswith("constraints[0].fix.values.values[0]")
    assert here["pareto bad label"][0] == "INVALID_ARGUMENT"
    assert here["pareto bad label"][1].startswith("constraints[0].fix.values.values[0]")
    code, details = here["curate no family"]
    assert code == "INVALID_ARGUMENT" and details.startswith("stress.family")
    assert here["events"] == ("OK", _brute(NORTH, {"c": 0}))
    # 10 per flip away from the published k2 = (0, 1, 0), energy -1; the least energy,
    # -1.5 at (0, 1, 1) (brute force), is one flip away and costs 8.5: k2 itself wins
    assert here["published"] == ("OK", ("k2", 0))
    code, details = here["moved events"]
    assert code == "FAILED_PRECONDITION" and details.startswith("use_events: event 1 'c off'")
    code, details = here["old candidates"]
    assert code == "INVALID_ARGUMENT" and details.startswith("all_revisions: candidate 'k1'")
    assert here["revision 2"] == ("OK", -1.0)  # a=1, b=0: brute force of -a + b


def test_a_large_stored_problem_is_never_decoded_in_the_server(tmp_path, monkeypatch):
    """With the model over ``light_bytes``, Repair and the audits read it in the worker:
    the server's own decoder is never called (it would fail the call)."""
    from flipfix.service import store as store_module

    doc = {"vartype": "BINARY", "linear": {f"v{k}": (k % 5) - 2.0 for k in range(4000)},
           "quadratic": [[f"v{k}", f"v{k + 1}", 1.0] for k in range(3999)]}
    with create_server("127.0.0.1:0", db_path=str(tmp_path / "big.sqlite3"), workers=1,
                       warm=False) as srv, FlipfixClient(srv.address, timeout=60) as fx:
        fx.create_problem("big", doc)
        fx.add_candidates("big", [{"id": "zero", "assignment": {f"v{k}": 0 for k in range(4000)}}])
        calls = []
        monkeypatch.setattr(store_module, "decode_model",
                            lambda text: calls.append(len(text)) or 1 / 0)
        assert fx.add_candidates("big", [{"id": "one", "assignment": {
            f"v{k}": 1 for k in range(4000)}}]) == ["one"]  # read against the model there
        assert srv.store.stored_bytes("big") >= srv.servicer.gate.config.light_bytes
        reply = _repair(fx, "big", [_fix({"v3": 0})])
        assert reply.best.feasible and reply.revision == 1
        rob = fx.stub.ProfileRobustness(pb.RobustnessRequest(problem="big"))
        assert [p.candidate_id for p in rob.profiles] == ["zero", "one"]
        got = convert.model_to_problem(fx.stub.GetProblem(pb.GetProblemRequest(name="big")).model)
        want = convert.model_to_problem(convert.doc_to_model(doc))
        assert got.labels == want.labels and (got.linear == want.linear).all()
        assert (got.data == want.data).all() and (got.indices == want.indices).all()
        assert calls == []
        with pytest.raises(ZeroDivisionError):  # the server's own read would have decoded it
            srv.store.get_problem("big")
        assert len(calls) == 1


def test_split_leaves_the_named_field_undecoded_and_keeps_the_rest():
    model = convert.doc_to_model(NORTH)
    req = pb.ReplaceProblemRequest(name="p", model=model, expected_revision=7)
    raw = req.SerializeToString()
    rest, (a, b) = wire.split(raw, 2)
    assert pb.ProblemModel.FromString(raw[a:b]) == model
    partial = pb.ReplaceProblemRequest.FromString(rest)
    assert partial.name == "p" and partial.expected_revision == 7 and not partial.HasField("model")
    deferred = wire.Deferred(partial, "model", raw, (a, b))
    assert deferred.name == "p" and deferred.size == len(raw)
    with pytest.raises(AttributeError):
        deferred.model  # noqa: B018 - left undecoded
    # given twice (protobuf would merge), absent, or not length-delimited: not split
    assert wire.split(raw + raw, 2) is None
    assert wire.split(pb.ReplaceProblemRequest(name="p").SerializeToString(), 2) is None
    assert wire.split(b"\x10\x01", 2) is None  # field 2 as a varint
    assert wire.split(raw[:-1], 2) is None  # truncated
    assert wire.split(b"\x0a\xff\xff\xff\xff\xff\xff\xff\xff\xff\xff\x01", 1) is None


def test_an_undecodable_large_upload_is_invalid_argument(tmp_path):
    with create_server("127.0.0.1:0", db_path=str(tmp_path / "u.sqlite3"), workers=1,
                       warm=False, light_bytes=16) as srv:
        ch = grpc.insecure_channel(srv.address)
        call = ch.unary_unary("/flipfix.v1.Flipfix/CreateProblem")
        good_name = pb.CreateProblemRequest(name="p").SerializeToString()
        bad_model = b"\x12\x20" + b"\xff" * 32  # field 2, 32 bytes that do not parse
        e = rpc_error(lambda: call(good_name + bad_model, timeout=30))
        assert e.code() == grpc.StatusCode.INVALID_ARGUMENT
        assert e.details() == "request: not a valid CreateProblem request (DecodeError)"
        assert srv.store.list_problems()[0] == []
