"""The proto form of every late-constraint kind, keyed by the core's kind names.

The core keeps one record per kind (class, JSON form, lowering:
:mod:`flipfix.repair.model.constraints`); this module adds the proto half of each
record: the kind's message (the field of ``Constraint.kind`` named like the kind)
and its two conversions. ``PROTO_FORMS`` and the core's ``KINDS`` have the same
keys (a test checks it, and the round trips of every kind).

Errors name the proto path: ``constraints[2].hamming.weight``. The server reads a
request's constraints once and compiles them once (:func:`constraints_to_compiled`).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable, Mapping, Sequence

from flipfix.repair.documents import forms as documents
from flipfix.repair.errors import InputError
from flipfix.repair.lowering.compiled import Compiled, compile_constraints
from flipfix.repair.model.constraints import (
    DecisionChangePenalty, ExtraTerms, HammingPenalty, LinearConstraint, registry,
)
from flipfix.repair.model.problem import Problem, finite

from flipfix.service.convert.enums import (
    DISTANCE_ENUM, DISTANCE_NAMES, SENSE_ENUM, SENSE_NAMES, SHAPE_ENUM, SHAPE_NAMES, enum_name,
)
from flipfix.service.convert.labels import (
    assignment_to_dict, dict_to_assignment, label_to_py, py_to_label, py_to_value, value_to_py,
)
from flipfix.service.generated import flipfix_pb2 as pb

__all__ = ["ProtoForm", "PROTO_FORMS", "constraint_to_domain", "constraints_to_domain",
           "constraint_paths", "constraints_to_compiled", "constraint_to_proto",
           "doc_to_constraint", "docs_to_constraints"]


@dataclass(frozen=True)
class ProtoForm:
    """The proto half of a kind's record.

    ``read(message, field) -> dict``: keyword arguments of the kind's class (proto-level
    checks only: enum numbers, labels set, finite numbers; the class and the lowering
    check the rest). ``write(constraint) -> message``: the inverse.
    """

    name: str
    message: type
    read: Callable[[Any, str], dict]
    write: Callable[[Any], Any]


def _summed_terms(terms, field: str) -> dict:
    """Repeated LinearTerms -> ``{label: bias}``, repeated labels summed."""
    out: dict = {}
    for k, t in enumerate(terms):
        lab = label_to_py(t.label, f"{field}[{k}].label")
        out[lab] = out.get(lab, 0.0) + finite(t.bias, f"{field}[{k}].bias")
    return out


def _terms(mapping: Mapping) -> list:
    return [pb.LinearTerm(label=py_to_label(k), bias=float(v)) for k, v in mapping.items()]


# ------------------------------------------------------------------ bit level
def _read_hamming(h: pb.HammingPenalty, f: str) -> dict:
    return {"reference": assignment_to_dict(h.reference, f + ".reference"), "weight": h.weight,
            "shape": enum_name(SHAPE_NAMES, h.shape, f + ".shape", pb.PenaltyShape),
            "threshold": h.threshold, "table": list(h.table) or None,
            "variables": [label_to_py(v, f"{f}.variables[{k}]")
                          for k, v in enumerate(h.variables)] or None}


def _write_hamming(c: HammingPenalty) -> pb.HammingPenalty:
    return pb.HammingPenalty(reference=dict_to_assignment(c.reference), weight=c.weight,
                             shape=SHAPE_ENUM[c.shape], threshold=c.threshold,
                             table=list(c.table or []),
                             variables=[py_to_label(v) for v in (c.variables or [])])


def _read_extra(e: pb.ExtraTerms, f: str) -> dict:
    quad = tuple((label_to_py(t.u, f"{f}.quadratic[{k}].u"), label_to_py(t.v, f"{f}.quadratic[{k}].v"),
                  finite(t.bias, f"{f}.quadratic[{k}].bias")) for k, t in enumerate(e.quadratic))
    return {"linear": _summed_terms(e.linear, f + ".linear"), "quadratic": quad,
            "offset": finite(e.offset, f + ".offset")}


def _write_extra(c: ExtraTerms) -> pb.ExtraTerms:
    return pb.ExtraTerms(linear=_terms(c.linear), offset=c.offset,
                         quadratic=[pb.QuadraticTerm(u=py_to_label(u), v=py_to_label(v), bias=b)
                                    for u, v, b in c.quadratic])


def _read_linear(ln: pb.LinearConstraint, f: str) -> dict:
    return {"terms": _summed_terms(ln.terms, f + ".terms"),
            "sense": enum_name(SENSE_NAMES, ln.sense, f + ".sense", pb.Sense),
            "rhs": ln.rhs}


def _write_linear(c: LinearConstraint) -> pb.LinearConstraint:
    return pb.LinearConstraint(terms=_terms(c.terms), sense=SENSE_ENUM[c.sense], rhs=c.rhs)


# ------------------------------------------------------------------ decisions
def _read_values(m, f: str) -> dict:
    return {"decision": m.decision,
            "values": [value_to_py(v, f"{f}.values[{k}]") for k, v in enumerate(m.values)]}


def _read_force(m: pb.ForceValue, f: str) -> dict:
    return {"decision": m.decision, "value": value_to_py(m.value, f + ".value")}


def _read_change(dc: pb.DecisionChangePenalty, f: str) -> dict:
    return {"reference": {r.decision: value_to_py(r.value, f"{f}.reference[{k}].value")
                          for k, r in enumerate(dc.reference)},
            "weight": dc.weight, "shape": enum_name(SHAPE_NAMES, dc.shape, f + ".shape", pb.PenaltyShape),
            "threshold": dc.threshold, "table": list(dc.table) or None,
            "distance": enum_name(DISTANCE_NAMES, dc.distance, f + ".distance",
                                  pb.DecisionDistance)}


def _write_change(c: DecisionChangePenalty) -> pb.DecisionChangePenalty:
    return pb.DecisionChangePenalty(
        reference=[pb.DecisionReference(decision=d, value=py_to_value(v))
                   for d, v in c.reference.items()],
        weight=c.weight, shape=SHAPE_ENUM[c.shape], threshold=c.threshold,
        table=list(c.table or []), distance=DISTANCE_ENUM[c.distance])


_FORMS = (
    ProtoForm("hamming", pb.HammingPenalty, _read_hamming, _write_hamming),
    ProtoForm("extra", pb.ExtraTerms, _read_extra, _write_extra),
    ProtoForm("fix", pb.FixVariables,
              lambda m, f: {"values": assignment_to_dict(m.values, f + ".values")},
              lambda c: pb.FixVariables(values=dict_to_assignment(c.values))),
    ProtoForm("linear", pb.LinearConstraint, _read_linear, _write_linear),
    ProtoForm("forbid", pb.ForbidAssignment,
              lambda m, f: {"assignment": assignment_to_dict(m.assignment, f + ".assignment")},
              lambda c: pb.ForbidAssignment(assignment=dict_to_assignment(c.assignment))),
    ProtoForm("forbid_values", pb.ForbidValues, _read_values,
              lambda c: pb.ForbidValues(decision=c.decision, values=[py_to_value(v) for v in c.values])),
    ProtoForm("force_value", pb.ForceValue, _read_force,
              lambda c: pb.ForceValue(decision=c.decision, value=py_to_value(c.value))),
    ProtoForm("allow_values", pb.AllowValues, _read_values,
              lambda c: pb.AllowValues(decision=c.decision, values=[py_to_value(v) for v in c.values])),
    ProtoForm("decision_change", pb.DecisionChangePenalty, _read_change, _write_change),
)

#: kind name (= the core's ``KINDS`` key = the field of ``Constraint.kind``) -> proto form
PROTO_FORMS: dict[str, ProtoForm] = {f.name: f for f in _FORMS}


# ------------------------------------------------------------------ dispatch
def constraint_to_domain(c: pb.Constraint, *, field: str) -> Any:
    """One Constraint proto -> its domain object (checked against the problem when compiled)."""
    kind = c.WhichOneof("kind")
    if kind is None:
        raise InputError(field, "no constraint kind set")
    f = f"{field}.{kind}"
    if kind not in PROTO_FORMS or kind not in registry.KINDS:
        raise InputError(f, "this constraint kind is not supported by this server")
    return registry.build(registry.KINDS[kind], PROTO_FORMS[kind].read(getattr(c, kind), f),
                          name=c.name or None, field=f)


def constraints_to_domain(constraints: Sequence[pb.Constraint], *,
                          field: str = "constraints") -> list:
    """Repeated Constraint -> domain objects (not yet checked against a problem)."""
    return [constraint_to_domain(c, field=f"{field}[{k}]") for k, c in enumerate(constraints)]


def constraint_paths(constraints: Sequence[pb.Constraint], *, field: str = "constraints") -> list[str]:
    """Where each constraint's own fields sit in the request: ``constraints[k].<kind>``."""
    return [f"{field}[{k}].{c.WhichOneof('kind')}" for k, c in enumerate(constraints)]


