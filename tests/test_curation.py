"""Library curation: checked against exhaustive subset search on small libraries."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest

from flipfix.repair import CandidateSet, InputError
from flipfix.repair.audit.curation import curate
from flipfix.repair.audit.stress import ScenarioFamily, stress_test

from test_stress import ALPHA, BUDGET, W, planted, state


def _brute_key(C, sub):
    """Reference: (scenarios left without a feasible repair, total best cost) of a subset."""
    best = [min(C[s][k] for k in sub) for s in range(len(C))]
    return (sum(1 for b in best if math.isinf(b)), sum(b for b in best if not math.isinf(b)))


def _brute_best(C, m):
    K = len(C[0])
    return min(_brute_key(C, sub) for sub in itertools.combinations(range(K), m))


@pytest.mark.parametrize("seed", range(6))
def test_curation_against_exhaustive_subset_search(seed):
    rng = np.random.default_rng(seed)
    S, K = 10, 7
    C = rng.integers(-20, 20, size=(S, K)).astype(float)
    if seed % 2:
        C[rng.random((S, K)) < 0.3] = np.inf  # some repairs infeasible
    Cl = C.tolist()
    full = _brute_key(Cl, range(K))
    for m in range(1, K + 1):
        opt = _brute_best(Cl, m)
        ex = curate(C, m, method="exhaustive")
        assert _brute_key(Cl, ex.kept_indices) == opt
        gr = curate(C, m)
        got = _brute_key(Cl, gr.kept_indices)
        assert (gr.uncovered, gr.total_cost) == (got[0] - full[0], got[1])
        assert got >= opt
        if m == 1:
            assert got == opt  # the first forward step is an exhaustive search over singletons
        if m == K:
            assert gr.mean_gap == 0 and gr.worst_gap == 0 and gr.relative_gap == 0
        # the curve records the total after each forward step and never rises once covered
        assert gr.curve[-1] == gr.total_cost and len(gr.curve) == m
        if not np.isinf(C).any():
            # monotone submodular benefit: forward selection keeps >= (1 - 1/e) of the best benefit
            # (Nemhauser, Wolsey and Fisher, 1978), benefit measured from the worst costs
            u = C.max(axis=1).sum()
            assert u - got[1] >= (1 - 1 / math.e) * (u - opt[1]) - 1e-9
            assert all(a >= b for a, b in zip(gr.curve, gr.curve[1:]))
            # how much worse than the full library, by hand
            sub = C[:, gr.kept_indices].min(axis=1)
            assert gr.mean_gap == pytest.approx((sub - C.min(axis=1)).mean())
            assert gr.relative_gap == pytest.approx(
                (sub - C.min(axis=1)).sum() / np.abs(C.min(axis=1)).sum())


def test_curating_a_stress_tested_library_keeps_the_broad_candidates():
    groups = [4, 8, 12]
    p = planted(groups)
    X = np.vstack([state(p, groups, bits) for bits in itertools.product([0, 1], repeat=3)])
    cs = CandidateSet.from_array(p, X)
    rep = stress_test(p, cs, ScenarioFamily(hamming_weight=W), scenarios=20, seed=5,
                      method="greedy", epsilon=ALPHA, time_limit=BUDGET)
    C = rep.cost_matrix()
    Cl = C.tolist()
    for m in (1, 2, 3):
        cur = curate(C, m, ids=rep.ids)
        ex = curate(C, m, ids=rep.ids, method="exhaustive")
        assert _brute_key(Cl, ex.kept_indices) == _brute_best(Cl, m)
        assert cur.total_cost >= ex.total_cost
        assert [rep.ids[k] for k in cur.kept_indices] == cur.kept_ids
    one = curate(C, 1, ids=rep.ids)
    # the single best keeper is a candidate with the broad groups on, not the optimum c0
    assert one.kept_ids[0] != "c0"
    assert rep.candidates[one.kept_indices[0]].free_variables >= 20
    assert one.to_dict()["kept_ids"] == one.kept_ids


@pytest.mark.parametrize("kw, field", [(dict(m=0), "m"), (dict(m=9), "m"),
                                        (dict(m=1, method="best"), "method"),
                                        (dict(m=1, ids=["a"]), "ids")])
def test_bad_options_name_the_field(kw, field):
    with pytest.raises(InputError) as err:
        curate(np.zeros((3, 4)), **kw)
    assert err.value.field == field


def test_nan_costs_are_refused():
    with pytest.raises(InputError) as err:
        curate([[0.0, float("nan")]], 1)
    assert err.value.field == "cost"
