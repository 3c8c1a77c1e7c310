"""Problem, candidates and constraint lowering, checked against dimod's own energies."""

import itertools
import subprocess
import sys

import dimod
import numpy as np
import pytest

from flipfix.repair import CandidateSet, InputError, Problem
from flipfix.repair.lowering.compiled import compile_constraints
from flipfix.repair.model.constraints import (
    ExtraTerms, FixVariables, ForbidAssignment, HammingPenalty, LinearConstraint,
)


def test_importing_the_core_loads_neither_grpc_nor_protobuf():
    code = (
        "import sys, numpy as np, flipfix.repair, flipfix.repair.api, flipfix.repair.solvers.greedy, flipfix.repair.lowering.compiled\n"
        "from flipfix.repair import Problem, CandidateSet, repair as run\n"
        "p = Problem.from_terms({'a': 1.0, 'b': -1.0}, [('a', 'b', 2.0)])\n"
        "c = CandidateSet.from_array(p, [[1, 1]])\n"
        "r = run(p, c, [], method='greedy', time_limit=1)\n"
        "bad = [m for m in sys.modules if m.startswith(('grpc', 'google.protobuf'))]\n"
        "assert not bad, bad\n"
        "run(p, c, [], method='cpsat', time_limit=0.2)\n"
        "assert not [m for m in sys.modules if m.startswith('grpc')]\n"
    )
    subprocess.run([sys.executable, "-c", code], check=True, cwd=str(__import__("conftest").ROOT))


@pytest.mark.parametrize("vartype", ["BINARY", "SPIN"])
def test_energies_match_dimod(vartype):
    # reference: dimod.BinaryQuadraticModel.energies
    bqm = dimod.generators.gnp_random_bqm(9, 0.5, vartype, random_state=3)
    bqm.offset = 1.25
    p = Problem.from_bqm(bqm)
    X = np.array(list(itertools.product([0, 1], repeat=9)), dtype=np.int8)
    values = p.to_caller(X)
    expected = bqm.energies((values, list(p.labels)))
    assert np.allclose(p.energies(X), expected)
    assert np.allclose(p.to_bqm().energies((values, list(p.labels))), expected)


def test_flip_costs_equal_energy_differences():
    bqm = dimod.generators.gnp_random_bqm(11, 0.4, "BINARY", random_state=5)
    p = Problem.from_bqm(bqm)
    X = np.random.default_rng(0).integers(0, 2, (6, 11)).astype(np.int8)
    fc = p.flip_costs(X)
    for k in range(6):
        for i in range(11):
            Y = X[k].copy()
            Y[i] ^= 1
            assert fc[k, i] == pytest.approx(p.energies(Y)[0] - p.energies(X[k])[0])


def test_from_matrix_counts_both_triangles():
    Q = np.array([[1.0, 2.0], [3.0, -4.0]])
    p = Problem.from_matrix(Q)
    assert p.energies(np.array([[1, 1]], dtype=np.int8))[0] == pytest.approx(1 + 2 + 3 - 4)


@pytest.mark.parametrize("build, field", [
    (lambda: Problem.from_terms({"a": float("nan")}, []), "linear['a']"),
    (lambda: Problem.from_terms({"a": 1.0}, [("a", "a", 1.0)]), "quadratic[0]"),
    (lambda: Problem.from_terms({"a": 1.0}, [("a", "b", float("inf"))]), "quadratic[0]"),
    (lambda: Problem.from_terms({"a": 1.0}, [], labels=["a", "a"]), "labels[1]"),
    (lambda: Problem.from_terms({"a": 1.0, "z": 2.0}, [], labels=["a"]), "linear['z']"),
    (lambda: Problem.from_terms({"a": 1.0}, [], vartype="TERNARY"), "vartype"),
    (lambda: Problem.from_terms({1.5: 1.0}, []), "linear[1.5]"),
])
def test_bad_problems_name_the_field(build, field):
    with pytest.raises(InputError) as err:
        build()
    assert err.value.field == field


