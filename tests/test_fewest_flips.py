"""The lexicographic CP-SAT step: fewest flips from a candidate at the best cost.

Every expected value is computed by brute force: dimod.ExactSolver (dimod's exhaustive
reference solver) gives the energy of all 2^n assignments (n <= 12); fixings and hard rows
are checked on those assignments directly in numpy; the expected answer is the smallest
Hamming distance from the centre among the assignments that meet them at the bound.
"""

import time

import dimod
import numpy as np
import pytest

from flipfix.repair import CandidateSet, Problem, repair
from flipfix.repair.lowering.compiled import compile_constraints
from flipfix.repair.model.constraints import FixVariables, LinearConstraint
from flipfix.repair.solvers.cpsat import LateModel


def exhaustive(bqm: dimod.BinaryQuadraticModel, labels):
    """All assignments int8 (2^n, n) in ``labels`` order and their energies, by dimod.ExactSolver."""
    ss = dimod.ExactSolver().sample(bqm)
    X = ss.record.sample[:, [ss.variables.index(v) for v in labels]].astype(np.int8)
    return X, ss.record.energy.astype(np.float64)


def random_bqm(seed: int, n: int = 10) -> dimod.BinaryQuadraticModel:
    """Small integer BINARY QUBO with coefficients in {-1, 0, 1}: many ties, so many optima."""
    rng = np.random.default_rng(seed)
    lin = {i: float(rng.integers(-1, 2)) for i in range(n)}
    quad = {(i, j): float(rng.integers(-1, 2)) for i in range(n) for j in range(i + 1, n)
            if rng.random() < 0.4}
    return dimod.BinaryQuadraticModel(lin, quad, 0.0, dimod.BINARY)


def expected_fewest(X, E, center, *, upper, ok, price=0.0, radius=None):
    """Brute force: the smallest distance from ``center`` among rows of X meeting ``ok``, with
    E + price * distance <= upper (and distance <= radius); None when there is none."""
    dist = (X != center[None, :]).sum(axis=1)
    keep = ok & (E + price * dist <= upper + 1e-9)
    if radius is not None:
        keep &= dist <= radius
    return int(dist[keep].min()) if keep.any() else None


CASES = [
    # (seed, hard, price, radius_mode, upper_above_best)
    (0, False, 0.0, None, 0.0),
    (1, False, 0.0, None, 0.0),
    (2, True, 0.0, None, 0.0),
    (3, True, 0.0, "exact", 0.0),
    (4, False, 0.0, "tight", 0.0),
    (5, True, 0.0, "tight", 0.0),
    (6, False, 1.0, None, 0.0),
    (7, True, 2.0, "exact", 0.0),
    (8, False, 0.0, None, 1.0),
    (9, True, 0.0, None, 1.0),
]


