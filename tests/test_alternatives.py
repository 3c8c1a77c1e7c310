"""Alternatives: feasible, pairwise at least d apart, cheapest first; when fewer than k
come back, no feasible assignment is d away from all of them.

Reference: brute force, every assignment enumerated by dimod's ExactSolver, costs and
feasibility from ``Compiled.evaluate`` over all of them.
"""

from __future__ import annotations

import itertools

import dimod
import numpy as np
import pytest

from flipfix.repair import CandidateSet, Problem, repair
from flipfix.repair.errors import InputError
from flipfix.repair.lowering.compiled import compile_constraints
from flipfix.repair.model.constraints import ForbidValues, LinearConstraint
from flipfix.repair.model.encodings import decode_indices
from flipfix.repair.solvers.alternatives import pick_alternatives

from tests.roster import roster


def _all_states(problem: Problem) -> np.ndarray:
    bqm = dimod.BinaryQuadraticModel({lab: 0.0 for lab in problem.labels}, {}, 0.0, "BINARY")
    ss = dimod.ExactSolver().sample(bqm)
    cols = [ss.variables.index(lab) for lab in problem.labels]
    return np.ascontiguousarray(ss.record.sample[:, cols], dtype=np.int8)


def _check(compiled, alts, k, d, codes_of, states):
    ev = compiled.evaluate(states)
    feasible = states[ev.feasible]
    assert 1 <= len(alts) <= k
    objs = [a.objective for a in alts]
    assert objs == sorted(objs)
    codes = [codes_of(a.x[None, :])[0] for a in alts]
    for a, c in zip(alts, codes):
        e = compiled.evaluate(a.x[None, :])
        assert e.feasible[0] and a.cost == pytest.approx(float(e.cost[0]))
    for (i, a), (j, b) in itertools.combinations(enumerate(codes), 2):
        assert (a != b).sum() >= d
    for j in range(1, len(alts)):
        assert alts[j].distance_to_previous == min((codes[j] != codes[i]).sum() for i in range(j))
    if len(alts) < k:  # CP-SAT proved that nothing else is d away from all of them
        F = codes_of(feasible)
        far = np.all([(F != c[None, :]).sum(axis=1) >= d for c in codes], axis=0)
        assert not far.any()
    # the first is the cheapest feasible assignment (brute force)
    assert alts[0].cost == pytest.approx(float(ev.cost[ev.feasible].min()))


def test_bits_exactly_two_of_six():
    rng = np.random.default_rng(2)
    labels = [f"x{i}" for i in range(6)]
    problem = Problem.from_terms({lab: float(rng.normal()) for lab in labels},
                                 [(a, b, float(rng.normal())) for a, b in itertools.combinations(labels, 2)])
    compiled = compile_constraints(problem, [LinearConstraint({lab: 1 for lab in labels}, "==", 2)])
    states = _all_states(problem)
    X0 = np.zeros((1, 6), np.int8)
    best = states[compiled.evaluate(states).feasible][np.argmin(
        compiled.evaluate(states).cost[compiled.evaluate(states).feasible])]
    for k, d in ((3, 1), (5, 4), (2, 3)):
        alts = pick_alternatives(compiled, X0, best[None, :], k=k, distance=d, time_limit=5.0)
        _check(compiled, alts, k, d, lambda X: np.asarray(X, np.int8), states)
    five = pick_alternatives(compiled, X0, best[None, :], k=5, distance=4, time_limit=5.0)
    assert len(five) == 3  # three disjoint pairs is the most two-of-six can hold


def test_decisions_through_repair():
    problem, _ = roster(nurses=3, seed=5)
    states = _all_states(problem)
    X = np.zeros((2, problem.n), np.int8)
    X[0, [3, 7, 11]] = 1
    X[1, [0, 5, 10]] = 1
    cons = [ForbidValues("n0", ["off"], name="n0 needed")]
    res = repair(problem, CandidateSet(("all off", "mixed"), X), cons, method="portfolio",
                 time_limit=3.0, alternatives=4, alternative_distance=2,
                 alternatives_by="decisions")
    compiled = compile_constraints(problem, cons)
    alts = res.alternatives
    assert alts[0].cost == pytest.approx(res.best.cost)
    _check(compiled, alts, 4, 2, lambda Y: decode_indices(problem, Y), states)
    d = res.to_dict()["alternatives"]
    assert [a["candidate_id"] for a in d] == [a.candidate_id for a in alts]
    assert all(a["candidate_id"] in ("all off", "mixed") for a in d)
    for a in alts:  # the source is the nearest candidate
        assert a.flips == (X != a.x[None, :]).sum(axis=1).min()
    with pytest.raises(InputError, match="alternatives"):
        repair(problem, CandidateSet(("a",), X[:1]), cons, alternatives=50)
    flat = Problem.from_terms({"a": 1.0}, [])
    with pytest.raises(InputError, match="alternatives_by"):
        repair(flat, CandidateSet(("a",), np.zeros((1, 1), np.int8)), [], alternatives=2,
               alternatives_by="decisions")
