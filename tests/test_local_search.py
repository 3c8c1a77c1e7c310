"""The portfolio's local-search stage: a bandit over annealing depths and kicks.

Outside references:
* bqp250-1 (OR-Library, Beasley 1998; ../shared/benchmarks/README.md): best-known minimum
  -45607 (the published maximum 45607, negated).
* dimod's own energy evaluation (BinaryQuadraticModel.energies) recomputes every reported
  cost independently of flipfix's scorer.
"""

from __future__ import annotations

import threading
import time
from pathlib import Path

import dimod
import numpy as np
import pytest

from flipfix.repair import CandidateSet, Problem, repair
from flipfix.repair.documents.instances import read_bqp
from flipfix.repair.kernels.readiness import warm_up
from flipfix.repair.kernels.scores import Scorer
from flipfix.repair.lowering.compiled import compile_constraints
from flipfix.repair.solvers import portfolio as P
from flipfix.repair.solvers.greedy import greedy_repair

BQP250 = Path(__file__).resolve().parents[2] / "shared" / "benchmarks" / "bqp" / "bqp250-1.sparse"
BEST_KNOWN = -45607.0  # OR-Library bqp250-1, negated (shared/benchmarks/README.md)


def _bqp250():
    if not BQP250.exists():
        pytest.skip("../shared/benchmarks is not beside the checkout")
    return read_bqp(BQP250)


def _repaired(problem, X0):
    """(compiled, greedy output, scorer, cost, violation, flips) of greedy repair of X0."""
    compiled = compile_constraints(problem, [])
    g = greedy_repair(compiled, X0)
    scorer = Scorer(compiled, X0)
    return (compiled, g, scorer, *scorer.near(g.X, np.arange(X0.shape[0])))


def _stage(problem, X0, *, rounds: int, workers: int = 1, seed: int = 0):
    """Run the stage on the greedy-repaired X0 until ``rounds`` rounds have reported (a
    cancel set from the progress callback: event-driven, not timed). The kernels are
    loaded first, as :func:`flipfix.repair.repair` does before its clock starts: a cold
    compile must not eat the stage's deadline."""
    warm_up()
    compiled, g, scorer, cost, viol, flips = _repaired(problem, X0)
    K = X0.shape[0]
    out = P.PlanOutcome(attempts=[])
    cancel = threading.Event()
    seen = []

    def report(**kw):
        seen.append(kw)
        if len(seen) >= rounds:
            cancel.set()

    cur = g.X.copy()
    obj, feasible, done = cost.copy(), viol == 0.0, np.ones(K, dtype=bool)
    P._local_search(compiled, X0, cur, obj, feasible, flips, done, out, scorer,
                    deadline=time.perf_counter() + 60.0, max_flips=None, flip_price=0.0,
                    seed=seed, cancel=cancel, workers=workers, report=report)
    return compiled, g, cost, out, seen


def test_every_arm_is_tried_once_then_the_bandit_chooses():
    p = _bqp250()
    X0 = np.random.default_rng(3).integers(0, 2, (6, p.n)).astype(np.int8)
    _, _, _, out, seen = _stage(p, X0, rounds=len(P.ARMS) + 3)
    rounds = out.stats["local_rounds"]
    assert sum(rounds.values()) == len(P.ARMS) + 3
    assert set(rounds) == {P._arm_name(a) for a in P.ARMS}  # each arm at least once
    assert all(kw["phase"] == "anneal" for kw in seen)


def test_arms_the_first_pass_did_not_reach_sit_out_the_stage(monkeypatch):
    """A first pass cut at once (no share of the stage for exploring) leaves every round to
    the first arm: an arm never tried is never chosen, not even by the exploration bonus."""
    monkeypatch.setattr(P, "EXPLORE_SHARE", 0.0)
    p = _bqp250()
    X0 = np.random.default_rng(3).integers(0, 2, (6, p.n)).astype(np.int8)
    _, _, _, out, _ = _stage(p, X0, rounds=6)
    assert out.stats["local_rounds"] == {P._arm_name(P.ARMS[0]): 6}


