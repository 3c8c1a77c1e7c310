"""Growing a library: exact confirmation, tolerance, determinism, stopping, the planted target.

References outside the project: every energy and every free move of a new state is
recomputed with dimod (``BinaryQuadraticModel.energy`` of the state and of each single flip
or one-step decision move, enumerated by brute force), and the nearest-stored distance by a
plain Hamming loop.
"""

from __future__ import annotations

import threading

import dimod
import numpy as np
import pytest

from flipfix.repair.errors import InputError
from flipfix.repair.grow.heldout import compare_heldout
from flipfix.repair.grow.kernel import BITS, DECISIONS, new_scratch, run_chain
from flipfix.repair.grow.neighbours import GrowSettings, _qubo, groups_of, grow, hard_rows
from flipfix.repair.model.constraints import HammingPenalty, LinearConstraint
from flipfix.repair.grow.planted import planted_model
from flipfix.repair.kernels.metropolis import Plan
from flipfix.repair.model.candidates import CandidateSet
from flipfix.repair.model.encodings import decode_indices
from flipfix.repair.model.problem import Decision, Problem

TOL = 1e-9


def _random_problem(seed: int, n: int = 9, decisions: bool = False) -> Problem:
    rng = np.random.default_rng(seed)
    labels = [f"x{i}" for i in range(n)]
    linear = {lab: float(rng.integers(-3, 4)) for lab in labels}
    quad = [(labels[i], labels[j], float(rng.integers(-2, 3)))
            for i in range(n) for j in range(i + 1, n) if rng.random() < 0.4]
    decs = ()
    if decisions:  # x0..x2 one-hot over 3 values, x3..x4 a domain wall over 3 values
        decs = (Decision("a", "one_hot", ("x0", "x1", "x2"), (0, 1, 2)),
                Decision("b", "domain_wall", ("x3", "x4"), (0, 1, 2)))
    return Problem.from_terms(linear, quad, labels=labels, decisions=decs)


def _library(problem: Problem, k: int, seed: int) -> CandidateSet:
    """k random states with every decision validly encoded, then descended to a local
    minimum over the plain variables (steepest single flips, plain numpy)."""
    rng = np.random.default_rng(seed)
    X = rng.integers(0, 2, size=(k, problem.n)).astype(np.int8)
    for d in problem.decisions:
        cols = [problem.index[v] for v in d.variables]
        for r in range(k):
            m = int(rng.integers(0, len(d.values)))
            X[r, cols] = ([1 if i == m else 0 for i in range(len(cols))] if d.encoding == "one_hot"
                          else [1 if m > i else 0 for i in range(len(cols))])
    in_dec = [problem.index[v] for d in problem.decisions for v in d.variables]
    for r in range(k):
        while True:
            c = problem.flip_costs(X[r])[0]
            c[in_dec] = np.inf
            i = int(np.argmin(c))
            if c[i] >= -TOL:
                break
            X[r, i] ^= 1
    return CandidateSet(tuple(f"c{r}" for r in range(k)), X)


def _cap_row(problem: Problem, lib: CandidateSet) -> list:
    """A capacity row over the plain variables that the library's lightest candidate meets
    with one unit to spare (so some moves break it)."""
    plain = groups_of(problem).plain
    w = {problem.labels[i]: float(1 + i % 3) for i in plain}
    load = min(sum(w[problem.labels[i]] * x[i] for i in plain) for x in lib.X)
    return [LinearConstraint(w, "<=", load + 1.0)]


def _holds(constraints, x) -> bool:
    """Plain-Python check of LinearConstraint rows (<= only) on x (labels x0, x1, ...)."""
    for c in constraints:
        if sum(w * x[int(str(lab)[1:])] for lab, w in c.terms.items()) > c.rhs + 1e-9:
            return False
    return True


