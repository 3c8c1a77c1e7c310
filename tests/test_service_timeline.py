"""The Timeline service through a real server on loopback: events in force, the published
plan, records, adoption, conflicts traced to events, revision changes reported.

References: the ward below is tests/roster.py (a construction of our own); the best
repair cost is checked against enumeration of all 4^4 plans (brute force), the conflict
against the rule that a decision cannot both take and avoid a value.
"""

from __future__ import annotations

import itertools
import json

import grpc
import numpy as np
import pytest

from flipfix.service.generated import timeline_pb2 as tpb
from flipfix.service.server import create_server
from flipfix.service.timeline_client import TimelineClient, as_dict

from conftest import rpc_error  # noqa: E402
from tests.roster import SHIFTS, cheapest_plans, plan_bits, roster, roster_energy

NURSES = 4


@pytest.fixture(scope="module")
def ward():
    return roster(nurses=NURSES, seed=3)


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    db = tmp_path_factory.mktemp("tl") / "flipfix.sqlite3"
    srv = create_server("127.0.0.1:0", db_path=str(db), workers=1, queue_size=2, max_records=50)
    yield srv
    srv.shutdown(grace=1.0)


@pytest.fixture()
def tl(server, ward):
    problem, pref = ward
    with TimelineClient(server.address, timeout=30.0) as c:
        for info in c.list_problems():
            c.delete_problem(info.name)
        c.create_problem("ward", problem)
        plans = cheapest_plans(pref, 3)
        c.add_candidates("ward", np.vstack([plan_bits(p) for p in plans]),
                         ids=["c1", "c2", "c3"])
        c.plans = plans
        yield c


def _plan_of(assignment) -> tuple:
    return tuple(next(s for s, name in enumerate(SHIFTS) if assignment[f"n{i}_{name}"] == 1)
                 for i in range(NURSES))


def test_events_published_plan_record_adopt(tl, ward):
    _problem, pref = ward
    c1 = tl.plans[0]
    assert tl.set_published_plan("ward", "c1")["candidate_id"] == "c1"
    # the mill is down: nurse 0 cannot take the shift the published plan gives her
    e1 = tl.add_event("ward", {"type": "forbid_values", "name": "n0 away",
                               "decision": "n0", "values": [SHIFTS[c1[0]]]})
    assert e1["state"] == "EVENT_STATE_IN_FORCE" and e1["revision"] == 1 and e1["id"] > 0
    out = tl.repair("ward", use_events=True, from_published_plan=True, stay_close=1.5,
                    by_decisions=True, method="cpsat", time_limit=5.0)
    assert out["status"] == "optimal" and out["event_ids"] == [e1["id"]] and out["record_id"] > 0
    # brute force: energy + 1.5 per decision changed from the published plan, n0 away
    best = min(roster_energy(q, pref) + 1.5 * sum(a != b for a, b in zip(q, c1))
               for q in itertools.product(range(4), repeat=NURSES) if q[0] != c1[0])
    assert out["best"]["cost"] == pytest.approx(best, abs=1e-9)
    plan = _plan_of(out["best"]["assignment"])
    assert plan[0] != c1[0]
    [summary] = tl.list_records("ward")
    assert summary["id"] == out["record_id"] and summary["kind"] == "RECORD_KIND_REPAIR"
    assert summary["event_ids"] == [e1["id"]] and summary["feasible"]
    assert summary["best_cost"] == pytest.approx(best) and summary["repair_status"] == "REPAIR_STATUS_OPTIMAL"
    assert summary["recorded_rpc"] == "RECORDED_RPC_REPAIR"
    assert summary["stop_reason"] == "STOP_REASON_UNSPECIFIED"  # audit records only
    rec = tl.get_record("ward", out["record_id"])
    assert rec.repair.request.use_events and rec.repair.reply.best.cost == pytest.approx(best)
    assert [e.id for e in rec.events] == [e1["id"]]
    assert len(rec.repair.reply.audit) == 1 and rec.repair.reply.audit[0].candidate_id == "c1"
    # adopt and publish: the next repair starts from it
    a = tl.adopt("ward", out["record_id"], publish=True)
    assert a["candidate_id"] == f"adopted-{out['record_id']}" and a["published"]
    assert f"record:{out['record_id']}" in a["provenance"]["tags"]
    assert tl.published_plan("ward")["candidate_id"] == a["candidate_id"]
    err = rpc_error(lambda: tl.adopt("ward", out["record_id"]))
    assert err.code() == grpc.StatusCode.ALREADY_EXISTS and "record_id:" in err.details()
    again = tl.repair("ward", use_events=True, from_published_plan=True, stay_close=1.5,
                      by_decisions=True, method="cpsat", time_limit=5.0)
    assert again["best"]["candidate_id"] == a["candidate_id"] and again["best"]["flips"] == 0
    assert tl.get_record("ward", again["record_id"]).repair.reply.audit[0].candidate_id == \
        a["candidate_id"]


