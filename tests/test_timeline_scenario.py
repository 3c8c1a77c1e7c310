"""A day of late events on the demo workshop, through a real server process and the
``flipfix timeline`` commands: the published plan, three successive events each repaired
from the adopted answer, one conflict named, the history listed, all of it still there
after the server restarts.

References: each answer's cost is recomputed with dimod (the BQM of the stored problem,
plus 5 per job moved from the published plan, written out here), and it is no worse than
the best plan found by brute force over every plan that moves at most two jobs from the
published one (1,711 plans, enumerated here); the conflict is the pair of events that
cannot both hold (a job forced to Monday AM and kept off Monday).
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import itertools

import dimod
import pytest

from flipfix.service.cli import main
from flipfix.service.demo import load_scenario

ROOT = Path(__file__).resolve().parents[1]
KEEP = 5.0  # per job moved from the published plan (the demo's own weight)


def _serve(db: Path) -> tuple[subprocess.Popen, str]:
    proc = subprocess.Popen([sys.executable, "-m", "flipfix.service.cli", "serve", "--port", "0",
                             "--db", str(db), "--max-records", "50"], cwd=ROOT,
                            stderr=subprocess.PIPE, text=True)
    t0 = time.monotonic()
    line = proc.stderr.readline()
    while "serving on" not in line and time.monotonic() - t0 < 120:
        if proc.poll() is not None:
            raise RuntimeError(f"the server exited: {proc.stderr.read()}")
        line = proc.stderr.readline()
    port = int(line.split("serving on ")[1].split()[0].rsplit(":", 1)[1])
    return proc, f"127.0.0.1:{port}"


def _stop(proc: subprocess.Popen) -> None:
    proc.send_signal(signal.SIGTERM)
    try:
        assert proc.wait(timeout=60) == 0
    finally:
        if proc.poll() is None:
            os.kill(proc.pid, signal.SIGKILL)
            proc.wait()


def _tl(capsys, server: str, *args: str, code: int = 0):
    rc = main(["timeline", "--server", server, *args])
    cap = capsys.readouterr()
    assert rc == code, cap.err
    return (json.loads(cap.out) if cap.out.strip() else None), cap.err


def _slots(assignment: dict, jobs) -> dict:
    """Domain wall: slot = 1 + the number of ones in the job's bits."""
    return {j: 1 + sum(assignment[f"{j}>{k}"] for k in range(1, 6)) for j in jobs}


def _bits(slots: dict) -> dict:
    return {f"{j}>{k}": int(v > k) for j, v in slots.items() for k in range(1, 6)}


def _best_near(bqm, plan: dict, holds) -> float:
    """Cheapest cost (energy + KEEP per job moved) over the plans moving at most two jobs
    from ``plan`` that satisfy every ``holds``; brute force."""
    best = float("inf")
    jobs = list(plan)
    for k in (0, 1, 2):
        for moved in itertools.combinations(jobs, k):
            for values in itertools.product(range(1, 7), repeat=k):
                if any(v == plan[j] for j, v in zip(moved, values)):
                    continue
                s = {**plan, **dict(zip(moved, values))}
                if all(h(s) for h in holds):
                    best = min(best, bqm.energy(_bits(s)) + KEEP * k)
    return best