def _brute_free(problem: Problem, x: np.ndarray, eps: float,
                constraints=()) -> tuple[float, int, int]:
    """(energy, free variables, free decisions) by dimod energies of every neighbour; with
    constraints, a free move must also keep them."""
    bqm = problem.to_bqm()
    lab = problem.labels

    def e(bits):
        return bqm.energy({lab[i]: int(bits[i]) for i in range(len(lab))})

    e0 = e(x)
    in_dec = {problem.index[v] for d in problem.decisions for v in d.variables}
    fv = 0
    for i in range(problem.n):
        if i in in_dec:
            continue
        y = x.copy()
        y[i] ^= 1
        fv += e(y) - e0 <= eps + TOL and _holds(constraints, y)
    fd = 0
    for d in problem.decisions:
        cols = [problem.index[v] for v in d.variables]
        bits = x[cols]
        if d.encoding == "one_hot":
            if bits.sum() != 1:
                continue
            on = cols[int(np.argmax(bits))]
            moves = [(on, j) for j in cols if j != on]
        else:
            if any(bits[i] < bits[i + 1] for i in range(len(bits) - 1)):
                continue
            v = int(bits.sum())
            moves = ([(cols[v - 1],)] if v > 0 else []) + ([(cols[v],)] if v < len(cols) else [])
        free = False
        for mv in moves:
            y = x.copy()
            for i in mv:
                y[i] ^= 1
            free |= e(y) - e0 <= eps + TOL and _holds(constraints, y)
        fd += free
    return e0, fv, fd


@pytest.mark.parametrize("decisions", [False, True])
@pytest.mark.parametrize("mode", ["robust", "diverse", "both"])
def test_new_states_confirmed_against_brute_force(decisions, mode):
    p = _random_problem(7, n=12, decisions=decisions)
    lib = _library(p, 4, seed=1)
    eps = 1.0
    res = grow(p, lib, settings=GrowSettings(mode=mode, epsilon=eps, tolerance=6.0, chains=6,
                                             sweeps=60, top=4, seed=5))
    e_lib = [_brute_free(p, x, eps) for x in lib.X]
    best = min(e for e, _, _ in e_lib)
    assert res.best_energy == pytest.approx(best)
    assert res.energy_cap == pytest.approx(best + 6.0)
    assert res.states, "expected at least one proposal on this model"
    for st in res.states:
        e, fv, fd = _brute_free(p, st.x, eps)
        assert st.energy == pytest.approx(e)
        assert (st.free_variables, st.free_decisions) == (fv, fd)
        assert st.energy <= best + 6.0 + TOL  # within the tolerance
        k = lib.ids.index(st.origin_id)
        assert st.energy_given_up == pytest.approx(e - e_lib[k][0])
        assert st.free_gained == fv + fd - e_lib[k][1] - e_lib[k][2]
        assert not any((st.x == y).all() for y in lib.X)  # never a stored state
        if mode == "robust":
            assert st.free_gained > 0
        if decisions:  # valid one-hot and domain wall kept by every move
            assert (decode_indices(p, st.x[None, :]) >= 0).all()
    assert (lib.X == _library(p, 4, seed=1).X).all()  # nothing stored, nothing changed


def test_distance_is_to_the_nearest_stored_or_earlier_state():
    p = _random_problem(3, n=12)
    lib = _library(p, 5, seed=2)
    res = grow(p, lib, settings=GrowSettings(mode="diverse", tolerance=6.0, chains=4, sweeps=50,
                                             top=2, seed=0))
    assert res.states
    for st in res.states:
        ids = list(lib.ids) + [o.id for o in res.states]
        rows = list(lib.X) + [o.x for o in res.states]
        d = {i: int((st.x != r).sum()) for i, r in zip(ids, rows) if i != st.id}
        assert st.distance <= min(d[i] for i in lib.ids)  # earlier new states count too
        assert d[st.nearest_id] == st.distance
        assert st.distance > 0


