"""Randomised checks of the core's contracts (seeded, so a failure reproduces).

* every repair of a random small model under random late constraints keeps its promises,
  checked against exhaustive enumeration of all 2^n assignments (the reference);
* every mutation of valid JSON documents is either accepted or rejected with an InputError
  (a field-named error), never another exception.
"""

import copy
import itertools
import random

import dimod
import numpy as np
import pytest

from flipfix.repair import CandidateSet, InputError, Problem, repair
from flipfix.repair.lowering.compiled import compile_constraints
from flipfix.repair.model.constraints import (
    ExtraTerms, FixVariables, ForbidAssignment, HammingPenalty, LinearConstraint,
)
from flipfix.repair.documents.forms import parse_candidates, parse_constraints, parse_problem


def random_constraints(rng, p: Problem):
    lo = -1 if p.vartype == "SPIN" else 0
    val = lambda: int(rng.choice([lo, 1]))  # noqa: E731
    labs, n = list(p.labels), p.n
    cs = []
    for _ in range(int(rng.integers(0, 4))):
        kind = int(rng.integers(0, 5))
        sub = [labs[i] for i in rng.choice(n, size=int(rng.integers(1, n + 1)), replace=False)]
        if kind == 0:
            cs.append(HammingPenalty({v: val() for v in sub}, weight=float(rng.uniform(0, 2)),
                                     shape=["linear", "quadratic", "threshold", "table"][int(rng.integers(4))],
                                     threshold=1, table=[0, 1, 5]))
        elif kind == 1:
            cs.append(FixVariables({sub[0]: val()}))
        elif kind == 2:
            cs.append(LinearConstraint({v: float(rng.integers(-2, 3)) or 1.0 for v in sub},
                                       ["<=", "==", ">="][int(rng.integers(3))], float(rng.integers(-2, 3))))
        elif kind == 3:
            cs.append(ForbidAssignment({v: val() for v in sub[:2]}))
        else:
            cs.append(ExtraTerms({sub[0]: float(rng.normal())}, []))
    return cs


@pytest.mark.parametrize("seed", range(36))
def test_random_repairs_keep_their_promises(seed):
    rng = np.random.default_rng(seed)
    n = int(rng.integers(1, 9))
    vartype = ["BINARY", "SPIN"][seed % 2]
    p = Problem.from_bqm(dimod.generators.gnp_random_bqm(n, 0.6, vartype, random_state=seed))
    cs = random_constraints(rng, p)
    K = int(rng.integers(1, 4))
    cands = CandidateSet.from_array(p, p.to_caller(rng.integers(0, 2, (K, n)).astype(np.int8)))
    method = ["greedy", "cpsat", "portfolio"][seed % 3]
    max_flips = None if rng.random() < 0.6 else int(rng.integers(0, n + 1))
    price = 0.0 if rng.random() < 0.6 else float(rng.uniform(0, 2))
    res = repair(p, cands, cs, method=method, time_limit=0.5, max_flips=max_flips,
                 flip_price=price, seed=seed)
    comp = compile_constraints(p, cs)
    X = np.array(list(itertools.product([0, 1], repeat=n)), dtype=np.int8)
    ev = comp.evaluate(X)  # every assignment: the reference
    b = res.best
    assert b.cost == pytest.approx(float(comp.evaluate(b.x).cost[0]))
    k = cands.ids.index(b.candidate_id)
    assert b.flips == int((cands.X[k] != b.x).sum())
    assert b.flips == int((cands.X != b.x).sum(axis=1).min())  # reported against the nearest
    if max_flips is not None:
        assert all(row.flips <= max_flips for row in res.audit if row.feasible)
    if b.feasible:
        assert bool(comp.evaluate(b.x).feasible[0])
    if res.status == "optimal" and max_flips is None and price == 0.0:
        assert b.cost == pytest.approx(float(ev.cost[ev.feasible].min()))
    if res.status == "infeasible":
        assert not ev.feasible.any()
    assert len(res.audit) == K


PROBLEM = {"vartype": "BINARY", "linear": {"a": 1.0, "b": -1.0, "c": 0.5},
           "quadratic": [["a", "b", 2.0], ["b", "c", -1.0]], "offset": 0.0,
           "decisions": [{"name": "d", "encoding": "one_hot", "variables": ["a", "b", "c"],
                          "values": [1, 2, 3]}]}
CANDIDATES = [{"id": "p1", "assignment": {"a": 1, "b": 0, "c": 0}},
              {"id": "p2", "assignment": {"a": 0, "b": 1, "c": 0}}]
CONSTRAINTS = [
    {"type": "hamming", "reference": {"a": 1, "b": 0, "c": 0}, "weight": 1.0, "shape": "table",
     "table": [0, 1, 3]},
    {"type": "linear", "terms": {"a": 1, "b": 1}, "sense": "<=", "rhs": 1},
    {"type": "fix", "values": {"a": 1}},
    {"type": "forbid", "assignment": {"a": 1, "b": 1}},
    {"type": "extra", "linear": {"a": 1}, "quadratic": [["a", "c", 1]]},
    {"type": "forbid_values", "decision": "d", "values": [2]},
    {"type": "decision_change", "reference": {"d": 1}, "weight": 2, "shape": "quadratic",
     "distance": "absolute"},
]
JUNK = [None, True, -1, 0, 1.5, float("nan"), float("inf"), "", "x", [], {}, [1, 2], {"a": 1},
        10**20, "BINARY"]


def mutate(doc, rnd: random.Random):
    doc = copy.deepcopy(doc)

    def walk(o):
        if isinstance(o, dict) and o:
            k = rnd.choice(list(o))
            r = rnd.random()
            if r < 0.3:
                o[k] = rnd.choice(JUNK)
            elif r < 0.4:
                del o[k]
            elif r < 0.5:
                o[rnd.choice(["zz", "type", "1"])] = rnd.choice(JUNK)
            else:
                walk(o[k])
        elif isinstance(o, list) and o:
            i = rnd.randrange(len(o))
            r = rnd.random()
            if r < 0.3:
                o[i] = rnd.choice(JUNK)
            elif r < 0.4:
                o.pop(i)
            else:
                walk(o[i])

    walk(doc)
    return doc


@pytest.mark.parametrize("which", ["problem", "candidates", "constraints"])
def test_mutated_documents_raise_only_field_named_errors(which):
    rnd = random.Random(which)
    for _ in range(700):
        try:
            p = parse_problem(mutate(PROBLEM, rnd) if which == "problem" else PROBLEM)
            parse_candidates(mutate(CANDIDATES, rnd) if which == "candidates" else CANDIDATES, p)
            cs = parse_constraints(mutate(CONSTRAINTS, rnd) if which == "constraints" else CONSTRAINTS, p)
            compile_constraints(p, cs)
        except InputError as err:
            assert err.field  # every rejection names a field
