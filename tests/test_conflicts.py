"""Conflicts named: the set is infeasible, and dropping any one member makes it feasible.

Reference: brute force. Every assignment of the small models below is enumerated by
dimod's ExactSolver (all 2^n states of the problem's BQM), and feasibility of a subset of
the late constraints is read from ``Compiled.evaluate`` over all of them.
"""

from __future__ import annotations

import dataclasses
import itertools

import dimod
import numpy as np
import pytest

from flipfix.repair import CandidateSet, Problem, repair
from flipfix.repair.lowering.compiled import compile_constraints
from flipfix.repair.model.constraints import (
    FixVariables, ForbidAssignment, ForbidValues, ForceValue, LinearConstraint,
)
from flipfix.repair.solvers.conflicts import name_conflict

from tests.roster import roster


def _all_states(problem: Problem) -> np.ndarray:
    """Every assignment, int8 (2^n, n) 0/1 in label order (dimod's ExactSolver)."""
    bqm = dimod.BinaryQuadraticModel({lab: 0.0 for lab in problem.labels}, {}, 0.0, "BINARY")
    ss = dimod.ExactSolver().sample(bqm)
    cols = [ss.variables.index(lab) for lab in problem.labels]
    return np.ascontiguousarray(ss.record.sample[:, cols], dtype=np.int8)


def _feasible(problem, constraints, states) -> bool:
    return bool(compile_constraints(problem, list(constraints)).evaluate(states).feasible.any())


def _random_hard(problem: Problem, rng) -> list:
    labels = list(problem.labels)
    out = []
    for k in range(rng.integers(3, 7)):
        kind = rng.integers(0, 3)
        pick = list(rng.choice(len(labels), size=rng.integers(1, 4), replace=False))
        if kind == 0:
            out.append(FixVariables({labels[i]: int(rng.integers(0, 2)) for i in pick},
                                    name=f"fix{k}"))
        elif kind == 1:
            terms = {labels[i]: float(rng.integers(1, 4)) for i in pick}
            sense = ("<=", "==", ">=")[rng.integers(0, 3)]
            out.append(LinearConstraint(terms, sense, float(rng.integers(0, 5)), name=f"lin{k}"))
        else:
            out.append(ForbidAssignment({labels[i]: int(rng.integers(0, 2)) for i in pick},
                                        name=f"forbid{k}"))
    return out


def _check_minimal(problem, constraints, conflict, states):
    members = [m.index for m in conflict.members]
    assert conflict.status == "conflict" and conflict.minimal
    assert [m.name for m in conflict.members] == [constraints[i].name for i in members]
    assert not _feasible(problem, [constraints[i] for i in members], states)
    for drop in members:
        rest = [constraints[i] for i in members if i != drop]
        assert _feasible(problem, rest, states), f"dropping {drop} left it infeasible"


def test_random_small_models_against_brute_force():
    rng = np.random.default_rng(7)
    conflicts = feasible = 0
    for trial in range(60):
        n = int(rng.integers(3, 8))
        problem = Problem.from_terms({f"x{i}": float(rng.normal()) for i in range(n)}, [])
        states = _all_states(problem)
        cons = _random_hard(problem, rng)
        res = name_conflict(compile_constraints(problem, cons), seed=trial)
        if _feasible(problem, cons, states):
            assert res.status == "feasible" and not res.members
            feasible += 1
        else:
            _check_minimal(problem, cons, res, states)
            conflicts += 1
    assert conflicts >= 10 and feasible >= 10  # both branches exercised


def test_decisions_conflict_keeps_encoding_as_background():
    problem, _ = roster(nurses=3)
    states = _all_states(problem)
    cons = [
        ForceValue("n0", "early", name="n0 early (rush job)"),
        FixVariables({"n2_off": 1}, name="n2 sick"),
        ForbidValues("n0", ["early", "late"], name="n0 mill down"),
        ForceValue("n1", "night", name="n1 nights"),
    ]
    res = name_conflict(compile_constraints(problem, cons))
    _check_minimal(problem, cons, res, states)
    assert [(m.index, m.name) for m in res.members] == [(0, "n0 early (rush job)"),
                                                        (2, "n0 mill down")]


def test_fixed_both_ways_and_single_impossible_row():
    problem = Problem.from_terms({"a": 1.0, "b": -1.0, "c": 0.5}, [])
    states = _all_states(problem)
    cons = [FixVariables({"a": 1}, name="a on"), LinearConstraint({"b": 1.0}, "<=", 5, name="loose"),
            FixVariables({"a": 0}, name="a off"),
            LinearConstraint({"b": 1.0, "c": 1.0}, ">=", 3, name="too much")]
    res = name_conflict(compile_constraints(problem, cons))
    # two disjoint conflicts; the deletion pass keeps one of them, minimal
    _check_minimal(problem, cons, res, states)
    assert {m.index for m in res.members} in ({0, 2}, {3})


