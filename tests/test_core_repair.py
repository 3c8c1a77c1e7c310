"""repair() against outside references.

References used here:
* brute force with dimod.ExactSolver (dimod's exhaustive reference solver);
* CP-SAT optimality proofs;
* J. E. Beasley's OR-Library bqp50/bqp100 instances and best-known values (shared/benchmarks/README.md);
* Billionnet and Soutif quadratic knapsack instances and best-known profits (same README);
* the worked example in Glover, Kochenberger and Du, "A tutorial on formulating and using QUBO models"
  (values from memory).
"""

import itertools
import threading

import dimod
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from flipfix.repair import CandidateSet, Problem, repair
from flipfix.repair.lowering.compiled import compile_constraints
from flipfix.repair.model.constraints import (
    ExtraTerms, FixVariables, ForbidAssignment, HammingPenalty, LinearConstraint,
)
from flipfix.repair.documents.instances import read_bqp, read_qkp

BQP_BEST = {  # shared/benchmarks/README.md (Beasley OR-Library, as tabulated with BiqMac)
    "bqp50-1": -2098, "bqp50-2": -3702, "bqp50-3": -4626, "bqp50-4": -3544, "bqp50-5": -4012,
    "bqp50-6": -3693, "bqp50-7": -4520, "bqp50-8": -4216, "bqp50-9": -3780, "bqp50-10": -3507,
    "bqp100-1": -7970, "bqp100-2": -11036, "bqp100-3": -12723, "bqp100-4": -10368,
    "bqp100-5": -9083, "bqp100-6": -10210, "bqp100-7": -10125, "bqp100-8": -11435,
    "bqp100-9": -11455, "bqp100-10": -12565,
}
QKP_BEST = {"jeu_100_25_1": 18558, "jeu_100_50_1": 83742, "jeu_100_25_3": 3752}  # same README


def random_case(seed: int, n: int, vartype: str):
    """A random model, a random library and a random set of late constraints."""
    rng = np.random.default_rng(seed)
    bqm = dimod.generators.gnp_random_bqm(n, 0.5, vartype, random_state=seed)
    p = Problem.from_bqm(bqm)
    lo = -1 if vartype == "SPIN" else 0
    val = lambda: int(rng.choice([lo, 1]))  # noqa: E731
    labels = list(bqm.variables)
    shape = ["linear", "quadratic", "threshold", "table"][seed % 4]
    cs = [HammingPenalty({v: val() for v in labels}, weight=float(rng.uniform(0.2, 2)),
                         shape=shape, threshold=2, table=[0, 0.3, 2.5, 2.7, 6.0])]
    kinds = rng.permutation(4)[: 1 + seed % 3]
    for kind in kinds:
        if kind == 0:
            cs.append(FixVariables({labels[int(rng.integers(n))]: val()}))
        elif kind == 1:
            sub = rng.choice(n, size=5, replace=False)
            cs.append(LinearConstraint({labels[i]: float(rng.integers(1, 4)) for i in sub},
                                       ["<=", "==", ">="][seed % 3], float(rng.integers(2, 6))))
        elif kind == 2:
            sub = rng.choice(n, size=2, replace=False)
            cs.append(ForbidAssignment({labels[i]: val() for i in sub}))
        else:
            a, b = rng.choice(n, size=2, replace=False)
            cs.append(ExtraTerms({labels[a]: float(rng.normal())},
                                 [(labels[a], labels[b], float(rng.normal()))]))
    cands = CandidateSet.from_array(p, p.to_caller(rng.integers(0, 2, (4, n)).astype(np.int8)))
    return bqm, p, cs, cands


def brute_force(p: Problem, cs) -> tuple[float | None, np.ndarray]:
    """Constrained optimum by dimod.ExactSolver over the cost, feasibility checked per sample."""
    comp = compile_constraints(p, cs)
    bqm = comp.objective_model.to_bqm()
    sampleset = dimod.ExactSolver().sample(bqm)
    X = np.asarray(sampleset.record.sample)[:, [sampleset.variables.index(v) for v in p.labels]]
    X = X.astype(np.int8)
    ev = comp.evaluate(X)
    if not ev.feasible.any():
        return None, X
    return float(ev.cost[ev.feasible].min()), X