@pytest.mark.parametrize("seed,hard,price,radius_mode,above", CASES)
def test_fewest_flips_matches_brute_force(seed, hard, price, radius_mode, above):
    n = 10
    bqm = random_bqm(seed, n)
    p = Problem.from_bqm(bqm)
    labels = list(p.labels)
    cons = []
    X, E = exhaustive(bqm, labels)
    ok = np.ones(X.shape[0], dtype=bool)
    if hard:
        # two fixings and a hard row; checked on the enumerated assignments directly
        cons += [FixVariables({labels[0]: 1, labels[3]: 0}),
                 LinearConstraint({labels[i]: 1.0 for i in range(4, 9)}, "<=", 2.0)]
        ok &= (X[:, 0] == 1) & (X[:, 3] == 0) & (X[:, 4:9].sum(axis=1) <= 2)
    rng = np.random.default_rng(100 + seed)
    center = rng.integers(0, 2, n).astype(np.int8)
    dist = (X != center[None, :]).sum(axis=1)
    obj = E + price * dist
    best = float(obj[ok].min())
    upper = best + above
    # the hint: the costliest-in-flips assignment at the best objective (the worst start)
    at_best = np.flatnonzero(ok & (obj <= best + 1e-9))
    hint = X[at_best[np.argmax(dist[at_best])]]
    want = expected_fewest(X, E, center, upper=upper, ok=ok, price=price)
    assert want is not None
    radius = None
    if radius_mode == "exact":  # a radius that leaves the answer inside
        radius = want
    elif radius_mode == "tight":  # a radius one short of it: nothing fits
        radius = want - 1 if want > 0 else None
    comp = compile_constraints(p, cons)
    model = LateModel(comp)
    r = model.fewest_flips(center=center, upper=upper, hint=hint, radius=radius,
                           flip_price=price, time_limit=1.0, workers=1, seed=seed)
    want_r = expected_fewest(X, E, center, upper=upper, ok=ok, price=price, radius=radius)
    if want_r is None:
        assert r.status == "infeasible" and r.x is None  # CP-SAT's proof of no assignment
        return
    assert r.status == "optimal"
    assert int((r.x != center).sum()) == want_r == r.objective == r.bound
    # the answer itself meets the bound and the hard constraints (ExactSolver energy)
    row = int(np.flatnonzero((X == r.x[None, :]).all(axis=1))[0])
    assert ok[row] and E[row] + price * want_r <= upper + 1e-9
    assert r.scaling_error == 0.0  # whole-number coefficients and prices: exact scaling


def test_fewest_flips_keeps_a_hint_at_a_rounded_bound_feasible():
    """Float coefficients (not decimals): the bound is widened to the hint's scaled cost."""
    rng = np.random.default_rng(11)
    n = 8
    lin = {i: float(rng.normal()) / 3.0 for i in range(n)}
    quad = {(i, i + 1): float(rng.normal()) / 7.0 for i in range(n - 1)}
    bqm = dimod.BinaryQuadraticModel(lin, quad, 0.0, dimod.BINARY)
    p = Problem.from_bqm(bqm)
    X, E = exhaustive(bqm, list(p.labels))
    b = int(np.argmin(E))
    model = LateModel(compile_constraints(p, []))
    center = 1 - X[b]
    # a bound a hair below the optimum (dimod.ExactSolver's value) with no slack: only the
    # widening to the hint's own scaled cost keeps the optimum feasible
    r = model.fewest_flips(center=center, upper=float(E[b]) - 1e-12, hint=X[b], slack=0.0,
                           time_limit=1.0, workers=1)
    assert r.status == "optimal" and r.x is not None
    assert model.scale_error > 0.0 and r.scaling_error == model.scale_error
    want = expected_fewest(X, E, center, upper=float(E[b]), ok=np.ones(len(E), bool))
    assert int((r.x != center).sum()) == want  # random normals: the optimum is unique


# ---------------------------------------------------------------- through repair()
def switch_model(groups: int = 2):
    """Per group (a, b, c, d1, d2, d3), stated for the complements u' = 1 - u and repaired from
    the all-one candidate (u = 0; construction of our own): a (bias -5) clashes with b and c
    (+10 each); b and c (bias -4 each) cost -8 together, 2 flips; a then d1..d3 (bias +1,
    -2 with a) also cost -8, 4 flips. Steepest descent takes a first (-5 beats -4), then the
    d's, and no single flip leaves that optimum. (Complemented, so that CP-SAT's habit of
    trying 0 first does not land on the 2-flip optimum by chance.)"""
    lin, quad = {}, {}
    for g in range(groups):
        a, b, c = f"a{g}", f"b{g}", f"c{g}"
        lin.update({a: -5.0, b: -4.0, c: -4.0})
        quad.update({(a, b): 10.0, (a, c): 10.0})
        for i in range(3):
            lin[f"d{g}_{i}"] = 1.0
            quad[(a, f"d{g}_{i}")] = -2.0
    bqm = dimod.BinaryQuadraticModel(lin, quad, 0.0, dimod.BINARY)
    for v in list(bqm.variables):
        bqm.flip_variable(v)  # u' = 1 - u
    return bqm


