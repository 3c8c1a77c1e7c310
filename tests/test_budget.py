"""Replies inside the budget, the early stop on a CP-SAT proof, and the distance from the plan.

No timings are asserted here (bench/budget.py measures them). What is checked:

* the deadline arithmetic (pure functions) and CP-SAT's measured set-up costs;
* that every stage honours a deadline that has already passed (it starts nothing);
* that descending in capped slices under a deadline gives the answers of one descent;
* the fast batch scores (:class:`flipfix.repair.kernels.scores.Scorer`) against
  ``Compiled.evaluate`` and, for the energy, against dimod's ``BinaryQuadraticModel.energies``;
* the early stop: status "optimal" (or "infeasible") with the stop recorded, the answer
  equal to the optimum by dimod.ExactSolver (dimod's exhaustive reference solver);
* ``plan_distance`` against an independent count on the reply's assignment.
"""

from __future__ import annotations

import time

import dimod
import numpy as np
import pytest

from flipfix.repair import CandidateSet, Decision, InputError, Problem, repair
from flipfix.repair.api import plan_reference, result_seconds, search_deadline
from flipfix.repair.kernels.scores import Scorer, distances
from flipfix.repair.lowering.compiled import compile_constraints
from flipfix.repair.model import constraints as enc
from flipfix.repair.model.constraints import FixVariables, HammingPenalty, LinearConstraint
from flipfix.repair.solvers import portfolio as pf
from flipfix.repair.solvers.greedy import greedy_repair


def sparse_problem(n: int, seed: int, *, spin: bool = False) -> Problem:
    """Seeded random sparse model with float coefficients (ties improbable)."""
    rng = np.random.default_rng(seed)
    m = 3 * n
    u = rng.integers(0, n, size=m)
    v = (u + rng.integers(1, n, size=m)) % n
    return Problem.from_arrays(range(n), rng.normal(size=n), u, v, rng.normal(size=m),
                               vartype="SPIN" if spin else "BINARY")


