"""Robustness profile: checked against exhaustive enumeration of single flips (energies by dimod)."""

from __future__ import annotations

import itertools

import dimod
import numpy as np
import pytest

from flipfix.repair import CandidateSet, Decision, InputError, Problem
from flipfix.repair.audit.robustness import (
    decision_move_costs, free_decision_counts, free_variable_counts, nearest_other,
    robustness_profile,
)


def _random_bqm(rng, n, vartype):
    """Small BQM with integer biases and many zeros, so free flips exist."""
    lin = {f"v{i}": int(rng.integers(-2, 3)) for i in range(n)}
    quad = {(f"v{i}", f"v{j}"): int(rng.integers(-2, 3))
            for i, j in itertools.combinations(range(n), 2) if rng.random() < 0.4}
    return dimod.BinaryQuadraticModel(lin, quad, 1.0, vartype)


def _flip(value, vartype):
    return -value if vartype is dimod.SPIN else 1 - value


def _enumerated_deltas(bqm, samples, labels):
    """Reference: energy change of every single flip, each energy computed by dimod."""
    base = bqm.energies((samples, labels))
    out = np.empty(samples.shape, dtype=np.float64)
    for i in range(samples.shape[1]):
        s = samples.copy()
        s[:, i] = _flip(s[:, i], bqm.vartype)
        out[:, i] = bqm.energies((s, labels)) - base
    return base, out


@pytest.mark.parametrize("vartype", [dimod.BINARY, dimod.SPIN])
@pytest.mark.parametrize("epsilon", [0.0, 1.0, 2.5])
@pytest.mark.parametrize("dense_max_n", [2048, 0])  # dense product / blocked CSR path
def test_free_variables_match_exhaustive_single_flip_enumeration(vartype, epsilon, dense_max_n,
                                                                  monkeypatch):
    import flipfix.repair.audit.robustness as rob

    monkeypatch.setattr(rob, "DENSE_MAX_N", dense_max_n)
    rng = np.random.default_rng(7)
    for trial in range(5):
        bqm = _random_bqm(rng, 9, vartype)
        labels = list(bqm.variables)
        p = Problem.from_bqm(bqm)
        # library: random assignments plus every ground state (dimod.ExactSolver brute force)
        ground = dimod.ExactSolver().sample(bqm).lowest()
        g = np.asarray(ground.record.sample)[:, [ground.variables.index(v) for v in labels]]
        values = (0, 1) if vartype is dimod.BINARY else (-1, 1)
        samples = np.vstack([rng.choice(values, size=(6, len(labels))), g]).astype(np.int8)
        cs = CandidateSet.from_array(p, samples)
        base, deltas = _enumerated_deltas(bqm, samples, labels)

        want_free = (deltas <= epsilon).sum(axis=1)
        assert free_variable_counts(p, cs, epsilon=epsilon).tolist() == want_free.tolist()
        rep = robustness_profile(p, cs, epsilon=epsilon)
        assert rep.column("free_variables") == want_free.tolist()
        assert rep.column("improving") == (deltas < 0).sum(axis=1).tolist()
        assert np.allclose(rep.column("energy"), base)  # dimod energies
        for k, prof in enumerate(rep.profiles):
            assert np.allclose(prof.spectrum, np.sort(deltas[k]))
            assert prof.within_1pct == int((deltas[k] <= 0.01 * abs(base[k])).sum())
            assert prof.within_5pct == int((deltas[k] <= 0.05 * abs(base[k])).sum())
        # ground states (dimod.ExactSolver) are local minima: no improving flip
        assert all(v == 0 for v in rep.column("improving")[6:])


def _is_valid(bits, encoding):
    """Reference validity, written out: one-hot = exactly one 1; domain wall = no 0 before a 1."""
    if encoding == "one_hot":
        return sum(bits) == 1
    return all(bits[i] >= bits[i + 1] for i in range(len(bits) - 1))