def independent_cost(bqm, p: Problem, cs, assignment: dict) -> float:
    """Energy plus penalties recomputed from the constraint definitions alone."""
    total = bqm.energy(assignment)
    for c in cs:
        if isinstance(c, HammingPenalty):
            d = sum(assignment[v] != r for v, r in c.reference.items())
            f = {"linear": d, "quadratic": d * d, "threshold": max(0, d - c.threshold),
                 "table": (list(c.table) + [c.table[-1]] * 99)[d] if c.table else 0}[c.shape]
            total += c.weight * f
        elif isinstance(c, ExtraTerms):
            total += c.offset + sum(b * assignment[v] for v, b in c.linear.items())
            total += sum(b * assignment[u] * assignment[v] for u, v, b in c.quadratic)
    return total


def independent_feasible(cs, assignment: dict) -> bool:
    for c in cs:
        if isinstance(c, FixVariables) and any(assignment[v] != b for v, b in c.values.items()):
            return False
        if isinstance(c, ForbidAssignment) and all(assignment[v] == b for v, b in c.assignment.items()):
            return False
        if isinstance(c, LinearConstraint):
            act = sum(a * assignment[v] for v, a in c.terms.items())
            if not {"<=": act <= c.rhs + 1e-9, "==": abs(act - c.rhs) <= 1e-9,
                    ">=": act >= c.rhs - 1e-9}[c.sense]:
                return False
    return True


@pytest.mark.parametrize("seed", range(12))
def test_cpsat_repair_equals_brute_force_optimum(seed):
    bqm, p, cs, cands = random_case(seed, 12 + seed % 3, ["BINARY", "SPIN"][seed % 2])
    opt, _ = brute_force(p, cs)
    res = repair(p, cands, cs, method="cpsat", time_limit=2.0, seed=seed)
    if opt is None:
        assert res.status == "infeasible"
        assert not res.best.feasible
        return
    assert res.status == "optimal"
    assert res.best.feasible
    assert res.best.cost == pytest.approx(opt, abs=1e-6)
    # reported figures equal an independent recomputation
    assert res.best.cost == pytest.approx(independent_cost(bqm, p, cs, res.best.assignment))
    assert independent_feasible(cs, res.best.assignment)
    src = cands.ids.index(res.best.candidate_id)
    caller = dict(zip(p.labels, p.to_caller(cands.X[src])))
    assert res.best.flips == sum(res.best.assignment[v] != caller[v] for v in p.labels)


@pytest.mark.parametrize("seed", range(6))
def test_portfolio_reaches_brute_force_optimum_and_audits_every_candidate(seed):
    bqm, p, cs, cands = random_case(100 + seed, 12, "BINARY")
    opt, _ = brute_force(p, cs)
    res = repair(p, cands, cs, time_limit=2.0, seed=seed, workers=2)
    assert [r.candidate_id for r in res.audit] == list(cands.ids)
    for row in res.audit:
        assert row.cost_before == pytest.approx(
            independent_cost(bqm, p, cs, dict(zip(p.labels, p.to_caller(cands.X[cands.ids.index(row.candidate_id)])))))
    if opt is None:
        assert res.status == "infeasible"
        return
    assert res.best.cost == pytest.approx(opt, abs=1e-6)
    assert res.best.cost <= min(r.cost_after for r in res.audit if r.feasible) + 1e-9
    assert res.best.penalties and res.best.base_energy == pytest.approx(bqm.energy(res.best.assignment))


def test_the_audit_is_held_by_column_and_reads_as_rows():
    from flipfix.repair.result import Audit, AuditRow

    bqm, p, cs, cands = random_case(140, 12, "BINARY")
    res = repair(p, cands, cs, method="greedy", time_limit=2.0)
    audit = res.audit
    assert isinstance(audit, Audit) and len(audit) == len(cands.ids)
    assert audit.cost_before.dtype == np.float64 and audit.flips.dtype == np.int64
    rows = list(audit)
    assert all(isinstance(r, AuditRow) for r in rows)
    for k, row in enumerate(rows):  # each row is its columns' entries
        assert row.candidate_id == cands.ids[k] and row.flips == audit.flips[k]
        assert row.cost_after == audit.cost_after[k] and row.feasible == audit.feasible[k]
        assert row.cost_before == pytest.approx(independent_cost(
            bqm, p, cs, dict(zip(p.labels, p.to_caller(cands.X[k])))))
    assert list(audit[1:3]) == rows[1:3] and audit[-1] == rows[-1]
    assert Audit.from_rows(rows) == audit and audit == rows
    dicts = res.to_dict()["audit"]
    assert [d["candidate_id"] for d in dicts] == list(cands.ids)
    assert [(d["cost"], d["flips"], d["feasible"], d["method"]) for d in dicts] == [
        (r.cost_after, r.flips, r.feasible, r.method) for r in rows]
    with pytest.raises(IndexError):
        audit[len(audit)]


