"""Diagnosing an answer that is not feasible: a distinct exit code for scripts, both
conflicting constraints named, and only the validity rows the answer breaks listed.

The expected optimum of the feasible case is dimod's ExactSolver (brute force over the 2^6
assignments) restricted to valid one-hot strings and the forced value.
"""

from __future__ import annotations

import json

import dimod
import pytest

from flipfix.service.cli import EXIT_NOT_FEASIBLE, main

PROBLEM = {"vartype": "BINARY",
           "linear": {"c_a": 1.0, "c_b": 0.0, "c_c": 2.0, "d_1": 0.0, "d_2": -1.0, "d_3": 0.5},
           "quadratic": [["c_a", "d_1", -1.5], ["c_b", "d_2", 1.0], ["c_c", "d_3", -0.5]],
           "decisions": [
               {"name": "crew", "encoding": "one_hot", "variables": ["c_a", "c_b", "c_c"],
                "values": ["A", "B", "C"]},
               {"name": "day", "encoding": "one_hot", "variables": ["d_1", "d_2", "d_3"],
                "values": [1, 2, 3]}]}
CANDIDATES = [{"id": "plan", "assignment": {"c_a": 1, "c_b": 0, "c_c": 0,
                                            "d_1": 1, "d_2": 0, "d_3": 0}}]
CONFLICT = [{"type": "force_value", "name": "crew A booked", "decision": "crew", "value": "A"},
            {"type": "force_value", "name": "crew B only", "decision": "crew", "value": "B"}]
FORCE_B = [CONFLICT[1]]


def _files(tmp_path, constraints):
    paths = []
    for name, doc in (("problem", PROBLEM), ("candidates", CANDIDATES),
                      ("constraints", constraints)):
        path = tmp_path / f"{name}.json"
        path.write_text(json.dumps(doc))
        paths.append(str(path))
    return paths


def _brute_force_with_b() -> float:
    bqm = dimod.BinaryQuadraticModel(PROBLEM["linear"],
                                     {(u, v): w for u, v, w in PROBLEM["quadratic"]}, 0.0, "BINARY")
    ss = dimod.ExactSolver().sample(bqm)
    return min(e for s, e in ss.data(["sample", "energy"])
               if (s["c_a"], s["c_b"], s["c_c"]) == (0, 1, 0)
               and s["d_1"] + s["d_2"] + s["d_3"] == 1)


@pytest.mark.parametrize("method", ["greedy", "portfolio"])
def test_conflicting_force_values_exit_3_and_name_both(tmp_path, capsys, method):
    code = main(["repair", *_files(tmp_path, CONFLICT), "--require-feasible", "--quiet",
                 "--method", method, "--time-limit", "1"])
    cap = capsys.readouterr()
    out = json.loads(cap.out)  # the result is printed all the same
    assert code == EXIT_NOT_FEASIBLE == 3
    assert out["status"] == "infeasible" and not out["best"]["feasible"]
    assert "'crew A booked'" in out["message"] and "'crew B only'" in out["message"]
    assert "not feasible" in cap.err and "crew B only" in cap.err
    # encoding rows the answer keeps are not listed; the broken constraint is
    assert not [k for k in out["best"]["violations"] if k.startswith("encoding[")]
    assert out["best"]["violations"]["crew B only"] > 0


def test_require_feasible_through_a_server(tmp_path, capsys):
    from flipfix.service.client import FlipfixClient
    from flipfix.service.server import create_server

    with create_server("127.0.0.1:0", db_path=str(tmp_path / "s.sqlite3"), workers=1) as srv:
        with FlipfixClient(srv.address) as fx:
            fx.wait_ready(timeout=300)
        code = main(["repair", *_files(tmp_path, CONFLICT), "--require-feasible", "--quiet",
                     "--time-limit", "1", "--server", srv.address])
    cap = capsys.readouterr()
    assert code == EXIT_NOT_FEASIBLE
    out = json.loads(cap.out)
    assert out["status"] == "infeasible" and "'crew A booked'" in out["message"]
    assert "not feasible" in cap.err


def test_feasible_answer_exits_0_and_lists_no_satisfied_encoding_row(tmp_path, capsys):
    code = main(["repair", *_files(tmp_path, FORCE_B), "--require-feasible", "--quiet",
                 "--time-limit", "1"])
    out = json.loads(capsys.readouterr().out)
    assert code == 0 and out["best"]["feasible"]
    assert out["best"]["cost"] == pytest.approx(_brute_force_with_b())
    assert out["best"]["violations"] == {"crew B only": 0.0}


def test_broken_encoding_in_the_answer_is_listed():
    """An answer that breaks a decision's validity row (infeasible late rows force it)
    lists that row with its violation."""
    from flipfix.repair import repair
    from flipfix.repair.documents.forms import parse_candidates, parse_constraints, parse_problem

    p = parse_problem(PROBLEM)
    cands = parse_candidates(CANDIDATES, p)
    # every crew bit pinned to 0: the one-hot row of crew cannot hold
    cons = parse_constraints([{"type": "fix", "values": {"c_a": 0, "c_b": 0, "c_c": 0}}], p)
    res = repair(p, cands, cons, method="greedy", time_limit=1.0)
    assert not res.best.feasible
    assert res.best.violations.get("encoding[crew]", 0.0) > 0
    assert "encoding[day]" not in res.best.violations