def test_conflict_names_the_events(tl):
    c1 = tl.plans[0]
    e1 = tl.add_event("ward", {"type": "forbid_values", "name": "n0 away",
                               "decision": "n0", "values": [SHIFTS[c1[0]]]})
    e2 = tl.add_event("ward", {"type": "force_value", "name": "n0 rush job",
                               "decision": "n0", "value": SHIFTS[c1[0]]})
    out = tl.repair("ward", [{"type": "fix", "name": "loose", "values": {"n1_off": 0}}],
                    use_events=True, time_limit=2.0)
    assert out["status"] == "infeasible" and out["conflict"]["minimal"]
    assert [(m["index"], m["name"], m["event_id"]) for m in out["conflict"]["members"]] == [
        (1, "n0 away", e1["id"]), (2, "n0 rush job", e2["id"])]
    tl.withdraw_event("ward", e2["id"])
    ok = tl.repair("ward", use_events=True, time_limit=2.0)
    assert ok["best"]["feasible"] and ok["event_ids"] == [e1["id"]]
    err = rpc_error(lambda: tl.withdraw_event("ward", e2["id"]))
    assert err.code() == grpc.StatusCode.FAILED_PRECONDITION and "event_id:" in err.details()
    listed = tl.list_events("ward", include_withdrawn=True)["events"]
    assert [e["state"] for e in listed] == ["EVENT_STATE_IN_FORCE", "EVENT_STATE_WITHDRAWN"]


def test_revision_change_is_reported_never_dropped(tl, ward):
    problem, pref = ward
    e = tl.add_event("ward", {"type": "force_value", "name": "n3 nights",
                              "decision": "n3", "value": "night"})
    out = tl.repair("ward", use_events=True, time_limit=1.0)
    smaller, _ = roster(nurses=3, seed=3)  # revision 2 has no nurse n3
    tl.replace_problem("ward", smaller)
    tl.add_candidates("ward", np.vstack([plan_bits(p) for p in cheapest_plans(pref[:3], 2)]))
    [ev] = tl.list_events("ward")["events"]
    assert ev["state"] == "EVENT_STATE_INVALID" and "n3" in ev["problem_message"]
    err = rpc_error(lambda: tl.repair("ward", use_events=True, time_limit=1.0))
    assert err.code() == grpc.StatusCode.FAILED_PRECONDITION
    assert err.details().startswith(f"use_events: event {e['id']} 'n3 nights'")
    err = rpc_error(lambda: tl.adopt("ward", out["record_id"]))
    assert err.code() == grpc.StatusCode.FAILED_PRECONDITION
    assert "record_id: record" in err.details() and "revision 1" in err.details()
    tl.withdraw_event("ward", e["id"])
    assert tl.repair("ward", use_events=True, time_limit=1.0)["event_ids"] == []


