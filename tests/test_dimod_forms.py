"""dimod's own forms in and out: serialised BQM and SampleSet JSON, ConstrainedQuadraticModel
(object and file), and the answer as a SampleSet; in-process and through a real server.

References: dimod's ExactSolver (brute force over every assignment) for the BQM cases, and
dimod's ExactCQMSolver (brute force, with dimod's own feasibility check) for the CQM cases;
dimod's ``BinaryQuadraticModel.energy`` for the SampleSet's energies.
"""

from __future__ import annotations

import json

import dimod
import numpy as np
import pytest

from flipfix.repair import CandidateSet, InputError, Problem, repair
from flipfix.repair.documents.dimod_forms import from_cqm, read_candidates, read_problem
from flipfix.service.cli import main
from flipfix.service.client import FlipfixClient, FlipfixError
from flipfix.service.server import create_server

BQM = dimod.BinaryQuadraticModel({"a": -1.0, "b": 0.5, 3: -0.25, "d": 1.0},
                                 {("a", "b"): 1.5, ("b", 3): -2.0, (3, "d"): 0.75, ("a", "d"): -1.0},
                                 0.5, "SPIN")
SAMPLES = dimod.SampleSet.from_samples(
    [{"a": 1, "b": 1, 3: -1, "d": 1}, {"a": -1, "b": -1, 3: 1, "d": -1},
     {"a": 1, "b": -1, 3: -1, "d": -1}], "SPIN", energy=[0.0, 0.0, 0.0])
LATE = [{"type": "fix", "values": {"b": 1}}]
IDS = CandidateSet.from_sampleset(Problem.from_bqm(BQM), SAMPLES).ids


def _bqm_optimum_with_b_up() -> float:
    ss = dimod.ExactSolver().sample(BQM)
    return min(e for s, e in ss.data(["sample", "energy"]) if s["b"] == 1)


def _cqm():
    x = {v: dimod.Binary(v) for v in ("x0", "x1", "x2", "s_a", "s_b", "s_c")}
    cqm = dimod.ConstrainedQuadraticModel()
    cqm.set_objective(-2 * x["x0"] - x["x1"] + 1.5 * x["x0"] * x["x1"] - x["x2"]
                      + 2 * x["s_a"] + 0.5 * x["s_b"] + x["s_c"] + x["x0"] * x["s_b"]
                      - 1.25 * x["x2"] * x["s_c"] + 3.0)
    cqm.add_constraint(x["x0"] + x["x1"] + x["x2"] <= 2, label="at most two")
    cqm.add_constraint(x["x1"] - x["s_c"] >= 0, label="c needs x1")
    cqm.add_discrete(["s_a", "s_b", "s_c"], label="shift")
    return cqm


def _cqm_optimum(cqm) -> float:
    ss = dimod.ExactCQMSolver().sample_cqm(cqm)
    return float(min(ss.filter(lambda d: d.is_feasible).record.energy))


CQM_CANDIDATES = [{"id": "k1", "assignment": {"x0": 1, "x1": 1, "x2": 1, "s_a": 1, "s_b": 0, "s_c": 0}},
                  {"id": "k2", "assignment": {"x0": 0, "x1": 0, "x2": 1, "s_a": 0, "s_b": 0, "s_c": 1}}]


def _write(tmp_path, problem, candidates, constraints):
    paths = []
    for name, doc in (("problem", problem), ("candidates", candidates),
                      ("constraints", constraints)):
        path = tmp_path / f"{name}.json"
        if isinstance(doc, bytes):
            path.write_bytes(doc)
        else:
            path.write_text(json.dumps(doc))
        paths.append(str(path))
    return paths


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    db = tmp_path_factory.mktemp("dimod") / "s.sqlite3"
    with create_server("127.0.0.1:0", db_path=str(db), workers=1) as srv:
        with FlipfixClient(srv.address) as fx:
            fx.wait_ready(timeout=300)
        yield srv


def test_serialised_bqm_and_sampleset_are_read():
    doc = json.loads(json.dumps(BQM.to_serializable()))
    problem, rows = read_problem(doc)
    assert rows == [] and problem.vartype == "SPIN" and list(problem.labels) == ["a", "b", 3, "d"]
    cands = read_candidates(json.loads(json.dumps(SAMPLES.to_serializable())), problem)
    # named as CandidateSet.from_sampleset names the rows of the SampleSet object
    assert cands.ids == CandidateSet.from_sampleset(problem, SAMPLES).ids and len(cands.ids) == 3
    # energies of the candidates as dimod computes them
    want = BQM.energies((SAMPLES.record.sample, list(SAMPLES.variables)))
    got = problem.energies(cands.X)
    assert np.allclose(np.sort(got), np.sort(want))