def test_glover_kochenberger_du_worked_example():
    # Tutorial example (values from memory): minimise
    # y = -5x1 - 3x2 - 8x3 - 6x4 + 4x1x2 + 8x1x3 + 2x2x3 + 10x3x4, optimum y = -11 at x = (1, 0, 0, 1).
    p = Problem.from_terms({1: -5, 2: -3, 3: -8, 4: -6},
                           [(1, 2, 4), (1, 3, 8), (2, 3, 2), (3, 4, 10)])
    cands = CandidateSet.from_array(p, [[0, 0, 0, 0], [1, 1, 1, 1]])
    for method in ("greedy", "cpsat", "portfolio"):
        res = repair(p, cands, [], method=method, time_limit=1.0)
        assert res.best.cost == -11
        assert res.best.assignment == {1: 1, 2: 0, 3: 0, 4: 1}
    assert repair(p, cands, [], method="cpsat", time_limit=1.0).status == "optimal"


def test_cpsat_proves_bqp50_1_optimal(benchmarks):
    # OR-Library bqp50-1, best known (proved optimal in the literature) -2098.
    p = read_bqp(benchmarks / "bqp" / "bqp50-1.sparse")
    cands = CandidateSet.from_array(p, np.zeros((1, p.n), dtype=np.int8))
    res = repair(p, cands, [], method="cpsat", time_limit=30.0, workers=2)
    assert res.status == "optimal"
    assert res.best.cost == -2098


@pytest.mark.parametrize("name", sorted(BQP_BEST))
def test_greedy_never_reports_below_best_known(benchmarks, name):
    p = read_bqp(benchmarks / "bqp" / f"{name}.sparse")
    rng = np.random.default_rng(0)
    cands = CandidateSet.from_array(p, rng.integers(0, 2, (64, p.n)))
    res = repair(p, cands, [], method="greedy", time_limit=5.0)
    assert res.best.cost >= BQP_BEST[name]
    # and the reported cost is the file's objective, recomputed here from the raw triples
    rows = [tuple(map(float, line.split())) for line in
            (benchmarks / "bqp" / f"{name}.sparse").read_text().splitlines()[1:] if line.strip()]
    x = res.best.x
    raw = sum(w * x[int(i) - 1] * x[int(j) - 1] * (1 if i == j else 2) for i, j, w in rows)
    assert res.best.cost == pytest.approx(raw)


@pytest.mark.parametrize("name", sorted(QKP_BEST))
def test_knapsack_capacity_arrives_late(benchmarks, name):
    kp = read_qkp(benchmarks / "qkp" / f"{name}.txt")
    rng = np.random.default_rng(1)
    # library: greedy optima of the unconstrained profit (they ignore the capacity)
    free = repair(kp.problem, CandidateSet.from_array(kp.problem, rng.integers(0, 2, (8, 100))),
                  [], method="greedy", time_limit=2.0)
    X = np.vstack([free.best.x, rng.integers(0, 2, (3, 100))])
    cands = CandidateSet.from_array(kp.problem, X)
    assert (X @ kp.weights > kp.capacity).any()
    res = repair(kp.problem, cands, [kp.constraint], time_limit=2.0)
    assert res.best.feasible
    assert res.best.x @ kp.weights <= kp.capacity
    assert -res.best.cost <= QKP_BEST[name]  # never above the published best-known profit
    assert -res.best.cost == pytest.approx(kp.profit(res.best.x[None, :])[0])


