"""Pareto front of (cost, flips): checked against an exhaustive O(N^2) dominance comparison."""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from flipfix.repair import CandidateSet, InputError, Problem
from flipfix.repair.model.constraints import FixVariables, HammingPenalty
from flipfix.repair.audit.front import cost_flip_front
from flipfix.repair.audit.pareto import (
    cheapest_within, fewest_flips_within, pareto_front, result_points,
)
from flipfix.repair.result import AuditRow, ParetoPoint


def _dominates(p, q):
    return p[0] <= q[0] and p[1] <= q[1] and (p[0] < q[0] or p[1] < q[1])


def _exhaustive_front(pts):
    """Reference: every point that no other point dominates, compared pair by pair."""
    return [p for p in pts if not any(_dominates(q, p) for q in pts)]


points = st.lists(st.tuples(st.integers(-20, 20).map(float), st.integers(0, 12)), max_size=60)


@settings(max_examples=200, deadline=None)
@given(points)
def test_front_matches_exhaustive_dominance(pts):
    tagged = [(c, f, f"k{i}", "m") for i, (c, f) in enumerate(pts)]
    ref = _exhaustive_front(pts)
    front = pareto_front(tagged)
    assert sorted((p.cost, p.flips) for p in front) == sorted(set(ref))
    # by increasing flips and strictly decreasing cost
    assert all(a.flips < b.flips and a.cost > b.cost for a, b in zip(front, front[1:]))
    # duplicates: the first in input order is kept
    for p in front:
        first = next(i for i, q in enumerate(pts) if q == (p.cost, p.flips))
        assert p.candidate_id == f"k{first}"
    # keep_duplicates keeps every non-dominated point with its multiplicity
    assert sorted((p.cost, p.flips) for p in pareto_front(tagged, keep_duplicates=True)) == sorted(ref)


@settings(max_examples=200, deadline=None)
@given(points, st.integers(0, 12), st.sampled_from([0.0, 1.0, 5.0, 50.0]))
def test_planner_helpers_match_brute_force(pts, max_flips, pct):
    got = cheapest_within(pts, max_flips)
    ok = [p for p in pts if p[1] <= max_flips]
    if not ok:
        assert got is None
    else:
        assert (got.cost, got.flips) == min(ok)
    got = fewest_flips_within(pts, pct)
    if not pts:
        assert got is None
    else:
        best = min(c for c, _ in pts)
        ok = [(f, c) for c, f in pts if c <= best + pct / 100 * abs(best)]
        assert (got.flips, got.cost) == min(ok)
    # both answers lie on the front
    front = {(p.cost, p.flips) for p in pareto_front(pts)}
    for ans in (cheapest_within(pts, max_flips), fewest_flips_within(pts, pct)):
        assert ans is None or (ans.cost, ans.flips) in front


def _row(cid, cost, flips, feasible):
    return AuditRow(candidate_id=cid, cost_before=0.0, feasible_before=False, cost_after=cost,
                    objective_after=cost, flips=flips, feasible=feasible, violation=0.0,
                    method="greedy", seconds=0.0)


def test_infeasible_rows_are_ignored():
    rows = [_row("a", 1.0, 5, True), _row("b", -9.0, 0, False), _row("c", 3.0, 1, True)]
    front = pareto_front(rows)
    assert [(p.candidate_id, p.cost, p.flips) for p in front] == [("c", 3.0, 1), ("a", 1.0, 5)]


@pytest.mark.parametrize("bad, field", [((1.0, -1), "points[0].flips"), ((None, 2), "points[0].cost"),
                                        ((float("nan"), 2), "points[0].cost"), ((1.0,), "points[0]")])
def test_bad_points_name_the_field(bad, field):
    with pytest.raises(InputError) as err:
        pareto_front([bad])
    assert err.value.field == field


def test_front_over_methods_of_a_real_repair():
    rng = np.random.default_rng(5)
    n = 14
    lin = {i: float(rng.integers(-4, 5)) for i in range(n)}
    quad = [(i, j, float(rng.integers(-3, 4))) for i in range(n) for j in range(i + 1, n)
            if rng.random() < 0.3]
    p = Problem.from_terms(lin, quad)
    cs = CandidateSet.from_array(p, rng.integers(0, 2, size=(8, n)))
    ref = {i: int(v) for i, v in enumerate(rng.integers(0, 2, size=n))}
    cons = [HammingPenalty(ref, weight=1.5), FixVariables({0: 1, 1: 0})]
    from flipfix.repair import repair

    # greedy is deterministic: the front equals the exhaustive dominance comparison over
    # every repaired candidate plus the candidates already feasible (0 flips)
    # generous budget: greedy takes milliseconds, but a first call may compile the kernel
    res = repair(p, cs, cons, method="greedy", time_limit=30.0, seed=3)
    pts = [(q.cost, q.flips) for q in result_points(res)]
    front = cost_flip_front(p, cs, cons, methods=("greedy",), time_limit=30.0, seed=3)
    assert sorted((q.cost, q.flips) for q in front) == sorted(set(_exhaustive_front(pts)))
    assert len(front) >= 2  # a real trade-off, so the check can fail
    # with CP-SAT too: no greedy point dominates any point of the two-method front
    both = cost_flip_front(p, cs, cons, methods=("greedy", "cpsat"), time_limit=1.0, seed=3)
    assert both and all(not any(_dominates(q, (g.cost, g.flips)) for q in pts) for g in both)
    assert all(isinstance(q, ParetoPoint) and q.method in ("greedy", "cpsat", "unchanged")
               for q in both)
    # repair(pareto=True) builds its front (over every attempt) with pareto_front
    res = repair(p, cs, cons, method="portfolio", time_limit=0.6, seed=3, pareto=True)
    own = [(q.cost, q.flips) for q in res.pareto]
    assert own and sorted(own) == sorted(set(_exhaustive_front(own)))


