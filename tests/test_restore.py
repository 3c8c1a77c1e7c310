"""Greedy's feasibility restore (tournament trees keyed per violated row) and the kernels'
stop flag.

References: dimod's ExactSolver enumerates every assignment of the small models (the
feasible set within the radius, its exact optimum, and the energy of the answer through
dimod's own BQM); ``Compiled.evaluate`` (plain numpy) recomputes every reported cost.
"""

from __future__ import annotations

import threading

import dimod
import numpy as np
import pytest

from flipfix.repair.cancel import CancelToken
from flipfix.repair.lowering.compiled import compile_constraints
from flipfix.repair.model.constraints import FixVariables, HammingPenalty, LinearConstraint
from flipfix.repair.model.problem import Problem
from flipfix.repair.solvers.greedy import greedy_repair, warm_up


def _model(n: int, seed: int) -> Problem:
    rng = np.random.default_rng(seed)
    linear = {i: float(rng.integers(-9, 10)) for i in range(n)}
    quad = {}
    for _ in range(2 * n):
        i, j = sorted(int(v) for v in rng.choice(n, 2, replace=False))
        quad[(i, j)] = float(rng.integers(-6, 7))
    return Problem.from_terms(linear, [(i, j, w) for (i, j), w in quad.items()])


def _rows_and_pins(n: int, seed: int):
    """Disjoint unit-coefficient rows (<=, >=, ==) over a shuffle of the variables, a
    linear or quadratic Hamming penalty, and two fixings."""
    rng = np.random.default_rng(seed + 7)
    perm = rng.permutation(n)
    cs, start = [], 0
    for r, sense in enumerate(("<=", ">=", "==")):
        idx = perm[start:start + 3]
        start += 3
        rhs = {"<=": 0.0, ">=": 3.0, "==": 1.0}[sense]
        cs.append(LinearConstraint({int(i): 1.0 for i in idx}, sense, rhs, name=f"r{r}"))
    ref = {i: int(b) for i, b in enumerate(rng.integers(0, 2, n))}
    shape = "linear" if seed % 2 else "quadratic"
    cs.append(HammingPenalty(ref, weight=1.5, shape=shape, name="near"))
    free = perm[start:]
    cs.append(FixVariables({int(free[0]): 1, int(free[1]): 0}, name="pins"))
    return cs


def _late_bqm(problem: Problem, compiled) -> tuple[dimod.BinaryQuadraticModel, np.ndarray]:
    """dimod's enumeration of every assignment: (the problem's BQM, samples int8 (2^n, n)
    in label order)."""
    bqm = dimod.BinaryQuadraticModel(
        {i: float(problem.linear[i]) for i in range(problem.n)},
        {(i, int(problem.indices[p])): float(problem.data[p])
         for i in range(problem.n) for p in range(problem.indptr[i], problem.indptr[i + 1])
         if int(problem.indices[p]) > i},
        0.0, dimod.BINARY)
    ss = dimod.ExactSolver().sample(bqm)
    return bqm, ss.record.sample[:, [ss.variables.index(i) for i in range(problem.n)]].astype(
        np.int8)


@pytest.mark.parametrize("seed", range(6))
@pytest.mark.parametrize("radius", [None, 6])
def test_restore_feasible_whenever_brute_force_finds_a_point_within_the_radius(seed, radius):
    n = 12
    problem = _model(n, seed)
    compiled = compile_constraints(problem, _rows_and_pins(n, seed))
    bqm, allx = _late_bqm(problem, compiled)
    ev_all = compiled.evaluate(allx)
    rng = np.random.default_rng(seed + 100)
    X0 = rng.integers(0, 2, size=(8, n)).astype(np.int8)
    g = greedy_repair(compiled, X0, max_flips=radius)
    assert g.done.all()
    ev = compiled.evaluate(g.X)
    # the reported cost is the QUBO energy by dimod plus the soft penalty by numpy
    base = np.array([bqm.energy({i: int(v) for i, v in enumerate(x)}) for x in g.X])
    np.testing.assert_allclose(ev.base, base)
    for k in range(X0.shape[0]):
        inside = (allx != X0[k]).sum(axis=1) <= (n if radius is None else radius)
        ok = inside & (ev_all.violation == 0.0)
        if ok.any():
            assert ev.violation[k] == 0.0, (seed, radius, k)
            assert (g.X[k] != X0[k]).sum() <= (n if radius is None else radius)
            # never below the exact optimum of the feasible points within the radius
            assert ev.cost[k] >= ev_all.cost[ok].min() - 1e-9


def test_wide_cardinality_row_is_restored_in_one_flip_per_unit():
    """A row over every variable far above its bound: the restore takes exactly the
    excess in flips (each removes one unit; the trees re-key only neighbours), and the
    answer is feasible and a local minimum under feasible single flips (numpy check)."""
    n = 3000
    rng = np.random.default_rng(3)
    problem = _model(n, 3)
    x0 = rng.integers(0, 2, size=n).astype(np.int8)
    cap = int(0.8 * x0.sum())
    compiled = compile_constraints(problem, [
        LinearConstraint({i: 1.0 for i in range(n)}, "<=", float(cap), name="card")])
    g = greedy_repair(compiled, x0[None, :])
    x = g.X[0]
    assert x.sum() <= cap
    ev = compiled.evaluate(g.X)
    assert ev.violation[0] == 0.0
    # every feasible single flip from the answer costs at least as much (numpy energies)
    flips = np.repeat(x[None, :], n, axis=0)
    flips[np.arange(n), np.arange(n)] ^= 1
    ok = flips.sum(axis=1) <= cap
    e = compiled.evaluate(flips[ok]).cost
    assert (e >= ev.cost[0] - 1e-9).all()


def _slow_case():
    """One candidate whose repair takes long (a 20,000-variable model, a cardinality row
    ~1,200 flips off, then a long descent at the bound)."""
    from bench.budget import late_event, library, sparse_model
    problem = sparse_model(20000)
    lib = library(problem, 6)  # the last one's descent takes seconds (pair moves at the bound)
    return compile_constraints(problem, late_event(problem, lib[0], "fix+ham+card")), lib[5:]


def test_cancel_ends_a_running_kernel_and_keeps_only_a_feasible_cut_state():
    """A cancel set while the kernel runs ends the call before the candidate's descent
    finishes (done False); the row returned is either the candidate unchanged or, when
    the restore had finished, a feasible state flagged ``partial`` (numpy check)."""
    compiled, X0 = _slow_case()
    warm_up()  # the cached kernels are loaded before the timer starts
    token = CancelToken()
    started = threading.Event()

    def progress(done, total):  # not reached before the cancel: one chunk only
        started.set()

    timer = threading.Timer(0.02, token.set)
    timer.start()
    g = greedy_repair(compiled, X0, cancel=token, progress=progress)
    timer.join()
    assert token.is_set()
    assert not g.done[0]
    if g.partial[0]:
        assert compiled.evaluate(g.X).violation[0] == 0.0
    else:
        assert (g.X[0] == X0[0]).all()
