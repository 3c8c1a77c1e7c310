"""Annealing from start states (flipfix.repair.solvers.anneal) and its kernel.

Outside references used (named again next to each check):
* dimod.ExactSolver: brute force over every bit string of the base model; the late
  penalties and the hard part are recomputed here from the constraint definitions alone.
* Published best-known values of the shared instances (../shared/benchmarks/README.md):
  bqp50-1 = -2098 (reported optimal) and bqp250-1 = -45607 (OR-Library, negated).
"""

from __future__ import annotations

import math
import threading
import time

import dimod
import numba as nb
import numpy as np
import pytest

from flipfix.repair import Decision, InputError, Problem
from flipfix.repair.documents.instances import read_bqp
from flipfix.repair.kernels import metropolis as K
from flipfix.repair.kernels.bundles import late_arrays
from flipfix.repair.lowering.compiled import compile_constraints
from flipfix.repair.model.constraints import FixVariables, HammingPenalty, LinearConstraint
from flipfix.repair.solvers import anneal as A
from flipfix.repair.solvers.anneal import anneal, flip_scale
from flipfix.repair.solvers.greedy import greedy_repair


# ------------------------------------------------------------------ models
def _late_model(seed: int, factor: float = 1.0):
    """16 bits: a one-hot decision of 3 values (a0..a2), a domain-wall decision of 4 values
    (b0..b2), 10 plain bits (x0..x9); integer couplings; a weighted row, an "exactly 2 of 3"
    row, a threshold and a quadratic Hamming penalty, a fixing. ``factor`` multiplies the
    model and its soft penalties (not the hard part)."""
    rng = np.random.default_rng(seed)
    labels = [f"a{i}" for i in range(3)] + [f"b{i}" for i in range(3)] + [f"x{i}" for i in range(10)]
    lin = {lab: factor * float(rng.integers(-6, 7)) for lab in labels}
    quad = {}
    for _ in range(40):
        u, v = rng.choice(len(labels), 2, replace=False)
        quad[(labels[min(u, v)], labels[max(u, v)])] = factor * float(rng.integers(-5, 6))
    ds = [Decision("a", "one_hot", ("a0", "a1", "a2"), ("p", "q", "r")),
          Decision("b", "domain_wall", ("b0", "b1", "b2"), (0, 1, 2, 3))]
    p = Problem.from_terms(lin, [(u, v, w) for (u, v), w in quad.items()], labels=labels,
                           decisions=ds)
    ref = {f"x{i}": int(b) for i, b in enumerate(rng.integers(0, 2, 10))}
    cs = [
        LinearConstraint({f"x{i}": float(rng.integers(1, 4)) for i in range(6)}, "<=", 5.0,
                         name="cap"),
        LinearConstraint({"x6": 1.0, "x7": 1.0, "x8": 1.0}, "==", 2.0, name="two_of_three"),
        HammingPenalty(ref, weight=factor * 7.0, shape="threshold", threshold=3, name="thr"),
        HammingPenalty({"a1": 1, "b0": 0, "x2": 1, "x5": 0}, weight=factor * 3.0,
                       shape="quadratic", name="quad"),
        FixVariables({"x9": 1}, name="pin"),
    ]
    return p, cs


def _independent(p: Problem, cs, X: np.ndarray):
    """(cost float64 (K,), feasible bool (K,)) of X in p's label order, from the
    constraint definitions and the decisions' encoding rules alone."""
    col = {lab: X[:, i].astype(np.int64) for i, lab in enumerate(p.labels)}
    cost = np.asarray(p.to_bqm().energies((X, list(p.labels))), dtype=float)  # dimod
    ok = np.ones(X.shape[0], dtype=bool)
    for c in cs:
        if isinstance(c, HammingPenalty):
            d = sum((col[v] != r).astype(np.int64) for v, r in c.reference.items())
            f = {"quadratic": d * d, "threshold": np.maximum(0, d - c.threshold),
                 "linear": d}[c.shape]
            cost = cost + c.weight * f
        elif isinstance(c, LinearConstraint):
            act = sum(a * col[v] for v, a in c.terms.items())
            ok &= {"<=": act <= c.rhs + 1e-9, "==": np.abs(act - c.rhs) <= 1e-9,
                   ">=": act >= c.rhs - 1e-9}[c.sense]
        elif isinstance(c, FixVariables):
            for v, b in c.values.items():
                ok &= col[v] == b
    for d in p.decisions:  # one-hot: exactly one bit; domain wall: no 0 followed by a 1
        bits = [col[v] for v in d.variables]
        if d.encoding == "one_hot":
            ok &= sum(bits) == 1
        else:
            for u, v in zip(bits[:-1], bits[1:]):
                ok &= u >= v
    return cost, ok


