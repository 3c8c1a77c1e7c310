"""What-if stress test on a planted model: a broad minimum against a narrow optimum."""

from __future__ import annotations

import itertools
import threading

import numpy as np
import pytest

from flipfix.repair import CandidateSet, InputError, Problem
from flipfix.repair.lowering.compiled import compile_constraints
from flipfix.repair.model.constraints import FixVariables, HammingPenalty, LinearConstraint
from flipfix.repair.audit.stress import ScenarioFamily, draw_scenarios, pearson, spearman, stress_test

# ----------------------------------------------------------------- planted model
# construction in tests/planted.py
from planted import ALPHA, R, planted as _planted, state as _state  # noqa: E402

RIGID, W = 4, 3.0
BUDGET = 120.0  # seconds for a whole stress run in tests (used runs take well under 1 s)


def planted(groups):
    return _planted(groups, rigid=RIGID)


def state(p, groups, broad):
    return _state(p, groups, broad, rigid=RIGID)


def predicted_costs(p, g, ref):
    """Closed form of greedy descent from each state under W * Hamming(x, ref), one block.

    Narrow: every flip costs more than W, nothing moves: E_narrow + W d.
    Broad: each y bit that differs from ref flips (gain W - ALPHA > 0); the switch stays off
    while some y is on (cost -R + P|y| - W > 0); with ref_y = 0 all y go off and the switch
    then flips on (gain R - W or R + W), landing on the narrow state's repair.
    """
    r = np.array([ref[p.index[f"y0_{i}"]] for i in range(g)])
    rz = ref[p.index["z0"]]
    d_rigid = sum(1 - ref[p.index[f"r{j}"]] for j in range(RIGID))
    k = int(r.sum())
    narrow = -R - 5.0 * RIGID + W * (d_rigid + (1 - rz) + k)
    broad = narrow if k == 0 else -ALPHA * k - 5.0 * RIGID + W * (d_rigid + rz)
    return narrow, broad


@pytest.mark.parametrize("method", ["greedy"])
def test_broad_candidate_wins_most_scenarios_and_report_says_so(method):
    g = 12
    p = planted([g])
    X = np.vstack([state(p, [g], [False]), state(p, [g], [True])])
    cs = CandidateSet.from_array(p, X, ids=["narrow", "broad"])
    e = p.energies(X)
    assert e[0] < e[1]  # the narrow one is the optimum of the unconstrained model
    fam = ScenarioFamily(hamming_weight=W)
    # a generous whole-run budget: greedy takes milliseconds per scenario, but the first call
    # may compile the kernel; exact figures must not depend on the machine's load
    rep = stress_test(p, cs, fam, scenarios=40, seed=1, method=method, epsilon=ALPHA,
                      time_limit=BUDGET)
    assert rep.scenarios_done == 40 and rep.stopped == "done"
    narrow, broad = rep.candidates
    assert (narrow.free_variables, broad.free_variables) == (0, g)
    # every repair cost equals the closed form of the construction (see predicted_costs)
    wins = 0
    for s, sc in enumerate(draw_scenarios(p, cs, fam, count=40, seed=1)):
        (h,) = sc.constraints
        ref = np.array([h.reference[lab] for lab in p.labels])
        want_n, want_b = predicted_costs(p, g, ref)
        assert rep.cost[s] == pytest.approx([want_n, want_b])
        wins += want_b < want_n
    assert broad.wins == wins and narrow.wins == 40 - wins
    assert wins > 30  # most scenarios: P(k >= 4) for k ~ Bin(12, 1/2) is 0.93
    assert broad.mean_cost < narrow.mean_cost and broad.worst_cost < narrow.worst_cost
    assert broad.mean_flips > 0 and narrow.mean_flips == 0


def test_free_variables_correlate_with_cheap_repair_across_a_library():
    groups = [4, 8, 12, 16]
    p = planted(groups)
    X = np.vstack([state(p, groups, bits) for bits in itertools.product([0, 1], repeat=4)])
    cs = CandidateSet.from_array(p, X)
    rep = stress_test(p, cs, ScenarioFamily(hamming_weight=W), scenarios=30, seed=2,
                      method="greedy", epsilon=ALPHA, time_limit=BUDGET)
    free = [c.free_variables for c in rep.candidates]
    assert free == [sum(g for g, b in zip(groups, bits) if b)
                    for bits in itertools.product([0, 1], repeat=4)]
    mean = [c.mean_cost for c in rep.candidates]
    # the report's figures agree with numpy's correlation (outside reference: np.corrcoef)
    assert rep.pearson == pytest.approx(np.corrcoef(free, mean)[0, 1])
    assert rep.spearman < -0.8 and rep.pearson < -0.8 and rep.correlated == 16
    # the all-narrow candidate, the unconstrained optimum, never wins
    assert rep.candidates[0].wins == 0 and sum(len(w) for w in rep.winners) >= 30