@pytest.mark.parametrize("rows", [False, True])
def test_kernel_figures_match_brute_force(rows):
    """run_chain's own F, D and energy change are exact (not only the confirmation)."""
    p = _random_problem(11, decisions=True)
    lib = _library(p, 3, seed=4)
    Q, Gr = _qubo(p), groups_of(p)
    cons = _cap_row(p, lib) if rows else []
    R = hard_rows(p, cons)
    Lv = decode_indices(p, lib.X)
    for unit in (BITS, DECISIONS):
        for chain in range(4):
            x0 = lib.X[chain % 3].copy()
            plan = Plan(40, 4, 0.05, 2.0, 0.0, p.n, np.uint64(9), False, 1.0)
            params = np.array([0.7, 0.4, 0.5 + TOL, 5.0, 1e-12])
            best, out = np.zeros(p.n, np.int8), np.zeros(5)
            g0 = np.ascontiguousarray(decode_indices(p, x0[None, :])[0])
            run_chain(Q, Gr, R, plan, params, unit, lib.X, Lv, x0, g0, np.int64(chain),
                      np.zeros(1, np.uint8), new_scratch(p.n, g0.size, 3, R.lo.size), best, out)
            e0 = _brute_free(p, x0, 0.5, cons)[0]
            e, fv, fd = _brute_free(p, best, 0.5, cons)
            assert out[0] == pytest.approx(e - e0)
            assert out[1] == fv + fd
            if unit == BITS:
                dmin = min(int((best != y).sum()) for y in lib.X)
            else:
                vb = decode_indices(p, best[None, :])[0]
                plain = groups_of(p).plain
                dmin = min(int((best[plain] != y[plain]).sum()) + int((vb != lv).sum())
                           for y, lv in zip(lib.X, Lv))
            assert out[2] == dmin
            assert out[4] == 40
            assert _holds(cons, best)


def test_seeded_and_reproducible():
    p = _random_problem(5, n=12)
    lib = _library(p, 4, seed=3)
    s = GrowSettings(mode="both", tolerance_percent=30.0, chains=4, sweeps=80, seed=7)
    a = grow(p, lib, settings=s)
    b = grow(p, lib, settings=s)
    c = grow(p, lib, settings=GrowSettings(**{**s.__dict__, "workers": 2}))
    for other in (b, c):
        assert [st.id for st in a.states] == [st.id for st in other.states]
        assert all((x.x == y.x).all() for x, y in zip(a.states, other.states))


def test_planted_model_broad_states_found_and_heldout_wins():
    """From an all-narrow start the grown states hold the broad state of >= 90 % of the
    blocks, and on held-out scenarios the grown library repairs cheaper on average."""
    pl = planted_model(blocks=20, slack=4)
    p = pl.problem
    lib = CandidateSet(("narrow",), pl.narrow_state()[None, :])
    assert pl.broad_blocks(lib.X).sum() == 0
    res = grow(p, lib, settings=GrowSettings(mode="robust", tolerance_percent=25.0, chains=4,
                                             sweeps=200, seed=1))
    assert res.states
    X = np.vstack([st.x for st in res.states])
    found = pl.broad_blocks(X).any(axis=0).mean()
    assert found >= 0.9
    for st in res.states:  # each new state: delta per broad block above the ground state
        assert st.energy == pytest.approx(-20 + pl.delta * pl.broad_blocks(st.x).sum())
    cmp = compare_heldout(p, lib, res.candidate_set(), m=1, scenarios=16, seed=2)
    assert cmp.heldout == 8
    assert cmp.grown_mean < cmp.original_mean
    assert cmp.wins + cmp.ties + cmp.losses == 8


def test_cancel_and_time_limit_stop_the_chains():
    p = _random_problem(2, n=10)
    lib = _library(p, 2, seed=0)
    ev = threading.Event()
    ev.set()
    res = grow(p, lib, settings=GrowSettings(sweeps=10 ** 9), cancel=ev)
    assert res.stopped == "cancelled" and res.chains_run <= GrowSettings().chains
    # 10**9 sweeps would run for hours: only the time limit ends it
    res = grow(p, lib, settings=GrowSettings(sweeps=10 ** 9, top=1), time_limit=0.2)
    assert res.stopped == "time_limit"
    assert all(st.energy <= res.energy_cap + TOL for st in res.states)


def test_bad_settings_name_their_field():
    p = _random_problem(1)
    lib = _library(p, 2, seed=0)
    cases = [(GrowSettings(mode="wide"), "settings.mode"),
             (GrowSettings(tolerance=1.0, tolerance_percent=2.0), "settings.tolerance"),
             (GrowSettings(from_ids=("nope",)), "settings.from_ids[0]"),
             (GrowSettings(from_ids=("c0", "c1", "c0")), "settings.from_ids[2]"),
             (GrowSettings(chains=0), "settings.chains"),
             (GrowSettings(depth=1.5), "settings.depth"),
             (GrowSettings(reward_free=-1.0), "settings.reward_free"),
             (GrowSettings(unit="hops"), "settings.unit")]
    for s, field in cases:
        with pytest.raises(InputError) as err:
            grow(p, lib, settings=s)
        assert err.value.field == field


