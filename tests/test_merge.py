"""Merging good answers region by region (flipfix.repair.solvers.merge, the regions kernel)
and its use after every annealing round of the portfolio's local search.

Outside references used (named again next to each check):
* dimod's BinaryQuadraticModel.energies recomputes every cost from the model's terms
  (plus the late penalties written out here from their definitions).
* The regions are checked against a breadth-first search over dimod's own adjacency
  (``bqm.adj``), and the merge of two states against brute force over every subset of
  their regions.
"""

from __future__ import annotations

import itertools
import threading
import time

import numpy as np
import pytest

from flipfix.repair import Decision, Problem
from flipfix.repair.kernels.bundles import late_arrays
from flipfix.repair.kernels.regions import regions
from flipfix.repair.kernels.scores import Scorer
from flipfix.repair.lowering.compiled import compile_constraints
from flipfix.repair.model.constraints import FixVariables, HammingPenalty, LinearConstraint
from flipfix.repair.solvers import portfolio as P
from flipfix.repair.solvers.anneal import swap_rows
from flipfix.repair.solvers.merge import merge, region_changes


def _grid(side: int, seed: int, *, decisions=()) -> Problem:
    """A side x side torus with random +-1 couplings and small integer fields (a sparse,
    glassy model whose good answers differ in separate places)."""
    rng = np.random.default_rng(seed)
    n = side * side
    lin = {i: float(rng.integers(-1, 2)) for i in range(n)}
    quad = []
    for r in range(side):
        for c in range(side):
            i = r * side + c
            for j in (r * side + (c + 1) % side, ((r + 1) % side) * side + c):
                quad.append((min(i, j), max(i, j), float(rng.choice([-2.0, 2.0]))))
    return Problem.from_terms(lin, quad, labels=range(n), decisions=list(decisions))


def _energies(p: Problem, X: np.ndarray) -> np.ndarray:
    return np.asarray(p.to_bqm().energies((X, list(p.labels))), dtype=float)  # dimod


def _components(p: Problem, x, y, fixed, groups=()) -> list[set]:
    """Connected parts of the free variables where x and y differ, by breadth-first search
    over dimod's adjacency, variables of one group (a one-hot decision) joined."""
    bqm = p.to_bqm()
    pos = {lab: i for i, lab in enumerate(p.labels)}
    diff = {i for i in range(p.n) if x[i] != y[i] and fixed[i] < 0}
    link = {i: {pos[v] for v in bqm.adj[p.labels[i]]} for i in diff}
    for g in groups:
        members = {pos[v] for v in g} & diff
        for i in members:
            link[i] |= members - {i}
    seen, parts = set(), []
    for s in sorted(diff):
        if s in seen:
            continue
        part, todo = {s}, [s]
        while todo:
            i = todo.pop()
            for j in link[i] & diff:
                if j not in part:
                    part.add(j)
                    todo.append(j)
        seen |= part
        parts.append(part)
    return parts


def _labels(comp, x, y):
    q = late_arrays(comp).qubo
    partner, rows = swap_rows(comp)
    return regions(q.indptr, q.indices, partner, rows, q.fixed, x, y)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_regions_are_the_connected_parts_of_the_differences(seed):
    p = _grid(8, seed, decisions=[Decision("d", "one_hot", (0, 27, 45, 63), "abcd")])
    comp = compile_constraints(p, [FixVariables({5: 1, 6: 0})])
    rng = np.random.default_rng(seed)
    x = rng.integers(0, 2, p.n).astype(np.int8)
    y = np.where(rng.random(p.n) < 0.3, 1 - x, x).astype(np.int8)
    label, count = _labels(comp, x, y)
    ref = _components(p, x, y, comp.fixed, groups=[(0, 27, 45, 63)])  # BFS on dimod's adj
    assert count == len(ref)
    assert {frozenset(np.flatnonzero(label == r).tolist()) for r in range(count)} == {
        frozenset(s) for s in ref}
    outside = (x == y) | (comp.fixed >= 0)
    assert (label[outside] == -1).all() and (label[~outside] >= 0).all()


def test_region_changes_are_exact_for_the_qubo_hamming_and_flip_price():
    p = _grid(10, 4)
    rng = np.random.default_rng(4)
    plan = {i: int(b) for i, b in enumerate(rng.integers(0, 2, p.n))}
    comp = compile_constraints(p, [HammingPenalty(plan, weight=0.3, name="keep")])
    x = rng.integers(0, 2, p.n).astype(np.int8)
    y = np.where(rng.random(p.n) < 0.2, 1 - x, x).astype(np.int8)
    origin = rng.integers(0, 2, p.n).astype(np.int8)
    label, count = _labels(comp, x, y)
    assert count >= 5
    change = region_changes(comp, x, y, label, count, price=0.7, origin=origin)
    ref_plan = np.array([plan[i] for i in range(p.n)])

    def objective(X):  # dimod's energies plus the penalty and the price, written out here
        return (_energies(p, X) + 0.3 * (X != ref_plan).sum(axis=1)
                + 0.7 * (X != origin).sum(axis=1))

    for r in range(count):
        t = x.copy()
        t[label == r] = y[label == r]
        assert change[r] == pytest.approx(objective(t[None])[0] - objective(x[None])[0],
                                          abs=1e-9)