def late(problem: Problem, plan: np.ndarray, seed: int) -> list:
    """Fixings, a linear and a threshold Hamming penalty, a cardinality row, an equality row."""
    rng = np.random.default_rng(seed + 1)
    n = problem.n
    pick = rng.choice(n, size=max(1, n // 20), replace=False)
    vals = problem.to_caller(plan)
    return [
        FixVariables({int(i): int(problem.to_caller(np.int8([1 - plan[i]]))[0]) for i in pick}),
        HammingPenalty({i: int(vals[i]) for i in range(n)}, weight=0.3, name="near"),
        HammingPenalty({i: int(vals[i]) for i in range(0, n, 2)}, weight=1.5,
                       shape="threshold", threshold=3, name="thr"),
        LinearConstraint({i: 1.0 for i in range(n)}, "<=", float(n // 3), name="card"),
        LinearConstraint({i: float(rng.integers(-3, 4)) for i in range(0, n, 3)}, "==", 1.0,
                         name="eq"),
    ]


# ------------------------------------------------------------------ deadline arithmetic
def test_result_reserve_grows_with_every_size():
    base = result_seconds(100, 1000)
    assert base > 0.0
    assert result_seconds(1000, 1000) > base
    assert result_seconds(100, 10000) > base
    assert result_seconds(100, 1000, attempts=500) > base
    assert result_seconds(100, 1000, decisions=20) > base


def test_search_deadline_keeps_the_reserve_and_never_precedes_the_entry():
    assert search_deadline(10.0, 1.0, 0.25) == pytest.approx(10.75)
    assert search_deadline(10.0, 0.1, 0.25) == 10.0  # the result alone exceeds the budget
    assert search_deadline(10.0, 0.5, 0.0) == pytest.approx(10.5)


def test_cpsat_costs_follow_measurements():
    costs = pf.CpsatCosts(build=1e-5, setup=1e-5, latency=(0.01, 0.2))
    comp = compile_constraints(sparse_problem(50, 0), [])
    items = pf._items(comp)
    costs.built(comp, 4e-5 * items)  # slower than thought: followed at once
    assert costs.build == pytest.approx(4e-5)
    costs.built(comp, 0.0)  # quicker: at most halved
    assert costs.build == pytest.approx(2e-5)
    assert costs.build_seconds(comp) == pytest.approx(2e-5 * items)
    # latency: the largest overrun of the last LATENCY_WINDOW searches, per worker class,
    # never below the floor
    assert costs.setup_seconds(comp, 2) == pytest.approx(0.2 + 1e-5 * items)
    costs.overran(comp, 2, 0.5 + 1e-5 * items)
    assert costs.latency(2) == pytest.approx(0.5)
    for _ in range(pf.CpsatCosts.LATENCY_WINDOW - 1):
        costs.overran(comp, 4, 0.003 + 1e-5 * items)  # 4 workers count as several too
    assert costs.latency(2) == pytest.approx(0.5)  # still in the window
    costs.overran(comp, 2, 0.003 + 1e-5 * items)
    assert costs.latency(2) == pytest.approx(0.2)  # it left the window: the floor
    costs.overran(comp, 1, 0.03 + 1e-5 * items)
    assert costs.latency(1) == pytest.approx(0.03)


def test_affordable_counts_build_setup_and_a_minimal_search():
    comp = compile_constraints(sparse_problem(50, 0), [])
    for workers in (1, 2):
        need = pf.CPSAT_COSTS.setup_seconds(comp, workers) + pf.CPSAT_MIN_SECONDS
        build = pf.build_cost(comp)
        assert pf._cpsat_affordable(comp, need + build + 1e-3, workers=workers)
        assert not pf._cpsat_affordable(comp, need + build - 1e-3, workers=workers)
        assert pf._cpsat_affordable(comp, need + 1e-3, built=True, workers=workers)
        assert not pf._cpsat_affordable(comp, need - 1e-3, built=True, workers=workers)


# ------------------------------------------------------------------ a passed deadline
@pytest.fixture(scope="module")
def model():
    p = sparse_problem(60, 3)
    rng = np.random.default_rng(4)
    X0 = rng.integers(0, 2, size=(12, p.n), dtype=np.int8)
    comp = compile_constraints(p, late(p, X0[0], 5))
    return p, X0, comp


def test_greedy_starts_nothing_after_its_deadline(model):
    _, X0, comp = model
    g = greedy_repair(comp, X0, deadline=time.perf_counter() - 1.0)
    assert not g.done.any()
    assert np.array_equal(g.X, X0)


def test_plan_starts_nothing_after_its_deadline(model):
    _, X0, comp = model
    out = pf.run_plan(comp, X0, method="portfolio", deadline=time.perf_counter() - 1.0,
                      max_flips=None, flip_price=0.0, seed=0, workers=1)
    assert out.attempts == []  # the candidates stay as they are (repair() reports them so)
    assert out.stats["greedy_done"] == 0
    assert "cpsat_build_seconds" not in out.stats and "local_rounds" not in out.stats
    assert out.stats["fewest_flips_status"].startswith("skipped")


def test_polish_and_fewest_flips_start_nothing_after_their_deadline(model):
    _, X0, comp = model
    scorer = Scorer(comp, X0)
    out = pf.run_plan(comp, X0, method="greedy", deadline=time.perf_counter() + 60.0,
                      max_flips=None, flip_price=0.0, seed=0, workers=1, scorer=scorer)
    before = len(out.attempts)
    past = time.perf_counter() - 1.0
    pf._polish(comp, X0, out, scorer, deadline=past, max_flips=None, flip_price=0.0)
    cp = pf._LazyCpsat(comp, out.stats)
    pf._fewest_flips(cp, comp, X0, out, scorer, deadline=past, max_flips=None, flip_price=0.0,
                     seed=0, workers=1, cancel=None)
    assert len(out.attempts) == before
    assert cp.model is None and out.stats["fewest_flips_status"].startswith("skipped")


def test_cpsat_is_not_built_past_its_deadline(model):
    _, _, comp = model
    cp = pf._LazyCpsat(comp, {})
    assert not cp.ready(time.perf_counter() - 1.0)
    assert cp.model is None and "cpsat_skipped" in cp.stats


@pytest.mark.parametrize("workers", [1, 2])
def test_descending_under_a_far_deadline_gives_the_same_answers(model, workers):
    """Far from its deadline (its timer armed, the kernels' stop flag watched) greedy gives
    the answers of a descent without a deadline."""
    p, X0, comp = model
    for c in (comp, compile_constraints(p, [])):  # general path, and the pure-QUBO path
        want = greedy_repair(c, X0, workers=workers)
        got = greedy_repair(c, X0, deadline=time.perf_counter() + 600.0, workers=workers)
        assert got.done.all()
        assert want.steps.max() > 16  # real descents
        assert np.array_equal(got.X, want.X)


# ------------------------------------------------------------------ batch scores
@pytest.mark.parametrize("spin", [False, True])
def test_scores_equal_the_evaluation(spin):
    p = sparse_problem(80, 7, spin=spin)
    rng = np.random.default_rng(8)
    root = rng.integers(0, 2, size=p.n, dtype=np.int8)
    near = np.repeat(root[None, :], 30, axis=0)
    near ^= (rng.random(near.shape) < 0.05).astype(np.int8)  # a clustered library
    X0 = np.vstack([near, rng.integers(0, 2, size=(10, p.n), dtype=np.int8)])  # and far rows
    comp = compile_constraints(p, late(p, root, 9))
    ev = comp.evaluate(X0)
    s = Scorer(comp, X0, workers=2)
    assert np.allclose(s.cost, ev.cost, rtol=0, atol=1e-9)
    assert np.allclose(s.violation, ev.violation, rtol=0, atol=1e-9)
    assert np.array_equal(s.violation == 0.0, ev.feasible)
    # the base energy against dimod (an outside reference): no late constraints
    base = Scorer(compile_constraints(p, []), X0)
    bqm = p.to_bqm()
    caller = p.to_caller(X0)
    assert np.allclose(base.cost, bqm.energies((caller, list(p.labels))), rtol=0, atol=1e-9)
    # near: repaired-like rows from their own candidate, and rows scored from far away
    A = X0.copy()
    A ^= (rng.random(A.shape) < 0.03).astype(np.int8)
    ks = np.arange(len(A))
    evA = comp.evaluate(A)
    for rows in (ks, ks[::-1]):
        cost, viol, flips = s.near(A, rows)
        assert np.allclose(cost, evA.cost, rtol=0, atol=1e-9)
        assert np.allclose(viol, evA.violation, rtol=0, atol=1e-9)
        assert np.array_equal(flips, (A != X0[rows]).sum(axis=1))
    assert np.array_equal(distances(X0, A[0]), (X0 != A[0]).sum(axis=1))


@pytest.mark.parametrize("workers", [1, 2])
def test_scoring_to_a_deadline_scores_a_prefix_in_blocks_with_the_same_scores(workers, monkeypatch):
    p = sparse_problem(80, 12)
    rng = np.random.default_rng(13)
    root = rng.integers(0, 2, size=p.n, dtype=np.int8)
    X0 = np.repeat(root[None, :], 40, axis=0)
    X0 ^= (rng.random(X0.shape) < 0.05).astype(np.int8)
    comp = compile_constraints(p, late(p, root, 14))
    ev = comp.evaluate(X0)
    passed = Scorer(comp, X0, workers=workers, deadline=time.perf_counter() - 1.0)
    assert passed.scored == workers  # the first block only
    assert np.isnan(passed.cost[workers:]).all() and np.isnan(passed.violation[workers:]).all()
    assert np.allclose(passed.cost[:workers], ev.cost[:workers], rtol=0, atol=1e-9)
    # near a candidate that was not scored: from scratch, still exact
    A = X0 ^ (rng.random(X0.shape) < 0.03).astype(np.int8)
    cost, viol, flips = passed.near(A, np.arange(len(A)))
    assert np.allclose(cost, comp.evaluate(A).cost, rtol=0, atol=1e-9)
    assert np.array_equal(flips, (A != X0).sum(axis=1))
    # blocks of 3 rows (each block's rows scored from rows of earlier blocks too)
    import flipfix.repair.kernels.scores as scores_mod

    monkeypatch.setattr(scores_mod, "BLOCK_SECONDS", 1e-12)
    blocks = Scorer(comp, X0, workers=workers, deadline=time.perf_counter() + 600.0)
    assert blocks.scored == len(X0)
    assert np.allclose(blocks.cost, ev.cost, rtol=0, atol=1e-9)
    assert np.allclose(blocks.violation, ev.violation, rtol=0, atol=1e-9)


def test_candidates_the_scoring_budget_did_not_reach_are_reported_unscored(monkeypatch):
    import json

    import flipfix.repair.api as api

    p = sparse_problem(40, 15)
    rng = np.random.default_rng(16)
    X0 = rng.integers(0, 2, size=(9, p.n), dtype=np.int8)
    cs = [FixVariables({0: 1}), HammingPenalty({i: int(X0[0, i]) for i in range(p.n)},
                                               weight=0.2)]
    monkeypatch.setattr(api, "SCORING_SHARE", 0.0)  # the scoring deadline: at once
    res = repair(p, CandidateSet.from_array(p, X0), cs, time_limit=0.5, workers=1,
                 method="greedy")
    audit = res.audit
    assert len(audit) == 9 and audit.unscored() == 8 and res.stats["unscored"] == 8
    assert list(audit.method[1:]) == ["unscored"] * 8
    assert np.isnan(audit.cost_before[1:]).all() and np.isnan(audit.cost_after[1:]).all()
    assert not audit.feasible[1:].any() and "8 of 9 candidates were not scored" in res.message
    # the answer comes from the one scored candidate; its cost is the evaluation's
    assert res.best.repaired_from == res.best.candidate_id == res.audit.candidate_id[0]
    ev = compile_constraints(p, cs).evaluate(res.best.x[None, :])
    assert res.best.feasible and res.best.cost == pytest.approx(float(ev.cost[0]), abs=1e-9)
    assert audit.cost_after[0] == pytest.approx(res.best.cost, abs=1e-9)
    rows = json.loads(json.dumps(res.to_dict(), allow_nan=False))["audit"]  # strict JSON
    assert rows[1]["method"] == "unscored" and rows[1]["cost"] is None


def test_scores_with_decisions_equal_the_evaluation():
    """Encodings lower to rows and count penalties (a quadratic change penalty)."""
    ds = [Decision(f"d{a}", enc_name, tuple(f"d{a}_{i}" for i in range(nb)), tuple(range(4)))
          for a, (enc_name, nb) in enumerate([("one_hot", 4), ("domain_wall", 3)] * 2)]
    labels = [lab for d in ds for lab in d.variables]
    rng = np.random.default_rng(11)
    p = Problem.from_terms({lab: float(rng.normal()) for lab in labels},
                           [(labels[i], labels[j], float(rng.normal()))
                            for i in range(len(labels)) for j in range(i + 1, len(labels))
                            if rng.random() < 0.3], labels=labels, decisions=ds)
    comp = compile_constraints(p, [enc.DecisionChangePenalty({"d0": 2, "d1": 1, "d3": 3},
                                                             shape="quadratic")])
    assert comp.counts and comp.rows
    X0 = rng.integers(0, 2, size=(40, p.n), dtype=np.int8)
    ev = comp.evaluate(X0)
    s = Scorer(comp, X0)
    assert np.allclose(s.cost, ev.cost, rtol=0, atol=1e-9)
    assert np.allclose(s.violation, ev.violation, rtol=0, atol=1e-9)
    A = X0 ^ (rng.random(X0.shape) < 0.1).astype(np.int8)
    cost, viol, _ = s.near(A, np.arange(len(A)))
    evA = comp.evaluate(A)
    assert np.allclose(cost, evA.cost, rtol=0, atol=1e-9)
    assert np.allclose(viol, evA.violation, rtol=0, atol=1e-9)


def _optimum(p: Problem, constraints) -> tuple[float, np.ndarray]:
    """Cheapest feasible late cost by dimod.ExactSolver over every assignment."""
    ss = dimod.ExactSolver().sample(p.to_bqm())
    X = p.from_caller(np.asarray(ss.record.sample)[:, [ss.variables.index(v) for v in p.labels]])
    ev = compile_constraints(p, constraints).evaluate(X)
    ok = ev.feasible
    return float(ev.cost[ok].min()), X[ok][ev.cost[ok] == ev.cost[ok].min()]


def test_a_proof_of_optimality_stops_the_search():
    p = sparse_problem(12, 21)
    rng = np.random.default_rng(22)
    X0 = rng.integers(0, 2, size=(3, p.n), dtype=np.int8)
    cs = [FixVariables({0: 1 - int(X0[0, 0])}),
          HammingPenalty({i: int(X0[0, i]) for i in range(p.n)}, weight=0.2),
          LinearConstraint({i: 1.0 for i in range(p.n)}, "<=", 5.0)]
    best, _ = _optimum(p, cs)
    res = repair(p, CandidateSet.from_array(p, X0), cs, time_limit=30.0, workers=1)
    assert res.status == "optimal"
    assert "optimal" in res.stats["stopped_early"]
    assert "local_rounds" not in res.stats  # nothing after the proof but the closing steps
    assert res.best.feasible and res.best.cost == pytest.approx(best, abs=1e-9)


def _readme_example():
    """The four-variable example of the README's file formats (problem, candidates,
    constraints), read through the documents as the CLI reads the files."""
    from flipfix.repair.documents import forms

    problem = forms.parse_problem({
        "vartype": "BINARY", "linear": {"a": -1.0, "b": -1.0, "c": 0.5, "0": 2.0},
        "quadratic": [["a", "b", 2.0], ["b", "c", -1.5], ["c", 0, 1.0]], "offset": 0.0})
    cands = forms.parse_candidates([
        {"id": "plan-1", "assignment": {"a": 1, "b": 0, "c": 1, "0": 0}},
        {"id": "plan-2", "assignment": {"a": 0, "b": 1, "c": 0, "0": 0}}], problem)
    cs = forms.parse_constraints([
        {"type": "hamming", "reference": {"a": 1, "b": 0, "c": 1, "0": 0}, "weight": 0.5,
         "shape": "linear", "variables": ["a", "b", "c"]},
        {"type": "hamming", "reference": {"a": 1, "b": 0}, "weight": 1.0, "shape": "threshold",
         "threshold": 1},
        {"type": "hamming", "reference": {"a": 1, "b": 0}, "weight": 1.0, "shape": "table",
         "table": [0, 1, 10]},
        {"type": "extra", "linear": {"c": 0.25}, "quadratic": [["a", "c", 1.0]], "offset": 0.0},
        {"type": "fix", "name": "machine down", "values": {"a": 0}},
        {"type": "linear", "terms": {"a": 1, "b": 1, "c": 1}, "sense": "<=", "rhs": 2},
        {"type": "forbid", "assignment": {"b": 1, "c": 1}}], problem)
    return problem, cands, cs


@pytest.mark.parametrize("workers", [1, 2])
@pytest.mark.parametrize("time_limit", [1.0, 5.0])
def test_the_readme_example_stops_at_the_proof(workers, time_limit, monkeypatch):
    """The default portfolio on the README's example: CP-SAT proves the answer optimal
    right after greedy and nothing else runs (the stop is recorded; no local search), on
    one or two workers, at the CLI's default budget and at 1 s (at 0.3 s too on a machine
    that is not overloaded: not asserted, CP-SAT's start alone may then take its share).
    The optimum by dimod.ExactSolver.
    CP-SAT's costs as a fresh process knows them (earlier tests' measurements aside)."""
    monkeypatch.setattr(pf, "CPSAT_COSTS", pf.CpsatCosts())
    problem, cands, cs = _readme_example()
    best, _ = _optimum(problem, cs)
    res = repair(problem, cands, cs, time_limit=time_limit, workers=workers)
    assert res.status == "optimal"
    assert "optimal" in res.stats["stopped_early"]
    assert "local_rounds" not in res.stats
    assert res.best.cost == pytest.approx(best, abs=1e-9)


def test_a_proof_of_infeasibility_stops_the_search():
    p = sparse_problem(10, 23)
    X0 = np.zeros((2, p.n), dtype=np.int8)
    cs = [LinearConstraint({0: 1.0, 1: 1.0, 2: 1.0}, ">=", 2.0),
          LinearConstraint({0: 1.0, 1: 1.0}, "<=", 0.0),
          LinearConstraint({2: 1.0, 3: 1.0}, "<=", 1.0)]
    res = repair(p, CandidateSet.from_array(p, X0), cs, time_limit=30.0, workers=1)
    assert res.status == "infeasible"
    assert "infeasible" in res.stats["stopped_early"]


# ------------------------------------------------------------------ distance from the plan
@pytest.mark.parametrize("spin", [False, True])
def test_plan_distance_counts_the_answer_against_the_reference(spin):
    p = sparse_problem(30, 31, spin=spin)
    rng = np.random.default_rng(32)
    X0 = rng.integers(0, 2, size=(6, p.n), dtype=np.int8)
    lo = -1 if spin else 0
    reference = {lab: int(rng.choice([lo, 1])) for lab in p.labels[:20]}  # a part of the plan
    cs = [FixVariables({p.labels[25]: lo}),
          HammingPenalty(reference, weight=0.1, variables=list(p.labels[:10]))]
    res = repair(p, CandidateSet.from_array(p, p.to_caller(X0)), cs, time_limit=0.5)
    a = res.best.assignment
    assert res.best.plan_distance == sum(a[lab] != v for lab, v in reference.items())
    assert res.to_dict()["best"]["plan_distance"] == res.best.plan_distance
    plain = repair(p, CandidateSet.from_array(p, p.to_caller(X0)), cs[:1], time_limit=0.2)
    assert plain.best.plan_distance is None and plain.to_dict()["best"]["plan_distance"] is None


def test_plan_distance_of_a_decision_change_penalty_counts_bits_of_the_plan():
    ds = [Decision("d0", "one_hot", ("a0", "a1", "a2"), ("x", "y", "z")),
          Decision("d1", "domain_wall", ("b0", "b1", "b2"), (1, 2, 3, 4))]
    labels = ["a0", "a1", "a2", "b0", "b1", "b2", "free"]
    rng = np.random.default_rng(33)
    p = Problem.from_terms({lab: float(rng.normal()) for lab in labels},
                           [("a0", "b1", 1.0), ("a2", "free", -2.0), ("b0", "b2", 0.5)],
                           labels=labels, decisions=ds)
    plan = {"d0": "y", "d1": 3}
    # the plan's bits by the encodings' definitions: one-hot y = 010; domain wall 3 = 110
    plan_bits = {"a0": 0, "a1": 1, "a2": 0, "b0": 1, "b1": 1, "b2": 0}
    idx, bits = plan_reference(compile_constraints(p, [enc.DecisionChangePenalty(plan)]))
    assert {p.labels[i]: int(b) for i, b in zip(idx, bits)} == plan_bits
    X0 = np.asarray([[1, 0, 0, 0, 0, 0, 1], [0, 0, 1, 1, 1, 1, 0]], dtype=np.int8)
    res = repair(p, CandidateSet.from_array(p, X0),
                 [enc.DecisionChangePenalty(plan, weight=0.1), enc.ForceValue("d0", "z")],
                 time_limit=0.5)
    a = res.best.assignment
    assert res.best.plan_distance == sum(a[lab] != b for lab, b in plan_bits.items())


# ------------------------------------------------------------------ lowering read at once
def test_lowering_read_at_once_matches_the_definitions_and_names_bad_entries():
    p = sparse_problem(20, 41, spin=True)
    ref = {i: (1 if i % 3 else -1) for i in range(20)}
    mixed = {np.int64(i) if i % 2 else i: v for i, v in ref.items()}  # numpy labels read too
    cs = [HammingPenalty(mixed, weight=0.5, name="near"),
          LinearConstraint({i: 1.0 for i in range(20)}, "<=", 3.0, name="row")]
    comp = compile_constraints(p, cs)
    S = np.random.default_rng(42).choice([-1, 1], size=(50, 20))  # caller (SPIN) values
    ev = comp.evaluate(p.from_caller(S))
    R = np.asarray([ref[i] for i in range(20)])
    assert np.allclose(ev.penalties["near"], 0.5 * (S != R).sum(axis=1))
    assert np.allclose(ev.violations["row"], np.maximum(0, S.sum(axis=1) - 3.0))
    with pytest.raises(InputError) as e:
        compile_constraints(p, [HammingPenalty({True: 1, 0: 1})])
    assert e.value.field.endswith("reference[True]")
    with pytest.raises(InputError) as e:
        compile_constraints(p, [HammingPenalty({**ref, 3: 0})])  # 0 is not a SPIN value
    assert e.value.field.endswith("reference[3]")
    with pytest.raises(InputError) as e:
        compile_constraints(p, [LinearConstraint({0: 1.0, 99: 1.0}, "<=", 1.0)])
    assert e.value.field.endswith("terms[99]")