def test_the_stage_improves_on_greedy_and_reports_true_costs():
    p = _bqp250()
    X0 = np.random.default_rng(7).integers(0, 2, (8, p.n)).astype(np.int8)
    compiled, g, greedy_cost, out, _ = _stage(p, X0, rounds=12, workers=2)
    found = [a for a in out.attempts]
    assert found, "twelve rounds from greedy local minima of bqp250-1 found nothing better"
    bqm = dimod.BinaryQuadraticModel.from_qubo(
        {(p.labels[i], p.labels[i]): float(p.linear[i]) for i in range(p.n)})
    qi, qj, qv = p.pairs()
    bqm.add_quadratic_from((p.labels[i], p.labels[j], v) for i, j, v in zip(qi, qj, qv))
    bqm.offset += p.offset
    X = np.vstack([a.x for a in found])
    ref = bqm.energies((X, list(p.labels)))  # dimod's own energies
    assert np.allclose([a.cost for a in found], ref, atol=1e-6)
    best = min(a.cost for a in found)
    assert best < greedy_cost.min() - 1e-9
    assert best >= BEST_KNOWN - 1e-9  # never below the best known (reported optimal)


def test_portfolio_keeps_the_local_search_answer_when_it_is_best():
    p = _bqp250()
    X0 = np.random.default_rng(11).integers(0, 2, (8, p.n)).astype(np.int8)
    cands = CandidateSet.from_array(p, X0)
    res = repair(p, cands, [], method="portfolio", time_limit=1.0, seed=0)
    greedy = repair(p, cands, [], method="greedy", time_limit=1.0, seed=0)
    assert res.best.cost <= greedy.best.cost
    assert "local_rounds" in res.stats and sum(res.stats["local_rounds"].values()) >= 1
    assert res.best.cost >= BEST_KNOWN - 1e-9


def _timed_stage(problem, X0, *, seconds: float, seed: int = 0, workers: int = 1):
    """The stage for ``seconds`` with no cancel: (out, seconds at which each round
    reported)."""
    compiled, g, scorer, cost, viol, flips = _repaired(problem, X0)
    K = X0.shape[0]
    out = P.PlanOutcome(attempts=[])
    seen = []
    t0 = time.perf_counter()
    P._local_search(compiled, X0, g.X.copy(), cost.copy(), viol == 0.0, flips,
                    np.ones(K, dtype=bool), out, scorer, deadline=t0 + seconds,
                    max_flips=None, flip_price=0.0, seed=seed, cancel=None, workers=workers,
                    report=lambda **kw: seen.append((time.perf_counter(), kw)))
    return out, [t - t0 for t, _ in seen]


def test_a_model_short_of_sweeps_gets_one_long_chain_after_the_first_pass(monkeypatch):
    """When a chain could run at most LONG_CHAIN_SWEEPS sweeps in what is left, the rest of
    the stage is one round at an annealing arm, as soon as a round of RATE_SWEEPS or more
    has measured the pace; without the rule the rounds keep doubling."""
    p = _bqp250()
    X0 = np.random.default_rng(5).integers(0, 2, (6, p.n)).astype(np.int8)
    monkeypatch.setattr(P, "LONG_CHAIN_SWEEPS", 10 ** 12)  # every model is short of sweeps
    out, ends = _timed_stage(p, X0, seconds=0.6)
    rounds = sum(out.stats["local_rounds"].values())
    # the first pass, at most two rounds until one ran RATE_SWEEPS sweeps, then the long one
    assert rounds <= len(P.ARMS) + 2
    assert ends[-1] - ends[-2] > 0.5 * ends[-1]  # the last round took most of the stage
    monkeypatch.setattr(P, "LONG_CHAIN_SWEEPS", 0)  # never short: doubling rounds
    out2, _ = _timed_stage(p, X0, seconds=0.6)
    assert sum(out2.stats["local_rounds"].values()) > rounds


def test_short_of_sweeps_counts_at_the_fastest_measured_pace():
    left = 1.0
    assert P._short_of_sweeps({0: left / P.LONG_CHAIN_SWEEPS}, left)
    assert not P._short_of_sweeps({0: 1.0, 2: 0.5 * left / P.LONG_CHAIN_SWEEPS}, left)


