"""JSON documents -> domain objects: label rule, vartypes, field-named errors.

Energies are checked against dimod's own BinaryQuadraticModel.energy (outside
reference: dimod), over every assignment of small models.
"""

from __future__ import annotations

import itertools

import dimod
import numpy as np
import pytest

from flipfix.repair.documents import forms as documents
from flipfix.repair.model.constraints import FixVariables, HammingPenalty, LinearConstraint
from flipfix.repair.errors import InputError


def _all_assignments(labels, vartype):
    vals = (-1, 1) if vartype == "SPIN" else (0, 1)
    for combo in itertools.product(vals, repeat=len(labels)):
        yield dict(zip(labels, combo))


@pytest.mark.parametrize("vartype", ["BINARY", "SPIN"])
def test_energies_match_dimod_for_every_assignment(vartype):
    doc = {"vartype": vartype, "linear": {"a": 1.5, "0": -2.0, "b": 0.25},
           "quadratic": [["a", 0, 3.0], [0, "b", -1.0], ["a", "b", 0.5], [0, 1, 2.0]],
           "offset": 0.75}
    p = documents.parse_problem(doc)
    # reference: dimod built from the same terms with the labels typed by hand
    bqm = dimod.BinaryQuadraticModel({"a": 1.5, 0: -2.0, "b": 0.25},
                                     {("a", 0): 3.0, (0, "b"): -1.0, ("a", "b"): 0.5, (0, 1): 2.0},
                                     0.75, vartype)
    assert set(p.labels) == set(bqm.variables)
    for sample in _all_assignments(list(bqm.variables), vartype):
        x = p.from_caller(np.array([sample[lab] for lab in p.labels]))
        assert p.energies(x[None, :])[0] == pytest.approx(bqm.energy(sample), abs=1e-12)


def test_int_labels_from_quadratic_and_labels_list():
    p = documents.parse_problem({"vartype": "BINARY", "linear": {"3": 1.0, "x": 2.0, "7": 0.5},
                                 "quadratic": [[3, "x", 1.0]]})
    # "3" is an int label (3 appears as a JSON int in quadratic); "7" is not, so it stays a string
    assert 3 in p.index and "3" not in p.index
    assert "7" in p.index and 7 not in p.index
    q = documents.parse_problem({"vartype": "BINARY", "labels": [0, 1], "linear": {"0": 1, "1": 2}})
    assert q.labels == (0, 1)


def test_candidates_and_constraints_resolve_keys_to_int_labels():
    p = documents.parse_problem({"vartype": "SPIN", "linear": {}, "quadratic": [[0, 1, 1.0], [1, "s", 1.0]]})
    cs = documents.parse_candidates([{"id": "k", "assignment": {"0": 1, "1": -1, "s": 1}}], p)
    assert cs.X.tolist() == [[1, 0, 1]]  # SPIN -> 0/1 with s = 2x - 1
    cons = documents.parse_constraints([
        {"type": "hamming", "reference": {"0": 1, "1": 1}, "weight": 2, "shape": "quadratic",
         "variables": [0, "1"]},
        {"type": "fix", "values": {"s": -1}},
        {"type": "linear", "terms": {"0": 1, "1": 1}, "sense": "<=", "rhs": 0},
    ], p)
    assert isinstance(cons[0], HammingPenalty) and set(cons[0].reference) == {0, 1}
    assert cons[0].variables == [0, 1]
    assert isinstance(cons[1], FixVariables) and cons[1].values == {"s": -1}
    assert isinstance(cons[2], LinearConstraint) and cons[2].terms == {0: 1.0, 1: 1.0}


