"""The Grow service over a real server on port 0, and ``flipfix grow`` end to end.

References: the proposals are compared with the core's :func:`grow` called in-process with
the same settings and seed; energies of the returned states with dimod's
``BinaryQuadraticModel.energy``; the planted model of :mod:`flipfix.repair.grow.planted`
(its broad state's energy is delta per block above the narrow ground state, by construction).
"""

from __future__ import annotations

import json

import grpc
import pytest

from conftest import rpc_error
from flipfix.repair.grow.neighbours import GrowSettings, grow
from flipfix.repair.grow.planted import planted_model
from flipfix.repair.model.candidates import CandidateSet
from flipfix.service import cli
from flipfix.service.client import FlipfixClient
from flipfix.service.convert.grow import reply_to_dict
from flipfix.service.generated import flipfix_pb2 as fpb
from flipfix.service.generated import grow_pb2 as gpb
from flipfix.service.generated import grow_pb2_grpc as gpb_grpc
from flipfix.service.server import create_server

BLOCKS = 10


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    db = tmp_path_factory.mktemp("grow") / "flipfix.sqlite3"
    srv = create_server("127.0.0.1:0", db_path=str(db), workers=1, queue_size=1)
    yield srv
    srv.shutdown(grace=1.0)


@pytest.fixture(scope="module")
def fx(server):
    with FlipfixClient(server.address, timeout=120.0) as client:
        yield client


@pytest.fixture(scope="module")
def planted(fx):
    pl = planted_model(blocks=BLOCKS)
    fx.create_problem("planted", pl.problem)
    fx.add_candidates("planted", pl.narrow_state()[None, :], ids=["narrow"])
    return pl


def _stub(fx):
    return gpb_grpc.GrowStub(fx.channel)


def _request(**kw):
    base = dict(problem="planted", mode=gpb.GROW_MODE_ROBUST, tolerance_percent=40.0, chains=3,
                sweeps=150, seed=4, time_limit=60.0)
    base.update(kw)
    return gpb.GrowRequest(**base)


def test_propose_matches_the_core_and_stores_nothing(fx, planted):
    reply = _stub(fx).Propose(_request(), timeout=120)
    core = grow(planted.problem, CandidateSet(("narrow",), planted.narrow_state()[None, :]),
                settings=GrowSettings(mode="robust", tolerance_percent=40.0, chains=3,
                                      sweeps=150, seed=4))
    d = reply_to_dict(reply, planted.problem)
    assert [s["id"] for s in d["states"]] == [s.id for s in core.states]
    bqm = planted.problem.to_bqm()
    for s, c in zip(d["states"], core.states):
        assert s["energy"] == pytest.approx(bqm.energy(s["assignment"]))
        assert s["free_moves"] == c.free_moves
        assert s["origin_id"] == "narrow"
    assert not reply.kept and list(reply.added_ids) == []
    assert reply.stop_reason == fpb.STOP_REASON_DONE and d["stopped"] == core.stopped == "done"
    batches = fx.list_candidates("planted")
    assert [i for b in batches for i in b.ids] == ["narrow"]  # nothing stored unless asked


def test_stream_reports_progress_then_keeps_in_one_transaction(fx, planted):
    events = list(_stub(fx).ProposeStream(_request(keep=True, seed=5), timeout=120))
    assert events[-1].HasField("result")
    assert any(e.HasField("progress") and e.progress.current_phase == fpb.PHASE_GROW for e in events[:-1])
    reply = events[-1].result
    assert reply.kept and len(reply.added_ids) == len(reply.states) > 0
    stored = [i for b in fx.list_candidates("planted") for i in b.ids]
    assert set(reply.added_ids) <= set(stored)
    # the same request again: its states are stored now, so they are set aside as repeats
    again = _stub(fx).Propose(_request(keep=True, seed=5), timeout=120)
    assert not again.kept and again.repeats > 0
    assert [i for b in fx.list_candidates("planted") for i in b.ids] == stored
    fx.remove_candidates("planted", list(reply.added_ids))


def test_heldout_comparison_over_the_service(fx, planted):
    reply = _stub(fx).Propose(_request(heldout=gpb.GrowHeldout(m=1, scenarios=8, seed=1)),
                              timeout=120)
    h = reply.heldout
    assert h.heldout == 4 and h.train == 4
    assert h.grown_mean < h.original_mean  # the broad states absorb the late penalties
    assert h.stop_reason == fpb.STOP_REASON_DONE  # all 8 scenarios ran within 60 s
    assert reply_to_dict(reply, planted.problem)["heldout"]["stopped"] == "done"