def test_decision_moves_match_enumeration_of_valid_codes():
    rng = np.random.default_rng(3)
    oh = [f"a{i}" for i in range(3)]
    dw = [f"b{i}" for i in range(3)]  # 4 values
    labels = oh + dw + ["c"]
    lin = {v: float(rng.integers(-2, 3)) for v in labels}
    quad = [(u, v, float(rng.integers(-2, 3))) for u, v in itertools.combinations(labels, 2)
            if rng.random() < 0.5]
    # make some moves free: equal unary costs on two one-hot bits, a zero-cost wall bit
    lin["a0"] = lin["a1"] = 0.0
    quad = [(u, v, w) for u, v, w in quad if {u, v} & {"a0", "a1", "b2"} == set()]
    lin["b2"] = 0.0
    decisions = [Decision("A", "one_hot", tuple(oh), (10, 20, 30)),
                 Decision("B", "domain_wall", tuple(dw), (0, 1, 2, 3))]
    p = Problem.from_terms(lin, quad, labels=labels, decisions=decisions)
    bqm = p.to_bqm()
    rows = [bits for bits in itertools.product((0, 1), repeat=len(labels))]
    X = np.asarray(rows, dtype=np.int8)
    cs = CandidateSet.from_array(p, X)
    base = bqm.energies((X, labels))  # dimod
    want_any = np.zeros(len(rows), dtype=np.int64)
    for d, cols, enc in ((decisions[0], [0, 1, 2], "one_hot"), (decisions[1], [3, 4, 5], "domain_wall")):
        got = decision_move_costs(p, X, d)
        for k, row in enumerate(rows):
            cur = [row[c] for c in cols]
            free = False
            moves = 0
            for code in itertools.product((0, 1), repeat=len(cols)):
                dist = sum(a != b for a, b in zip(code, cur))
                allowed = dist == (2 if enc == "one_hot" else 1)
                if not (_is_valid(cur, enc) and _is_valid(code, enc) and allowed):
                    continue
                y = list(row)
                for c, b in zip(cols, code):
                    y[c] = b
                delta = bqm.energy(dict(zip(labels, y))) - base[k]  # dimod
                # the move's column is the value index the code decodes to
                m = code.index(1) if enc == "one_hot" else sum(code)
                assert got[k, m] == pytest.approx(delta)
                free |= delta <= 0.0
                moves += 1
            # every other entry is not a move (+inf), invalid rows have none
            assert int(np.isfinite(got[k]).sum()) == moves
            want_any[k] += free
    assert free_decision_counts(p, cs).tolist() == want_any.tolist()
    # free variables leave the decision bits out: only "c" counts (dimod energies)
    c_flip = X.copy()
    c_flip[:, 6] ^= 1
    want_c = (bqm.energies((c_flip, labels)) - base <= 0.0).astype(int)
    assert free_variable_counts(p, cs).tolist() == want_c.tolist()
    assert robustness_profile(p, cs).column("free_decisions") == want_any.tolist()
    assert want_any.max() >= 1  # the construction has free moves, so the check can fail


def test_distances_match_pairwise_loops():
    rng = np.random.default_rng(11)
    X = rng.integers(0, 2, size=(23, 17)).astype(np.int8)
    X[5] = X[9]  # a duplicate: nearest other at distance 0
    p = Problem.from_terms({i: float(rng.normal()) for i in range(17)}, [])
    cs = CandidateSet.from_array(p, X)
    e = p.energies(X)
    best = int(np.argmin(e))
    d, j = nearest_other(X, block=4)  # small blocks exercise the blocking
    for k in range(23):
        others = [(int((X[k] != X[m]).sum()), m) for m in range(23) if m != k]
        dist, idx = min(others)
        assert d[k] == dist and j[k] == idx
    rep = robustness_profile(p, cs)
    assert rep.best_id == f"c{best}"
    assert rep.column("distance_to_best") == [int((X[k] != X[best]).sum()) for k in range(23)]
    assert rep.profiles[5].nearest_other == 0 and rep.profiles[5].nearest_other_id == "c9"


def test_single_candidate_has_no_nearest_other():
    p = Problem.from_terms({"x": 1.0, "y": 0.0}, [])
    rep = robustness_profile(p, CandidateSet.from_array(p, [[0, 1]]))
    prof = rep.profiles[0]
    assert (prof.nearest_other, prof.nearest_other_id) == (-1, "")
    assert prof.free_variables == 1  # y flips at cost 0; x costs 1 (by hand)
    assert rep.to_dict()["profiles"][0]["spectrum"] == [0.0, 1.0]


@pytest.mark.parametrize("eps", [-1.0, float("nan"), "a"])
def test_bad_epsilon_names_the_field(eps):
    p = Problem.from_terms({"x": 1.0}, [])
    with pytest.raises(InputError) as err:
        robustness_profile(p, CandidateSet.from_array(p, [[0]]), epsilon=eps)
    assert err.value.field == "epsilon"