@pytest.mark.parametrize("hard", [False, True])
def test_repair_reports_the_fewest_flips_at_the_best_cost(hard):
    bqm = switch_model(2)
    p = Problem.from_bqm(bqm)
    labels = list(p.labels)
    X, E = exhaustive(bqm, labels)
    ok = np.ones(X.shape[0], dtype=bool)
    cons = []
    if hard:
        # late: d1_0 is fixed on (u' = 0: group 1 then has one optimum), and a0 + b0 <= 1
        # (-a0' - b0' <= -1: a hard row that both optima of group 0 meet, so the tie stays)
        col = {v: i for i, v in enumerate(labels)}
        cons = [FixVariables({"d1_0": 0}), LinearConstraint({"a0": -1.0, "b0": -1.0}, "<=", -1.0)]
        ok &= (X[:, col["d1_0"]] == 0) & (X[:, col["a0"]] + X[:, col["b0"]] >= 1)
    cand = np.ones((1, p.n), dtype=np.int8)
    best = float(E[ok].min())
    want = expected_fewest(X, E, cand[0], upper=best, ok=ok)
    res = repair(p, CandidateSet.from_array(p, cand), cons, method="portfolio",
                 time_limit=0.6, workers=1, seed=0)
    assert res.best.feasible and res.best.cost == pytest.approx(best)  # ExactSolver optimum
    assert res.best.flips == want  # brute force: fewest flips among the optima
    assert res.stats["fewest_flips_status"] == "optimal"  # CP-SAT proved no fewer flips


def test_greedy_plan_does_not_run_the_cpsat_step():
    bqm = switch_model(1)
    p = Problem.from_bqm(bqm)
    cand = np.ones((1, p.n), dtype=np.int8)
    res = repair(p, CandidateSet.from_array(p, cand), [], method="greedy", time_limit=0.5)
    assert "fewest_flips_status" not in res.stats
    # steepest descent ends in the 4-flip optimum and polish cannot leave it (see switch_model)
    assert res.best.flips == 4 and res.best.cost == -8.0


@pytest.mark.parametrize("price", [0.5, 0.25, 1.3])
def test_a_fractional_flip_price_on_a_whole_number_model_is_scaled_exactly(price):
    """The model's scale is 1 (whole numbers); the price rescales the objective instead of
    being rounded (0.5 used to round to 0 or 1). Expected optimum: brute force over
    dimod.ExactSolver energies of cost + price * flips from the centre."""
    bqm = random_bqm(21, n=10)
    p = Problem.from_bqm(bqm)
    X, E = exhaustive(bqm, list(p.labels))
    center = X[int(np.argmax(E))]  # a poor centre, so the price matters
    model = LateModel(compile_constraints(p, []))
    r = model.solve(center=center, flip_price=price, time_limit=2.0, workers=1)
    dist = (X != center[None, :]).sum(axis=1)
    want = float((E + price * dist).min())
    assert r.status == "optimal" and r.scaling_error == 0.0
    got = float(bqm.energy(dict(zip(p.labels, r.x)))) + price * int((r.x != center).sum())
    assert abs(got - want) < 1e-9 and abs(r.objective - want) < 1e-9


# ---------------------------------------------------------------- the published plan
def plan_case(seed: int):
    """A degenerate small QUBO (coefficients in {-1, 0, 1}, many optima), a library of two
    random candidates and a published plan (a third random state, not in the library)."""
    bqm = random_bqm(seed, n=10)
    p = Problem.from_bqm(bqm)
    X, E = exhaustive(bqm, list(p.labels))
    rng = np.random.default_rng(100 + seed)
    lib = rng.integers(0, 2, size=(2, p.n)).astype(np.int8)
    plan = rng.integers(0, 2, size=p.n).astype(np.int8)
    return bqm, p, X, E, lib, plan


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
def test_with_a_plan_the_answer_is_the_optimum_nearest_to_it(seed):
    """Expected: among dimod.ExactSolver's optima, the smallest distance from the plan."""
    bqm, p, X, E, lib, plan = plan_case(seed)
    best = float(E.min())
    want = expected_fewest(X, E, plan, upper=best, ok=np.ones(X.shape[0], dtype=bool))
    res = repair(p, CandidateSet.from_array(p, lib), [], method="portfolio", time_limit=0.6,
                 workers=1, seed=0, plan=plan)
    assert res.best.cost == pytest.approx(best)
    assert res.best.plan_distance == int((res.best.x != plan).sum()) == want
    assert res.stats["fewest_flips_center"] == "plan"
    # the flips still count from the nearest library candidate
    assert res.best.flips == int((lib != res.best.x[None, :]).sum(axis=1).min())


