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
    # decision-level parts on a problem that declares no decisions
    (dict(unavailable_values=1), "family.unavailable_values"),
    (dict(must_change=1), "family.must_change"),
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


# ------------------------------------------- decision-level families on a one-hot roster
# construction in tests/roster.py; the library is the 8 cheapest valid plans plus one row
# whose nurse 0 has no shift set (a broken one-hot decision)
from roster import (  # noqa: E402
    SHIFTS, cheapest_plans, free_decisions, plan_bits, roster, roster_energy,
)


def _roster_library(k=8):
    p, pref = roster()
    plans = cheapest_plans(pref, k)
    broken = plan_bits(plans[0])
    broken[:len(SHIFTS)] = 0
    X = np.vstack([plan_bits(q) for q in plans] + [broken])
    ids = ["".join(SHIFTS[s][0] for s in q) for q in plans] + ["broken"]
    return p, pref, plans, CandidateSet.from_array(p, X, ids=ids)


@pytest.mark.parametrize("kw", [dict(unavailable_values=2), dict(must_change=2),
                                dict(unavailable_values=1, must_change=3)])
def test_decision_families_keep_decisions_valid_and_change_what_they_say(kw):
    from flipfix.repair.model.encodings import ForbidValues

    p, pref, plans, cs = _roster_library()
    fam = ScenarioFamily(hamming_weight=0.0, **kw)
    want_u, want_m = kw.get("unavailable_values", 0), kw.get("must_change", 0)
    every = list(itertools.product(range(len(SHIFTS)), repeat=pref.shape[0]))  # all valid plans
    E = np.vstack([plan_bits(q) for q in every])
    broken = np.vstack([np.zeros(p.n, np.int8), np.ones(p.n, np.int8)])  # no shift / all shifts
    drawn = draw_scenarios(p, cs, fam, count=12, seed=5)
    first = draw_scenarios(p, cs, fam, count=4, seed=5)
    assert [s.description for s in first] == [s.description for s in drawn[:4]]
    for sc in drawn:
        lost = {}  # decision -> (value index, part), read from the constraints themselves
        for c in sc.constraints:
            assert isinstance(c, ForbidValues) and len(c.values) == 1
            assert c.decision not in lost  # the two parts use distinct decisions
            lost[c.decision] = (SHIFTS.index(c.values[0]), c.name)
        assert sum(n == "stress_unavailable" for _, n in lost.values()) == want_u
        assert sum(n == "stress_must_change" for _, n in lost.values()) == want_m
        for d, (v, n) in lost.items():
            if n == "stress_unavailable":  # a value some valid library plan holds
                assert any(q[int(d[1:])] == v for q in plans)
        # the core's verdict on every valid plan equals the test's own: a plan is feasible
        # iff it avoids every lost value; strings that break an encoding never are
        comp = compile_constraints(p, sc.constraints)
        mine = np.array([all(q[int(d[1:])] != v for d, (v, _) in lost.items()) for q in every])
        assert (comp.evaluate(E).feasible == mine).all() and mine.any()
        assert not comp.evaluate(broken).feasible.any()
        if want_m:
            # the plan in force is a valid library plan holding each value it must give up,
            # and the nearest feasible plan changes exactly the decisions the scenario names
            assert sc.plan in cs.ids and sc.plan != "broken"
            r = plans[cs.ids.index(sc.plan)]
            assert all(r[int(d[1:])] == v for d, (v, n) in lost.items() if n == "stress_must_change")
            changed = min(sum(a != b for a, b in zip(q, r)) for q, ok in zip(every, mine) if ok)
            assert want_m <= changed <= want_m + want_u
            if want_u == 0:
                assert changed == want_m
        else:
            assert sc.plan == ""