# ------------------------------------------------- repair(pareto=True) against brute force
# Two blocks b = 0, 1, each with a_b, c_b and free bits y_b_i. "N" (a=1, c=0, y=0) has energy
# -10 per block, "B" (a=0, c=1, some y) -8; flipping a y in N costs 15, in B nothing.
BLOCK_Y = 3


def _blocks_problem():
    lin, quad = {}, []
    for b in range(2):
        lin[f"a{b}"], lin[f"c{b}"] = -10.0, -8.0
        quad.append((f"a{b}", f"c{b}", 20.0))
        for i in range(BLOCK_Y):
            lin[f"y{b}_{i}"] = 0.0
            quad.append((f"a{b}", f"y{b}_{i}", 15.0))
    return Problem.from_terms(lin, quad)


def _blocks_state(p, kinds, ys):
    x = dict.fromkeys(p.labels, 0)
    for b, (kind, y) in enumerate(zip(kinds, ys)):
        x[f"a{b}"], x[f"c{b}"] = (1, 0) if kind == "N" else (0, 1)
        for i in range(BLOCK_Y):
            x[f"y{b}_{i}"] = y[i] if kind == "B" else 0
    return np.array([x[lab] for lab in p.labels], dtype=np.int8)


def _blocks_cost(x, labels, ref, weight):
    """The issue's energy written out term by term, plus weight * Hamming(x, ref)."""
    v = dict(zip(labels, x.tolist()))
    e = 0.0
    for b in range(2):
        a, c = v[f"a{b}"], v[f"c{b}"]
        e += -10 * a - 8 * c + 20 * a * c + sum(15 * a * v[f"y{b}_{i}"] for i in range(BLOCK_Y))
    return e + weight * sum(v[lab] != r for lab, r in ref.items())


@pytest.mark.parametrize("method", ["greedy", "portfolio"])
def test_repair_front_is_the_non_dominated_set_of_what_the_run_knows(method):
    """The front of ``repair(pareto=True)`` checked against brute force over all 2^10
    assignments (itertools.product; costs from :func:`_blocks_cost`, not from the core).

    What is compared: (1) every front point is real: some assignment x has exactly that cost,
    differs from the named candidate in exactly that many bits, and from no candidate in fewer;
    (2) the front is non-dominated and weakly dominates every point the run provably knows:
    each feasible candidate unchanged (its brute-force cost, 0 flips), each audit row (the
    repair the run kept per candidate) and the reported best answer; so it is exactly the
    non-dominated set of those points and its own; (3) its ends are the brute-force ones: at
    0 flips the cheapest candidate as it is, and the cheapest point at the brute-force optimum.
    """
    from flipfix.repair import repair

    p = _blocks_problem()
    B0, B1 = (1, 0, 0), (0, 0, 1)
    ids = ["NN", "NB", "BN", "BB"]
    X = np.vstack([_blocks_state(p, k, (B0, B1)) for k in ids])
    cs = CandidateSet.from_array(p, X, ids=ids)
    ref_x = _blocks_state(p, "BB", ((1, 1, 0), (1, 0, 0)))
    ref = dict(zip(p.labels, ref_x.tolist()))
    res = repair(p, cs, [HammingPenalty(ref, weight=3.0)], method=method, time_limit=1.0,
                 seed=0, pareto=True)
    front = [(q.cost, q.flips) for q in res.pareto]

    allx = np.array(list(itertools.product((0, 1), repeat=p.n)), dtype=np.int8)
    cost = np.array([_blocks_cost(x, p.labels, ref, 3.0) for x in allx])
    dist = (allx[:, None, :] != X[None, :, :]).sum(axis=2)  # (2^n, K) flips from each candidate
    row = {cid: k for k, cid in enumerate(cs.ids)}
    # (1) real points with honest flip counts
    for q in res.pareto:
        k = row[q.candidate_id]
        hit = (cost == q.cost) & (dist[:, k] == q.flips) & (dist.min(axis=1) == q.flips)
        assert hit.any(), q
    # (2) non-dominated, and covering every known point
    assert sorted(front) == sorted(set(_exhaustive_front(front)))
    unchanged = [(_blocks_cost(x, p.labels, ref, 3.0), 0) for x in X]
    audit = [(r.cost_after, r.flips) for r in res.audit if r.feasible]
    known = unchanged + audit + [(res.best.cost, res.best.flips)]
    for c, f in known:
        assert any(qc <= c and qf <= f for qc, qf in front), (c, f)
    # (3) the ends: the 0-flip point is the cheapest candidate unchanged (BB here, not NN,
    # which costs 8 more), and the cheapest point reaches the brute-force optimum
    assert min(unchanged) == (-7.0, 0) and (-7.0, 0) in front
    assert res.pareto[0].candidate_id == "BB" and res.pareto[0].method == "unchanged"
    assert min(front)[0] == cost.min() == -16.0
    assert res.to_dict()["pareto"] == [
        {"cost": q.cost, "flips": q.flips, "candidate_id": q.candidate_id, "method": q.method}
        for q in res.pareto]
