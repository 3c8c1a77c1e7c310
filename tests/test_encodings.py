"""Integer decisions (flipfix.repair.model.encodings): encodings, lowering, repair, reports, JSON.

Outside references used (named again next to each check):
* Chancellor, "Domain wall encoding of discrete variables for quantum annealing
  and QAOA", Quantum Science and Technology 4, 045004 (2019): the Ising form of
  the domain-wall penalty, written here from memory.
* dimod.ExactSolver: brute force over every bit string.
* CP-SAT optimality proofs (status "optimal" over the whole space).
"""

from __future__ import annotations

import itertools

import dimod
import numpy as np
import pytest

from flipfix.repair import CandidateSet, Decision, InputError, Problem, repair
from flipfix.repair.documents import forms as documents
from flipfix.repair.model import encodings as enc
from flipfix.repair.lowering.compiled import compile_constraints
from flipfix.repair.model.constraints import AllowValues, DecisionChangePenalty, ForbidValues, ForceValue


# ----------------------------------------------------------------- helpers
def ref_index(encoding: str, bits) -> int | None:
    """Value index of a bit string, written independently of flipfix.repair.model.encodings."""
    bits = [int(b) for b in bits]
    if encoding == "one_hot":
        return bits.index(1) if sum(bits) == 1 else None
    if any(bits[i] < bits[i + 1] for i in range(len(bits) - 1)):
        return None
    return sum(bits)


def ref_bits(encoding: str, k: int, m: int) -> list[int]:
    if encoding == "one_hot":
        return [int(i == m) for i in range(k)]
    return [int(i < m) for i in range(k - 1)]


def ref_shape(shape: str, weight: float, d: int, threshold=0.0, table=None) -> float:
    """Penalty shapes as documented in the proto (PenaltyShape) and README."""
    if shape == "linear":
        return weight * d
    if shape == "quadratic":
        return weight * d * d
    if shape == "threshold":
        return weight * max(0.0, d - threshold)
    return weight * table[min(d, len(table) - 1)]


def integer_model(D: int, k: int, seed: int):
    """Seeded random integer model: unary U (D, k) and pair matrices G[(a, b)] (k, k)."""
    rng = np.random.default_rng(seed)
    U = np.round(rng.uniform(-3, 3, size=(D, k)), 3)
    G = {(a, b): np.round(rng.uniform(-2, 4, size=(k, k)), 3)
         for a in range(D) for b in range(a + 1, D) if rng.random() < 0.8}
    return U, G


def integer_energy(U, G, plan) -> float:
    return float(sum(U[d, m] for d, m in enumerate(plan))
                 + sum(M[plan[a], plan[b]] for (a, b), M in G.items()))


def encoded_problem(encoding: str, U, G, values=None) -> Problem:
    """The integer model in bits, built with encodings.unary_terms / pair_terms."""
    D, k = U.shape
    values = tuple(range(1, k + 1)) if values is None else tuple(values)
    nb = k if encoding == "one_hot" else k - 1
    ds = [Decision(f"d{a}", encoding, tuple(f"d{a}_{i}" for i in range(nb)), values)
          for a in range(D)]
    lin: dict = {lab: 0.0 for d in ds for lab in d.variables}
    quad: dict = {}
    off = 0.0
    for a, d in enumerate(ds):
        l, o = enc.unary_terms(d, U[a])
        off += o
        for lab, w in l.items():
            lin[lab] += w
    for (a, b), M in G.items():
        l, q, o = enc.pair_terms(ds[a], ds[b], M)
        off += o
        for lab, w in l.items():
            lin[lab] += w
        for key, w in q.items():
            quad[key] = quad.get(key, 0.0) + w
    labels = [lab for d in ds for lab in d.variables]
    return Problem.from_terms(lin, [(u, v, w) for (u, v), w in quad.items()], offset=off,
                              labels=labels, decisions=ds)


