"""Pareto front of (cost, flips): checked against an exhaustive O(N^2) dominance comparison."""

from __future__ import annotations

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