def test_default_family_is_decision_level_on_decisions():
    from flipfix.repair.audit.stress import default_family

    p, pref, plans, cs = _roster_library()
    fam = default_family(p)
    assert (fam.hamming_weight, fam.unavailable_values, fam.must_change) == (0.0, 1, 0)
    assert default_family(planted([3])) == ScenarioFamily()
    rep = stress_test(p, cs, scenarios=3, seed=1, time_limit=BUDGET)  # family=None: the default
    assert rep.scenarios_done == 3 and rep.family["unavailable_values"] == 1
    assert all(d.startswith("unavailable: n") for d in rep.scenario_descriptions)
    # every repair is a valid plan avoiding the lost value: never below the cheapest such plan
    # (enumerated with roster_energy), and a valid candidate that does not hold the value
    # costs at most its own energy (descent never worsens it)
    every = list(itertools.product(range(len(SHIFTS)), repeat=pref.shape[0]))
    for s, sc in enumerate(draw_scenarios(p, cs, default_family(p), count=3, seed=1)):
        [lost] = sc.constraints
        i, v = int(lost.decision[1:]), SHIFTS.index(lost.values[0])
        opt = min(roster_energy(q, pref) for q in every if q[i] != v)
        assert all(rep.feasible[s]) and min(rep.cost[s]) >= opt - 1e-9
        for k, q in enumerate(plans):
            if q[i] != v:
                assert rep.cost[s][k] <= roster_energy(q, pref) + 1e-9


@pytest.mark.parametrize("kw, field", [
    (dict(unavailable_values=6), "family.unavailable_values"),
    (dict(must_change=-1), "family.must_change"),
    (dict(must_change=2.0), "family.must_change"),
    (dict(unavailable_values=3, must_change=3), "family.unavailable_values"),
])
def test_bad_decision_parts_name_the_field(kw, field):
    p, _, _, cs = _roster_library()
    with pytest.raises(InputError) as err:
        draw_scenarios(p, cs, ScenarioFamily(hamming_weight=0.0, **kw), count=2)
    assert err.value.field == field


def test_must_change_needs_a_valid_plan():
    p, pref = roster()
    X = np.zeros((2, p.n), np.int8)  # every decision broken
    cs = CandidateSet.from_array(p, X)
    with pytest.raises(InputError) as err:
        draw_scenarios(p, cs, ScenarioFamily(hamming_weight=0.0, must_change=1), count=1)
    assert err.value.field == "family.must_change"


def _write_library(tmp_path, p, X, ids):
    import json

    from flipfix.repair.documents.forms import problem_document

    (tmp_path / "p.json").write_text(json.dumps(problem_document(p)))
    (tmp_path / "c.json").write_text(json.dumps(
        [{"id": i, "assignment": {str(lab): int(v) for lab, v in zip(p.labels, row)}}
         for i, row in zip(ids, X)]))
    return str(tmp_path / "p.json"), str(tmp_path / "c.json")


@pytest.mark.parametrize("eps", [0.0, 1.0])
def test_audit_names_free_variables_and_free_decisions_on_a_one_hot_model(tmp_path, capsys, eps):
    import json

    from flipfix.service.audit_cli import main

    p, pref, plans, cs = _roster_library()
    pj, cj = _write_library(tmp_path, p, cs.X[:-1], cs.ids[:-1])
    js = tmp_path / "a.json"
    rc = main(["audit", pj, cj, "--scenarios", "3", "--epsilon", str(eps), "--time-limit",
               str(BUDGET), "--pareto-methods", "greedy", "--json", str(js)])
    text = capsys.readouterr().out
    assert rc == 0
    doc = json.loads(js.read_text())
    want = [free_decisions(q, pref, eps) for q in plans]
    assert max(want) > 0  # the roster has free moves at this epsilon, so the check can fail
    cands = doc["stress"]["candidates"]
    assert [c["free_decisions"] for c in cands] == want
    assert [c["free_variables"] for c in cands] == [0] * len(plans)  # every bit is a decision's
    assert [q["free_decisions"] for q in doc["robustness"]["profiles"]] == want
    assert [q["free_variables"] for q in doc["robustness"]["profiles"]] == [0] * len(plans)
    # the default scenarios on a problem with decisions are decision level
    assert doc["stress"]["family"]["unavailable_values"] == 1
    assert doc["stress"]["family"]["hamming_weight"] == 0
    head = next(line for line in text.splitlines() if line.startswith("candidate"))
    assert "free var" in head and "free dec" in head
    assert f"free moves (free variables + free decisions, cost <= {eps:g}) vs mean repair cost" \
        in text
    row = next(line for line in text.splitlines() if line.startswith(cands[0]["candidate_id"]))
    assert row.split()[2:4] == ["0", str(want[0])]