def test_spearman_matches_published_example():
    # Wikipedia, "Spearman's rank correlation coefficient", IQ against hours of TV per week:
    # rho = -29/165 (value from memory)
    iq = [106, 100, 86, 101, 99, 103, 97, 113, 112, 110]
    tv = [7, 27, 2, 50, 28, 29, 20, 12, 6, 17]
    assert spearman(iq, tv) == pytest.approx(-29 / 165)
    assert pearson(iq, tv) == pytest.approx(np.corrcoef(iq, tv)[0, 1])  # numpy reference
    # ties take average ranks: a monotone relation with ties is still +1
    assert spearman([1, 2, 2, 3], [10, 20, 20, 30]) == pytest.approx(1.0)
    assert pearson([1, 1, 1], [1, 2, 3]) is None and spearman([1, 2], [2, 1]) is None


@pytest.mark.parametrize("vartype", ["BINARY", "SPIN"])
def test_scenarios_are_seeded_and_mean_what_they_say(vartype):
    rng = np.random.default_rng(4)
    n = 10
    p = Problem.from_terms({i: float(rng.normal()) for i in range(n)},
                           [(i, i + 1, 1.0) for i in range(n - 1)], vartype=vartype)
    vals = rng.integers(0, 2, size=(6, n))
    cs = CandidateSet.from_array(p, 2 * vals - 1 if vartype == "SPIN" else vals)
    fam = ScenarioFamily(hamming_weight=2.0, hamming_shape="quadratic", hamming_fraction=0.5,
                         reference="perturbed", perturb_rate=0.2, fix_k=3, capacity_cut_percent=25)
    a = draw_scenarios(p, cs, fam, count=4, seed=9)
    b = draw_scenarios(p, cs, fam, count=8, seed=9)
    assert [s.description for s in a] == [s.description for s in b[:4]]
    assert [s.seed for s in a] == [s.seed for s in b[:4]]
    assert len({s.seed for s in b}) == 8
    cap_max = int(cs.X.sum(axis=1).max())
    for sc in b:
        h, fix, cap = sc.constraints
        assert isinstance(h, HammingPenalty) and len(h.reference) == 5 and h.shape == "quadratic"
        assert isinstance(fix, FixVariables) and len(fix.values) == 3
        assert isinstance(cap, LinearConstraint) and cap.sense == "<="
        # the capacity row, lowered to 0/1 form, is sum x <= 0.75 * (max over the library):
        # counted by hand on every candidate
        comp = compile_constraints(p, [cap])
        viol = comp.evaluate(cs.X).violation
        want = np.maximum(0.0, cs.X.sum(axis=1) - 0.75 * cap_max)
        assert viol == pytest.approx(want)


def test_combined_family_repairs_checked_against_exhaustive_enumeration():
    rng = np.random.default_rng(8)
    n = 11
    lin = {i: float(rng.integers(-3, 4)) for i in range(n)}
    quad = [(i, j, float(rng.integers(-2, 3))) for i in range(n) for j in range(i + 1, n)
            if rng.random() < 0.3]
    p = Problem.from_terms(lin, quad)
    cs = CandidateSet.from_array(p, rng.integers(0, 2, size=(5, n)))
    fam = ScenarioFamily(hamming_weight=1.0, fix_k=2, capacity_cut_percent=20)
    # CP-SAT proves optimality on 11 variables in milliseconds; the generous whole-run budget
    # only guards against a slow first call (kernel compilation, a loaded machine)
    rep = stress_test(p, cs, fam, scenarios=5, seed=3, method="cpsat", time_limit=20.0)
    assert rep.scenarios_done == 5, rep.message
    allx = np.array(list(itertools.product((0, 1), repeat=n)), dtype=np.int8)
    for s, sc in enumerate(draw_scenarios(p, cs, fam, count=5, seed=3)):
        ev = compile_constraints(p, sc.constraints).evaluate(allx)  # exhaustive enumeration
        opt = ev.cost[ev.feasible].min()
        c = np.asarray(rep.cost[s])
        f = np.asarray(rep.feasible[s])
        assert f.any()
        assert (c[f] >= opt - 1e-9).all()
        assert rep.scenario_best[s] == pytest.approx(c[f].min())
        # CP-SAT warm-started from the library reaches the exhaustive optimum on 11 variables
        assert rep.scenario_best[s] == pytest.approx(opt)