def _every_string(p: Problem) -> np.ndarray:
    """Every bit string int8 (2^n, n) in p's label order, by dimod.ExactSolver."""
    ss = dimod.ExactSolver().sample(p.to_bqm())
    return np.asarray(ss.record.sample)[:, [ss.variables.index(v) for v in p.labels]].astype(
        np.int8)


def _sparse(n: int, seed: int, factor: float = 1.0) -> tuple[Problem, list]:
    """Random sparse integer QUBO (~6 neighbours) with a wide row, a wide threshold
    penalty, a narrow quadratic penalty, a one-hot decision and fixings."""
    rng = np.random.default_rng(seed)
    lin = {i: factor * float(rng.integers(-20, 21)) for i in range(n)}
    quad = {}
    for _ in range(3 * n):
        i, j = rng.choice(n, 2, replace=False)
        quad[(int(min(i, j)), int(max(i, j)))] = factor * float(rng.integers(-10, 11))
    ds = [Decision("d", "one_hot", (0, 1, 2, 3), ("w", "x", "y", "z"))]
    p = Problem.from_terms(lin, [(i, j, w) for (i, j), w in quad.items()], labels=range(n),
                           decisions=ds)
    ref = {i: int(b) for i, b in enumerate(rng.integers(0, 2, n))}
    cs = [LinearConstraint({i: float(rng.integers(1, 4)) for i in range(n)}, "<=",
                           float(n // 2), name="cap"),
          HammingPenalty(ref, weight=factor * 5.0, shape="threshold", threshold=n // 3),
          HammingPenalty({i: 1 for i in range(4, 12)}, weight=factor * 2.0, shape="quadratic",
                         name="narrow"),
          FixVariables({n - 1: 0, n - 2: 1})]
    return p, cs


# --------------------------------------------------- against brute force
@pytest.mark.parametrize("seed", [0, 1, 5])
def test_answers_feasible_exact_costs_and_the_optimum_found(seed):
    p, cs = _late_model(seed)
    comp = compile_constraints(p, cs)
    # reference: dimod.ExactSolver over all 2^16 strings, costs and feasibility recomputed
    every = _every_string(p)
    cost_all, ok_all = _independent(p, cs, every)
    assert ok_all.any()
    optimum = cost_all[ok_all].min()
    rng = np.random.default_rng(seed + 10)
    starts = rng.integers(0, 2, (8, p.n)).astype(np.int8)  # infeasible, encodings broken
    greedy_cost, _ = _independent(p, cs, greedy_repair(comp, starts).X)
    assert (greedy_cost > optimum + 1e-9).any()  # greedy alone misses it from some starts
    for depth in (0.7, 1.0):
        out = anneal(comp, starts, depth=depth, sweeps=300, seed=seed)
        ev = comp.evaluate(out.X)
        cost, ok = _independent(p, cs, out.X)
        assert ev.feasible.all() and ok.all()
        np.testing.assert_allclose(ev.cost, cost, rtol=0, atol=1e-9)
        assert (cost >= optimum - 1e-9).all()
        np.testing.assert_allclose(cost, optimum, rtol=0, atol=1e-9)  # from every start
        assert (out.sweeps == 300).all()


@pytest.mark.parametrize("seed", [0, 3])
def test_radius_and_flip_price_against_brute_force(seed):
    p, cs = _late_model(seed)
    comp = compile_constraints(p, cs)
    every = _every_string(p)  # dimod.ExactSolver, as above
    cost_all, ok_all = _independent(p, cs, every)
    origin = every[np.flatnonzero(ok_all)[len(np.flatnonzero(ok_all)) // 2]]
    radius, price = 3, 0.5
    dist = (every != origin).sum(axis=1)
    within = ok_all & (dist <= radius)
    best = (cost_all + price * dist)[within].min()
    starts = np.repeat(origin[None], 6, axis=0)
    out = anneal(comp, starts, depth=0.8, sweeps=200, seed=seed, max_flips=radius,
                 flip_price=price)
    d = (out.X != origin).sum(axis=1)
    assert (d <= radius).all()
    cost, ok = _independent(p, cs, out.X)
    assert ok.all()
    obj = cost + price * d
    assert (obj >= best - 1e-9).all()
    assert obj.min() == pytest.approx(best, abs=1e-9)


def test_published_optima_reached_from_greedy_candidates(benchmarks):
    # best-known values from ../shared/benchmarks/README.md (BiqMac table; OR-Library)
    for name, best, sweeps in [("bqp50-1", -2098.0, 300), ("bqp250-1", -45607.0, 1000)]:
        p = read_bqp(benchmarks / "bqp" / f"{name}.sparse")
        comp = compile_constraints(p, [])
        rng = np.random.default_rng(0)
        starts = greedy_repair(comp, rng.integers(0, 2, (8, p.n)).astype(np.int8)).X
        assert comp.evaluate(starts).cost.min() > best  # greedy alone does not reach it
        out = anneal(comp, starts, depth=0.85, sweeps=sweeps, seed=0)
        assert comp.evaluate(out.X).cost.min() == best


# ------------------------------------------------------ guarantees
def test_fixed_variables_never_move_and_results_depend_on_the_seed_only():
    p, cs = _sparse(200, 4)
    comp = compile_constraints(p, cs)
    rng = np.random.default_rng(5)
    starts = rng.integers(0, 2, (7, p.n)).astype(np.int8)
    starts[:, p.n - 1] = 1  # violates the fixing x[n-1] = 0
    a = anneal(comp, starts, depth=0.6, sweeps=40, seed=11)
    b = anneal(comp, starts, depth=0.6, sweeps=40, seed=11, workers=3)
    c = anneal(comp, starts, depth=0.6, sweeps=40, seed=11)
    assert (a.X[:, p.n - 1] == 0).all() and (a.X[:, p.n - 2] == 1).all()
    np.testing.assert_array_equal(a.X, b.X)
    np.testing.assert_array_equal(a.X, c.X)
    d = anneal(comp, starts, depth=0.6, sweeps=40, seed=12)
    assert not np.array_equal(a.X, d.X)  # another seed, other walks (some answer differs)
    assert comp.evaluate(a.X).feasible.all()


def test_slicing_does_not_change_the_answers():
    """The kernel resumed after every few attempts gives what one long call gives."""
    p, cs = _sparse(120, 6)
    comp = compile_constraints(p, cs)
    late, moves = late_arrays(comp), A._moves(comp)
    starts = np.random.default_rng(1).integers(0, 2, (3, p.n)).astype(np.int8)
    tq, tt = A.temperatures(0.7, flip_scale(comp, starts))
    plan = K.Plan(30, 3, tq, tt, 0.25, 40, np.uint64(9), False, 1.0)
    results = []
    for budget in (10 ** 9, 1):
        X = starts.copy()
        ch = K.new_chain(p.n, late.counts.cp_const.size, late.counts.term_pen.size,
                         late.rows.lo.size)
        pos, done = np.zeros(3, dtype=np.int64), np.zeros(3, dtype=np.int64)
        calls = 0
        while pos[0] < 3:
            K.advance(late.qubo, late.counts, late.rows, moves, plan, X, starts, ch, pos, 3,
                      budget, 1e-9, done)
            calls += 1
        results.append(X)
        assert (done == 30).all()
    assert calls > 90  # one sweep or start-up per call
    np.testing.assert_array_equal(results[0], results[1])


def _model_and_times_ten(rows: int):
    """The late model of ``_sparse(150, 8)``, the same with every weight x10, and ``rows``
    greedy-repaired random starts: (compiled, compiled x10, starts int8 (rows, 150))."""
    p1, cs1 = _sparse(150, 8)
    p10, cs10 = _sparse(150, 8, factor=10.0)
    c1, c10 = compile_constraints(p1, cs1), compile_constraints(p10, cs10)
    starts = greedy_repair(c1, np.random.default_rng(2).integers(0, 2, (rows, 150)).astype(
        np.int8)).X
    return c1, c10, starts


def test_scale_invariance_model_times_ten():
    c1, c10, starts = _model_and_times_ten(5)
    assert flip_scale(c10, starts) == 10.0 * flip_scale(c1, starts)
    for depth in (0.4, 1.0):
        a = anneal(c1, starts, depth=depth, sweeps=60, seed=3, flip_price=0.5)
        b = anneal(c10, starts, depth=depth, sweeps=60, seed=3, flip_price=5.0)
        np.testing.assert_array_equal(a.X, b.X)


def test_flip_scale_is_the_median_single_flip_change():
    p, cs = _late_model(4)
    comp = compile_constraints(p, cs)
    X = np.random.default_rng(0).integers(0, 2, (3, p.n)).astype(np.int8)
    free = np.flatnonzero(comp.fixed < 0)
    changes = []
    for x in X:  # each flip evaluated independently (cost after - before, Compiled.evaluate)
        moves = np.repeat(x[None], free.size, axis=0)
        moves[np.arange(free.size), free] ^= 1
        changes.append(comp.evaluate(moves).cost - comp.evaluate(x[None]).cost[0])
    assert flip_scale(comp, X) == pytest.approx(np.median(np.abs(np.concatenate(changes))))
    flat = compile_constraints(Problem.from_terms({0: 0.0, 1: 0.0}, []), [])
    assert flip_scale(flat, np.zeros((2, 2), dtype=np.int8)) == 1.0


# ---------------------------------------------------------- stopping
class _SetsItselfAfter(threading.Event):
    """An event that reports itself set from its ``calls``-th check on (the kernel's
    caller checks it between slices)."""

    def __init__(self, calls: int):
        super().__init__()
        self.left = calls

    def is_set(self) -> bool:
        self.left -= 1
        if self.left <= 0:
            self.set()
        return super().is_set()


def test_cancel_before_and_during_the_run():
    p, cs = _sparse(300, 9)
    comp = compile_constraints(p, cs)
    starts = greedy_repair(comp, np.random.default_rng(3).integers(0, 2, (4, p.n)).astype(
        np.int8)).X
    ev = threading.Event()
    ev.set()
    out = anneal(comp, starts, depth=0.5, sweeps=10 ** 9, seed=0, cancel=ev)
    assert (out.sweeps == 0).all()
    np.testing.assert_array_equal(out.X, starts)
    # set during the run: a billion sweeps asked, the run returns after a few slices
    out = anneal(comp, starts, depth=0.5, sweeps=10 ** 9, seed=0, cancel=_SetsItselfAfter(4),
                 workers=2)
    assert (out.sweeps < 10 ** 9).all() and out.sweeps.max() > 0
    assert comp.evaluate(out.X).feasible.all()  # the best states so far, feasible starts
    out = anneal(comp, starts, depth=0.5, sweeps=10 ** 9, seed=0,
                 deadline=time.perf_counter() - 1.0)
    assert (out.sweeps == 0).all()


# ------------------------------------------------------------- inputs
@pytest.mark.parametrize("kwargs,field", [
    ({"depth": 0.0}, "depth"), ({"depth": 1.5}, "depth"), ({"sweeps": -1}, "sweeps"),
    ({"workers": 0}, "workers"), ({"scale": -1.0}, "scale"), ({"flip_price": -1.0}, "flip_price"),
    ({"max_flips": -2}, "max_flips"), ({"origin": np.zeros((1, 3), dtype=np.int8)}, "origin"),
    ({"starts": np.full((2, 16), 2, dtype=np.int8)}, "starts"),
])
def test_bad_inputs_name_the_field(kwargs, field):
    p, cs = _late_model(0)
    comp = compile_constraints(p, cs)
    args = {"starts": np.zeros((2, p.n), dtype=np.int8), "depth": 0.5, "sweeps": 2, "seed": 0}
    args.update(kwargs)
    with pytest.raises(InputError) as e:
        anneal(comp, args.pop("starts"), **args)
    assert e.value.field == field


def _knapsack(seed: int, n: int = 14):
    """n items with weights 4-7 under a capacity that holds about five of them; values
    20-40 (as negative linear terms) and a few integer couplings of -3..3."""
    rng = np.random.default_rng(seed)
    w = rng.integers(4, 8, n).astype(float)
    lin = {i: -float(rng.integers(20, 41)) for i in range(n)}
    quad = []
    for _ in range(12):
        i, j = rng.choice(n, 2, replace=False)
        quad.append((int(i), int(j), float(rng.integers(-3, 4))))
    p = Problem.from_terms(lin, quad, labels=range(n))
    cap = float(np.sort(w)[:5].sum() + 1)
    return p, [LinearConstraint({i: w[i] for i in range(n)}, "<=", cap, name="cap")]


@pytest.mark.parametrize("seed", [1, 4])
def test_tight_knapsack_row_is_crossed_by_pair_moves(seed):
    """From full knapsacks where no single flip is both feasible and cheaper, a shallow
    anneal reaches the optimum by moving an item out and another in at once; with those
    pair moves switched off it mostly does not. Reference: dimod.ExactSolver (every
    string, its cost and feasibility)."""
    p, cs = _knapsack(seed)
    comp = compile_constraints(p, cs)
    every = _every_string(p)
    ev = comp.evaluate(every)
    optimum = ev.cost[ev.feasible].min()
    stuck = []  # feasible, not optimal, every single flip infeasible or costlier
    for x, c in zip(every[ev.feasible], ev.cost[ev.feasible]):
        one = np.repeat(x[None], p.n, axis=0)
        one[np.arange(p.n), np.arange(p.n)] ^= 1
        e = comp.evaluate(one)
        if c > optimum + 1e-9 and ((~e.feasible) | (e.cost > c + 1e-9)).all():
            stuck.append(x)
    starts = np.array(stuck[:: max(1, len(stuck) // 64)], dtype=np.int8)
    assert A._moves(comp).pairs.all()  # unequal weights: the row gets pair moves
    reached = {}
    for pairs in (True, False):
        c2 = compile_constraints(p, cs)
        if not pairs:
            moves = A._moves(c2)
            c2._anneal_moves = moves._replace(pairs=np.zeros_like(moves.pairs))
        X, _ = A._sweep_rows(c2, starts, starts.copy(), depth=0.1, sweeps=200, seed=1,
                             flip_price=0.0, max_flips=None, scale=None, workers=1,
                             deadline=None, until=None, cancel=None)
        e = c2.evaluate(X)
        assert e.feasible.all() and (e.cost >= optimum - 1e-9).all()
        reached[pairs] = float(np.mean(np.abs(e.cost - optimum) < 1e-9))
    assert reached[True] >= 0.85
    assert reached[False] < 0.5


def test_plain_path_matches_the_general_path():
    """A pure QUBO sweeps through a lean loop; with a row that never binds the general
    loop runs instead, and must take the same moves (same random draws)."""
    p, _ = _sparse(150, 12)
    plain = compile_constraints(p, [])
    general = compile_constraints(p, [LinearConstraint({0: 1.0, 1: 1.0}, "<=", 5.0)])
    starts = greedy_repair(plain, np.random.default_rng(4).integers(0, 2, (4, 150)).astype(
        np.int8)).X
    scale = flip_scale(plain, starts)
    for kw in ({}, {"flip_price": 0.5, "max_flips": 30}):
        a = anneal(plain, starts, depth=0.8, sweeps=50, seed=2, scale=scale, **kw)
        b = anneal(general, starts, depth=0.8, sweeps=50, seed=2, scale=scale, **kw)
        np.testing.assert_array_equal(a.X, b.X)
        assert not np.array_equal(a.X, starts)  # the anneal moved


# ------------------------------------------------- the schedule paced by the clock
@nb.njit
def _sweep_temperature(plan, s):
    """K.temperature is an inner kernel (no Python wrapper): called through this one."""
    return K.temperature(plan, s)


def test_timed_schedule_has_the_shape_of_the_sweep_schedule():
    """temperature_at: the quench at phase 0 and 1, the turn at the end of the heating
    share, geometric (log-linear) in between, as temperature() is by sweep."""
    plan = K.Plan(100, 10, 0.03, 3.0, 0.0, 10, np.uint64(0), False, 1.0, True)
    at = [K.temperature_at(plan, f) for f in np.linspace(0.0, 1.0, 101)]
    assert at[0] == pytest.approx(0.03) and at[-1] == pytest.approx(0.03)
    assert at[10] == pytest.approx(3.0)  # heat / sweeps = 0.1
    assert np.all(np.diff(at[:11]) > 0) and np.all(np.diff(at[10:]) < 0)
    assert K.temperature_at(plan, 0.55) == pytest.approx(math.sqrt(0.03 * 3.0))
    # the sweep schedule reaches the same turn and quench
    assert _sweep_temperature(plan._replace(timed=False), 9) == pytest.approx(3.0)
    assert _sweep_temperature(plan._replace(timed=False), 99) == pytest.approx(0.03)


def _timed_run(comp, starts, sweeps, seed):
    """The kernel on a timed plan left unpaced (its phase grows by 1 / (sweeps - 1))."""
    late, moves = late_arrays(comp), A._moves(comp)
    scale = flip_scale(comp, starts)
    tq, tt = A.temperatures(0.6, scale)
    plan = K.Plan(sweeps, sweeps // 10, tq, tt, 0.0, comp.n, np.uint64(seed), False, scale,
                  True)
    X = starts.copy()
    ch = K.new_chain(comp.n, late.counts.cp_const.size, late.counts.term_pen.size,
                     late.rows.lo.size)
    pos, done = np.zeros(3, dtype=np.int64), np.zeros(len(X), dtype=np.int64)
    K.advance(late.qubo, late.counts, late.rows, moves, plan, X, starts, ch, pos, len(X),
              10 ** 12, 1e-9, done)
    return X, done


def test_timed_plan_unpaced_runs_its_sweeps_and_is_scale_invariant():
    c1, c10, starts = _model_and_times_ten(3)
    X1, done = _timed_run(c1, starts, 40, 5)
    X10, _ = _timed_run(c10, starts, 40, 5)
    assert (done == 40).all()  # phase 0, 1/39, ..., 1: forty sweeps, the last at the quench
    np.testing.assert_array_equal(X1, X10)  # model x 10: every temperature x 10, same moves


@pytest.mark.parametrize("guess", [4, 10 ** 8])
def test_paced_anneal_ends_cold_at_until_whatever_the_guess(guess):
    """A chain paced to ``until`` stretches a guess of 4 sweeps and shortens one of 10^8;
    its answers are feasible, their costs agree with an independent recomputation and are
    never below the exact optimum (dimod.ExactSolver over every bit string)."""
    p, cs = _late_model(3)
    comp = compile_constraints(p, cs)
    every = _every_string(p)
    cost_all, ok_all = _independent(p, cs, every)
    optimum = cost_all[ok_all].min()
    starts = np.random.default_rng(4).integers(0, 2, (4, p.n)).astype(np.int8)
    out = anneal(comp, starts, depth=0.7, sweeps=guess, seed=1, workers=2,
                 until=time.perf_counter() + 0.05)
    assert (out.sweeps > 0).all() and (out.sweeps < 10 ** 8).all()
    cost, ok = _independent(p, cs, out.X)
    ev = comp.evaluate(out.X)
    assert ok.all() and ev.feasible.all()
    np.testing.assert_allclose(ev.cost, cost, rtol=0, atol=1e-9)
    assert (cost >= optimum - 1e-9).all()


@pytest.mark.parametrize("reserve", [True, False])
def test_paced_to_its_deadline_the_anneal_keeps_time_for_its_greedy_pass(monkeypatch, reserve):
    """Chains paced to end at their deadline stop early enough for the greedy pass that
    ends an anneal: no single flip of an answer lowers its cost (checked one flip at a
    time with comp.evaluate). Without that reserve the pass gets no time and the quenched
    states are returned as they are, with flips left that pay (real-valued couplings: the
    quench still accepts the smallest uphill changes). The reserve is widened here to 20 ms
    so that a loaded machine cannot eat it: this checks that the chains honour it; its
    default size is measured in anneal.PASS_SECONDS's note."""
    monkeypatch.setattr(A, "PASS_SECONDS", 0.02 if reserve else 0.0)
    monkeypatch.setattr(A, "PASS_SWEEPS", A.PASS_SWEEPS if reserve else 0)
    n = 4000
    rng = np.random.default_rng(3)
    pairs = rng.integers(0, n, (3 * n, 2))
    pairs = pairs[pairs[:, 0] != pairs[:, 1]]
    p = Problem.from_terms({i: float(v) for i, v in enumerate(rng.normal(size=n))},
                           [(int(i), int(j), float(w)) for (i, j), w in
                            zip(pairs, rng.normal(size=len(pairs)))], labels=range(n))
    comp = compile_constraints(p, [])
    starts = rng.integers(0, 2, (2, n)).astype(np.int8)
    anneal(comp, starts, depth=0.5, sweeps=2, seed=0, workers=2)  # this model's first call
    end = time.perf_counter() + 0.1
    out = anneal(comp, starts, depth=0.5, sweeps=50, seed=1, workers=2, until=end,
                 deadline=end)
    assert (out.sweeps > 100).all()
    base = comp.evaluate(out.X).cost
    gains = 0
    for k in range(out.X.shape[0]):
        one = np.repeat(out.X[k][None], n, axis=0)
        one[np.arange(n), np.arange(n)] ^= 1
        gains += int((comp.evaluate(one).cost < base[k] - 1e-9).sum())
    assert (gains == 0) if reserve else (gains > 0)


# ------------------------------------------------------------- a part of the model
def _plain_qubo(n: int, seed: int) -> Problem:
    """Random sparse integer QUBO (~4 neighbours a variable), no rows nor decisions."""
    rng = np.random.default_rng(seed)
    quad = {}
    for _ in range(2 * n):
        i, j = rng.choice(n, 2, replace=False)
        quad[(int(min(i, j)), int(max(i, j)))] = float(rng.integers(-10, 11))
    return Problem.from_terms({i: float(rng.integers(-5, 6)) for i in range(n)},
                              [(i, j, w) for (i, j), w in quad.items()], labels=range(n))


def _sweeps_only(comp, starts, **kw):
    """The Metropolis part of anneal alone (no greedy pass afterwards)."""
    X, done = A._sweep_rows(comp, starts, starts.copy(), depth=0.8, sweeps=30, seed=4,
                            flip_price=0.0, max_flips=None, scale=None, workers=2,
                            deadline=None, until=None, cancel=None, **kw)
    return X, done


def test_within_sweeps_only_that_part_and_all_of_it_is_the_whole_model():
    p = _plain_qubo(300, 2)
    comp = compile_constraints(p, [FixVariables({0: 1})])
    starts = np.random.default_rng(3).integers(0, 2, (4, p.n)).astype(np.int8)
    starts[:, 0] = 1
    part = np.arange(0, 300, 3)
    X, done = _sweeps_only(comp, starts, within=part)
    outside = np.setdiff1d(np.arange(p.n), part)
    np.testing.assert_array_equal(X[:, outside], starts[:, outside])
    assert (X[:, part] != starts[:, part]).any() and (done == 30).all()
    whole, _ = _sweeps_only(comp, starts, within=np.arange(p.n))  # the fixed 0 drops out
    plain, _ = _sweeps_only(comp, starts)
    np.testing.assert_array_equal(whole, plain)
    out = anneal(comp, starts, depth=0.8, sweeps=30, seed=4, within=part)
    assert comp.evaluate(out.X).feasible.all()  # the greedy pass after it as usual


@pytest.mark.parametrize("within", [np.array([[1, 2]]), np.array([0, 400]), np.array([0.5])])
def test_bad_within_names_the_field(within):
    p = _plain_qubo(300, 2)
    comp = compile_constraints(p, [])
    with pytest.raises(InputError) as e:
        anneal(comp, np.zeros((1, p.n), np.int8), depth=0.5, sweeps=2, seed=0, within=within)
    assert e.value.field == "within"


def test_disagreement_is_where_rows_differ_grown_by_qubo_neighbours():
    """Neighbours from dimod's adjacency of the same model, not from flipfix's arrays."""
    p = _plain_qubo(200, 5)
    comp = compile_constraints(p, [FixVariables({7: 0})])
    X = np.random.default_rng(1).integers(0, 2, (3, p.n)).astype(np.int8)
    X[:] = X[0]
    X[0, 7] = 0
    X[1:, 7] = 1  # a fixed variable: never in the part
    X[1, [10, 20]] ^= 1
    X[2, 30] ^= 1
    assert A.disagreement(comp, X[:1]).size == 0
    np.testing.assert_array_equal(A.disagreement(comp, X, ring=0), [10, 20, 30])
    adj = p.to_bqm().adj
    want = {10, 20, 30} | {int(v) for u in (10, 20, 30) for v in adj[u]}
    want.discard(7)
    np.testing.assert_array_equal(A.disagreement(comp, X, ring=1), sorted(want))
    two = set(want) | {int(v) for u in want for v in adj[u]}
    two.discard(7)
    np.testing.assert_array_equal(A.disagreement(comp, X, ring=2), sorted(two))