def test_audit_cli_decision_options(tmp_path, capsys):
    import json

    from flipfix.service.audit_cli import main

    p, pref, plans, cs = _roster_library()
    pj, cj = _write_library(tmp_path, p, cs.X[:-1], cs.ids[:-1])
    js = tmp_path / "a.json"
    rc = main(["audit", pj, cj, "--scenarios", "3", "--must-change", "2", "--pareto-methods",
               "greedy", "--time-limit", str(BUDGET), "--json", str(js)])
    assert rc == 0, capsys.readouterr().err
    fam = json.loads(js.read_text())["stress"]["family"]
    assert (fam["must_change"], fam["unavailable_values"], fam["hamming_weight"]) == (2, 0, 0)
    assert all("must change" in s["description"] for s in json.loads(js.read_text())["stress"]["scenarios"])
    rc = main(["audit", pj, cj, "--scenarios", "2", "--unavailable", "9", "--pareto-methods", "greedy"])
    assert rc == 2 and "error: --unavailable:" in capsys.readouterr().err
    # on a problem without decisions the decision options name themselves
    q = planted([3])
    pj, cj = _write_library(tmp_path, q, state(q, [3], [1])[None, :], ["a"])
    rc = main(["audit", pj, cj, "--scenarios", "2", "--must-change", "1", "--pareto-methods", "greedy"])
    assert rc == 2 and "error: --must-change:" in capsys.readouterr().err


@pytest.mark.parametrize("case", ["planted", "roster"])
def test_audit_figure_names_points_without_overlap_and_counts_from_zero(tmp_path, case):
    """The PNG's artists (matplotlib objects, not pixels): both count axes start at 0,
    every named point carries an Annotation at its own coordinates, the names follow the
    legend's rule, and no two name boxes overlap."""
    from matplotlib.text import Annotation

    from flipfix.service.audit_cli import NAMED_CANDIDATES, audit, draw_figure

    if case == "planted":  # 8 candidates, every one named; a front of several points
        groups = [4, 8, 12]
        p = planted(groups)
        X = np.vstack([state(p, groups, b) for b in itertools.product([0, 1], repeat=3)])
        cs = CandidateSet.from_array(p, X, ids=[f"k{k}" for k in range(8)])
        fam = ScenarioFamily(hamming_weight=W)
    else:  # 14 one-hot plans: only the NAMED_CANDIDATES cheapest are named
        p, pref = roster(nurses=6, seed=1)
        plans = cheapest_plans(pref, 14)
        cs = CandidateSet.from_array(p, np.vstack([plan_bits(q) for q in plans]),
                                     ids=[f"plan{k}" for k in range(14)])
        fam = None
    rep = audit(p, cs, fam, scenarios=5, seed=0, method="greedy", time_limit=BUDGET,
                epsilon=ALPHA, keep=None, pareto_methods=("greedy",), pareto_time=BUDGET)
    fig = draw_figure(rep, str(tmp_path / "a.png"))
    assert (tmp_path / "a.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    ax1, ax2 = fig.axes
    st, front = rep["stress"], rep["pareto"]
    assert ax1.get_xlim()[0] == 0 and ax2.get_xlim()[0] == 0
    assert ax2.get_xlim()[1] > max(q.flips for q in front)
    free = [c.free_moves for c in st.candidates]
    assert ax1.get_xlim()[1] > max(free)
    names1 = [a for a in ax1.texts if isinstance(a, Annotation)]
    names2 = [a for a in ax2.texts if isinstance(a, Annotation)]
    order = sorted(range(len(st.candidates)), key=lambda k: (st.candidates[k].mean_cost, k))
    named = order[:NAMED_CANDIDATES]
    assert [a.get_text() for a in names1] == [st.candidates[k].candidate_id for k in named]
    for a, k in zip(names1, named):
        assert a.xy == pytest.approx((free[k], st.candidates[k].mean_cost))
    legend = [t.get_text() for t in ax1.get_legend().get_texts()]
    assert ("names: every candidate" if len(cs) <= NAMED_CANDIDATES
            else f"names: the {NAMED_CANDIDATES} lowest mean costs") in legend
    assert [a.get_text() for a in names2] == [f"{q.candidate_id} ({q.method})" for q in front]
    for a, q in zip(names2, front):
        assert a.xy == pytest.approx((q.flips, q.cost))
    if case == "planted":
        assert len(front) >= 3  # several names on the right panel, so overlaps could occur
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    r = FigureCanvasAgg(fig).get_renderer()  # the closed figure, measured as it was saved
    boxes = [a.get_window_extent(r) for a in names1 + names2]
    assert not any(b.overlaps(c) for i, b in enumerate(boxes) for c in boxes[i + 1:])