def test_a_hedged_round_is_each_group_annealed_at_its_own_depth():
    """_anneal_at with two depths gives, group by group, exactly what a plain anneal call
    at that group's depth and seed gives (seeded chains: the threads do not matter)."""
    from flipfix.repair.solvers.anneal import anneal

    p = _bqp250()
    compiled = compile_constraints(p, [])
    X = greedy_repair(compiled, np.random.default_rng(9).integers(0, 2, (4, p.n)).astype(
        np.int8)).X
    kw = dict(sweeps=200, flip_price=0.0, max_flips=None, scale=None, deadline=None,
              cancel=None, until=None)
    both = P._anneal_at(compiled, X, depths=[0.3, 1.0], workers=2, seed=5, origin=X, **kw)
    low = anneal(compiled, X[:2], depth=0.3, workers=1, seed=5, origin=X[:2], **kw)
    high = anneal(compiled, X[2:], depth=1.0, workers=1, seed=5 + 7919, origin=X[2:], **kw)
    assert np.array_equal(both.X, np.vstack([low.X, high.X]))
    assert both.sweeps.tolist() == [200] * 4


def _portfolio(problem, X0, monkeypatch, *, reserve: float, time_limit: float = 0.5):
    """repair(method="portfolio") with ANNEAL_RESERVE set; records every _anneal_at call's
    (number of starts, depths)."""
    calls = []
    inner = P._anneal_at

    def spy(compiled, starts, **kw):
        calls.append((starts.shape[0], list(kw["depths"])))
        return inner(compiled, starts, **kw)

    monkeypatch.setattr(P, "ANNEAL_RESERVE", reserve)
    monkeypatch.setattr(P, "_anneal_at", spy)
    res = repair(problem, CandidateSet.from_array(problem, X0), [], method="portfolio",
                 time_limit=time_limit, seed=0, workers=2)
    return res, calls


def test_the_greedy_stage_leaves_the_search_its_reserve_of_sweeps(monkeypatch):
    """A reserve longer than any budget stops the greedy stage after the first candidate
    (the rest are reported as they are, 'unrepaired'), and both chains then start from that
    one answer; with no reserve every candidate is repaired. Every reported cost is
    recomputed by dimod."""
    p = _bqp250()
    X0 = np.random.default_rng(21).integers(0, 2, (12, p.n)).astype(np.int8)
    bqm = p.to_bqm()
    res, calls = _portfolio(p, X0, monkeypatch, reserve=1e9)
    assert res.stats["greedy_done"] == 1
    methods = list(res.audit.method)
    assert methods.count("unrepaired") == X0.shape[0] - 1
    assert calls and all(n == 2 for n, _ in calls)  # one answer, two chains from it
    assert res.best.feasible and res.best.cost >= BEST_KNOWN - 1e-9
    full, _ = _portfolio(p, X0, monkeypatch, reserve=0.0)
    assert full.stats["greedy_done"] == X0.shape[0]
    assert "unrepaired" not in list(full.audit.method)
    for r in (res, full):
        assert bqm.energies(([r.best.x], list(range(p.n))))[0] == pytest.approx(r.best.cost)


def test_a_stage_short_of_probe_sweeps_skips_the_first_pass(monkeypatch):
    """With time for at most NO_EXPLORE_SWEEPS probe sweeps, the first round is the last:
    one long round at the first arm (hedged when long enough, HEDGE_MIN_SWEEPS), not a
    probe of the first arm followed by others."""
    p = _bqp250()
    X0 = np.random.default_rng(22).integers(0, 2, (6, p.n)).astype(np.int8)
    monkeypatch.setattr(P, "NO_EXPLORE_SWEEPS", 10 ** 12)
    monkeypatch.setattr(P, "HEDGE_MIN_SWEEPS", 0)
    _, calls = _portfolio(p, X0, monkeypatch, reserve=0.0)
    assert calls[0][1] == [P.ARMS[0][1], max(P.ARMS[0][1], P.HEDGE_DEPTH)]
    monkeypatch.setattr(P, "NO_EXPLORE_SWEEPS", 0)
    _, calls = _portfolio(p, X0, monkeypatch, reserve=0.0)
    assert calls[0][1] == [P.ARMS[0][1]]  # the first pass: one depth per round


def test_the_last_round_hedges_only_when_its_chains_are_long(monkeypatch):
    """The last annealing round turns half its chains at HEDGE_DEPTH only when they have
    time for HEDGE_MIN_SWEEPS sweeps: with the threshold at 0 the last round carries two
    depths, with it beyond any budget every round carries one."""
    p = _bqp250()
    X0 = np.random.default_rng(23).integers(0, 2, (6, p.n)).astype(np.int8)
    monkeypatch.setattr(P, "HEDGE_MIN_SWEEPS", 0)
    _, calls = _portfolio(p, X0, monkeypatch, reserve=0.0)
    assert any(len(d) == 2 for _, d in calls)
    assert all(d[1] == max(d[0], P.HEDGE_DEPTH) for _, d in calls if len(d) == 2)
    monkeypatch.setattr(P, "HEDGE_MIN_SWEEPS", 10 ** 12)
    _, calls = _portfolio(p, X0, monkeypatch, reserve=0.0)
    assert calls and all(len(d) == 1 for _, d in calls)