def test_a_plan_named_by_candidate_id_is_that_candidate():
    bqm, p, X, E, lib, plan = plan_case(4)
    lib = np.vstack([lib, plan])
    cands = CandidateSet.from_array(p, lib, ids=["a", "b", "published"])
    by_id = repair(p, cands, [], time_limit=0.5, workers=1, seed=0, plan="published")
    by_values = repair(p, cands, [], time_limit=0.5, workers=1, seed=0, plan=plan)
    assert by_id.best.plan_distance == by_values.best.plan_distance
    assert by_id.best.plan_distance == int((by_id.best.x != plan).sum())


def test_the_greedy_plan_moves_free_variables_to_the_plan():
    """Variables with no bias and no coupling cost nothing either way: with a plan, the
    greedy plan's last step sets them as the plan has them (without one, as the candidate)."""
    n, free = 60, np.arange(40, 60)
    rng = np.random.default_rng(5)
    lin = {i: float(rng.choice([-1.0, 1.0])) for i in range(40)}
    lin.update({int(i): 0.0 for i in free})
    quad = {(i, i + 1): float(rng.choice([-1.0, 1.0])) for i in range(39)}
    p = Problem.from_bqm(dimod.BinaryQuadraticModel(lin, quad, 0.0, dimod.BINARY))
    cand = rng.integers(0, 2, size=(1, n)).astype(np.int8)
    plan = 1 - cand[0]
    col = [p.labels.index(int(i)) for i in free]
    res = repair(p, CandidateSet.from_array(p, cand), [], method="greedy", time_limit=0.5,
                 plan=plan)
    assert np.array_equal(res.best.x[col], plan[col])
    plain = repair(p, CandidateSet.from_array(p, cand), [], method="greedy", time_limit=0.5)
    assert np.array_equal(plain.best.x[col], cand[0, col])
    assert res.best.cost <= plain.best.cost + 1e-9  # kept only when no costlier


@pytest.mark.parametrize("plan,needle", [
    ("nobody", "no candidate with id 'nobody'"),
    (np.zeros(3, dtype=np.int8), "must be a candidate id or 10 values"),
    (np.full(10, 2), "value 2 is not"),
])
def test_a_bad_plan_names_the_field(plan, needle):
    from flipfix.repair.errors import InputError

    bqm, p, X, E, lib, _ = plan_case(0)
    with pytest.raises(InputError) as e:
        repair(p, CandidateSet.from_array(p, lib), [], time_limit=0.2, plan=plan)
    assert e.value.field == "plan" and needle in str(e.value)


