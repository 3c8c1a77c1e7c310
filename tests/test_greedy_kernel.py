"""The greedy kernels on models large enough for their fast structures to matter.

Under late rows and count penalties longer than ``flipfix.repair.solvers.greedy.WIDE`` the kernel picks
flips from per-group tournament trees; these tests check its answers against an
independent evaluation (``Compiled.evaluate``, plain numpy) and against the plain scan
over free variables that the kernel falls back to, on integer-coefficient models so
that ties break the same way in both.
"""

from __future__ import annotations

import numpy as np
import pytest

from flipfix.repair.solvers import greedy
from flipfix.repair.lowering.compiled import compile_constraints
from flipfix.repair.model.constraints import FixVariables, HammingPenalty, LinearConstraint
from flipfix.repair.solvers.greedy import descend_qubo, greedy_repair
from flipfix.repair.model.problem import Problem


def _model(n: int, seed: int) -> Problem:
    """Random sparse QUBO with integer coefficients (about 6 neighbours per variable)."""
    rng = np.random.default_rng(seed)
    linear = {i: float(rng.integers(-20, 21)) for i in range(n)}
    quad = {}
    for _ in range(3 * n):
        i, j = rng.choice(n, 2, replace=False)
        quad[(int(min(i, j)), int(max(i, j)))] = float(rng.integers(-10, 11))
    return Problem.from_terms(linear, [(i, j, w) for (i, j), w in quad.items()])