def test_unsatisfiable_constraints_are_a_status_not_an_error():
    p = Problem.from_terms({0: 1.0, 1: -1.0, 2: 0.5}, [(0, 1, 1.0)])
    cands = CandidateSet.from_array(p, [[0, 0, 0], [1, 1, 1]])
    cs = [LinearConstraint({0: 1, 1: 1, 2: 1}, ">=", 4)]
    for method in ("cpsat", "portfolio"):
        res = repair(p, cands, cs, method=method, time_limit=1.0)
        assert res.status == "infeasible"
        assert not res.best.feasible
        assert res.best.violation == pytest.approx(1.0)  # least-violating: all ones
    # greedy proves nothing itself; the conflict search that follows proves it (CP-SAT)
    res = repair(p, cands, cs, method="greedy", time_limit=1.0)
    assert res.status == "infeasible" and res.best.violation == pytest.approx(1.0)
    assert [(m.index, m.name) for m in res.conflict.members] == [(0, "linear")]
    clash = repair(p, cands, [FixVariables({0: 1}), FixVariables({0: 0})])
    assert clash.status == "infeasible" and "fix variable 0 to different values" in clash.message
    assert "[0] fix, [1] fix#2" in clash.message


@pytest.mark.parametrize("method", ["greedy", "cpsat", "portfolio"])
def test_max_flips_is_a_hard_radius_and_price_trades_cost_for_flips(method):
    bqm, p, cs, cands = random_case(7, 14, "BINARY")
    ref = dict(zip(p.labels, np.zeros(p.n, dtype=int)))
    cs = [HammingPenalty(ref, weight=0.0)]
    for R in (0, 2):
        res = repair(p, cands, cs, method=method, max_flips=R, time_limit=1.0)
        assert all(row.flips <= R for row in res.audit)
    free = repair(p, cands, cs, method=method, time_limit=1.0)
    priced = repair(p, cands, cs, method=method, flip_price=50.0, time_limit=1.0)
    assert priced.best.flips <= free.best.flips
    assert priced.best.objective == pytest.approx(priced.best.cost + 50.0 * priced.best.flips)


def test_cancel_returns_best_so_far():
    p = read_bqp(__import__("conftest").BENCHMARKS / "bqp" / "bqp100-1.sparse")
    cands = CandidateSet.from_array(p, np.random.default_rng(0).integers(0, 2, (4, p.n)))
    ev = threading.Event()
    timer = threading.Timer(0.5, ev.set)
    timer.start()
    res = repair(p, cands, [], method="cpsat", time_limit=60.0, cancel=ev)
    timer.cancel()
    assert res.seconds < 30.0  # stopped by the event, far before the 60 s budget
    assert res.best.feasible


def test_pareto_front_is_non_dominated_over_audit():
    bqm, p, cs, cands = random_case(3, 12, "BINARY")
    res = repair(p, cands, cs, method="portfolio", time_limit=1.0, pareto=True)
    assert res.pareto
    pts = [(q.cost, q.flips) for q in res.pareto]
    for a in pts:
        assert not any(b != a and b[0] <= a[0] and b[1] <= a[1] for b in pts)
    feasible_rows = [(r.cost_after, r.flips) for r in res.audit if r.feasible]
    for c, f in feasible_rows:  # every audit row is weakly dominated by the front
        assert any(pc <= c + 1e-9 and pf <= f for pc, pf in pts)


def test_bad_options_name_the_option():
    p = Problem.from_terms({0: 1.0}, [])
    c = CandidateSet.from_array(p, [[0]])
    from flipfix.repair import InputError

    for kw, field in [({"method": "anneal"}, "method"), ({"time_limit": 0}, "time_limit"),
                      ({"max_flips": -1}, "max_flips"), ({"flip_price": float("nan")}, "flip_price"),
                      ({"seed": -3}, "seed"), ({"workers": 0}, "workers")]:
        with pytest.raises(InputError) as err:
            repair(p, c, [], **kw)
        assert err.value.field == field