def test_sweep_pace_leaves_its_state_as_it_was():
    from flipfix.repair.solvers.anneal import sweep_pace

    p = _bqp250()
    compiled = compile_constraints(p, [])
    x = np.random.default_rng(4).integers(0, 2, p.n).astype(np.int8)
    keep = x.copy()
    assert sweep_pace(compiled, x) > 0.0
    assert np.array_equal(x, keep)


def test_answers_read_and_write_like_the_rows_of_a_library_array():
    X = np.arange(12, dtype=np.int8).reshape(3, 4)
    a = P.Answers(np.array([7, 2, 5]), X.copy())
    assert np.array_equal(a[2], X[1])
    assert np.array_equal(a[[5, 7]], X[[2, 0]])
    a[np.int64(5)] = np.zeros(4, dtype=np.int8)
    assert not a[5].any() and np.array_equal(a[7], X[0])
    with pytest.raises(KeyError):
        a[3]


def test_a_long_last_round_ends_on_the_part_its_chains_disagree_on(monkeypatch):
    """Two chains (two workers) in a long last round: its second part anneals the variables
    their answers disagree on with their neighbours (on a random sparse model of 3,000
    variables: some of them, not all); every answer kept is reported at its true cost
    (dimod's energies of the same model). Below FOCUS_MIN_SWEEPS there is no second part."""
    rng = np.random.default_rng(4)
    n = 3000
    ij = rng.integers(0, n, (2 * n, 2))
    ij = ij[ij[:, 0] != ij[:, 1]]
    p = Problem.from_terms({i: float(rng.integers(-3, 4)) for i in range(n)},
                           [(int(i), int(j), float(rng.choice([-2.0, -1.0, 1.0, 2.0])))
                            for i, j in ij], labels=range(n))
    X0 = rng.integers(0, 2, (4, n)).astype(np.int8)
    monkeypatch.setattr(P, "LONG_CHAIN_SWEEPS", 10 ** 12)  # one long last round
    monkeypatch.setattr(P, "FOCUS_MIN_SWEEPS", 1)
    out, _ = _timed_stage(p, X0, seconds=0.3, workers=2)
    parts = out.stats["focus_parts"]
    assert len(parts) == 1 and 0 < parts[0] < n
    bqm = p.to_bqm()
    for a in out.attempts:
        assert abs(bqm.energy(dict(enumerate(a.x.tolist()))) - a.cost) < 1e-6
    monkeypatch.setattr(P, "FOCUS_MIN_SWEEPS", 10 ** 12)
    out2, _ = _timed_stage(p, X0, seconds=0.3, workers=2)
    assert "focus_parts" not in out2.stats


def test_a_stage_out_of_time_still_answers_with_the_first_candidate_clamped():
    """No time for any descent: with fixings as the only hard constraints, the first
    candidate with its fixed bits set is the stage's answer (feasible by the constraint
    definitions); with a hard row that clamping alone breaks there is none."""
    from flipfix.repair.model.constraints import FixVariables, LinearConstraint

    rng = np.random.default_rng(2)
    n = 60
    p = Problem.from_terms({i: float(rng.integers(-3, 4)) for i in range(n)},
                           [(i, (i + 7) % n, float(rng.integers(-3, 4))) for i in range(n)],
                           labels=range(n))
    X0 = rng.integers(0, 2, (5, n)).astype(np.int8)
    X0[:, 3] = 0
    fix = FixVariables({3: 1})
    past = time.perf_counter() - 1.0
    order = np.array([2, 0, 1, 3, 4])

    def stage(constraints):
        compiled = compile_constraints(p, constraints)
        return P._greedy_stage(compiled, X0, order, deadline=past, first_deadline=past,
                               max_flips=None, flip_price=0.0, cancel=None, workers=1,
                               report=lambda **kw: None)[0]

    rows = stage([fix])
    assert list(rows) == [2]
    assert rows[2][3] == 1 and (np.delete(rows[2], 3) == np.delete(X0[2], 3)).all()
    assert stage([fix, LinearConstraint({i: 1.0 for i in range(n)}, "<=", 0.0)]) == {}
