"""One record per constraint kind: the core's registry and the service's proto forms agree,
and every kind survives domain -> proto -> domain and domain -> JSON -> domain unchanged.

Adding a kind without its proto form, its proto message or an example below fails here.
"""

from __future__ import annotations

import dataclasses
import json
import re

import numpy as np
import pytest

from flipfix.repair.documents import forms as documents
from flipfix.repair.errors import InputError
from flipfix.repair.lowering.compiled import compile_constraints
from flipfix.repair.model.constraints import (
    KINDS, AllowValues, DecisionChangePenalty, ExtraTerms, FixVariables, ForbidAssignment,
    ForbidValues, ForceValue, HammingPenalty, LinearConstraint, kind_of,
)
from flipfix.repair.model.problem import Decision, Problem

from flipfix.service import convert
from flipfix.service.generated import flipfix_pb2 as pb


def _problem(vartype: str) -> Problem:
    """Bits with string and integer labels, and two decisions (one per encoding)."""
    labels = ["a", "b", 7, "d0", "d1", "w0", "w1", "w2"]
    decisions = (Decision("shift", "domain_wall", ("w0", "w1", "w2"), (1, 2, 3, 4)),
                 Decision("room", "one_hot", ("d0", "d1"), ("north", "south")))
    return Problem.from_terms({lab: 0.5 for lab in labels}, [("a", "b", 1.0), ("b", 7, -2.0)],
                              vartype=vartype, labels=labels, decisions=decisions)


def _examples(lo: int) -> dict:
    """One domain object per kind, every optional field set (``lo``: 0 or -1, the vartype's low)."""
    return {
        "hamming": HammingPenalty({"a": 1, 7: lo}, weight=2.5, shape="table", threshold=1.0,
                                  table=[0.0, 1.0, 4.0], variables=[7, "a"], name="keep"),
        "extra": ExtraTerms({"a": 1.5, 7: -0.25}, (("a", 7, 2.0), ("b", "a", -1.0)), 0.75),
        "fix": FixVariables({"b": lo, 7: 1}),
        "linear": LinearConstraint({"a": 1.0, "b": 2.0, 7: -1.0}, "<=", 1.5, name="cap"),
        "forbid": ForbidAssignment({"a": 1, "b": lo}),
        "forbid_values": ForbidValues("shift", [2, 3]),
        "force_value": ForceValue("room", "south"),
        "allow_values": AllowValues("shift", [1, 4], name="allowed"),
        "decision_change": DecisionChangePenalty({"shift": 3, "room": "north"}, weight=1.5,
                                                 shape="quadratic", distance="changed",
                                                 table=[0.0, 2.0]),
    }


def test_every_core_kind_has_a_proto_form_and_a_proto_message():
    oneof = pb.Constraint.DESCRIPTOR.oneofs_by_name["kind"]
    assert list(convert.PROTO_FORMS) == list(KINDS)
    assert {f.name for f in oneof.fields} == set(KINDS)   # no other kind (no JSON text) in the proto
    for name, form in convert.PROTO_FORMS.items():
        assert pb.Constraint.DESCRIPTOR.fields_by_name[name].message_type is form.message.DESCRIPTOR
        assert KINDS[name].name == form.name == name


def test_every_kind_has_an_example():
    ex = _examples(0)
    assert set(ex) == set(KINDS)
    assert all(kind_of(c).name == k for k, c in ex.items())


@pytest.mark.parametrize("vartype", ["BINARY", "SPIN"])
@pytest.mark.parametrize("kind", list(KINDS))
def test_domain_proto_domain_round_trip(kind, vartype):
    c = _examples(-1 if vartype == "SPIN" else 0)[kind]
    msg = convert.constraint_to_proto(c)
    assert msg.WhichOneof("kind") == kind
    wire = pb.Constraint.FromString(msg.SerializeToString())
    back = convert.constraint_to_domain(wire, field="constraints[0]")
    assert back == c and type(back) is type(c)


@pytest.mark.parametrize("vartype", ["BINARY", "SPIN"])
@pytest.mark.parametrize("kind", list(KINDS))
def test_domain_json_domain_round_trip(kind, vartype):
    p = _problem(vartype)
    c = _examples(-1 if vartype == "SPIN" else 0)[kind]
    doc = json.loads(json.dumps(documents.constraints_document([c])))
    assert doc[0]["type"] == kind
    back = documents.parse_constraints(doc, p)
    assert back == [c] and type(back[0]) is type(c)


@pytest.mark.parametrize("vartype", ["BINARY", "SPIN"])
def test_every_example_lowers_the_same_from_each_form(vartype):
    """Each example compiles; the proto and JSON round trips give the same costs and
    violations on every assignment of the 8 bits (2^8 rows)."""
    p = _problem(vartype)
    ex = list(_examples(-1 if vartype == "SPIN" else 0).values())
    via_proto = convert.constraints_to_domain([convert.constraint_to_proto(c) for c in ex])
    via_json = documents.parse_constraints(documents.constraints_document(ex), p)
    X = ((np.arange(2 ** p.n)[:, None] >> np.arange(p.n)) & 1).astype(np.int8)
    want = compile_constraints(p, ex).evaluate(X)
    for other in (via_proto, via_json):
        got = compile_constraints(p, other).evaluate(X)
        np.testing.assert_array_equal(got.cost, want.cost)
        np.testing.assert_array_equal(got.violation, want.violation)


@pytest.mark.parametrize("kind", list(KINDS))
def test_errors_name_the_proto_path_of_the_kind(kind):
    """Against a problem that has none of the examples' labels or decisions, every kind fails
    when compiled, and the error sits under ``constraints[1].<kind>`` (the proto layout)."""
    other = Problem.from_terms({"zz": 1.0}, [])
    c = _examples(0)[kind]
    attributes = {f.name for f in dataclasses.fields(c)}

    def attribute(path: str, prefix: str) -> str:
        assert path.startswith(prefix), path
        return re.match(r"[a-z_]+", path[len(prefix):]).group()

    good = ExtraTerms(offset=1.0)
    with pytest.raises(InputError) as e:
        convert.constraints_to_compiled([convert.constraint_to_proto(good),
                                         convert.constraint_to_proto(c)], other)
    assert attribute(e.value.field, f"constraints[1].{kind}.") in attributes
    with pytest.raises(InputError) as e:  # the same constraint, JSON layout: no kind in the path
        compile_constraints(other, [good, c])
    assert attribute(e.value.field, "constraints[1].") in attributes


def test_an_unknown_constraint_class_names_the_field():
    class Teleport:
        name = "teleport"

    p = Problem.from_terms({"a": 1.0}, [])
    with pytest.raises(InputError) as e:
        compile_constraints(p, [FixVariables({"a": 1}), Teleport()])
    assert e.value.field == "constraints[1]" and "Teleport" in e.value.message
    with pytest.raises(InputError) as e:
        convert.constraint_to_proto(Teleport(), field="constraints[3]")
    assert e.value.field == "constraints[3]"


def test_a_constraint_without_a_kind_names_the_field():
    with pytest.raises(InputError) as e:
        convert.constraints_to_domain([pb.Constraint(name="empty")])
    assert e.value.field == "constraints[0]"