def encode_plans(problem: Problem, plans) -> np.ndarray:
    X = np.zeros((len(plans), problem.n), dtype=np.int8)
    for r, plan in enumerate(plans):
        for d, m in zip(problem.decisions, plan):
            for lab, b in zip(d.variables, ref_bits(d.encoding, len(d.values), m)):
                X[r, problem.index[lab]] = b
    return X


def every_string(problem: Problem):
    """Every bit string int8 (2^n, n) in the problem's label order and its energy float64
    (2^n,), by dimod.ExactSolver (dimod's exhaustive reference solver)."""
    ss = dimod.ExactSolver().sample(problem.to_bqm())
    X = np.asarray(ss.record.sample)[:, [ss.variables.index(v) for v in problem.labels]]
    return X.astype(np.int8), np.asarray(ss.record.energy, dtype=np.float64)


def brute_force(problem: Problem, extra_cost, allowed):
    """Every bit string via dimod.ExactSolver; returns (best cost, best plans, table of valid rows).

    ``extra_cost(plan)`` is the integer-level late penalty, ``allowed(plan)`` the hard part.
    """
    X, E = every_string(problem)
    best, plans = np.inf, []
    for x, e in zip(X, E):
        plan = tuple(ref_index(d.encoding, x[[problem.index[v] for v in d.variables]])
                     for d in problem.decisions)
        if None in plan or not allowed(plan):
            continue
        c = e + extra_cost(plan)
        if c < best - 1e-9:
            best, plans = c, [plan]
        elif abs(c - best) <= 1e-9:
            plans.append(plan)
    return best, plans


def plan_of(problem: Problem, x) -> tuple:
    x = np.asarray(x)
    return tuple(ref_index(d.encoding, x[[problem.index[v] for v in d.variables]])
                 for d in problem.decisions)


