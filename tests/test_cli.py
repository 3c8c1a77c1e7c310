"""The ``flipfix`` command: JSON out, exit code 2 naming file and field, in-process == --server.

The expected optimum is dimod's ExactSolver (brute force) over the 2^6 assignments.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import dimod
import grpc
import pytest
from grpc_health.v1 import health_pb2, health_pb2_grpc

from flipfix.service.cli import main

ROOT = Path(__file__).resolve().parents[1]

PROBLEM = {"vartype": "SPIN",
           "linear": {"0": 0.5, "1": -1.0, "2": 0.25, "x": -0.5, "y": 1.0, "z": 0.0},
           "quadratic": [[0, 1, 1.0], [1, 2, -1.0], [2, "x", 0.5], ["x", "y", 1.0], ["y", "z", -1.0],
                         ["z", 0, 0.75]],
           "offset": 1.0}
CANDIDATES = [{"id": "p1", "assignment": {"0": 1, "1": -1, "2": -1, "x": 1, "y": -1, "z": -1}},
              {"id": "p2", "assignment": {"0": -1, "1": 1, "2": 1, "x": 1, "y": -1, "z": 1}}]
CONSTRAINTS = [{"type": "fix", "values": {"1": -1}},
               {"type": "forbid", "assignment": {"x": 1, "y": -1}}]


def _brute_force_optimum() -> float:
    bqm = dimod.BinaryQuadraticModel({0: 0.5, 1: -1.0, 2: 0.25, "x": -0.5, "y": 1.0, "z": 0.0},
                                     {(u, v): b for u, v, b in PROBLEM["quadratic"]}, 1.0, "SPIN")
    ss = dimod.ExactSolver().sample(bqm)
    return min(d.energy for d in ss.data(["sample", "energy"])
               if d.sample[1] == -1 and not (d.sample["x"] == 1 and d.sample["y"] == -1))


@pytest.fixture
def files(tmp_path):
    paths = {}
    for name, doc in (("problem", PROBLEM), ("candidates", CANDIDATES), ("constraints", CONSTRAINTS)):
        paths[name] = tmp_path / f"{name}.json"
        paths[name].write_text(json.dumps(doc))
    return paths


def _args(files, *extra):
    return ["repair", str(files["problem"]), str(files["candidates"]), str(files["constraints"]),
            "--time-limit", "1", "--quiet", *extra]


def test_in_process_repair_prints_the_result_json(files, capsys):
    assert main(_args(files)) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["best"]["feasible"] is True
    assert out["best"]["cost"] == pytest.approx(_brute_force_optimum(), abs=1e-9)
    assert out["best"]["assignment"]["1"] == -1  # JSON keys; label 1 is an int label
    for row in out["audit"]:
        assert {"candidate_id", "cost", "flips", "feasible"} <= set(row)
    assert [r["candidate_id"] for r in out["audit"]] == ["p1", "p2"]


def test_plan_option_counts_from_that_candidate_here_and_through_a_server(files, capsys,
                                                                           tmp_path):
    """--plan p2: plan_distance is the answer's distance from p2's assignment (counted here);
    an unknown id names the option."""
    from flipfix.service.server import create_server

    p2 = CANDIDATES[1]["assignment"]
    with create_server("127.0.0.1:0", db_path=str(tmp_path / "cli.sqlite3")) as srv:
        for extra in ([], ["--server", srv.address]):
            assert main(_args(files, "--plan", "p2", *extra)) == 0
            best = json.loads(capsys.readouterr().out)["best"]
            assert best["plan_distance"] == sum(best["assignment"][k] != v for k, v in p2.items())
            assert main(_args(files, "--plan", "p9", *extra)) == 2
            assert "--plan" in capsys.readouterr().err


def test_server_and_in_process_give_the_same_best_cost(files, capsys, tmp_path):
    from flipfix.service.server import create_server

    assert main(_args(files)) == 0
    local = json.loads(capsys.readouterr().out)
    with create_server("127.0.0.1:0", db_path=str(tmp_path / "cli.sqlite3")) as srv:
        assert main(_args(files, "--server", srv.address)) == 0
        remote = json.loads(capsys.readouterr().out)
        assert srv.store.list_problems()[0] == []  # an inline repair stores nothing
    assert remote["best"]["cost"] == pytest.approx(local["best"]["cost"], abs=1e-9)
    assert remote["best"]["feasible"] and local["best"]["feasible"]  # status may differ: a proof is timing-dependent
    assert set(remote["best"]["assignment"]) == set(local["best"]["assignment"])


def test_server_path_reads_each_document_once(files, capsys, tmp_path, monkeypatch):
    """--server: the problem, the candidates and each constraint are parsed once (the client
    converts what it parsed), and a bad file is still blamed by name."""
    from flipfix.repair.documents import forms
    from flipfix.service.server import create_server

    calls = {"parse_problem": 0, "parse_candidate_records": 0, "parse_constraint": 0}
    for name in calls:
        real = getattr(forms, name)

        def counted(*args, _real=real, _name=name, **kwargs):
            calls[_name] += 1
            return _real(*args, **kwargs)

        monkeypatch.setattr(forms, name, counted)
    with create_server("127.0.0.1:0", db_path=str(tmp_path / "once.sqlite3")) as srv:
        assert main(_args(files, "--server", srv.address)) == 0
        assert json.loads(capsys.readouterr().out)["best"]["feasible"]
        assert calls == {"parse_problem": 1, "parse_candidate_records": 1,
                         "parse_constraint": len(CONSTRAINTS)}
        files["constraints"].write_text(json.dumps([{"type": "fix", "values": {"q": 1}}]))
        assert main(_args(files, "--server", srv.address)) == 2
        err = capsys.readouterr().err
        assert f"{files['constraints']}: constraints[0].values['q']" in err


@pytest.mark.parametrize("which, content, field", [
    ("constraints", [{"type": "fix", "values": {"1": -1}},
                     {"type": "hamming", "reference": {"x": 1}, "weight": -3}], "constraints[1].weight"),
    ("candidates", [{"id": "p1", "assignment": {"0": 1, "1": 1, "2": 0, "x": 1, "y": 1, "z": 1}}],
     "candidates[0].assignment[2]"),  # label 2 is an int label
    ("problem", {**PROBLEM, "vartype": "QUBIT"}, "problem.vartype"),
    ("constraints", [{"type": "fix", "values": {"nope": 1}}], "constraints[0].values['nope']"),
])
def test_malformed_file_exit_2_names_file_and_field(files, capsys, which, content, field):
    files[which].write_text(json.dumps(content))
    assert main(_args(files)) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1
    assert str(files[which]) in err and field in err


def test_invalid_json_and_console_script_exit_code(files):
    files["candidates"].write_text('[{"id": "p1", "assignment": {')
    proc = subprocess.run([sys.executable, "-m", "flipfix.service.cli", *_args(files)], cwd=ROOT,
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 2 and proc.stdout == ""
    assert str(files["candidates"]) in proc.stderr and "line 1" in proc.stderr
    assert len(proc.stderr.strip().splitlines()) == 1


def test_serve_answers_health_and_stops_on_sigterm(tmp_path):
    proc = subprocess.Popen([sys.executable, "-m", "flipfix.service.cli", "serve", "--port", "0",
                             "--db", str(tmp_path / "s.sqlite3")], cwd=ROOT,
                            stderr=subprocess.PIPE, text=True)
    try:
        line = proc.stderr.readline()
        t0 = time.monotonic()
        while "serving on" not in line and time.monotonic() - t0 < 60:
            line = proc.stderr.readline()
        port = int(line.split("serving on ")[1].split()[0].rsplit(":", 1)[1])
        from flipfix.service.client import FlipfixClient

        with FlipfixClient(f"127.0.0.1:{port}") as fx:
            fx.wait_ready(timeout=120)  # NOT_SERVING while the worker loads its kernels
        with grpc.insecure_channel(f"127.0.0.1:{port}") as ch:
            r = health_pb2_grpc.HealthStub(ch).Check(health_pb2.HealthCheckRequest(), timeout=10)
            assert r.status == health_pb2.HealthCheckResponse.SERVING
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(timeout=30) == 0
    finally:
        if proc.poll() is None:
            os.kill(proc.pid, signal.SIGKILL)
            proc.wait()


def test_demo_runs_end_to_end():
    from flipfix.service.demo import run_demo

    lines: list[str] = []
    assert run_demo(time_limit=1.0, out=lines.append) == 0  # 0: the repaired plan is feasible
    text = "\n".join(lines)
    assert "feasible: yes" in text and "responsible person" in text


def _closed_port() -> str:
    import socket

    with socket.socket() as s:  # bound then closed: nothing listens there
        s.bind(("127.0.0.1", 0))
        return f"127.0.0.1:{s.getsockname()[1]}"


@pytest.mark.parametrize("command", ["repair", "audit", "grow", "timeline"])
def test_a_server_that_fails_exits_2_on_every_command(files, capsys, command):
    addr = _closed_port()
    argv = {"repair": _args(files, "--server", addr),
            "audit": ["audit", "stored", "--server", addr, "--quiet"],
            "grow": ["grow", "stored", "--server", addr, "--quiet"],
            "timeline": ["timeline", "--server", addr, "records", "stored"]}[command]
    assert main(argv) == 2  # README, "Exit codes"
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and addr in err and "UNAVAILABLE" in err, err


def test_a_server_that_refuses_exits_2_for_repair_and_audit(files, capsys, tmp_path):
    from flipfix.repair.documents.forms import parse_problem
    from flipfix.service.client import FlipfixClient
    from flipfix.service.server import create_server

    with create_server("127.0.0.1:0", db_path=str(tmp_path / "refuse.sqlite3"),
                       max_constraints=1, max_scenarios=2) as srv:
        with FlipfixClient(srv.address) as fx:
            fx.create_problem("stored", parse_problem(PROBLEM))
            fx.add_candidates("stored", CANDIDATES)
        assert main(_args(files, "--server", srv.address)) == 2  # 2 constraints, 1 allowed
        err = capsys.readouterr().err
        assert srv.address in err and "RESOURCE_EXHAUSTED" in err, err
        assert main(["audit", "stored", "--server", srv.address, "--scenarios", "5",
                     "--quiet"]) == 2
        err = capsys.readouterr().err
        assert srv.address in err and "RESOURCE_EXHAUSTED" in err, err