def _constraints(n: int, seed: int, kind: str):
    rng = np.random.default_rng(seed + 1)
    cs = []
    if kind in ("row", "mixed"):  # a wide capacity row with unit and weighted parts
        coef = {i: float(rng.integers(1, 4)) for i in range(n)}
        cs.append(LinearConstraint(coef, "<=", float(sum(coef.values()) // 3), name="cap"))
    if kind in ("penalty", "mixed"):  # a wide threshold Hamming penalty
        ref = {i: int(b) for i, b in enumerate(rng.integers(0, 2, n))}
        cs.append(HammingPenalty(ref, weight=7.0, shape="threshold", threshold=n // 4))
    if kind == "many":  # more wide rows than flipfix.repair.solvers.greedy.MAX_WIDE: the kernel scans
        for r in range(20):
            idx = rng.choice(n, 70, replace=False)
            cs.append(LinearConstraint({int(i): 1.0 for i in idx}, "<=", 30.0, name=f"w{r}"))
    if kind == "mixed":  # narrow rows, a narrow count penalty and fixings too
        for r in range(5):
            idx = rng.choice(n, 6, replace=False)
            cs.append(LinearConstraint({int(i): 1.0 for i in idx}, "<=", 2.0, name=f"r{r}"))
        idx = rng.choice(n, 10, replace=False)
        cs.append(HammingPenalty({int(i): int(rng.integers(2)) for i in idx}, weight=60.0,
                                 shape="quadratic", name="narrow"))
        pinned = rng.choice(n, 4, replace=False)
        cs.append(FixVariables({int(i): int(rng.integers(2)) for i in pinned}))
    return cs


def _objective(comp, X, X0, price):
    ev = comp.evaluate(X)
    return ev, ev.cost + price * (X != X0).sum(axis=1)


@pytest.mark.parametrize("kind", ["row", "penalty", "mixed", "many"])
@pytest.mark.parametrize("max_flips,price", [(None, 0.0), (40, 0.0), (None, 1.5)])
def test_grouped_answers_are_feasible_single_flip_local_minima(kind, max_flips, price):
    n, seed = 160, 3
    p = _model(n, seed)
    comp = compile_constraints(p, _constraints(n, seed, kind))
    rng = np.random.default_rng(seed + 2)
    X0 = rng.integers(0, 2, (6, n)).astype(np.int8)
    g = greedy_repair(comp, X0, max_flips=max_flips, flip_price=price)
    ev, obj = _objective(comp, g.X, X0, price)
    free = np.flatnonzero(comp.fixed < 0)
    for k in range(X0.shape[0]):
        if not ev.feasible[k]:
            continue  # feasibility restore may get stuck; that answer is marked infeasible
        assert max_flips is None or (g.X[k] != X0[k]).sum() <= max_flips
        moves = np.repeat(g.X[k][None], free.size, axis=0)
        moves[np.arange(free.size), free] ^= 1
        evm, objm = _objective(comp, moves, np.repeat(X0[k][None], free.size, axis=0), price)
        ok = evm.feasible.copy()
        if max_flips is not None:
            ok &= (moves != X0[k]).sum(axis=1) <= max_flips
        # independent check (numpy evaluation): no feasible single flip improves
        assert (objm[ok] >= obj[k] - 1e-6).all()
    assert ev.feasible.sum() >= 4


@pytest.mark.parametrize("kind", ["row", "penalty", "mixed"])
@pytest.mark.parametrize("max_flips", [None, 40])
def test_grouped_trees_take_the_same_steps_as_the_plain_scan(kind, max_flips, monkeypatch):
    n, seed = 160, 5
    p = _model(n, seed)
    comp = compile_constraints(p, _constraints(n, seed, kind))
    X0 = np.random.default_rng(seed).integers(0, 2, (5, n)).astype(np.int8)
    lay = greedy.general_arrays(comp).layout
    par = 1 if max_flips is None else 2
    assert 2 <= lay.groups * par <= greedy.MAX_GROUP_SHARE * n  # the grouped path runs
    grouped = greedy_repair(comp, X0, max_flips=max_flips)
    monkeypatch.setattr(greedy.layout, "MAX_GROUP_SHARE", -1.0)  # force the scan
    monkeypatch.setattr(greedy.layout, "MIN_GROUPS", -1)
    assert not greedy.layout.groups_pay(lay.groups * par, n)
    scan = greedy_repair(comp, X0, max_flips=max_flips)
    np.testing.assert_array_equal(grouped.X, scan.X)
    np.testing.assert_array_equal(grouped.steps, scan.steps)


def test_a_narrow_penalty_moves_variables_their_qubo_change_alone_would_not():
    # Worked out by hand: variable i costs h_i when set (h = 10, 11, 12 for 0, 1, 2 and
    # 10 for the rest, no couplings); a threshold Hamming penalty on 0, 1, 2 towards 1
    # ("narrow": three variables) costs 100 x max(0, d - 1) for d of them not at 1. So
    # the optimum sets exactly 0 and 1 (cost 21, penalty 0); from all-zeros steepest
    # descent sets 0 (-90), then 1 (-89). A wide row with slack (sum x <= n) puts the
    # kernel on its grouped trees, where a narrow member must enter its tree on its full
    # change (penalty included), not on its QUBO change, which alone never improves.
    n = 100
    h = {i: 10.0 for i in range(n)}
    h.update({1: 11.0, 2: 12.0})
    p = Problem.from_terms(h, [(0, 1, 0.0)])
    comp = compile_constraints(p, [
        LinearConstraint({i: 1.0 for i in range(n)}, "<=", float(n), name="slack"),
        HammingPenalty({0: 1, 1: 1, 2: 1}, weight=100.0, shape="threshold", threshold=1,
                       name="narrow")])
    assert len(comp.counts) == 1  # a count penalty, not folded into the QUBO
    lay = greedy.general_arrays(comp).layout
    assert 2 <= lay.groups <= greedy.MAX_GROUP_SHARE * n  # the grouped path runs
    X0 = np.zeros((3, n), dtype=np.int8)
    X0[1, 50:] = 1
    X0[2, 1] = 1
    g = greedy_repair(comp, X0)
    optimum = np.zeros(n, dtype=np.int8)
    optimum[:2] = 1
    np.testing.assert_array_equal(g.X, np.repeat(optimum[None], 3, axis=0))
    assert g.steps.tolist() == [2, 52, 1]


def test_fast_path_matches_a_plain_steepest_descent():
    # reference: textbook steepest descent by full re-evaluation (numpy), lowest index on ties
    n = 60
    p = _model(n, 11)
    rng = np.random.default_rng(11)
    X0 = rng.integers(0, 2, (8, n)).astype(np.int8)
    X, steps = descend_qubo(p.linear, p.indptr, p.indices, p.data, X0)
    for k in range(X0.shape[0]):
        x = X0[k].copy()
        taken = 0
        while True:
            moves = np.repeat(x[None], n, axis=0)
            moves[np.arange(n), np.arange(n)] ^= 1
            d = p.energies(moves) - p.energies(x[None])[0]
            i = int(np.argmin(d))
            if d[i] >= -1e-9:
                break
            x[i] ^= 1
            taken += 1
        np.testing.assert_array_equal(X[k], x)
        assert steps[k] == taken


@pytest.mark.parametrize("seed", range(6))
def test_answers_under_a_tight_weighted_row_admit_no_improving_swap(seed):
    # independent check (numpy evaluation of every swap): with the capacity row tight, no
    # feasible single flip and no feasible "one in, one out" swap lowers the cost; rows of
    # <= 32 variables try every swap, so a wrongly pruned pair would show up here
    n = 24
    rng = np.random.default_rng(seed)
    lin = {i: float(rng.integers(-40, -5)) for i in range(n)}
    quad = [(i, j, float(rng.integers(-6, 7))) for i in range(n) for j in range(i + 1, n)
            if rng.random() < 0.3]
    p = Problem.from_terms(lin, quad)
    w = {i: float(rng.integers(1, 20)) for i in range(n)}
    comp = compile_constraints(p, [LinearConstraint(w, "<=", float(sum(w.values()) * 0.35))])
    X0 = rng.integers(0, 2, (5, n)).astype(np.int8)
    g = greedy_repair(comp, X0)
    ev = comp.evaluate(g.X)
    assert ev.feasible.all()
    for k in range(X0.shape[0]):
        x = g.X[k]
        ones, zeros = np.flatnonzero(x == 1), np.flatnonzero(x == 0)
        moves = [x ^ np.eye(n, dtype=np.int8)[i] for i in range(n)]
        moves += [x ^ np.eye(n, dtype=np.int8)[i] ^ np.eye(n, dtype=np.int8)[j]
                  for i in zeros for j in ones]
        evm = comp.evaluate(np.vstack(moves))
        assert (evm.cost[evm.feasible] >= ev.cost[k] - 1e-9).all()


@pytest.mark.parametrize("kind", ["row", "penalty", "mixed", "many", "none"])
def test_a_candidate_descends_the_same_alone_and_in_any_batch(kind):
    # A candidate's start-up state (fields, term states, row activities) comes from the
    # batch's bitwise-majority anchor by the differing bits when it is near it, else anew;
    # both must give the state computed for the candidate alone (where it is the anchor),
    # so the steps and the answer cannot depend on the batch.
    n, seed = 160, 9
    p = _model(n, seed)
    comp = compile_constraints(p, [] if kind == "none" else _constraints(n, seed, kind))
    rng = np.random.default_rng(seed)
    base = rng.integers(0, 2, n).astype(np.int8)
    near = np.repeat(base[None], 6, axis=0)
    for row in near[1:]:  # a few bits from the majority: the anchor route
        row[rng.choice(n, 12, replace=False)] ^= 1
    far = (1 - base)[None].copy()  # far from the majority: computed anew
    far[0, rng.choice(n, 10, replace=False)] ^= 1
    X0 = np.concatenate([near, far, rng.integers(0, 2, (2, n)).astype(np.int8)])
    for max_flips, price in [(None, 0.0), (30, 1.5)]:
        batch = greedy_repair(comp, X0, max_flips=max_flips, flip_price=price)
        for k in range(X0.shape[0]):
            alone = greedy_repair(comp, X0[k:k + 1], max_flips=max_flips, flip_price=price)
            np.testing.assert_array_equal(batch.X[k], alone.X[0])
            assert batch.steps[k] == alone.steps[0]


@pytest.mark.parametrize("kind", ["row", "mixed", "none"])
def test_greedy_answers_do_not_depend_on_the_thread_count(kind):
    # the kernels release the GIL and greedy splits each chunk over `workers` threads; every
    # candidate's descent depends on that candidate alone, so the split must not show
    n, seed = 160, 11
    p = _model(n, seed)
    comp = compile_constraints(p, [] if kind == "none" else _constraints(n, seed, kind))
    X0 = np.random.default_rng(seed).integers(0, 2, (37, n)).astype(np.int8)
    one = greedy_repair(comp, X0, chunk=16)
    for workers in (2, 3):
        many = greedy_repair(comp, X0, chunk=16, workers=workers)
        np.testing.assert_array_equal(one.X, many.X)
        np.testing.assert_array_equal(one.steps, many.steps)
        assert many.done.all()


def test_every_input_layout_runs_the_one_compiled_kernel():
    # a read-only or Fortran-order batch, int32 CSR pointers or a read-only fixings array
    # is another array type to numba: each would compile the kernel again (seconds, inside
    # a request's budget) unless the driver normalises its inputs first
    n, seed = 60, 13
    p = _model(n, seed)
    rng = np.random.default_rng(seed)
    X0 = rng.integers(0, 2, (4, n)).astype(np.int8)
    frozen = X0.copy()
    frozen.flags.writeable = False
    fixed = np.full(n, -1, dtype=np.int8)
    fixed.flags.writeable = False
    comp = compile_constraints(p, _constraints(n, seed, "mixed"))
    plain = compile_constraints(p, [])
    for X in (X0, frozen, np.asfortranarray(X0)):
        greedy_repair(comp, X, origin=frozen, max_flips=20)
        greedy_repair(plain, X)
        descend_qubo(p.linear, p.indptr.astype(np.int32), p.indices, p.data, X, fixed=fixed)
    for kernel in (greedy.general.descend_general, greedy.qubo.descend_tree):
        assert len(kernel.signatures) == 1, kernel.signatures


@pytest.mark.parametrize("width", [0, 1, 2, 5])
def test_unique_rows_equal_numpys_unique_by_row(width):
    """The layout's row grouping against numpy's own ``unique(axis=0)`` (the reference)."""
    from flipfix.repair.solvers.greedy.layout import unique_rows

    rng = np.random.default_rng(width)
    base = rng.integers(-2, 3, size=(7, width)).astype(np.float64)
    M = base[rng.integers(0, 7, size=500)]
    uniq, inv = unique_rows(M)
    want, want_inv = np.unique(M, axis=0, return_inverse=True)
    assert np.array_equal(uniq, want) and np.array_equal(inv, want_inv.reshape(-1))
    assert np.array_equal(uniq[inv], M)
    neg = unique_rows(np.array([[0.0], [-0.0], [1.0]]))[1]
    assert neg[0] == neg[1] != neg[2]


def _chain_model(n: int = 40) -> Problem:
    return Problem.from_terms({i: float((-1) ** i) for i in range(n)},
                              [(i, i + 1, 2.0) for i in range(n - 1)], labels=range(n))


def test_clamp_fixings_sets_the_fixed_bits_only_where_that_alone_is_feasible():
    """Checked against the constraint definitions directly (fixed values, the row's sum)."""
    p = _chain_model()
    fix = FixVariables({0: 1, 5: 0, 9: 1})
    X = np.zeros((3, p.n), np.int8)
    X[1, 5] = 1
    X[2, :20] = 1
    O = X.copy()
    only_fixings = compile_constraints(p, [fix])
    Y = X.copy()
    ok = greedy.clamp_fixings(only_fixings, Y, O, np.arange(3), p.n)
    assert ok.all()
    assert (Y[:, [0, 5, 9]] == [1, 0, 1]).all()
    others = np.setdiff1d(np.arange(p.n), [0, 5, 9])
    np.testing.assert_array_equal(Y[:, others], X[:, others])
    # a row the clamp alone does not satisfy (at most 10 ones): that state is left alone
    cap = compile_constraints(p, [fix, LinearConstraint({i: 1.0 for i in range(p.n)}, "<=", 10)])
    Y = X.copy()
    ok = greedy.clamp_fixings(cap, Y, O, np.arange(3), p.n)
    np.testing.assert_array_equal(ok, [True, True, False])
    np.testing.assert_array_equal(Y[2], X[2])
    assert (Y[:2].sum(axis=1) <= 10).all()
    # the radius: row 0 needs two flips (x0, x9), row 1 three (x0, x5, x9)
    Y = X.copy()
    np.testing.assert_array_equal(greedy.clamp_fixings(only_fixings, Y, O, np.arange(2), 2),
                                  [True, False])
    np.testing.assert_array_equal(Y[1], X[1])


def test_clamp_fixings_settles_a_cardinality_row_by_its_cheapest_flips():
    """At most 10 ones, 20 set: with ``settle`` the 10 members whose single flip (1 -> 0)
    costs least at the clamped state are turned off (costs by Problem.flip_costs, the
    model's own formula, not the kernel); a row of unequal coefficients is left broken."""
    p = _chain_model()
    fix = FixVariables({0: 1, 5: 0, 9: 1})
    x = np.zeros((1, p.n), np.int8)
    x[0, :20] = 1
    cap = compile_constraints(p, [fix, LinearConstraint({i: 1.0 for i in range(p.n)}, "<=", 10)])
    Y = x.copy()
    assert greedy.clamp_fixings(cap, Y, x.copy(), np.arange(1), p.n, settle=True)[0]
    clamped = x.copy()
    clamped[0, [0, 5, 9]] = [1, 0, 1]
    costs = p.flip_costs(clamped)[0]
    ones = [i for i in range(p.n) if clamped[0, i] == 1 and i not in (0, 9)]
    want = sorted(ones, key=lambda i: (costs[i], i))[:int(clamped.sum()) - 10]
    expected = clamped.copy()
    expected[0, want] = 0
    np.testing.assert_array_equal(Y, expected)
    assert Y.sum() == 10 and (Y[0, [0, 5, 9]] == [1, 0, 1]).all()
    uneven = compile_constraints(p, [fix, LinearConstraint(
        {i: 1.0 + (i % 2) for i in range(p.n)}, "<=", 10)])
    Y = x.copy()
    assert not greedy.clamp_fixings(uneven, Y, x.copy(), np.arange(1), p.n, settle=True)[0]
    np.testing.assert_array_equal(Y, x)