def test_bad_requests_name_the_field(tl, ward):
    problem, _ = ward
    cases = [
        (lambda: tl.add_event("ward", {"type": "force_value", "decision": "nobody",
                                       "value": "early"}), "constraint.force_value.decision"),
        (lambda: tl.set_published_plan("ward", "zz"), "candidate_id"),
        (lambda: tl.published_plan("ward"), "problem"),
        (lambda: tl.get_record("ward", 0), "record_id"),
        (lambda: tl.get_record("ward", 10 ** 6), "record_id"),
        (lambda: tl.withdraw_event("ward", 10 ** 6), "event_id"),
        (lambda: tl.repair(problem, candidates=np.zeros((1, problem.n), np.int8), stay_close=1.0),
         "constraints[0].hamming.published_plan"),
        (lambda: tl.repair(problem, candidates=np.zeros((1, problem.n), np.int8),
                           use_events=True), "use_events"),
        (lambda: tl.repair("ward", from_published_plan=True), "problem"),
        (lambda: tl.repair("ward", plan="zz"), "plan_candidate_id"),
        (lambda: tl.repair(problem, candidates=np.zeros((1, problem.n), np.int8), plan="zz"),
         "plan_candidate_id"),
        (lambda: tl.list_records("nowhere"), "problem"),
    ]
    for call, field in cases:
        err = rpc_error(call)
        assert err.details().startswith(field + ":"), (field, err.details())
    tl.set_published_plan("ward", "c2")
    raw = tl._repair_request("ward", [])[0]
    c = raw.constraints.add()
    c.hamming.weight = 1.0
    c.hamming.published_plan = True
    c.hamming.reference.values.add().value = 1
    err = rpc_error(lambda: tl.stub.Repair(raw, timeout=10))
    assert err.details().startswith("constraints[0].hamming.reference: must be empty")


def test_audit_runs_are_recorded_and_retention_holds(tl, server):
    from flipfix.repair.audit.stress import ScenarioFamily

    tl.stress_test("ward", ScenarioFamily(hamming_weight=1.0), scenarios=3, time_limit=5.0)
    [rec] = tl.list_records("ward")
    assert rec["kind"] == "RECORD_KIND_AUDIT" and rec["recorded_rpc"] == "RECORDED_RPC_STRESS_TEST"
    assert rec["stop_reason"] == "STOP_REASON_DONE"  # all 3 scenarios ran
    assert rec["repair_status"] == "REPAIR_STATUS_UNSPECIFIED"  # repair records only
    full = tl.get_record("ward", rec["id"])
    assert full.WhichOneof("run") == "stress" and full.stress.reply.scenarios_done == 3
    err = rpc_error(lambda: tl.adopt("ward", rec["id"]))
    assert err.code() == grpc.StatusCode.FAILED_PRECONDITION and "audit run" in err.details()
    keep = server.servicer.timeline.history.max_records
    for _ in range(3):
        tl.repair("ward", method="greedy", time_limit=0.5)
    assert len(tl.list_records("ward")) == min(4, keep)
    tl.repair("ward", method="greedy", time_limit=0.5, skip_record=True)
    assert len(tl.list_records("ward")) == min(4, keep)
    assert as_dict(tpb.RecordSummary(id=5))["id"] == 5
    # a run cut short (time limit; or cancelled, as its budget ends): the record's stop
    # reason is the reply's
    rep = tl.stress_test("ward", ScenarioFamily(hamming_weight=1.0), scenarios=1000,
                         time_limit=0.05)
    newest = tl.list_records("ward", limit=1)[0]
    assert rep.scenarios_done < 1000 and rep.stopped in ("time_limit", "cancelled")
    assert newest["stop_reason"] == "STOP_REASON_" + rep.stopped.upper()


def test_alternatives_through_the_server(tl, ward):
    problem, pref = ward
    out = tl.repair("ward", [{"type": "forbid_values", "name": "n0 away", "decision": "n0",
                              "values": ["early", "off"]}], time_limit=3.0,
                    alternatives=3, alternative_distance=2, alternatives_by_decisions=True)
    alts = out["alternatives"]
    assert 1 <= len(alts) <= 3 and alts[0]["cost"] == pytest.approx(out["best"]["cost"])
    plans = [_plan_of(a["assignment"]) for a in alts]
    for a, p in zip(alts, plans):  # each cost written out from the construction
        assert p[0] not in (0, 3) and a["cost"] == pytest.approx(roster_energy(p, pref))
        assert a["candidate_id"] in ("c1", "c2", "c3")
    for p, q in itertools.combinations(plans, 2):
        assert sum(x != y for x, y in zip(p, q)) >= 2
    assert [a["cost"] for a in alts] == sorted(a["cost"] for a in alts)
    rec = tl.get_record("ward", out["record_id"])
    assert len(rec.repair.reply.alternatives) == len(alts)
    err = rpc_error(lambda: tl.repair("ward", alternatives=50))
    assert err.details().startswith("options.alternatives:")