def test_the_last_greedy_step_keeps_a_cheaper_answer_that_is_no_nearer():
    """An answer that a cut search left short of a local minimum (here: three uphill flips
    from the candidate) is brought down by the polish although the result is no nearer the
    candidate (the step used to keep only nearer results); the kept answer's cost is its
    dimod.ExactSolver energy and no more than the best single-flip neighbour's."""
    from flipfix.repair.kernels.scores import Scorer
    from flipfix.repair.solvers import portfolio as pf

    bqm = random_bqm(21, n=12)
    labels = list(range(12))
    X, E = exhaustive(bqm, labels)
    p = Problem.from_terms({i: bqm.get_linear(i) for i in labels},
                           [(u, v, w) for (u, v), w in bqm.quadratic.items()], labels=labels)
    comp = compile_constraints(p, [])
    rng = np.random.default_rng(3)
    X0 = rng.integers(0, 2, (1, 12)).astype(np.int8)
    index = {tuple(row): e for row, e in zip(X.tolist(), E.tolist())}
    start = X0[0].copy()
    for _ in range(3):  # three flips away from the candidate, each one a step uphill or level
        gains = [index[tuple(np.where(np.arange(12) == i, 1 - start, start).tolist())]
                 - index[tuple(start.tolist())] for i in range(12)]
        start[int(np.argmax(gains))] ^= 1
    one = np.repeat(start[None], 12, axis=0)
    one[np.arange(12), np.arange(12)] ^= 1
    best_single = min(index[tuple(r)] for r in one.tolist())
    assert best_single < index[tuple(start.tolist())]  # the start is no local minimum
    scorer = Scorer(comp, X0)
    out = pf.PlanOutcome(attempts=[pf.Attempt(0, start, "anneal", 0.0)])
    pf._polish(comp, X0, out, scorer, deadline=time.perf_counter() + 10.0, max_flips=None,
               flip_price=0.0)
    ks, cost, viol, flips = pf.attempt_scores(scorer, out.attempts)
    assert len(out.attempts) == 2 and out.stats.get("polished") == 1
    kept = out.attempts[1]
    assert kept.cost == pytest.approx(index[tuple(kept.x.tolist())], abs=1e-9)
    assert kept.cost <= best_single + 1e-9
    assert kept.flips >= 3  # no nearer the candidate than the answer it came from


def test_with_a_plan_the_tail_anneals_toward_it_without_raising_the_cost(benchmarks):
    """Gset G11 (../shared/benchmarks, 800 spins on a torus, weights +-1) as a QUBO with a
    linear Hamming penalty toward a random reference: its optima are many and not joined by
    cost-free single flips, so the greedy polish cannot move between them. From an answer a
    long anneal reached, the plan-priced anneal finds answers nearer a plan (another
    anneal's answer) at no higher cost; every kept answer's cost is recomputed with
    dimod's energies plus the penalty counted here."""
    from flipfix.repair.documents.instances import read_gset
    from flipfix.repair.kernels.scores import Scorer
    from flipfix.repair.model.constraints import HammingPenalty
    from flipfix.repair.solvers import portfolio as pf
    from flipfix.repair.solvers.anneal import anneal

    p = read_gset(benchmarks / "gset" / "G11.txt")
    rng = np.random.default_rng(0)
    ref = rng.integers(0, 2, p.n).astype(np.int8)
    cs = [HammingPenalty({lab: int(b) for lab, b in zip(p.labels, ref)}, weight=0.5)]
    comp = compile_constraints(p, cs)
    starts = rng.integers(0, 2, (2, p.n)).astype(np.int8)
    two = anneal(comp, starts, depth=1.0, sweeps=20_000, seed=1, workers=2).X
    answer, plan = two[0], two[1]
    X0 = answer[None, :].copy()  # the answer's candidate: itself
    scorer = Scorer(comp, X0)
    out = pf.PlanOutcome(attempts=[pf.Attempt(0, answer.copy(), "anneal", 0.0)])
    base = float(comp.evaluate(answer[None]).cost[0])
    d0 = int((answer != plan).sum())
    assert d0 > 20  # two long anneals end in different optima
    pf._toward_plan(comp, X0, out, scorer, plan, deadline=time.perf_counter() + 0.2,
                    max_flips=None, flip_price=0.0, seed=0, workers=2, cancel=None)
    kept = out.attempts[1:]
    assert kept and out.stats["toward_plan_anneal"] == len(kept)
    bqm = p.to_bqm()
    for a in kept:
        energy = float(bqm.energy({lab: int(v) for lab, v in zip(p.labels, a.x)}))
        assert a.cost == pytest.approx(energy + 0.5 * int((a.x != ref).sum()), abs=1e-9)
        assert a.cost <= base + 1e-9
        assert int((a.x != plan).sum()) < d0