def test_heldout_comparison_recomputed_from_the_stress_matrix():
    """compare_heldout against a direct stress test of the union and curation of its halves."""
    from flipfix.repair.audit.curation import curate
    from flipfix.repair.audit.stress import ScenarioFamily, draw_scenarios, stress_test
    from flipfix.repair.grow.heldout import union

    p = _random_problem(9, n=12)
    lib = _library(p, 4, seed=5)
    res = grow(p, lib, settings=GrowSettings(mode="both", tolerance_percent=40.0, chains=3,
                                             sweeps=60, top=4, seed=2))
    assert res.states
    new = res.candidate_set()
    fam = ScenarioFamily(hamming_weight=2.0, hamming_fraction=0.5)
    cmp = compare_heldout(p, lib, new, m=2, family=fam, scenarios=10, seed=3)
    both = union(lib, new)
    C = stress_test(p, both, draw_scenarios(p, lib, fam, count=10, seed=3)).cost_matrix()
    o = curate(C[0::2, :4], 2, ids=lib.ids)
    g = curate(C[0::2], 2, ids=both.ids)
    assert (cmp.original_kept, cmp.grown_kept) == (o.kept_ids, g.kept_ids)
    so, sg = C[1::2][:, o.kept_indices].min(axis=1), C[1::2][:, g.kept_indices].min(axis=1)
    assert cmp.original_mean == pytest.approx(so.mean()) and cmp.grown_mean == pytest.approx(sg.mean())
    assert cmp.original_worst == pytest.approx(so.max()) and cmp.grown_worst == pytest.approx(sg.max())
    assert cmp.wins == int((sg < so - 1e-6).sum()) and cmp.losses == int((sg > so + 1e-6).sum())
    with pytest.raises(InputError) as err:
        union(lib, lib)
    assert err.value.field == "new.ids"


@pytest.mark.parametrize("mode", ["robust", "diverse"])
def test_growing_under_a_capacity_row(mode):
    """Every origin and proposal meets the row; free moves counted only when they keep it
    (dimod energies and a plain-Python row check of every neighbour)."""
    p = _random_problem(13, n=12, decisions=True)
    lib = _library(p, 4, seed=6)
    cons = _cap_row(p, lib)
    res = grow(p, lib, constraints=cons,
               settings=GrowSettings(mode=mode, epsilon=1.0, tolerance=6.0, chains=6, sweeps=60,
                                     top=4, seed=1))
    ok = [k for k in range(4) if _holds(cons, lib.X[k])]
    assert res.best_energy == pytest.approx(min(_brute_free(p, lib.X[k], 1.0)[0] for k in ok))
    assert res.states
    for st in res.states:
        assert _holds(cons, st.x)
        assert st.origin_id in [lib.ids[k] for k in ok]
        e, fv, fd = _brute_free(p, st.x, 1.0, cons)
        assert st.energy == pytest.approx(e)
        assert (st.free_variables, st.free_decisions) == (fv, fd)
        k = lib.ids.index(st.origin_id)
        _, fv0, fd0 = _brute_free(p, lib.X[k], 1.0, cons)
        assert st.free_gained == fv + fd - fv0 - fd0


def test_constraints_must_be_hard_rows_met_by_some_candidate():
    p = _random_problem(13, n=12)
    lib = _library(p, 3, seed=6)
    with pytest.raises(InputError) as err:
        grow(p, lib, constraints=[LinearConstraint({"x0": 1.0}, "<=", 0.0),
                                  HammingPenalty({"x1": 1}, weight=1.0)])
    assert err.value.field == "constraints[1]"
    with pytest.raises(InputError) as err:
        grow(p, lib, constraints=[LinearConstraint({lab: 1.0 for lab in p.labels}, "<=", -1.0)])
    assert err.value.field == "constraints"