def test_option_and_cli_errors_name_the_field(tl, server, tmp_path, capsys):
    from flipfix.repair import Problem
    from flipfix.service.cli import main

    flat = Problem.from_terms({"a": 1.0, "b": -1.0}, [])
    err = rpc_error(lambda: tl.repair(flat, candidates=np.zeros((1, 2), np.int8), alternatives=2,
                                      alternatives_by_decisions=True))
    assert err.details().startswith("options.alternatives_by_decisions:")
    assert main(["timeline", "--server", server.address, "add-event", "ward",
                 str(tmp_path / "missing.json")]) == 2
    assert "missing.json: cannot read" in capsys.readouterr().err
    (tmp_path / "bad.json").write_text('{"type": "fix", "values": {"nobody": 1}}')
    assert main(["timeline", "--server", server.address, "add-event", "ward",
                 str(tmp_path / "bad.json")]) == 2
    assert "constraint.values['nobody']" in capsys.readouterr().err
    assert main(["timeline", "--server", server.address, "adopt", "ward", "999"]) == 2
    assert "NOT_FOUND: record_id:" in capsys.readouterr().err
    assert main(["timeline", "--server", server.address, "repair", "ward", "--plan", "zz",
                 "--time-limit", "0.3"]) == 2
    assert "NOT_FOUND: plan_candidate_id:" in capsys.readouterr().err
    assert main(["timeline", "--server", server.address, "repair", "ward", "--plan", "c3",
                 "--method", "greedy", "--time-limit", "0.3", "--no-record"]) == 0
    out = json.loads(capsys.readouterr().out)
    x = np.array([out["best"]["assignment"][lab] for lab in tl.get_problem("ward")[1].labels])
    assert out["best"]["plan_distance"] == int((x != plan_bits(tl.plans[2])).sum())


def test_hamming_to_the_published_plan(tl, ward):
    _problem, pref = ward
    ref = tl.plans[1]
    tl.set_published_plan("ward", "c2")
    out = tl.repair("ward", stay_close=0.75, method="cpsat", time_limit=5.0)
    # brute force: energy + 0.75 per bit differing from c2 (two bits per moved nurse)
    best = min(roster_energy(q, pref) + 0.75 * 2 * sum(a != b for a, b in zip(q, ref))
               for q in itertools.product(range(4), repeat=NURSES))
    assert out["status"] == "optimal" and out["best"]["cost"] == pytest.approx(best, abs=1e-9)
    rec = tl.get_record("ward", out["record_id"])
    assert rec.repair.request.constraints[0].hamming.published_plan  # recorded as asked
    assert rec.summary.published_candidate_id == "c2"  # and the plan it referred to then
    tl.set_published_plan("ward", "c3")
    assert tl.get_record("ward", out["record_id"]).summary.published_candidate_id == "c2"
    plain = tl.repair("ward", method="greedy", time_limit=0.5)
    # no penalty refers to it, but the published plan is the plan in force
    assert tl.get_record("ward", plain["record_id"]).summary.published_candidate_id == "c3"


def test_the_plan_in_force(tl, ward):
    """plan_distance counts from the request's plan_candidate_id, else from the published
    plan; without either (and no Hamming penalty) it is not reported. Expected distances:
    counted here from the candidates' own bits (tests/roster.py's plan_bits)."""
    problem, _ = ward
    bits = {cid: plan_bits(p) for cid, p in zip(["c1", "c2", "c3"], tl.plans)}
    labels = list(problem.labels)

    def distance(out, cid):
        x = np.array([out["best"]["assignment"][lab] for lab in labels], dtype=np.int8)
        return int((x != bits[cid]).sum())

    none = tl.repair("ward", method="greedy", time_limit=0.5)
    assert none["best"].get("plan_distance") is None
    assert tl.get_record("ward", none["record_id"]).summary.published_candidate_id == ""
    tl.set_published_plan("ward", "c2")
    pub = tl.repair("ward", method="greedy", time_limit=0.5)
    assert pub["best"]["plan_distance"] == distance(pub, "c2")
    named = tl.repair("ward", method="greedy", time_limit=0.5, plan="c3", candidate_ids=["c1"])
    assert named["best"]["plan_distance"] == distance(named, "c3")  # not repaired, still known
    inline = tl.repair(problem, candidates=np.vstack([bits["c1"], bits["c3"]]),
                       method="greedy", time_limit=0.5, plan="c1")  # inline ids: c0, c1
    assert inline["best"]["plan_distance"] == distance(inline, "c3")