@pytest.mark.parametrize("doc, field", [
    ({"linear": {}}, "problem.vartype"),
    ({"vartype": "TERNARY"}, "problem.vartype"),
    ({"vartype": "BINARY", "quadratic": [["a", "b"]]}, "problem.quadratic[0]"),
    ({"vartype": "BINARY", "quadratic": [["a", "b", 1], ["a", "a", 1]]}, "problem.quadratic[1]"),
    ({"vartype": "BINARY", "linear": {"a": "x"}}, "problem.linear['a']"),
    ({"vartype": "BINARY", "quadratic": [[3, "3", 1.0]]}, "problem.quadratic[0]"),
    ({"vartype": "BINARY", "linera": {}}, "problem.linera"),
])
def test_problem_errors_name_the_field(doc, field):
    with pytest.raises(InputError) as e:
        documents.parse_problem(doc)
    assert e.value.field == field


def _small():
    return documents.parse_problem({"vartype": "BINARY", "linear": {"x1": 1, "x2": -1, "x3": 0.5},
                                    "quadratic": [["x1", "x2", 2]]})


@pytest.mark.parametrize("cands, field", [
    ([{"id": "a", "assignment": {"x1": 1, "x2": 0, "x3": 1}},
      {"id": "b", "assignment": {"x1": 1, "x2": 0, "x9": 1}}], "candidates[1].assignment['x9']"),
    ([{"id": "a", "assignment": {"x1": 1, "x2": 2, "x3": 1}}], "candidates[0].assignment['x2']"),
    ([{"id": "a", "assignment": {"x1": 1, "x2": 0}}], "candidates[0].assignment"),
    ([{"id": "a"}], "candidates[0].assignment"),
    ({"id": "a"}, "candidates"),
])
def test_candidate_errors_name_the_field(cands, field):
    with pytest.raises(InputError) as e:
        documents.parse_candidates(cands, _small())
    assert e.value.field == field


@pytest.mark.parametrize("cons, field", [
    ([{"type": "fix", "values": {"x1": 0}}, {"type": "fix", "values": {"x2": 1}},
      {"type": "hamming", "reference": {"x1": 1}, "weight": -1}], "constraints[2].weight"),
    ([{"type": "hamming", "reference": {"x1": 1}, "shape": "cubic"}], "constraints[0].shape"),
    ([{"type": "hamming", "reference": {"x1": 1}, "shape": "table"}], "constraints[0].table"),
    ([{"type": "linear", "terms": {"x1": 1}, "sense": "<", "rhs": 1}], "constraints[0].sense"),
    ([{"type": "linear", "terms": {"x1": 1}, "sense": "<="}], "constraints[0].rhs"),
    ([{"type": "forbid", "assignment": {"x7": 1}}], "constraints[0].assignment['x7']"),
    ([{"type": "teleport"}], "constraints[0].type"),
    ([{"type": "fix", "values": {"x1": 0}, "wieght": 1}], "constraints[0].wieght"),
])
def test_constraint_errors_name_the_field(cons, field):
    with pytest.raises(InputError) as e:
        documents.parse_constraints(cons, _small())
    assert e.value.field == field


@pytest.mark.parametrize("vartype", ["BINARY", "SPIN"])
def test_problem_document_round_trip_keeps_labels_and_energies(vartype):
    p = documents.parse_problem({"vartype": vartype, "linear": {"0": 1.0, "a": -0.5},
                                 "quadratic": [[0, "a", 2.0], [0, 5, -1.25]], "offset": 0.5})
    q = documents.parse_problem(documents.problem_document(p))
    assert q.labels == p.labels and q.vartype == p.vartype
    X = np.array(list(itertools.product((0, 1), repeat=p.n)), dtype=np.int8)
    np.testing.assert_allclose(q.energies(X), p.energies(X), atol=1e-12)


def test_a_constraint_type_that_is_not_a_string_names_the_field():
    # found by randomised mutation of documents: {"type": {...}} used to raise TypeError
    from flipfix.repair.documents.forms import parse_constraints, parse_problem

    p = parse_problem({"vartype": "BINARY", "linear": {"a": 1.0}, "quadratic": []})
    with pytest.raises(InputError) as err:
        parse_constraints([{"type": {"a": 1}}], p)
    assert err.value.field == "constraints[0].type"