@pytest.mark.parametrize("seed", [0, 3, 8])
def test_merging_two_answers_finds_the_best_mix_of_their_regions(seed):
    """On a QUBO, taking every region that helps is the best of all 2^c mixes of x and y
    (brute force over the subsets of regions, dimod's energies)."""
    p = _grid(7, seed)
    comp = compile_constraints(p, [])
    rng = np.random.default_rng(seed)
    x = rng.integers(0, 2, p.n).astype(np.int8)
    y = np.where(rng.random(p.n) < 0.15, 1 - x, x).astype(np.int8)
    label, count = _labels(comp, x, y)
    assert 2 <= count <= 14
    mixes = []
    for keep in itertools.product([0, 1], repeat=count):
        t = x.copy()
        for r in np.flatnonzero(keep):
            t[label == r] = y[label == r]
        mixes.append(t)
    best_mix = _energies(p, np.vstack(mixes)).min()
    score = lambda X: _energies(p, X)
    merged, s, taken = merge(comp, x, y[None, :], score=score)
    assert s == pytest.approx(_energies(p, merged[None])[0])
    assert s == pytest.approx(best_mix)
    assert ((merged == x) | (merged == y)).all()
    assert taken == len(set(label[merged != x].tolist()))


def test_merge_never_worsens_and_respects_rows_and_count_penalties():
    """With a cardinality row and a quadratic Hamming penalty the regions interact: the
    merged answer's score is the exact one (recomputed from the definitions), it is
    feasible, and no worse than the start."""
    p = _grid(8, 6)
    rng = np.random.default_rng(6)
    ref = {i: int(b) for i, b in enumerate(rng.integers(0, 2, p.n))}
    row = LinearConstraint({i: 1.0 for i in range(p.n)}, "<=", 30.0, name="cap")
    comp = compile_constraints(p, [row, HammingPenalty(ref, weight=0.5, shape="quadratic")])
    ref_bits = np.array([ref[i] for i in range(p.n)])

    def score(X):  # from the definitions: dimod's energies, the penalty, the row
        d = (X != ref_bits).sum(axis=1)
        return np.where(X.sum(axis=1) <= 30, _energies(p, X) + 0.5 * d * d, np.inf)

    for seed in range(5):
        r = np.random.default_rng(seed)
        x = np.zeros(p.n, dtype=np.int8)
        x[r.choice(p.n, 25, replace=False)] = 1
        donors = np.repeat(x[None], 4, axis=0)
        for d in donors:
            d[r.choice(p.n, 12, replace=False)] ^= 1
        merged, s, taken = merge(comp, x, donors, score=score)
        assert s <= score(x[None])[0]
        assert s == score(merged[None])[0] and np.isfinite(s)
        assert (taken > 0) == (s < score(x[None])[0])


def test_the_local_search_merges_a_better_region_into_the_best_answer():
    """_merge_answers: a donor that beats the best current answer in one 2x2 block gives it
    that block (then a greedy pass): the answer stays its candidate's, and its cost,
    dimod's, is at most the donor's."""
    p = _grid(8, 2)
    comp = compile_constraints(p, [])
    X0 = np.random.default_rng(2).integers(0, 2, (3, p.n)).astype(np.int8)
    scorer = Scorer(comp, X0)
    cost, viol, flips = scorer.near(X0, np.arange(3))
    k = int(np.argmin(cost))
    best = X0[k]
    for corner in range(0, p.n, 2):  # the first block where another setting is better
        block = [corner, corner + 1, (corner + 8) % p.n, (corner + 9) % p.n]
        trials = np.repeat(best[None], 16, axis=0)
        trials[:, block] = np.array(list(itertools.product([0, 1], repeat=4)), dtype=np.int8)
        e = _energies(p, trials)
        if e.min() < _energies(p, best[None])[0] - 1e-9:
            donor = trials[int(np.argmin(e))]
            break
    obj = cost.copy()
    out = P.PlanOutcome(attempts=[])
    taken = P._merge_answers(comp, X0, P.Answers(np.arange(3), X0.copy()), obj, viol == 0.0,
                             flips, np.ones(3, bool), out, scorer, [donor], max_flips=None,
                             flip_price=0.0, deadline=time.perf_counter() + 10.0,
                             cancel=threading.Event())
    assert taken and out.stats["merged"] >= 1
    a = out.attempts[-1]
    assert a.k == k and a.method == "anneal"
    assert a.cost == pytest.approx(_energies(p, a.x[None])[0])  # dimod
    assert a.cost <= _energies(p, donor[None])[0] + 1e-9
    assert obj[k] == pytest.approx(a.cost)