# ------------------------------------------------- Chancellor's domain wall
@pytest.mark.parametrize("k", [2, 3, 4, 5, 6, 7])
def test_domain_wall_matches_chancellor(k):
    # Chancellor (2019), Quantum Sci. Technol. 4 045004, from memory: a variable with M = k
    # values uses M - 1 spins sigma_1..sigma_{M-1} with
    #   H_DW = -kappa * (sum_{a=1}^{M-2} s_a s_{a+1} - s_1 + s_{M-1}),
    # i.e. a ferromagnetic chain between virtual end spins fixed at -1 and +1; the ground
    # states have exactly one domain wall, one per value, and each further pair of walls
    # costs 4 kappa (two more unsatisfied bonds at 2 kappa each).
    kappa = 1.5
    M = k
    spins = [f"s{a}" for a in range(1, M)]
    lin = {s: 0.0 for s in spins}
    lin[spins[0]] += kappa          # -kappa * (-s_1)
    lin[spins[-1]] += -kappa        # -kappa * (+s_{M-1})
    quad = {(spins[a], spins[a + 1]): -kappa for a in range(M - 2)}
    bqm = dimod.BinaryQuadraticModel(lin, quad, 0.0, dimod.SPIN)
    ss = dimod.ExactSolver().sample(bqm)                       # brute force: dimod.ExactSolver
    S = np.asarray(ss.record.sample)[:, [ss.variables.index(s) for s in spins]]
    E = np.asarray(ss.record.energy)
    ground = E.min()
    assert ground == pytest.approx(-kappa * (M - 2))           # one unsatisfied bond of M

    # our bits: x_i = 1 where sigma_{i+1} = -1 (the run of ones sits on the -1 side)
    X = ((1 - S) // 2).astype(np.int8)
    d = Decision("v", "domain_wall", tuple(f"x{i}" for i in range(k - 1)), tuple(range(k)))
    p = Problem.from_terms({v: 0.0 for v in d.variables}, [], labels=list(d.variables),
                           decisions=[d])
    idx = enc.decode_indices(p, X)[:, 0]
    is_ground = np.isclose(E, ground)
    # k values in k - 1 bits; exactly one valid string per value, and they are the ground states
    assert X.shape[1] == k - 1
    assert is_ground.sum() == k
    assert np.array_equal(idx >= 0, is_ground)
    assert sorted(idx[is_ground].tolist()) == list(range(k))
    for x, m in zip(X[is_ground], idx[is_ground]):
        assert x.tolist() == enc.encode(d, int(m)).tolist() == ref_bits("domain_wall", k, m)
    # energy penalty of an invalid string: 4 kappa per extra pair of walls, which is 4 kappa
    # times our 0/1 penalty validity_penalty (the number of "0 then 1" places)
    lin_p, quad_p, off_p = enc.validity_penalty(d, strength=1.0)
    pen = dimod.BinaryQuadraticModel(lin_p, quad_p, off_p, dimod.BINARY)
    ours = pen.energies((X, list(d.variables)))
    assert np.allclose(E - ground, 4 * kappa * ours)
    assert np.all(ours[~is_ground] >= 1)
    # the hard rows of the repair accept exactly the valid strings
    ev = compile_constraints(p, []).evaluate(X)
    assert np.array_equal(ev.feasible, is_ground)


def test_one_hot_penalty_and_rows_by_brute_force():
    # dimod.ExactSolver brute force: (sum x - 1)^2 is 0 exactly on the k one-hot strings
    k = 4
    d = Decision("v", "one_hot", tuple(f"x{i}" for i in range(k)), tuple("abcd"))
    p = Problem.from_terms({v: 0.0 for v in d.variables}, [], labels=list(d.variables),
                           decisions=[d])
    lin, quad, off = enc.validity_penalty(d, strength=2.0)
    ss = dimod.ExactSolver().sample(dimod.BinaryQuadraticModel(lin, quad, off, dimod.BINARY))
    X = np.asarray(ss.record.sample)[:, [ss.variables.index(v) for v in d.variables]]
    E = np.asarray(ss.record.energy)
    assert np.allclose(E, 2.0 * (X.sum(axis=1) - 1) ** 2)
    ev = compile_constraints(p, []).evaluate(X.astype(np.int8))
    assert np.array_equal(ev.feasible, X.sum(axis=1) == 1)
    assert np.array_equal(enc.codewords(d), np.eye(k, dtype=np.int8))


@pytest.mark.parametrize("encoding", ["one_hot", "domain_wall"])
def test_unary_and_pair_terms_exact_on_valid_strings(encoding):
    # dimod.ExactSolver brute force: the bit model equals the integer model on every valid string
    U, G = integer_model(3, 4, seed=11)
    p = encoded_problem(encoding, U, G)
    X, energy = every_string(p)
    seen = 0
    for x, e in zip(X, energy):
        plan = plan_of(p, x)
        if None not in plan:
            assert e == pytest.approx(integer_energy(U, G, plan), abs=1e-9)
            seen += 1
    assert seen == 4 ** 3


# ---------------------------------------------------- lowering, brute force
CASES = [
    ("linear", "changed", {}),
    ("quadratic", "changed", {}),
    ("threshold", "absolute", {"threshold": 1.0}),
    ("table", "absolute", {"table": [0.0, 0.5, 3.0, 7.0]}),
    ("quadratic", "absolute", {}),
]


@pytest.mark.parametrize("encoding", ["one_hot", "domain_wall"])
@pytest.mark.parametrize("shape,distance,extra", CASES)
def test_lowering_matches_definitions_on_every_string(encoding, shape, distance, extra):
    # dimod.ExactSolver enumerates every bit string; Compiled.evaluate must give the integer
    # definition on valid strings, mark every invalid one infeasible, and never index a
    # count table out of range (the counts stay in range on invalid strings too).
    U, G = integer_model(3, 4, seed=5)
    values = (0, 2, 3, 7)   # unevenly spaced, so "absolute" differs from index distance
    p = encoded_problem(encoding, U, G, values=values)
    ref = {"d0": 3, "d2": 0}
    w = 1.25
    cons = [ForbidValues("d1", [2]), AllowValues("d2", [0, 3, 7]),
            DecisionChangePenalty(ref, weight=w, shape=shape, distance=distance, **extra)]
    comp = compile_constraints(p, cons)
    X, energy = every_string(p)
    ev = comp.evaluate(X)
    for r, x in enumerate(X):
        plan = plan_of(p, x)
        if None in plan:
            assert not ev.feasible[r]
            continue
        vals = {d.name: values[m] for d, m in zip(p.decisions, plan)}
        ok = vals["d1"] != 2 and vals["d2"] in (0, 3, 7)
        assert ev.feasible[r] == ok
        if distance == "changed":
            dist = sum(vals[name] != v for name, v in ref.items())
        else:
            dist = sum(abs(vals[name] - v) for name, v in ref.items())
        want = energy[r] + ref_shape(shape, w, dist, **extra)
        assert ev.cost[r] == pytest.approx(want, abs=1e-9)


@pytest.mark.parametrize("encoding", ["one_hot", "domain_wall"])
@pytest.mark.parametrize("values", [(3, 1, 2, 0), (9, 5, 4, -2)])
def test_absolute_distance_with_unordered_values(encoding, values):
    # dimod.ExactSolver over every bit string: |value - ref| for values out of order
    # (non-monotone: one term per value) and descending ones (per-bit steps)
    U, G = integer_model(2, 4, seed=9)
    p = encoded_problem(encoding, U, G, values=values)
    ref = {"d0": values[1], "d1": values[3]}
    comp = compile_constraints(p, [DecisionChangePenalty(ref, weight=0.5, shape="quadratic",
                                                             distance="absolute")])
    X, energy = every_string(p)
    ev = comp.evaluate(X)
    for r, x in enumerate(X):
        plan = plan_of(p, x)
        if None in plan:
            continue
        dist = abs(values[plan[0]] - ref["d0"]) + abs(values[plan[1]] - ref["d1"])
        assert ev.cost[r] == pytest.approx(energy[r] + 0.5 * dist ** 2, abs=1e-9)


def test_spin_problem_with_decisions():
    # decisions read the internal 0/1 bits: spin +1 is bit 1 (s = 2x - 1)
    d = Decision("c", "one_hot", ("a", "b", "c"), ("A", "B", "C"))
    p = Problem.from_terms({"a": 0.5, "b": -0.25, "c": 0.0}, [("a", "b", 1.0)], vartype="SPIN",
                           decisions=[d])
    cands = CandidateSet.from_array(p, [[1, 1, -1], [-1, -1, -1]])
    issues = enc.check_candidates(p, cands.X, ids=list(cands.ids))
    assert [(i.candidate, i.decision) for i in issues] == [("c0", "c"), ("c1", "c")]
    res = repair(p, cands, [ForceValue("c", "B")], method="cpsat", time_limit=0.5, seed=0)
    assert res.best.assignment == {"a": -1, "b": 1, "c": -1}
    assert res.best.changes == [("c", None, "B")]


def test_force_value_pins_every_bit():
    U, G = integer_model(2, 5, seed=2)
    for encoding in ("one_hot", "domain_wall"):
        p = encoded_problem(encoding, U, G)
        comp = compile_constraints(p, [ForceValue("d1", 4)])
        d = p.decisions[1]
        want = ref_bits(encoding, 5, 3)
        assert [int(comp.fixed[p.index[v]]) for v in d.variables] == want


def test_linear_change_penalty_merges_into_the_qubo():
    U, G = integer_model(3, 4, seed=1)
    p = encoded_problem("domain_wall", U, G)
    comp = compile_constraints(p, [DecisionChangePenalty({"d0": 2, "d1": 1}, weight=2.0)])
    assert comp.counts == []            # linear shape: no count penalty left for the solvers
    # one decision: d is 0 or 1, so even a quadratic shape is linear in d and merges
    comp = compile_constraints(p, [DecisionChangePenalty({"d0": 2}, shape="quadratic")])
    assert comp.counts == []
    comp = compile_constraints(p, [DecisionChangePenalty({"d0": 2, "d1": 1}, shape="quadratic")])
    assert len(comp.counts) == 1


# ------------------------------------------------------------------ repair
def _constraints_small():
    return [ForbidValues("d0", [1, 2]),
            DecisionChangePenalty({"d0": 1, "d1": 3, "d2": 2}, weight=1.5,
                                      shape="quadratic", distance="absolute")]


def _extra_small(plan):
    vals = [m + 1 for m in plan]
    dist = abs(vals[0] - 1) + abs(vals[1] - 3) + abs(vals[2] - 2)
    return ref_shape("quadratic", 1.5, dist)


def _allowed_small(plan):
    return plan[0] + 1 not in (1, 2)


@pytest.mark.parametrize("encoding", ["one_hot", "domain_wall"])
def test_cpsat_repair_equals_brute_force_optimum(encoding):
    # dimod.ExactSolver brute force over every bit string gives the constrained optimum;
    # CP-SAT (no radius) must reach it and prove it ("optimal").
    U, G = integer_model(3, 4, seed=7)
    p = encoded_problem(encoding, U, G)
    best, plans = brute_force(p, _extra_small, _allowed_small)
    rng = np.random.default_rng(3)
    X = rng.integers(0, 2, size=(3, p.n)).astype(np.int8)       # mostly broken encodings
    cands = CandidateSet.from_array(p, X)
    res = repair(p, cands, _constraints_small(), method="cpsat", time_limit=1.0, seed=0)
    assert res.status == "optimal"
    assert res.best.feasible
    assert res.best.cost == pytest.approx(best, abs=1e-6)
    assert plan_of(p, res.best.x) in plans


@pytest.mark.parametrize("encoding", ["one_hot", "domain_wall"])
def test_greedy_repair_equals_brute_force_optimum(encoding):
    # dimod.ExactSolver brute force; the library holds every integer plan (valid strings), so a
    # descent that keeps encodings valid and never worsens a candidate must return the optimum.
    U, G = integer_model(3, 4, seed=7)
    p = encoded_problem(encoding, U, G)
    best, plans = brute_force(p, _extra_small, _allowed_small)
    all_plans = list(itertools.product(range(4), repeat=3))
    cands = CandidateSet.from_array(p, encode_plans(p, all_plans))
    res = repair(p, cands, _constraints_small(), method="greedy", time_limit=1.0, seed=0)
    assert res.best.feasible
    assert res.best.cost == pytest.approx(best, abs=1e-6)
    assert plan_of(p, res.best.x) in plans
    for row in res.audit:
        assert row.feasible         # every valid plan can be repaired (d0 moved to 3 or 4)


@pytest.mark.parametrize("method", ["greedy", "cpsat", "portfolio"])
@pytest.mark.parametrize("encoding", ["one_hot", "domain_wall"])
def test_every_repaired_answer_decodes_validly(method, encoding):
    # invalid candidates are accepted, reported by check_candidates, and repaired to valid plans
    U, G = integer_model(4, 4, seed=21)
    p = encoded_problem(encoding, U, G)
    rng = np.random.default_rng(8)
    X = rng.integers(0, 2, size=(6, p.n)).astype(np.int8)
    issues = enc.check_candidates(p, X, ids=[f"r{k}" for k in range(6)])
    broken = {(i.candidate, i.decision) for i in issues}
    for k in range(6):
        for d in p.decisions:
            bits = X[k, [p.index[v] for v in d.variables]]
            assert ((f"r{k}", d.name) in broken) == (ref_index(encoding, bits) is None)
    assert issues and all(i.how.startswith(encoding) for i in issues)
    cands = CandidateSet.from_array(p, X, ids=[f"r{k}" for k in range(6)])
    cons = [ForbidValues("d3", [4]), DecisionChangePenalty({"d0": 2, "d1": 2})]
    res = repair(p, cands, cons, method=method, time_limit=1.0, seed=0)
    assert res.best.feasible
    got = enc.decode(p, res.best.x[None, :])[0]
    assert None not in got.values() and got["d3"] != 4
    # changes count decisions, flips count bits
    before = plan_of(p, X[cands.ids.index(res.best.candidate_id)])
    after = plan_of(p, res.best.x)
    want = [(d.name, None if b is None else d.values[b], d.values[a])
            for d, b, a in zip(p.decisions, before, after) if b != a]
    assert res.best.changes == want
    assert res.best.decisions_changed == len(want)
    assert res.best.flips == int((res.best.x != X[cands.ids.index(res.best.candidate_id)]).sum())
    # the audit row of the candidate the answer was repaired from holds that answer
    src = cands.ids.index(res.best.repaired_from)
    row = res.audit[src]
    assert row.cost_after == pytest.approx(res.best.cost)
    assert row.flips == int((res.best.x != X[src]).sum()) >= res.best.flips
    # the audit names every broken (candidate, decision), and says how
    for k, row in enumerate(res.audit):
        assert row.encoding_issues == [(i.decision, i.how) for i in issues if i.candidate == f"r{k}"]
    assert res.to_dict()["audit"][0]["encoding_issues"] == [
        {"decision": d, "how": h} for d, h in res.audit[0].encoding_issues]


def test_equivalence_one_hot_and_domain_wall():
    # Same integer model in both encodings; brute force (dimod.ExactSolver) fixes the unique
    # constrained optimum; CP-SAT repairs both libraries to that plan and cost. With k = 3
    # values a domain-wall move of |a - b| <= 2 steps flips |a - b| bits and a one-hot move
    # always 2, so the domain-wall repair flips no more bits.
    D, k = 4, 3
    U, G = integer_model(D, k, seed=13)
    cons = [ForbidValues("d1", [2]), DecisionChangePenalty(
        {"d0": 1, "d1": 2, "d2": 3, "d3": 1}, weight=0.75, distance="changed")]

    def extra(plan):
        vals = [m + 1 for m in plan]
        return 0.75 * sum(a != b for a, b in zip(vals, (1, 2, 3, 1)))

    rng = np.random.default_rng(4)
    plans = [tuple(rng.integers(0, k, size=D)) for _ in range(4)]
    out = {}
    for encoding in ("one_hot", "domain_wall"):
        p = encoded_problem(encoding, U, G)
        best, opt = brute_force(p, extra, lambda plan: plan[1] != 1)
        assert len(opt) == 1                       # unique optimum (precondition)
        cands = CandidateSet.from_array(p, encode_plans(p, plans))
        res = repair(p, cands, cons, method="cpsat", time_limit=1.0, seed=0)
        assert res.status == "optimal"
        assert plan_of(p, res.best.x) == opt[0]
        assert res.best.cost == pytest.approx(best, abs=1e-6)
        out[encoding] = (opt[0], res.best.cost, res.best.flips,
                         enc.decode(p, res.best.x[None, :])[0], res.best.decisions_changed)
    oh, dw = out["one_hot"], out["domain_wall"]
    assert oh[0] == dw[0] and oh[3] == dw[3]
    assert oh[1] == pytest.approx(dw[1], abs=1e-6)
    assert dw[2] <= oh[2]
    assert oh[2] == 2 * oh[4]          # one-hot: two bits per changed decision


# -------------------------------------------------------------- validation
def _bits_problem(labels):
    return dict(linear={lab: 0.0 for lab in labels}, quadratic=[], labels=labels)


@pytest.mark.parametrize("decisions,field,text", [
    ([Decision("a", "one_hot", ("x0", "x1"), (1, 2, 3))], "decisions[0].variables", "needs 3 bits"),
    ([Decision("a", "domain_wall", ("x0", "x1", "x2"), (1, 2, 3))], "decisions[0].variables",
     "needs 2 bits"),
    ([Decision("a", "one_hot", ("x0", "x1"), (1, 2)), Decision("b", "one_hot", ("x1", "x2"), (1, 2))],
     "decisions[1].variables[0]", "also in decision 'a'"),
    ([Decision("a", "one_hot", ("x0", "x0"), (1, 2))], "decisions[0].variables[1]", "twice"),
    ([Decision("a", "one_hot", ("x0", "nope"), (1, 2))], "decisions[0].variables[1]", "unknown"),
    ([Decision("a", "one_hot", ("x0", "x1"), (1, 1))], "decisions[0].values[1]", "duplicate"),
    ([Decision("a", "one_hot", ("x0",), (1,))], "decisions[0].values", "at least 2"),
    ([Decision("a", "binary", ("x0", "x1"), (1, 2))], "decisions[0].encoding", "one of"),
    ([Decision("a", "one_hot", ("x0", "x1"), (1, 2)), Decision("a", "one_hot", ("x2", "x3"), (1, 2))],
     "decisions[1].name", "duplicate"),
])
def test_decision_validation_names_the_field(decisions, field, text):
    with pytest.raises(InputError) as e:
        Problem.from_terms(**_bits_problem(["x0", "x1", "x2", "x3"]), decisions=decisions)
    assert e.value.field == field
    assert text in e.value.message


def _doc():
    return {"vartype": "BINARY", "linear": {"a0": 1.0, "a1": -1.0, "a2": 0.5, "b0": 0.0, "b1": 0.0},
            "quadratic": [["a0", "b0", 2.0]],
            "decisions": [{"name": "a", "encoding": "domain_wall", "variables": ["a0", "a1", "a2"],
                           "values": [1, 2, 3, 4]},
                          {"name": "b", "encoding": "one_hot", "variables": ["b0", "b1"],
                           "values": ["x", "y"]}]}


def test_json_documents_end_to_end():
    p = documents.parse_problem(_doc())
    assert [d.name for d in p.decisions] == ["a", "b"]
    cons = documents.parse_constraints([
        {"type": "forbid_values", "decision": "a", "values": [3, 4]},
        {"type": "force_value", "decision": "b", "value": "y", "name": "b is y"},
        {"type": "allow_values", "decision": "a", "values": [1, 2, 3]},
        {"type": "decision_change", "reference": {"a": 4}, "weight": 2, "distance": "absolute",
         "shape": "threshold", "threshold": 1},
    ], p)
    assert [type(c).__name__ for c in cons] == ["ForbidValues", "ForceValue", "AllowValues",
                                                 "DecisionChangePenalty"]
    cands = documents.parse_candidates([{"id": "c", "assignment": {
        "a0": 1, "a1": 1, "a2": 1, "b0": 1, "b1": 0}}], p)
    res = repair(p, cands, cons, method="cpsat", time_limit=0.5, seed=0)
    assert res.status == "optimal"
    d = res.to_dict()
    assert d["best"]["changes"][-1] == {"decision": "b", "old": "x", "new": "y"}
    assert enc.decode(p, res.best.x[None, :])[0]["a"] in (1, 2)


@pytest.mark.parametrize("obj,field", [
    ({"type": "forbid_values", "decision": "zz", "values": [1]}, "constraints[0].decision"),
    ({"type": "forbid_values", "decision": "a", "values": [1, 9]}, "constraints[0].values[1]"),
    ({"type": "forbid_values", "decision": "a", "values": []}, "constraints[0].values"),
    ({"type": "forbid_values", "decision": "a", "value": [1]}, "constraints[0].value"),
    ({"type": "force_value", "decision": "b", "value": "q"}, "constraints[0].value"),
    ({"type": "allow_values", "decision": "a"}, "constraints[0].values"),
    ({"type": "decision_change", "reference": {"a": 1}, "distance": "far"},
     "constraints[0].distance"),
    ({"type": "decision_change", "reference": {"a": 1}, "weight": -1}, "constraints[0].weight"),
    ({"type": "decision_change", "reference": {"b": "x"}, "distance": "absolute"},
     "constraints[0].reference['b']"),
    ({"type": "decision_change", "reference": {"a": 7}}, "constraints[0].reference['a']"),
    ({"type": "decision_change", "reference": {}}, "constraints[0].reference"),
])
def test_constraint_errors_name_the_field(obj, field):
    p = documents.parse_problem(_doc())
    with pytest.raises(InputError) as e:
        cons = documents.parse_constraints([obj], p)
        compile_constraints(p, cons)
    assert e.value.field == field


@pytest.mark.parametrize("mutate,field", [
    (lambda d: d["decisions"][0].update(encoding="wall"), "problem.decisions[0].encoding"),
    (lambda d: d["decisions"][0].pop("values"), "problem.decisions[0].values"),
    (lambda d: d["decisions"][1].update(variables=["b0", "b1", "a0"], values=[1, 2, 3]),
     "problem.decisions[1].variables[2]"),
    (lambda d: d["decisions"][0].update(values=[1, 2, True, 4]), "problem.decisions[0].values[2]"),
    (lambda d: d["decisions"][0].update(colour="red"), "problem.decisions[0].colour"),
    (lambda d: d.update(decisions={"a": 1}), "problem.decisions"),
])
def test_problem_document_errors_name_the_field(mutate, field):
    doc = _doc()
    mutate(doc)
    with pytest.raises(InputError) as e:
        documents.parse_problem(doc)
    assert e.value.field == field


# ------------------------------------------------------------------- demo
def test_workshop_scenario_repairs_to_a_valid_timetable():
    from flipfix.service.demo_scenario import JOBS, workshop_scenario

    s = workshop_scenario(seed=0)
    p = documents.parse_problem(s["problem"])
    cands = documents.parse_candidates(s["candidates"], p)
    cons = documents.parse_constraints(s["constraints"], p)
    assert len(p.decisions) == 12 and all(d.encoding == "domain_wall" for d in p.decisions)
    assert enc.check_candidates(p, cands.X) == []
    res = repair(p, cands, cons, method="greedy", time_limit=1.0, seed=0)
    assert res.best.feasible
    plan = enc.decode(p, res.best.x[None, :])[0]
    for j, (_, machine, _) in JOBS.items():
        if machine == "Mill":
            assert plan[j] not in (3, 4)
    text = s["render"](res.to_dict())
    assert "Mon AM" in text and "Mill" in text and "proposal" in text
    assert workshop_scenario(seed=0)["candidates"] == s["candidates"]   # seeded


def test_proto_carries_integer_constraints_and_encoding_issues():
    # proto round trip (flipfix.service.convert): typed messages for the four integer kinds
    from flipfix.service import convert

    s_doc = _doc()
    p = documents.parse_problem(s_doc)
    objs = [
        {"type": "forbid_values", "decision": "a", "values": [3, 4], "name": "down"},
        {"type": "force_value", "decision": "b", "value": "y"},
        {"type": "allow_values", "decision": "a", "values": [1, 2, 3]},
        {"type": "decision_change", "reference": {"a": 4, "b": "x"}, "weight": 2.5,
         "distance": "changed", "shape": "table", "table": [0, 1, 5]},
    ]
    msgs = [convert.doc_to_constraint(o, p, field=f"constraints[{k}]") for k, o in enumerate(objs)]
    assert [m.WhichOneof("kind") for m in msgs] == ["forbid_values", "force_value", "allow_values",
                                                    "decision_change"]
    back = convert.constraints_to_domain(msgs)
    assert back == documents.parse_constraints(objs, p)
    bad = convert.doc_to_constraint({"type": "forbid_values", "decision": "a", "values": [9]}, p,
                                    field="constraints[0]")
    with pytest.raises(InputError) as e:
        convert.constraints_to_compiled([bad], p)
    assert e.value.field == "constraints[0].forbid_values.values[0]"   # proto field path
    X = np.asarray([[0, 1, 1, 1, 1], [1, 0, 0, 1, 0]], dtype=np.int8)   # row 0 breaks a and b
    res = repair(p, CandidateSet.from_array(p, X), back, method="cpsat", time_limit=0.5, seed=0)
    reply = convert.result_to_reply(res)
    assert [(i.decision, i.how) for i in reply.audit[0].encoding_issues] == res.audit[0].encoding_issues
    assert [i.decision for i in reply.audit[0].encoding_issues] == ["a", "b"]
    assert convert.reply_to_dict(reply)["audit"] == [
        {**row, "seconds": round(row["seconds"], 6)} for row in res.to_dict()["audit"]]
    # decision values travel typed (DecisionValue; unset where the bits broke the encoding)
    assert convert.reply_to_dict(reply)["best"]["changes"] == res.to_dict()["best"]["changes"]