def constraints_to_compiled(constraints: Sequence[pb.Constraint], problem: Problem, *,
                            field: str = "constraints") -> Compiled:
    """A request's constraints read once, checked against ``problem`` and lowered once
    (:func:`flipfix.repair.lowering.compiled.compile_constraints`), errors on proto paths."""
    return compile_constraints(problem, constraints_to_domain(constraints, field=field),
                               field=field, paths=constraint_paths(constraints, field=field))


def constraint_to_proto(dom: Any, *, field: str = "constraint") -> pb.Constraint:
    """A domain constraint -> Constraint proto of its kind (an unknown class names ``field``)."""
    kind = registry.kind_of(dom, field)
    return pb.Constraint(name=dom.name or "", **{kind.name: PROTO_FORMS[kind.name].write(dom)})


def doc_to_constraint(obj: Any, problem: Problem, *, field: str) -> pb.Constraint:
    """One constraint JSON object -> Constraint proto (read once, by the kind's JSON reader)."""
    return constraint_to_proto(documents.parse_constraint(obj, problem, field=field), field=field)


def docs_to_constraints(doc: Any, problem: Problem, *, field: str = "constraints"
                        ) -> list[pb.Constraint]:
    """A constraints JSON document (a list, or one object) -> Constraint protos."""
    return [constraint_to_proto(c, field=f"{field}[{k}]")
            for k, c in enumerate(documents.parse_constraints(doc, problem, field=field))]