def test_budget_cancel_and_progress():
    p = planted([6])
    cs = CandidateSet.from_array(p, np.vstack([state(p, [6], [0]), state(p, [6], [1])]))
    fam = ScenarioFamily(hamming_weight=W)
    seen = []
    rep = stress_test(p, cs, fam, scenarios=5, seed=0, progress=seen.append, time_limit=BUDGET)
    assert [d["done"] for d in seen] == [1, 2, 3, 4, 5] and all(d["total"] == 5 for d in seen)
    assert all(d["phase"] == "stress" for d in seen)
    cancel = threading.Event()

    def stop_after_two(d):
        if d["done"] == 2:
            cancel.set()

    rep = stress_test(p, cs, fam, scenarios=5, seed=0, cancel=cancel, progress=stop_after_two,
                      time_limit=BUDGET)
    assert (rep.scenarios_done, rep.stopped) == (2, "cancelled") and len(rep.cost) == 2
    rep = stress_test(p, cs, fam, scenarios=5, seed=0, time_limit=1e-9)
    assert (rep.scenarios_done, rep.stopped) == (0, "time_limit")
    assert all(c.wins == 0 and c.failures == 0 for c in rep.candidates)
    assert rep.to_dict()["candidates"][0]["mean_cost"] is None  # JSON-ready: no NaN


@pytest.mark.parametrize("kw, field", [
    (dict(hamming_weight=-1.0), "family.hamming_weight"),
    (dict(hamming_shape="cubic"), "family.hamming_shape"),
    (dict(hamming_fraction=0.0), "family.hamming_fraction"),
    (dict(reference="nearby"), "family.reference"),
    (dict(fix_k=99), "family.fix_k"),
    (dict(capacity_cut_percent=100.0), "family.capacity_cut_percent"),
    (dict(capacity_weights={"nope": 1.0}), "family.capacity_weights['nope']"),
    (dict(hamming_weight=0.0), "family"),
])
def test_bad_family_names_the_field(kw, field):
    p = planted([3])
    cs = CandidateSet.from_array(p, state(p, [3], [1]))
    with pytest.raises(InputError) as err:
        draw_scenarios(p, cs, ScenarioFamily(**kw), count=2)
    assert err.value.field == field


def test_audit_cli_end_to_end(tmp_path):
    import json

    from flipfix.repair.documents.forms import problem_document
    from flipfix.service.audit_cli import main

    groups = [6, 10]
    p = planted(groups)
    X = np.vstack([state(p, groups, bits) for bits in itertools.product([0, 1], repeat=2)])
    (tmp_path / "p.json").write_text(json.dumps(problem_document(p)))
    cands = [{"id": f"k{k}", "assignment": {str(lab): int(v) for lab, v in zip(p.labels, row)}}
             for k, row in enumerate(X)]
    (tmp_path / "c.json").write_text(json.dumps(cands))
    png, js = tmp_path / "a.png", tmp_path / "a.json"
    rc = main(["audit", str(tmp_path / "p.json"), str(tmp_path / "c.json"), "--scenarios", "6", "--time-limit", str(BUDGET),
               "--weight", str(W), "--epsilon", str(ALPHA), "--keep", "2", "--pareto-methods",
               "greedy", "--png", str(png), "--json", str(js)])
    assert rc == 0
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # the PNG signature
    doc = json.loads(js.read_text())
    assert [c["free_variables"] for c in doc["stress"]["candidates"]] == [0, 10, 6, 16]
    assert doc["stress"]["scenarios_done"] == 6 and len(doc["curation"]["kept_ids"]) == 2
    pts = [(q["cost"], q["flips"]) for q in doc["pareto"]]
    assert all(a[1] < b[1] and a[0] > b[0] for a, b in zip(pts, pts[1:]))


@pytest.mark.parametrize("extra, field", [(["--weight", "-2"], "--weight"),
                                          (["--keep", "9"], "--keep"),
                                          (["--scenarios", "0"], "--scenarios")])
def test_audit_cli_bad_option_names_it(tmp_path, capsys, extra, field):
    import json

    from flipfix.repair.documents.forms import problem_document
    from flipfix.service.audit_cli import main

    p = planted([3])
    (tmp_path / "p.json").write_text(json.dumps(problem_document(p)))
    row = state(p, [3], [1])
    (tmp_path / "c.json").write_text(json.dumps(
        [{"id": "a", "assignment": {str(lab): int(v) for lab, v in zip(p.labels, row)}}]))
    rc = main(["audit", str(tmp_path / "p.json"), str(tmp_path / "c.json"), "--pareto-methods",
               "greedy", "--scenarios", "2"] + extra)
    assert rc == 2
    assert f"error: {field}:" in capsys.readouterr().err