# ------------------------------------------------------------------ properties
@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 10_000), n=st.integers(3, 10), hard=st.booleans())
def test_greedy_output_is_a_feasible_local_minimum(seed, n, hard):
    rng = np.random.default_rng(seed)
    bqm = dimod.generators.gnp_random_bqm(n, 0.6, "BINARY", random_state=seed)
    p = Problem.from_bqm(bqm)
    cs = [HammingPenalty({v: int(rng.integers(2)) for v in p.labels}, weight=1.0,
                         shape="quadratic")]
    if hard:
        cs.append(LinearConstraint({v: 1 for v in p.labels}, "==", n // 2))
    X0 = rng.integers(0, 2, (3, n)).astype(np.int8)
    res = repair(p, CandidateSet.from_array(p, X0), cs, method="greedy", time_limit=5.0)
    comp = compile_constraints(p, cs)
    assert all(row.feasible for row in res.audit)
    x = res.best.x
    ev = comp.evaluate(x)
    moves = [x ^ np.eye(n, dtype=np.int8)[i] for i in range(n)]
    if hard:  # pair moves keep the equality
        moves += [x ^ np.eye(n, dtype=np.int8)[i] ^ np.eye(n, dtype=np.int8)[j]
                  for i in range(n) for j in range(n) if x[i] != x[j]]
    evm = comp.evaluate(np.vstack(moves))
    if not hard:  # single-flip local minimum
        assert (evm.cost >= ev.cost[0] - 1e-9).all()
    else:  # no feasible pair move improves (n <= 10: every pair is among the best six ups/downs)
        assert evm.feasible.any()
        assert (evm.cost[evm.feasible] >= ev.cost[0] - 1e-9).all()
    assert res.best.flips == int((x != X0[int(res.best.candidate_id[1:])]).sum())


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 10_000), n=st.integers(2, 9))
def test_spin_and_binary_inputs_give_the_same_repair(seed, n):
    rng = np.random.default_rng(seed)
    spin = dimod.generators.gnp_random_bqm(n, 0.7, "SPIN", random_state=seed)
    binary = spin.change_vartype("BINARY", inplace=False)
    ps, pb = Problem.from_bqm(spin), Problem.from_bqm(binary)
    X0 = rng.integers(0, 2, (3, n)).astype(np.int8)
    ref = rng.integers(0, 2, n)
    rs = repair(ps, CandidateSet.from_array(ps, 2 * X0 - 1),
                [HammingPenalty(dict(zip(ps.labels, map(int, 2 * ref - 1))), weight=0.5)],
                method="greedy", time_limit=5.0)
    rb = repair(pb, CandidateSet.from_array(pb, X0),
                [HammingPenalty(dict(zip(pb.labels, map(int, ref))), weight=0.5)],
                method="greedy", time_limit=5.0)
    for a, b in zip(rs.audit, rb.audit):
        assert a.cost_after == pytest.approx(b.cost_after)
        assert a.flips == b.flips
    assert rs.best.x.tolist() == rb.best.x.tolist()
    assert set(rs.best.assignment.values()) <= {-1, 1}


@pytest.mark.parametrize("method", ["greedy", "cpsat", "portfolio"])
def test_a_flip_cap_that_the_fixings_break_leaves_no_feasible_answer(method):
    # fixing a bit away from every candidate needs one flip; a cap of 0 forbids it
    p = Problem.from_terms({0: 1.0, 1: -1.0}, [(0, 1, 0.5)])
    cands = CandidateSet.from_array(p, [[0, 0], [0, 1]])
    res = repair(p, cands, [FixVariables({0: 1})], method=method, max_flips=0, time_limit=0.5)
    assert not res.best.feasible
    assert res.status == "no_feasible_found"
    assert all(not row.feasible for row in res.audit)
    ok = repair(p, cands, [FixVariables({0: 1})], method=method, max_flips=1, time_limit=0.5)
    assert ok.best.feasible and ok.best.flips <= 1 and ok.best.violations["max_flips"] == 0


@pytest.mark.parametrize("width,top", [(1, 1), (2, 2), (7, 3), (90, 10), (500, 50)])
def test_kicks_flip_a_uniform_number_of_distinct_variables(width, top):
    # each kick flips r distinct variables, r drawn from min(2, top) .. top; over many rows
    # every size and every position turns up
    from flipfix.repair.solvers.portfolio import kick_masks

    rows = 4000
    M = kick_masks(np.random.default_rng(5), rows, width, top)
    assert M.shape == (rows, width) and M.dtype == bool
    sizes = M.sum(axis=1)
    lo = min(2, top)
    assert sizes.min() == lo and sizes.max() == top
    assert set(np.unique(sizes)) == set(range(lo, top + 1))
    assert M.any(axis=0).all()
    # same seed, same kicks
    assert np.array_equal(M, kick_masks(np.random.default_rng(5), rows, width, top))