def test_a_day_of_events_survives_a_restart(tmp_path, capsys):
    from flipfix.service.timeline_client import TimelineClient

    sc = load_scenario()
    doc = sc["problem"]
    jobs = [d["name"] for d in doc["decisions"]]
    bqm = dimod.BinaryQuadraticModel(doc["linear"], {(u, v): b for u, v, b in doc["quadratic"]},
                                     doc.get("offset", 0.0), "BINARY")
    db = tmp_path / "day.sqlite3"
    proc, server = _serve(db)
    try:
        with TimelineClient(server) as tl:
            tl.create_problem("workshop", doc)
            ids = tl.add_candidates("workshop", sc["candidates"])
            lib = tl.list_candidates("workshop")[0]
        published = next(cid for cid, a in zip(lib.ids, lib.assignments())
                         if _slots(a, jobs) == sc["published"])
        assert ids and _tl(capsys, server, "publish", "workshop", published)[0][
            "candidate_id"] == published

        day = [  # (event constraints, what each must make true of the plan)
            ([{"type": "forbid_values", "name": f"mill down Tue {j}", "decision": j,
               "values": [3, 4]} for j in ("J05", "J06", "J07", "J08")],
             lambda s: all(s[j] not in (3, 4) for j in ("J05", "J06", "J07", "J08"))),
            ([{"type": "forbid_values", "name": f"welder sick Wed {j}", "decision": j,
               "values": [5, 6]} for j in ("J09", "J10", "J11", "J12")],
             lambda s: all(s[j] not in (5, 6) for j in ("J09", "J10", "J11", "J12"))),
            ([{"type": "force_value", "name": "rush: roller pins Mon AM", "decision": "J03",
               "value": 1}], lambda s: s["J03"] == 1),
        ]
        plan, adopted, checks = dict(sc["published"]), [], []
        for events, holds in day:
            for ev in events:
                (tmp_path / "ev.json").write_text(json.dumps(ev))
                _tl(capsys, server, "add-event", "workshop", str(tmp_path / "ev.json"))
            out, _ = _tl(capsys, server, "repair", "workshop", "--events", "--from-published",
                         "--stay-close", str(KEEP), "--by-decisions", "--time-limit", "3")
            assert out["status"] in ("optimal", "feasible") and out["best"]["feasible"]
            assert [r["candidate_id"] for r in out["audit"]] == [published]  # from the adopted plan
            checks.append(holds)
            s = _slots(out["best"]["assignment"], jobs)
            near = _best_near(bqm, plan, checks)
            assert near < float("inf") and out["best"]["cost"] <= near + 1e-9
            assert all(h(s) for h in checks)  # every event so far still holds
            moved = sum(s[j] != plan[j] for j in jobs)
            energy = bqm.energy(out["best"]["assignment"])
            assert out["best"]["cost"] == pytest.approx(energy + KEEP * moved, abs=1e-6)
            assert out["best"]["decisions_changed"] == moved
            a, _ = _tl(capsys, server, "adopt", "workshop", str(out["record_id"]), "--publish")
            published, plan = a["candidate_id"], s
            adopted.append((out["record_id"], published))
        # a fourth event clashes with the rush job: the conflict is named, nothing adopted
        (tmp_path / "ev.json").write_text(json.dumps(
            {"type": "forbid_values", "name": "J03 not Monday", "decision": "J03",
             "values": [1, 2]}))
        clash, _ = _tl(capsys, server, "add-event", "workshop", str(tmp_path / "ev.json"))
        out, err = _tl(capsys, server, "repair", "workshop", "--events", "--from-published",
                       "--time-limit", "5")
        assert out["status"] == "infeasible" and out["conflict"]["minimal"]
        assert [m["name"] for m in out["conflict"]["members"]] == ["rush: roller pins Mon AM",
                                                                  "J03 not Monday"]
        assert out["conflict"]["members"][1]["event_id"] == clash["id"]
        assert f"J03 not Monday (event {clash['id']})" in err
        _, err = _tl(capsys, server, "adopt", "workshop", str(out["record_id"]), code=2)
        assert "FAILED_PRECONDITION: record_id:" in err
        _, err = _tl(capsys, server, "adopt", "workshop", str(adopted[0][0]), code=2)
        assert "ALREADY_EXISTS: record_id:" in err
        _tl(capsys, server, "withdraw", "workshop", str(clash["id"]))
        before, _ = _tl(capsys, server, "records", "workshop")
        events_before, _ = _tl(capsys, server, "events", "workshop", "--all")
    finally:
        _stop(proc)

    proc, server = _serve(db)  # the same database, a new process
    try:
        after, _ = _tl(capsys, server, "records", "workshop")
        assert after == before and len(after) == 4
        assert [(r["id"], r["adopted_candidate_id"]) for r in after[:0:-1]] == adopted
        assert after[0]["repair_status"] == "REPAIR_STATUS_INFEASIBLE" and after[0]["adopted_candidate_id"] == ""
        assert _tl(capsys, server, "events", "workshop", "--all")[0] == events_before
        assert [e["state"] for e in events_before["events"]].count("EVENT_STATE_IN_FORCE") == 9
        assert _tl(capsys, server, "published", "workshop")[0]["candidate_id"] == published
        full, _ = _tl(capsys, server, "record", "workshop", str(adopted[-1][0]))
        assert full["repair"]["request"]["use_events"] and len(full["events"]) == 9
    finally:
        _stop(proc)
