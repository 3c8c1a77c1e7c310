"""``repair --pareto`` on the two-block example of a newcomer's report: the front never
lists a point that another known point dominates, in particular a candidate that is already
feasible and cheaper at 0 flips.

The model: blocks b = 0, 1 with bits ``a_b``, ``c_b`` and free bits ``y_b_0``, ``y_b_1``;
linear ``a_b: -10``, ``c_b: -8``; couplings ``a_b c_b: 20`` and ``a_b y_b_i: 15``. A block is
N (a=1, c=0, y=0: energy -10) or B (a=0, c=1, y free: energy -8). Candidates NN, NB, BN, BB
and a linear Hamming penalty of weight 3 to a reference. The reference costs are checked
against dimod's own energies (``BinaryQuadraticModel.energy``) plus 3 x the Hamming distance.
"""

from __future__ import annotations

import json

import dimod
import pytest

from flipfix.service.cli import main


def _model():
    linear, quadratic = {}, []
    for b in (0, 1):
        linear[f"a_{b}"] = -10.0
        linear[f"c_{b}"] = -8.0
        for i in (0, 1):
            linear[f"y_{b}_{i}"] = 0.0
            quadratic.append([f"a_{b}", f"y_{b}_{i}", 15.0])
        quadratic.append([f"a_{b}", f"c_{b}", 20.0])
    return {"vartype": "BINARY", "linear": linear, "quadratic": quadratic, "offset": 0.0}


def _block(state, b, y):
    if state == "N":
        return {f"a_{b}": 1, f"c_{b}": 0, f"y_{b}_0": 0, f"y_{b}_1": 0}
    return {f"a_{b}": 0, f"c_{b}": 1, f"y_{b}_0": y[0], f"y_{b}_1": y[1]}


CANDIDATES = [{"id": s0 + s1, "assignment": {**_block(s0, 0, (1, 1)), **_block(s1, 1, (0, 0))}}
              for s0 in "NB" for s1 in "NB"]
# the reference: B blocks with other free bits than the library's (NN is 7 flips from it,
# BB 3, as in the report)
REFERENCE = {**_block("B", 0, (1, 0)), **_block("B", 1, (1, 1))}
CONSTRAINTS = [{"type": "hamming", "reference": REFERENCE, "weight": 3.0, "shape": "linear"}]


def _dominates(p, q):
    return p[0] <= q[0] and p[1] <= q[1] and (p[0] < q[0] or p[1] < q[1])


def test_reference_costs_from_dimod():
    doc = _model()
    bqm = dimod.BinaryQuadraticModel(doc["linear"], {(u, v): w for u, v, w in doc["quadratic"]},
                                     0.0, "BINARY")
    costs = {c["id"]: bqm.energy(c["assignment"])
             + 3 * sum(c["assignment"][k] != v for k, v in REFERENCE.items()) for c in CANDIDATES}
    # NN: -20 + 3*7 = 1; BB: -16 + 3*3 = -7 (the report's two figures)
    assert costs == {"NN": 1.0, "NB": -3.0, "BN": -3.0, "BB": -7.0}


@pytest.mark.parametrize("method", ["greedy", "portfolio"])
def test_pareto_front_lists_no_dominated_point(tmp_path, capsys, method):
    paths = []
    for name, doc in (("problem", _model()), ("candidates", CANDIDATES),
                      ("constraints", CONSTRAINTS)):
        path = tmp_path / f"{name}.json"
        path.write_text(json.dumps(doc))
        paths.append(str(path))
    assert main(["repair", *paths, "--pareto", "--method", method, "--time-limit", "1",
                 "--quiet"]) == 0
    out = json.loads(capsys.readouterr().out)
    front = [(p["cost"], p["flips"]) for p in out["pareto"]]
    known = front + [(r["cost_before"], 0) for r in out["audit"] if r["feasible_before"]] \
        + [(r["cost"], r["flips"]) for r in out["audit"] if r["feasible"]]
    assert not [p for p in front if any(_dominates(q, p) for q in known)]
    # the 0-flip point is the cheapest candidate as it is (BB at -7), not the first (NN at 1)
    zero = [p for p in out["pareto"] if p["flips"] == 0]
    assert [(p["candidate_id"], p["cost"]) for p in zero] == [("BB", -7.0)]