def test_damaged_dimod_document_names_the_field():
    doc = BQM.to_serializable()
    doc["linear_biases"] = [1.0]  # one bias for four variables
    with pytest.raises(InputError) as err:
        read_problem(json.loads(json.dumps(doc)))
    assert err.value.field == "problem.linear_biases" and "num_variables = 4" in err.value.message
    doc = BQM.to_serializable()
    doc["variable_type"] = "TERNARY"
    with pytest.raises(InputError) as err:
        read_problem(json.loads(json.dumps(doc)))
    assert err.value.field == "problem" and "dimod BinaryQuadraticModel" in err.value.message


@pytest.mark.parametrize("remote", [False, True])
def test_cli_reads_dimod_json_and_writes_a_sampleset(tmp_path, capsys, server, remote):
    files = _write(tmp_path, BQM.to_serializable(), SAMPLES.to_serializable(), LATE)
    extra = ["--server", server.address] if remote else []
    assert main(["repair", *files, "--quiet", "--time-limit", "1", *extra]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["best"]["cost"] == pytest.approx(_bqm_optimum_with_b_up())
    assert out["best"]["candidate_id"] in IDS
    assert main(["repair", *files, "--quiet", "--time-limit", "1", "--output", "sampleset",
                 *extra]) == 0
    ss = dimod.SampleSet.from_serializable(json.loads(capsys.readouterr().out))
    assert len(ss) == 1 and ss.vartype is dimod.SPIN
    sample = ss.first.sample
    assert sample["b"] == 1
    assert ss.first.energy == pytest.approx(BQM.energy(sample))  # dimod's own energy
    assert ss.first.energy == pytest.approx(_bqm_optimum_with_b_up())
    assert bool(ss.record.feasible[0]) and ss.info["candidate_id"] in IDS
    assert ss.info["status"] in ("optimal", "feasible")


def test_cqm_becomes_problem_rows_and_one_hot_decision():
    cqm = _cqm()
    problem, rows = from_cqm(cqm)
    assert [r.name for r in rows] == ["at most two", "c needs x1"]
    [d] = problem.decisions
    assert (d.name, d.encoding, d.variables) == ("shift", "one_hot", ("s_a", "s_b", "s_c"))
    # the objective is the problem's energy: dimod's own on every assignment
    X = np.array([[int(b) for b in f"{k:06b}"] for k in range(64)], dtype=np.int8)
    want = cqm.objective.energies((X, list(cqm.variables)))
    assert np.allclose(problem.energies(X), want)
    cands = read_candidates(CQM_CANDIDATES, problem)
    for method in ("greedy", "cpsat", "portfolio"):
        res = repair(problem, cands, rows, method=method, time_limit=1.0)
        assert res.best.feasible, method
        assert cqm.check_feasible(res.best.assignment)  # dimod agrees it is feasible
        assert res.best.cost == pytest.approx(_cqm_optimum(cqm)), method


def test_cqm_file_through_the_cli_and_a_cqm_inline_through_the_client(tmp_path, capsys, server):
    cqm = _cqm()
    files = _write(tmp_path, cqm.to_file().read(), CQM_CANDIDATES,
                   [{"type": "force_value", "decision": "shift", "value": "s_c"}])
    assert main(["repair", *files, "--quiet", "--time-limit", "1"]) == 0
    out = json.loads(capsys.readouterr().out)
    forced = _cqm()
    forced.add_constraint(dimod.Binary("s_c") == 1, label="forced")
    assert out["best"]["feasible"] and out["best"]["assignment"]["s_c"] == 1
    assert out["best"]["cost"] == pytest.approx(_cqm_optimum(forced))
    with FlipfixClient(server.address) as fx:
        ss, res = fx.repair_sampleset(cqm, [], candidates=CQM_CANDIDATES, time_limit=1.0)
        assert res["best"]["cost"] == pytest.approx(_cqm_optimum(cqm))
        assert cqm.check_feasible(ss.first.sample)
        with pytest.raises(FlipfixError) as err:  # rows cannot be stored with a problem
            fx.create_problem("cqm", cqm)
        assert err.value.field == "model" and "at most two" in err.value.details()


@pytest.mark.parametrize("build, field, words", [
    (lambda c: c.add_constraint(dimod.Binary("x0") * dimod.Binary("x1") <= 0, label="q"),
     "cqm.constraints['q']", "quadratic"),
    (lambda c: c.add_constraint(dimod.Binary("x0") + dimod.Binary("x2") >= 1, label="s",
                                weight=2.0),
     "cqm.constraints['s']", "soft"),
    (lambda c: c.add_variable("INTEGER", "n"), "cqm.variables['n']", "INTEGER"),
])
def test_cqm_parts_flipfix_cannot_take_are_named(build, field, words):
    cqm = _cqm()
    build(cqm)
    with pytest.raises(InputError) as err:
        from_cqm(cqm)
    assert err.value.field == field and words in err.value.message
