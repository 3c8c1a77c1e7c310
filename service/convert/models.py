"""Problems and their integer decisions: proto <-> domain, and JSON documents -> proto."""

from __future__ import annotations

from typing import Any

import numpy as np

from flipfix.repair.documents import forms as documents
from flipfix.repair.errors import InputError
from flipfix.repair.model.problem import SPIN, Decision, Problem, finite
from flipfix.repair.model.vartypes import BINARY, change_vartype

from flipfix.service.convert.enums import ENCODING_ENUM, ENCODING_NAMES, VARTYPE_NAMES, enum_name
from flipfix.service.convert.labels import label_to_py, py_to_label, py_to_value, value_to_py
from flipfix.service.generated import flipfix_pb2 as pb

__all__ = ["decision_to_domain", "decision_to_proto", "model_to_problem", "caller_terms",
           "problem_to_model", "doc_to_model"]


def decision_to_domain(d: pb.Decision, field: str) -> Decision:
    """A Decision proto -> :class:`flipfix.repair.model.problem.Decision` (sizes and bit ownership
    are checked with the problem, by :func:`flipfix.repair.model.problem.validate_decisions`)."""
    encoding = enum_name(ENCODING_NAMES, d.encoding, field + ".encoding", pb.Encoding)
    variables = tuple(label_to_py(v, f"{field}.variables[{j}]") for j, v in enumerate(d.variables))
    values = tuple(value_to_py(v, f"{field}.values[{j}]") for j, v in enumerate(d.values))
    return Decision(d.name, encoding, variables, values)


def decision_to_proto(d: Decision) -> pb.Decision:
    return pb.Decision(name=d.name, encoding=ENCODING_ENUM[d.encoding],
                       variables=[py_to_label(v) for v in d.variables],
                       values=[py_to_value(v) for v in d.values])


def _vartype(model: pb.ProblemModel, field: str) -> str:
    return enum_name(VARTYPE_NAMES, model.vartype, field + ".vartype", pb.Vartype)


def model_to_problem(model: pb.ProblemModel, *, field: str = "model") -> Problem:
    """A ProblemModel -> validated :class:`Problem` (size limits are the server's:
    :class:`flipfix.service.limits.Limits`)."""
    vartype = _vartype(model, field)
    if model.HasField("indexed"):
        return _indexed_to_problem(model, vartype, field=field)
    lin = [(label_to_py(t.label, f"{field}.linear[{k}].label"),
            finite(t.bias, f"{field}.linear[{k}].bias")) for k, t in enumerate(model.linear)]
    quad = [(label_to_py(t.u, f"{field}.quadratic[{k}].u"), label_to_py(t.v, f"{field}.quadratic[{k}].v"),
             finite(t.bias, f"{field}.quadratic[{k}].bias")) for k, t in enumerate(model.quadratic)]
    labels = [label_to_py(lab, f"{field}.labels[{k}]") for k, lab in enumerate(model.labels)] or None
    decisions = tuple(decision_to_domain(d, f"{field}.decisions[{k}]")
                      for k, d in enumerate(model.decisions))
    return Problem.from_terms(lin, quad, offset=finite(model.offset, field + ".offset"),
                              vartype=vartype, labels=labels, decisions=decisions,
                              field=field)


def _indexed_to_problem(model: pb.ProblemModel, vartype: str, *, field: str) -> Problem:
    """A ProblemModel with ``indexed`` terms -> Problem (numpy, no per-term Python)."""
    if len(model.linear) or len(model.quadratic):
        raise InputError(field + ".indexed", "give the terms either label-keyed (linear, "
                                             "quadratic) or indexed, not both")
    if not len(model.labels):
        raise InputError(field + ".labels", "must be set with indexed terms (they refer to it)")
    labels = [label_to_py(lab, f"{field}.labels[{k}]") for k, lab in enumerate(model.labels)]
    decisions = tuple(decision_to_domain(d, f"{field}.decisions[{k}]")
                      for k, d in enumerate(model.decisions))
    t = model.indexed
    f = "indexed."
    return Problem.from_arrays(
        labels, np.asarray(t.linear, dtype=np.float64), np.asarray(t.u, dtype=np.int64),
        np.asarray(t.v, dtype=np.int64), np.asarray(t.bias, dtype=np.float64),
        offset=finite(model.offset, field + ".offset"), vartype=vartype,
        decisions=decisions, field=field,
        fields=(f + "linear", f + "u", f + "v", f + "bias"))


def caller_terms(problem: Problem) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, float]:
    """The model's terms in the caller's vartype: (linear float64 (n,), u, v int64 (m,),
    bias float64 (m,), offset), one term per coupled pair (u < v)."""
    i, j, J = problem.pairs()
    idx, lin, J, off = change_vartype(np.arange(problem.n), problem.linear, i, j, J,
                                      problem.offset, source=BINARY, target=problem.vartype)
    h = np.zeros(problem.n, dtype=np.float64)
    np.add.at(h, idx, lin)
    return h, i, j, J, off


def problem_to_model(problem: Problem) -> pb.ProblemModel:
    """A :class:`Problem` -> ProblemModel in the caller's vartype, labels in order, terms
    indexed (packed arrays)."""
    h, i, j, J, off = caller_terms(problem)
    m = pb.ProblemModel(
        vartype=pb.VARTYPE_SPIN if problem.vartype == SPIN else pb.VARTYPE_BINARY,
        offset=off,
        labels=[py_to_label(lab) for lab in problem.labels],
        indexed=pb.IndexedTerms(linear=h.tolist(), u=i.tolist(), v=j.tolist(), bias=J.tolist()))
    m.decisions.extend(decision_to_proto(d) for d in problem.decisions)
    return m


def doc_to_model(doc: Any, *, field: str = "problem", problem: Problem | None = None
                 ) -> pb.ProblemModel:
    """A problem JSON document -> ProblemModel with the document's own terms (exact).

    ``problem`` is the document already parsed (:func:`flipfix.repair.documents.forms.parse_problem`);
    without it the document is parsed here.
    """
    if problem is None:
        problem = documents.parse_problem(doc, field=field)
    m = pb.ProblemModel(vartype=pb.VARTYPE_SPIN if problem.vartype == SPIN else pb.VARTYPE_BINARY,
                        offset=float(doc.get("offset", 0.0)),
                        labels=[py_to_label(lab) for lab in problem.labels])
    for key, bias in doc.get("linear", {}).items():
        lab = documents.resolve_label(problem, key, f"{field}.linear[{key!r}]")
        m.linear.append(pb.LinearTerm(label=py_to_label(lab), bias=float(bias)))
    for u, v, bias in doc.get("quadratic", []):
        m.quadratic.append(pb.QuadraticTerm(u=py_to_label(u), v=py_to_label(v), bias=float(bias)))
    m.decisions.extend(decision_to_proto(d) for d in problem.decisions)
    return m