def test_repair_reply_names_the_conflict():
    problem, _ = roster(nurses=3)
    X = np.zeros((1, problem.n), dtype=np.int8)
    X[0, [3, 7, 11]] = 1  # everyone off
    cons = [ForceValue("n0", "early", name="rush"), FixVariables({"n0_early": 0}, name="n0 out")]
    for method in ("portfolio", "greedy", "cpsat"):
        res = repair(problem, CandidateSet(("c1",), X), cons, method=method, time_limit=2.0)
        assert res.status == "infeasible", method
        assert res.conflict is not None and res.conflict.minimal
        assert [(m.index, m.name) for m in res.conflict.members] == [(0, "rush"), (1, "n0 out")]
        assert "[0] rush" in res.message and res.to_dict()["conflict"]["members"][1]["name"] == "n0 out"


def test_feasible_repair_has_no_conflict():
    problem, _ = roster(nurses=3)
    X = np.zeros((1, problem.n), dtype=np.int8)
    X[0, [3, 7, 11]] = 1
    res = repair(problem, CandidateSet(("c1",), X), [ForceValue("n0", "early")], time_limit=1.0)
    assert res.status in ("optimal", "feasible") and res.conflict is None


def test_time_limit_zero_gives_unknown():
    problem = Problem.from_terms({"a": 1.0}, [])
    res = name_conflict(compile_constraints(problem, [FixVariables({"a": 1})]), time_limit=0.0)
    assert res.status == "unknown"


def test_cli_prints_the_conflict_locally_and_through_a_server(tmp_path, capsys):
    import json

    from flipfix.service.cli import main
    from flipfix.service.server import create_server

    docs = {"problem": {"vartype": "BINARY", "linear": {"a": 1.0, "b": -1.0, "c": 0.5}},
            "candidates": [{"id": "p1", "assignment": {"a": 0, "b": 1, "c": 0}}],
            "constraints": [{"type": "fix", "name": "a on", "values": {"a": 1}},
                            {"type": "linear", "name": "loose", "terms": {"b": 1}, "sense": "<=",
                             "rhs": 5},
                            {"type": "forbid", "name": "not a with c off",
                             "assignment": {"a": 1, "c": 0}},
                            {"type": "fix", "name": "c off", "values": {"c": 0}}]}
    paths = []
    for name, doc in docs.items():
        paths.append(tmp_path / f"{name}.json")
        paths[-1].write_text(json.dumps(doc))
    args = ["repair", *map(str, paths), "--time-limit", "2", "--quiet"]
    with create_server("127.0.0.1:0", db_path=str(tmp_path / "c.sqlite3"), warm=False) as srv:
        for extra in ([], ["--server", srv.address]):
            assert main(args + extra) == 0
            cap = capsys.readouterr()
            out = json.loads(cap.out)
            assert out["status"] == "infeasible"
            assert [(m["index"], m["name"]) for m in out["conflict"]["members"]] == [
                (0, "a on"), (2, "not a with c off"), (3, "c off")]
            assert "[0] a on, [2] not a with c off, [3] c off" in cap.err


@pytest.mark.parametrize("assumptions", [True, False])
def test_many_constraints_divide_and_conquer_against_brute_force(monkeypatch, assumptions):
    """Over 16 hard constraints: without the assumptions' core (its time set to 0) every
    constraint is the start and divide and conquer narrows it; the set is still minimal."""
    from flipfix.repair.solvers import conflicts

    if not assumptions:
        monkeypatch.setattr(conflicts, "ASSUMPTION_SECONDS", 0.0)
    rng = np.random.default_rng(11)
    found = 0
    for trial in range(12):
        n = 8
        problem = Problem.from_terms({f"x{i}": 0.0 for i in range(n)}, [])
        states = _all_states(problem)
        cons = []
        while len(cons) < 20:
            cons.extend(_random_hard(problem, rng))
        cons = [dataclasses.replace(c, name=f"{c.name}.{j}") for j, c in enumerate(cons)]
        res = name_conflict(compile_constraints(problem, cons), seed=trial)
        if _feasible(problem, cons, states):
            assert res.status == "feasible"
            continue
        _check_minimal(problem, cons, res, states)
        found += 1
    assert found >= 6