def test_candidates_from_mappings_sampleset_and_errors():
    p = Problem.from_terms({"a": 1.0, "b": -1.0}, [("a", "b", 2.0)], vartype="SPIN")
    c = CandidateSet.from_mappings(p, [{"id": "x", "assignment": {"a": 1, "b": -1}}])
    assert c.X.tolist() == [[1, 0]] and c.ids == ("x",)
    ss = dimod.SampleSet.from_samples([{"a": -1, "b": 1}, {"a": 1, "b": 1}], "SPIN", [0, 0])
    c2 = CandidateSet.from_sampleset(p, ss)
    assert c2.X.tolist() == [[0, 1], [1, 1]]
    with pytest.raises(InputError, match=r"candidates\[0\].assignment\['a'\]"):
        CandidateSet.from_mappings(p, [{"id": "x", "assignment": {"a": 0, "b": 1}}])
    with pytest.raises(InputError, match="misses variable 'b'"):
        CandidateSet.from_mappings(p, [{"id": "x", "assignment": {"a": 1}}])
    with pytest.raises(InputError, match="duplicate candidate id"):
        CandidateSet.from_array(p, [[1, 1], [1, -1]], ids=["q", "q"])
    with pytest.raises(InputError, match=r"shape \(K, 2\)"):
        CandidateSet.from_array(p, [[1, 1, 1]])


@pytest.mark.parametrize("vartype", ["BINARY", "SPIN"])
def test_cost_split_equals_independent_recomputation(vartype):
    rng = np.random.default_rng(7)
    bqm = dimod.generators.gnp_random_bqm(8, 0.5, vartype, random_state=8)
    p = Problem.from_bqm(bqm)
    lo_v = -1 if vartype == "SPIN" else 0
    ref = {v: int(rng.choice([lo_v, 1])) for v in bqm.variables}
    table = [0.0, 0.5, 4.0, 4.5]
    cs = [
        HammingPenalty(ref, weight=2.0, shape="quadratic"),
        HammingPenalty(ref, weight=1.0, shape="table", table=table, variables=[0, 1, 2, 3]),
        HammingPenalty(ref, weight=3.0, shape="threshold", threshold=2),
        ExtraTerms({0: 1.5}, [(0, 1, -2.0)], offset=0.5),
        LinearConstraint({0: 1, 1: 2, 2: 1}, "<=", 1),
        ForbidAssignment({3: 1, 4: lo_v}),
        FixVariables({5: 1}),
    ]
    c = compile_constraints(p, cs)
    X = np.array(list(itertools.product([0, 1], repeat=8)), dtype=np.int8)
    ev = c.evaluate(X)
    S = p.to_caller(X)
    d = (S != np.array([ref[v] for v in p.labels])).sum(1)
    d4 = (S[:, :4] != np.array([ref[v] for v in range(4)])).sum(1)
    base = bqm.energies((S, list(p.labels)))
    expected = {
        "hamming": 2.0 * d**2,
        "hamming#2": np.asarray(table + [table[-1]])[d4],
        "hamming#3": 3.0 * np.maximum(0, d - 2),
        "extra": 1.5 * S[:, 0] - 2.0 * S[:, 0] * S[:, 1] + 0.5,
    }
    assert np.allclose(ev.base, base)
    for name, val in expected.items():
        assert np.allclose(ev.penalties[name], val), name
    assert np.allclose(ev.cost, base + sum(expected.values()))
    feasible = (S[:, 0] + 2 * S[:, 1] + S[:, 2] <= 1) & ~((S[:, 3] == 1) & (S[:, 4] == lo_v)) & (S[:, 5] == 1)
    assert (ev.feasible == feasible).all()
    # the merged search objective (QUBO + non-linear counts) is the same function
    search = c.objective_model.energies(X) + sum(s.table[c.count_values(s, X)] for s in c.counts)
    assert np.allclose(search, ev.cost)


@pytest.mark.parametrize("constraint, field", [
    (HammingPenalty({"q": 1}), "constraints[0].reference['q']"),
    (HammingPenalty({0: 2}), "constraints[0].reference[0]"),
    (HammingPenalty({0: 1}, shape="table"), "constraints[0].table"),
    (LinearConstraint({0: float("nan")}, "<=", 1), "constraints[0].terms[0]"),
    (ForbidAssignment({}), "constraints[0].assignment"),
    (ExtraTerms({}, [(0, 0, 1.0)]), "constraints[0].quadratic[0]"),
])
def test_bad_constraints_name_the_field(constraint, field):
    p = Problem.from_terms({0: 1.0, 1: 1.0}, [(0, 1, 1.0)])
    with pytest.raises(InputError) as err:
        compile_constraints(p, [constraint])
    assert err.value.field == field


def test_constraint_dataclasses_reject_bad_options():
    with pytest.raises(InputError, match="shape"):
        HammingPenalty({0: 1}, shape="cubic")
    with pytest.raises(InputError, match="weight"):
        HammingPenalty({0: 1}, weight=-1)
    with pytest.raises(InputError, match="sense"):
        LinearConstraint({0: 1}, "<", 1)