def test_bad_requests_name_the_field(fx, planted):
    cases = [(_request(mode=9), "mode"), (_request(tolerance_absolute=-1.0), "tolerance_absolute"),
             (_request(from_ids=["nope"]), "from_ids[0]"), (_request(depth=3.0), "depth"),
             (_request(heldout=gpb.GrowHeldout(m=1, scenarios=1)), "heldout.scenarios")]
    for req, field in cases:
        err = rpc_error(lambda: _stub(fx).Propose(req, timeout=60))
        assert err.code() == grpc.StatusCode.INVALID_ARGUMENT
        assert err.details().startswith(field + ":"), err.details()
    err = rpc_error(lambda: _stub(fx).Propose(_request(chains=5000), timeout=60))
    assert err.code() == grpc.StatusCode.RESOURCE_EXHAUSTED
    err = rpc_error(lambda: _stub(fx).Propose(_request(problem="absent"), timeout=60))
    assert err.code() == grpc.StatusCode.NOT_FOUND


def test_deadline_ends_a_long_search_with_what_it_has(fx, planted):
    # 10**8 sweeps would take hours: only the deadline budget stops it
    req = _request(sweeps=10 ** 6, chains=1)
    req.ClearField("time_limit")  # unset: the server's default (30 s), cut by the deadline
    reply = _stub(fx).Propose(req, timeout=1.5)
    assert reply.stop_reason in (fpb.STOP_REASON_TIME_LIMIT, fpb.STOP_REASON_CANCELLED)
    assert reply.time_limit < 1.5


def test_time_limit_unset_is_the_stated_default_and_zero_is_refused(fx, planted):
    from grpc_status import rpc_status
    from google.rpc import error_details_pb2

    req = _request(chains=1, sweeps=20)
    req.ClearField("time_limit")
    reply = _stub(fx).Propose(req, timeout=None)  # no deadline: nothing caps the default
    assert reply.time_limit == 30.0  # the default grow.proto states
    assert reply.stop_reason == fpb.STOP_REASON_DONE and reply.chains_run == reply.chains_total
    for bad in (0.0, -2.0):
        err = rpc_error(lambda: _stub(fx).Propose(_request(time_limit=bad), timeout=60))
        assert err.code() == grpc.StatusCode.INVALID_ARGUMENT
        assert err.details().startswith("time_limit: must be a number of seconds > 0")
        info = error_details_pb2.ErrorInfo()
        assert any(d.Unpack(info) for d in rpc_status.from_call(err).details)
        assert info.reason == "INVALID_FIELD" and info.metadata["field"] == "time_limit"


def test_cli_in_process_and_through_the_server(tmp_path, server, planted, capsys):
    pl = planted
    prob = tmp_path / "p.json"
    cands = tmp_path / "c.json"
    from flipfix.repair.documents import forms

    prob.write_text(json.dumps(forms.problem_document(pl.problem)))
    cands.write_text(json.dumps([{"id": "narrow", "assignment": {
        lab: 0 for lab in pl.problem.labels}}]))
    out = tmp_path / "out.json"
    rc = cli.main(["grow", str(prob), str(cands), "--tolerance-percent", "40", "--chains", "2",
                   "--heldout", "1", "--scenarios", "6", "--json", str(out), "--quiet"])
    text = capsys.readouterr().out
    assert rc == 0 and "held-out comparison" in text and "responsible person" in text
    rep = json.loads(out.read_text())
    assert rep["states"] and rep["heldout"]["grown_mean"] < rep["heldout"]["original_mean"]
    rc = cli.main(["grow", "planted", "--server", server.address, "--tolerance-percent", "40",
                   "--chains", "2", "--quiet"])
    assert rc == 0 and "narrow~robust" in capsys.readouterr().out
    rc = cli.main(["grow", str(prob), str(cands), "--depth", "2", "--quiet"])
    assert rc == 2 and "--depth" in capsys.readouterr().err
    for where in ([str(prob), str(cands)], ["planted", "--server", server.address]):
        rc = cli.main(["grow", *where, "--time-limit", "0", "--quiet"])
        assert rc == 2 and "--time-limit: must be a number of seconds > 0" in capsys.readouterr().err





def test_hard_constraints_bound_the_proposals(fx, planted):
    from flipfix.repair.model.constraints import HammingPenalty, LinearConstraint
    from flipfix.service.convert.constraints import constraint_to_proto

    core = [f"v0_{a}" for a in range(3)]
    keep_narrow = LinearConstraint({v: 1.0 for v in core}, "<=", 0.0)  # block 0 stays narrow
    reply = _stub(fx).Propose(_request(constraints=[constraint_to_proto(keep_narrow)]),
                              timeout=120)
    d = reply_to_dict(reply, planted.problem)
    assert d["states"]
    for s in d["states"]:
        assert all(s["assignment"][v] == 0 for v in core)
        assert sum(s["assignment"][f"v{b}_0"] for b in range(1, BLOCKS)) == BLOCKS - 1
    soft = HammingPenalty({"v0_0": 1}, weight=1.0)
    err = rpc_error(lambda: _stub(fx).Propose(
        _request(constraints=[constraint_to_proto(soft)]), timeout=60))
    assert err.code() == grpc.StatusCode.INVALID_ARGUMENT
    assert err.details().startswith("constraints[0]:"), err.details()
