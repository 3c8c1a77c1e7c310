"""Proto <-> domain conversion: pure functions, no I/O, no grpc calls.

Field names in errors follow the proto (``model.quadratic[3]``,
``constraints[1].hamming.weight``) so a caller can find the offending field.
JSON documents (the CLI formats) are converted through :mod:`flipfix.repair.documents.forms`
first, so the int/str label rule is the same on every path.
"""

from __future__ import annotations

import json
import math
import re
from typing import Any, Hashable, Iterable, Mapping, Sequence

import numpy as np

from flipfix.repair.documents import forms as documents
from flipfix.repair.model.candidates import CandidateSet
from flipfix.repair.model.constraints import (
    ExtraTerms, FixVariables, ForbidAssignment, HammingPenalty, LinearConstraint,
)
from flipfix.repair.model.encodings import AllowValues, DecisionChangePenalty, ForbidValues, ForceValue
from flipfix.repair.errors import InputError, LimitError
from flipfix.repair.model.problem import Decision, Problem
from flipfix.repair.result import RepairResult

from flipfix.service import packing
from flipfix.service.generated import flipfix_pb2 as pb

__all__ = [
    "label_to_py", "py_to_label", "decision_to_domain", "decision_to_proto", "model_to_problem",
    "problem_to_model", "caller_terms", "doc_to_model",
    "array_to_packed", "packed_to_array", "batch_to_arrays", "arrays_to_batch", "records_to_batches",
    "batch_to_candidates", "candidates_to_batch", "constraint_to_domain",
    "constraints_to_domain", "doc_to_constraint", "constraint_to_proto", "options_to_kwargs", "result_to_reply",
    "reply_values", "reply_to_dict", "METHOD_NAMES", "Limits",
    "family_to_domain", "family_to_proto", "stress_to_kwargs", "pareto_to_kwargs",
    "robustness_to_reply", "stress_to_reply", "pareto_to_reply", "curation_to_reply",
    "reply_to_robustness", "reply_to_stress", "reply_to_point", "reply_to_curation",
]

METHOD_NAMES = {pb.METHOD_UNSPECIFIED: "portfolio", pb.PORTFOLIO: "portfolio",
                pb.GREEDY: "greedy", pb.CPSAT: "cpsat"}
_METHOD_ENUM = {"portfolio": pb.PORTFOLIO, "greedy": pb.GREEDY, "cpsat": pb.CPSAT}
_VARTYPE_NAMES = {pb.BINARY: "BINARY", pb.SPIN: "SPIN"}
_SHAPE_NAMES = {pb.SHAPE_UNSPECIFIED: "linear", pb.LINEAR: "linear", pb.QUADRATIC: "quadratic",
                pb.THRESHOLD: "threshold", pb.TABLE: "table"}
_SHAPE_ENUM = {"linear": pb.LINEAR, "quadratic": pb.QUADRATIC, "threshold": pb.THRESHOLD,
               "table": pb.TABLE}
_SENSE_NAMES = {pb.LE: "<=", pb.EQ: "==", pb.GE: ">="}
_SENSE_ENUM = {v: k for k, v in _SENSE_NAMES.items()}
_DISTANCE_NAMES = {pb.DISTANCE_UNSPECIFIED: "changed", pb.CHANGED: "changed",
                   pb.ABSOLUTE: "absolute"}
_DISTANCE_ENUM = {"changed": pb.CHANGED, "absolute": pb.ABSOLUTE}


def _value_to_py(v: pb.DecisionValue, field: str) -> Any:
    """DecisionValue -> str | int | float (integer-decision values, issue 4)."""
    kind = v.WhichOneof("kind")
    if kind is None:
        raise InputError(field, "no value set (str, int or num)")
    return getattr(v, kind)


def _py_to_value(v: Any) -> pb.DecisionValue:
    if isinstance(v, str):
        return pb.DecisionValue(str=v)
    if isinstance(v, int) and not isinstance(v, bool):
        return pb.DecisionValue(int=v)
    return pb.DecisionValue(num=float(v))


class Limits:
    """Per-request size limits (None: unlimited); exceeding one is a LimitError."""

    def __init__(self, *, max_variables: int | None = None, max_candidates: int | None = None,
                 max_constraints: int | None = None):
        self.max_variables = max_variables
        self.max_candidates = max_candidates
        self.max_constraints = max_constraints

    @staticmethod
    def _check(count: int, limit: int | None, field: str, what: str) -> None:
        if limit is not None and count > limit:
            raise LimitError(field, f"{count} {what} exceed the limit of {limit}")

    def variables(self, n: int, field: str) -> None:
        self._check(n, self.max_variables, field, "variables")

    def candidates(self, k: int, field: str) -> None:
        self._check(k, self.max_candidates, field, "candidates")

    def constraints(self, m: int, field: str) -> None:
        self._check(m, self.max_constraints, field, "constraints")


NO_LIMITS = Limits()


# ------------------------------------------------------------------ labels
def label_to_py(label: pb.Label, field: str) -> Hashable:
    kind = label.WhichOneof("kind")
    if kind == "str":
        return label.str
    if kind == "int":
        return int(label.int)
    raise InputError(field, "label is empty (set str or int)")


def py_to_label(label: Any) -> pb.Label:
    if isinstance(label, (int, np.integer)) and not isinstance(label, bool):
        return pb.Label(int=int(label))
    return pb.Label(str=str(label))


def _finite(v: float, field: str) -> float:
    if not math.isfinite(v):
        raise InputError(field, f"{v!r} is not finite")
    return float(v)


def assignment_to_dict(a: pb.Assignment, field: str) -> dict:
    out: dict = {}
    for k, item in enumerate(a.values):
        lab = label_to_py(item.label, f"{field}.values[{k}].label")
        if lab in out:
            raise InputError(f"{field}.values[{k}]", f"variable {lab!r} given twice")
        out[lab] = int(item.value)
    return out


def dict_to_assignment(mapping: Mapping) -> pb.Assignment:
    return pb.Assignment(values=[pb.VariableValue(label=py_to_label(k), value=int(v))
                                 for k, v in mapping.items()])


# ---------------------------------------------------------------- decisions
_ENCODING_NAMES = {pb.ONE_HOT: "one_hot", pb.DOMAIN_WALL: "domain_wall"}
_ENCODING_ENUM = {v: k for k, v in _ENCODING_NAMES.items()}


def decision_to_domain(d: pb.Decision, field: str) -> Decision:
    """A Decision proto -> :class:`flipfix.repair.model.problem.Decision` (sizes and bit ownership are
    checked with the problem, by :func:`flipfix.repair.model.encodings.validate_decisions`)."""
    if d.encoding not in _ENCODING_NAMES:
        raise InputError(field + ".encoding", "must be ONE_HOT or DOMAIN_WALL")
    variables = tuple(label_to_py(v, f"{field}.variables[{j}]") for j, v in enumerate(d.variables))
    values = tuple(_value_to_py(v, f"{field}.values[{j}]") for j, v in enumerate(d.values))
    return Decision(d.name, _ENCODING_NAMES[d.encoding], variables, values)


def decision_to_proto(d: Decision) -> pb.Decision:
    return pb.Decision(name=d.name, encoding=_ENCODING_ENUM[d.encoding],
                       variables=[py_to_label(v) for v in d.variables],
                       values=[_py_to_value(v) for v in d.values])


# ----------------------------------------------------------------- problems
def model_to_problem(model: pb.ProblemModel, *, field: str = "model",
                     limits: Limits = NO_LIMITS) -> Problem:
    """A ProblemModel -> validated :class:`Problem`."""
    if model.vartype not in _VARTYPE_NAMES:
        raise InputError(field + ".vartype", "must be BINARY or SPIN")
    if model.HasField("indexed"):
        return _indexed_to_problem(model, field=field, limits=limits)
    lin = [(label_to_py(t.label, f"{field}.linear[{k}].label"),
            _finite(t.bias, f"{field}.linear[{k}].bias")) for k, t in enumerate(model.linear)]
    quad = [(label_to_py(t.u, f"{field}.quadratic[{k}].u"), label_to_py(t.v, f"{field}.quadratic[{k}].v"),
             _finite(t.bias, f"{field}.quadratic[{k}].bias")) for k, t in enumerate(model.quadratic)]
    labels = [label_to_py(lab, f"{field}.labels[{k}]") for k, lab in enumerate(model.labels)] or None
    n_seen = len(labels) if labels else len({lab for lab, _ in lin} | {x for u, v, _ in quad for x in (u, v)})
    limits.variables(n_seen, field)
    decisions = tuple(decision_to_domain(d, f"{field}.decisions[{k}]")
                      for k, d in enumerate(model.decisions))
    return Problem.from_terms(lin, quad, offset=_finite(model.offset, field + ".offset"),
                              vartype=_VARTYPE_NAMES[model.vartype], labels=labels,
                              decisions=decisions, field_prefix=field + ".")


def _indexed_to_problem(model: pb.ProblemModel, *, field: str, limits: Limits) -> Problem:
    """A ProblemModel with ``indexed`` terms -> Problem (numpy, no per-term Python)."""
    if len(model.linear) or len(model.quadratic):
        raise InputError(field + ".indexed", "give the terms either label-keyed (linear, "
                                             "quadratic) or indexed, not both")
    if not len(model.labels):
        raise InputError(field + ".labels", "must be set with indexed terms (they refer to it)")
    limits.variables(len(model.labels), field)
    labels = [label_to_py(lab, f"{field}.labels[{k}]") for k, lab in enumerate(model.labels)]
    decisions = tuple(decision_to_domain(d, f"{field}.decisions[{k}]")
                      for k, d in enumerate(model.decisions))
    t = model.indexed
    f = "indexed."
    return Problem.from_arrays(
        labels, np.asarray(t.linear, dtype=np.float64), np.asarray(t.u, dtype=np.int64),
        np.asarray(t.v, dtype=np.int64), np.asarray(t.bias, dtype=np.float64),
        offset=_finite(model.offset, field + ".offset"), vartype=_VARTYPE_NAMES[model.vartype],
        decisions=decisions, field_prefix=field + ".",
        fields=(f + "linear", f + "u", f + "v", f + "bias"))


def caller_terms(problem: Problem) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, float]:
    """The model's terms in the caller's vartype: (linear float64 (n,), u, v int64 (m,),
    bias float64 (m,), offset), one term per coupled pair (u < v)."""
    i, j, J = problem.pairs()
    h, off = problem.linear.astype(np.float64), float(problem.offset)
    if problem.vartype == "SPIN":  # x = (s + 1) / 2, exactly the inverse of the core's s = 2x - 1
        J = J / 4.0
        hs = h / 2.0
        np.add.at(hs, i, J)
        np.add.at(hs, j, J)
        off = off + float(h.sum()) / 2.0 + float(J.sum())
        h = hs
    return h, i, j, J, off


def problem_to_model(problem: Problem) -> pb.ProblemModel:
    """A :class:`Problem` -> ProblemModel in the caller's vartype, labels in order, terms
    indexed (packed arrays)."""
    h, i, j, J, off = caller_terms(problem)
    m = pb.ProblemModel(
        vartype=pb.SPIN if problem.vartype == "SPIN" else pb.BINARY, offset=off,
        labels=[py_to_label(lab) for lab in problem.labels],
        indexed=pb.IndexedTerms(linear=h.tolist(), u=i.tolist(), v=j.tolist(), bias=J.tolist()))
    m.decisions.extend(decision_to_proto(d) for d in problem.decisions)
    return m


def doc_to_model(doc: Any, *, field: str = "problem") -> pb.ProblemModel:
    """A problem JSON document -> ProblemModel with the document's own terms (exact)."""
    problem = documents.parse_problem(doc, field=field)
    m = pb.ProblemModel(vartype=pb.SPIN if problem.vartype == "SPIN" else pb.BINARY,
                        offset=float(doc.get("offset", 0.0)),
                        labels=[py_to_label(lab) for lab in problem.labels])
    for key, bias in doc.get("linear", {}).items():
        lab = documents.resolve_label(problem, key, f"{field}.linear[{key!r}]")
        m.linear.append(pb.LinearTerm(label=py_to_label(lab), bias=float(bias)))
    for u, v, bias in doc.get("quadratic", []):
        m.quadratic.append(pb.QuadraticTerm(u=py_to_label(u), v=py_to_label(v), bias=float(bias)))
    m.decisions.extend(decision_to_proto(d) for d in problem.decisions)
    return m


# --------------------------------------------------------------- candidates
def array_to_packed(X: np.ndarray) -> pb.PackedAssignments:
    """int8 (K, n) or (n,) 0/1 -> PackedAssignments (see the proto for the layout)."""
    X = np.asarray(X)
    if X.ndim == 1:
        X = X[None, :]
    return pb.PackedAssignments(count=X.shape[0], num_variables=X.shape[1],
                                bits=packing.pack_rows(X))


def packed_to_array(msg: pb.PackedAssignments, n: int, *, field: str,
                    count: int | None = None) -> np.ndarray:
    """PackedAssignments -> int8 (count, n) 0/1, checked against the problem's ``n``
    (and the expected ``count``); errors name ``field.num_variables``, ``.count``, ``.bits``."""
    if msg.num_variables != n:
        raise InputError(field + ".num_variables",
                         f"is {msg.num_variables}; the problem has {n} variables")
    if count is not None and msg.count != count:
        raise InputError(field + ".count", f"is {msg.count}; expected {count}")
    return packing.unpack_rows(msg.bits, int(msg.count), n, field=field)


def _provenance(p: pb.Provenance, field: str) -> dict:
    energy = p.reported_energy if p.HasField("reported_energy") else None
    if energy is not None:
        _finite(energy, field + ".reported_energy")
    return {"source": p.source, "energy": energy, "tags": list(p.tags)}


def batch_to_arrays(problem: Problem, batch: pb.CandidateBatch, *, field: str = "candidates",
                    limits: Limits = NO_LIMITS) -> tuple[list[str], np.ndarray, list[dict]]:
    """CandidateBatch -> (ids ('' = assign one), X int8 (K, n) 0/1 in ``problem.labels``
    order, K provenance dicts). Non-empty ids must be distinct."""
    ids = list(batch.ids)
    K = len(ids)
    limits.candidates(K, field)
    if K == 0:
        raise InputError(field + ".ids", "is empty: at least one candidate is needed")
    seen: set = set()
    for k, cid in enumerate(ids):
        if cid:
            if cid in seen:
                raise InputError(f"{field}.ids[{k}]", f"duplicate candidate id {cid!r}")
            seen.add(cid)
    X = packed_to_array(batch.values, problem.n, field=field + ".values", count=K)
    if len(batch.provenance) not in (0, K):
        raise InputError(field + ".provenance",
                         f"has {len(batch.provenance)} entries for {K} candidates (give 0 or {K})")
    provs = ([_provenance(p, f"{field}.provenance[{k}]") for k, p in enumerate(batch.provenance)]
             or [{"source": "", "energy": None, "tags": []} for _ in range(K)])
    return ids, X, provs


def _provenance_proto(prov: Mapping) -> pb.Provenance:
    p = pb.Provenance(source=prov.get("source") or "", tags=list(prov.get("tags") or ()))
    if prov.get("energy") is not None:
        p.reported_energy = float(prov["energy"])
    return p


def arrays_to_batch(ids: Sequence[str], X: np.ndarray, provenance: Sequence[Mapping] = (), *,
                    revision: int = 0) -> pb.CandidateBatch:
    """(K ids, X int8 (K, n) 0/1, 0 or K provenance dicts) -> CandidateBatch."""
    out = pb.CandidateBatch(ids=[str(i) for i in ids], values=array_to_packed(X),
                            revision=int(revision))
    if any(p.get("source") or p.get("energy") is not None or p.get("tags") for p in provenance):
        out.provenance.extend(_provenance_proto(p) for p in provenance)
    return out


def records_to_batches(recs: Sequence) -> list[pb.CandidateBatch]:
    """Stored :class:`flipfix.service.store.CandidateRecord` s -> one batch per run of one revision."""
    out: list[pb.CandidateBatch] = []
    start = 0
    for k in range(1, len(recs) + 1):
        if k == len(recs) or recs[k].revision != recs[start].revision:
            run = recs[start:k]
            n = len(run[0].labels)
            batch = pb.CandidateBatch(
                ids=[r.id for r in run], revision=int(run[0].revision),
                values=pb.PackedAssignments(count=len(run), num_variables=n,
                                            bits=b"".join(r.bits for r in run)))
            provs = [{"source": r.source, "energy": r.energy, "tags": r.tags} for r in run]
            if any(p["source"] or p["energy"] is not None or p["tags"] for p in provs):
                batch.provenance.extend(_provenance_proto(p) for p in provs)
            out.append(batch)
            start = k
    return out


def batch_to_candidates(batch: pb.CandidateBatch, problem: Problem, *,
                        field: str = "candidates") -> tuple[CandidateSet, list[dict]]:
    """A CandidateBatch (client side: ListCandidates) -> (CandidateSet, K provenance dicts);
    ``problem`` is the model of the batch's revision."""
    ids, X, provs = batch_to_arrays(problem, batch, field=field)
    return CandidateSet(CandidateSet._check_ids(ids, len(ids), field + ".ids"), X), provs


def candidates_to_batch(problem: Problem, candidates: Any, *, ids: Sequence[str] | None = None,
                        field: str = "candidates") -> pb.CandidateBatch:
    """Candidates in any form the client takes -> CandidateBatch in ``problem.labels`` order.

    ``candidates``: a :class:`CandidateSet`, a ``dimod.SampleSet`` (its energies become
    provenance), a numpy array (K, n) of values in the problem's vartype (columns in label
    order) or a candidates JSON document (list of objects). Without ``ids``, arrays and
    sample sets go with empty ids: the server assigns them (stored: ``c<N>``, inline: ``c<k>``).
    """
    if isinstance(candidates, pb.CandidateBatch):
        return candidates
    if isinstance(candidates, CandidateSet):
        return arrays_to_batch(candidates.ids, candidates.X)
    if type(candidates).__name__ == "SampleSet":
        cs = CandidateSet.from_sampleset(problem, candidates, ids=ids, field_name=field)
        energies = np.asarray(candidates.record.energy, dtype=np.float64)
        return arrays_to_batch(cs.ids if ids is not None else [""] * len(cs), cs.X,
                               [{"source": "dimod.SampleSet", "energy": float(e)}
                                for e in energies])
    if isinstance(candidates, np.ndarray):
        cs = CandidateSet.from_array(problem, candidates, ids=ids, field_name=field)
        return arrays_to_batch(cs.ids if ids is not None else [""] * len(cs), cs.X)
    recs = documents.parse_candidate_records(candidates, problem, field=field)
    cs = CandidateSet.from_mappings(
        problem, [{"id": r["id"], "assignment": r["assignment"]} for r in recs], field_name=field)
    return arrays_to_batch(cs.ids, cs.X, recs)


# -------------------------------------------------------------- constraints
#: Further proto constraint kinds: oneof field name -> fn(message, problem, field, name) -> constraint.
#: (The integer-decision kinds register here; the ``json`` kind covers every JSON type anyway.)
CONSTRAINT_CONVERTERS: dict = {}


def _reprefix(err: InputError, field: str) -> InputError:
    return err if err.field.startswith(field) else InputError(f"{field}.{err.field}", err.message)


def constraint_to_domain(c: pb.Constraint, problem: Problem, *, field: str) -> Any:
    """One Constraint proto -> its domain object (checked by the core when compiled)."""
    kind = c.WhichOneof("kind")
    name = c.name or None
    f = f"{field}.{kind}"
    try:
        if kind == "hamming":
            h = c.hamming
            table = list(h.table) if len(h.table) else None
            variables = [label_to_py(v, f"{f}.variables[{k}]") for k, v in enumerate(h.variables)] or None
            return HammingPenalty(assignment_to_dict(h.reference, f + ".reference"),
                                  weight=_finite(h.weight, f + ".weight"),
                                  shape=_SHAPE_NAMES.get(h.shape, "?"), threshold=h.threshold,
                                  table=table, variables=variables, name=name or "hamming")
        if kind == "extra":
            e = c.extra
            lin: dict = {}
            for k, t in enumerate(e.linear):
                lab = label_to_py(t.label, f"{f}.linear[{k}].label")
                lin[lab] = lin.get(lab, 0.0) + _finite(t.bias, f"{f}.linear[{k}].bias")
            quad = tuple((label_to_py(t.u, f"{f}.quadratic[{k}].u"),
                          label_to_py(t.v, f"{f}.quadratic[{k}].v"),
                          _finite(t.bias, f"{f}.quadratic[{k}].bias")) for k, t in enumerate(e.quadratic))
            return ExtraTerms(lin, quad, _finite(e.offset, f + ".offset"), name=name or "extra")
        if kind == "fix":
            return FixVariables(assignment_to_dict(c.fix.values, f + ".values"), name=name or "fix")
        if kind == "linear":
            ln = c.linear
            if ln.sense not in _SENSE_NAMES:
                raise InputError(f + ".sense", "must be LE, EQ or GE")
            terms: dict = {}
            for k, t in enumerate(ln.terms):
                lab = label_to_py(t.label, f"{f}.terms[{k}].label")
                terms[lab] = terms.get(lab, 0.0) + _finite(t.bias, f"{f}.terms[{k}].bias")
            return LinearConstraint(terms, _SENSE_NAMES[ln.sense], _finite(ln.rhs, f + ".rhs"),
                                    name=name or "linear")
        if kind == "forbid":
            return ForbidAssignment(assignment_to_dict(c.forbid.assignment, f + ".assignment"),
                                    name=name or "forbid")
        if kind in ("forbid_values", "allow_values"):
            msg = getattr(c, kind)
            vals = [_value_to_py(v, f"{f}.values[{k}]") for k, v in enumerate(msg.values)]
            cls = ForbidValues if kind == "forbid_values" else AllowValues
            return cls(msg.decision, vals, name=name or kind)
        if kind == "force_value":
            return ForceValue(c.force_value.decision, _value_to_py(c.force_value.value, f + ".value"),
                              name=name or kind)
        if kind == "decision_change":
            dc = c.decision_change
            ref = {r.decision: _value_to_py(r.value, f"{f}.reference[{k}].value")
                   for k, r in enumerate(dc.reference)}
            return DecisionChangePenalty(
                ref, weight=_finite(dc.weight, f + ".weight"),
                shape=_SHAPE_NAMES.get(dc.shape, "?"), threshold=dc.threshold,
                table=list(dc.table) or None, distance=_DISTANCE_NAMES.get(dc.distance, "?"),
                name=name or kind)
        if kind == "json":
            try:
                obj = json.loads(c.json)
            except ValueError as err:
                raise InputError(f, f"is not JSON: {err}") from None
            if isinstance(obj, dict) and name and "name" not in obj:
                obj["name"] = name
            return documents.parse_constraint(obj, problem, field=f)
        if kind in CONSTRAINT_CONVERTERS:
            return CONSTRAINT_CONVERTERS[kind](getattr(c, kind), problem, f, name)
    except InputError as err:
        raise _reprefix(err, f) from None
    if kind is None:
        raise InputError(field, "no constraint kind set")
    raise InputError(f, "this constraint kind is not supported by this server")


def constraints_to_domain(constraints: Sequence[pb.Constraint], problem: Problem, *,
                          field: str = "constraints", limits: Limits = NO_LIMITS) -> list:
    limits.constraints(len(constraints), field)
    out = [constraint_to_domain(c, problem, field=f"{field}[{k}]") for k, c in enumerate(constraints)]
    # validate now (names the field in proto terms); the worker compiles again
    from flipfix.repair.lowering.compiled import compile_constraints

    try:
        compile_constraints(problem, out, field_name=field)
    except InputError as err:  # "constraints[k].rest" -> "constraints[k].<kind>.rest"
        m = re.match(rf"{re.escape(field)}\[(\d+)\]\.(.*)", err.field)
        if m and int(m.group(1)) < len(constraints):
            kind = constraints[int(m.group(1))].WhichOneof("kind")
            if kind != "json" and not m.group(2).startswith(f"{kind}."):
                raise InputError(f"{field}[{m.group(1)}].{kind}.{m.group(2)}", err.message) from None
        raise
    return out


def doc_to_constraint(obj: Any, problem: Problem, *, field: str) -> pb.Constraint:
    """One constraint JSON object -> Constraint proto (typed kinds; others as ``json``)."""
    dom = documents.parse_constraint(obj, problem, field=field)
    name = obj.get("name", "") if isinstance(obj, Mapping) else ""
    msg = constraint_to_proto(dom, name=name)
    return msg if msg is not None else pb.Constraint(name=name, json=json.dumps(obj))


def constraint_to_proto(dom: Any, *, name: str | None = None) -> pb.Constraint | None:
    """A domain constraint -> Constraint proto of its typed kind (None: no typed kind).

    ``name`` defaults to the constraint's own ``name`` attribute.
    """
    name = getattr(dom, "name", "") or "" if name is None else name
    if isinstance(dom, HammingPenalty):
        msg = pb.HammingPenalty(reference=dict_to_assignment(dom.reference), weight=dom.weight,
                                shape=_SHAPE_ENUM[dom.shape], threshold=dom.threshold,
                                table=list(dom.table or []),
                                variables=[py_to_label(v) for v in (dom.variables or [])])
        return pb.Constraint(name=name, hamming=msg)
    if isinstance(dom, ExtraTerms):
        return pb.Constraint(name=name, extra=pb.ExtraTerms(
            linear=[pb.LinearTerm(label=py_to_label(k), bias=v) for k, v in dom.linear.items()],
            quadratic=[pb.QuadraticTerm(u=py_to_label(u), v=py_to_label(v), bias=b)
                       for u, v, b in dom.quadratic], offset=dom.offset))
    if isinstance(dom, FixVariables):
        return pb.Constraint(name=name, fix=pb.FixVariables(values=dict_to_assignment(dom.values)))
    if isinstance(dom, LinearConstraint):
        return pb.Constraint(name=name, linear=pb.LinearConstraint(
            terms=[pb.LinearTerm(label=py_to_label(k), bias=v) for k, v in dom.terms.items()],
            sense=_SENSE_ENUM[dom.sense], rhs=dom.rhs))
    if isinstance(dom, ForbidAssignment):
        return pb.Constraint(name=name, forbid=pb.ForbidAssignment(
            assignment=dict_to_assignment(dom.assignment)))
    if isinstance(dom, (ForbidValues, AllowValues)):
        msg = pb.ForbidValues if isinstance(dom, ForbidValues) else pb.AllowValues
        key = "forbid_values" if isinstance(dom, ForbidValues) else "allow_values"
        return pb.Constraint(name=name, **{key: msg(decision=dom.decision,
                                                   values=[_py_to_value(v) for v in dom.values])})
    if isinstance(dom, ForceValue):
        return pb.Constraint(name=name, force_value=pb.ForceValue(
            decision=dom.decision, value=_py_to_value(dom.value)))
    if isinstance(dom, DecisionChangePenalty):
        return pb.Constraint(name=name, decision_change=pb.DecisionChangePenalty(
            reference=[pb.DecisionReference(decision=d, value=_py_to_value(v))
                       for d, v in dom.reference.items()],
            weight=dom.weight, shape=_SHAPE_ENUM[dom.shape], threshold=dom.threshold,
            table=list(dom.table or []), distance=_DISTANCE_ENUM[dom.distance]))
    return None


def docs_to_constraints(doc: Any, problem: Problem, *, field: str = "constraints") -> list[pb.Constraint]:
    if isinstance(doc, Mapping):
        doc = [doc]
    if not isinstance(doc, list):
        raise InputError(field, "must be a list of constraint objects")
    return [doc_to_constraint(obj, problem, field=f"{field}[{k}]") for k, obj in enumerate(doc)]


# ------------------------------------------------------------------ options
def options_to_kwargs(o: pb.RepairOptions, *, default_time_limit: float = 5.0,
                      field: str = "options") -> dict:
    """RepairOptions -> keyword arguments of :func:`flipfix.repair.repair` (time limit uncapped)."""
    if o.method not in METHOD_NAMES:
        raise InputError(field + ".method", f"unknown method {o.method}")
    if not math.isfinite(o.time_limit) or o.time_limit < 0:
        raise InputError(field + ".time_limit", f"must be >= 0 seconds, got {o.time_limit!r}")
    if not math.isfinite(o.flip_price) or o.flip_price < 0:
        raise InputError(field + ".flip_price", f"must be >= 0, got {o.flip_price!r}")
    return {
        "method": METHOD_NAMES[o.method],
        "time_limit": float(o.time_limit) if o.time_limit > 0 else float(default_time_limit),
        "max_flips": int(o.max_flips) if o.HasField("max_flips") else None,
        "flip_price": float(o.flip_price),
        "seed": int(o.seed),
        "workers": max(1, int(o.workers)),
        "pareto": bool(o.pareto),
    }


def kwargs_to_options(*, method: str = "portfolio", time_limit: float = 0.0,
                      max_flips: int | None = None, flip_price: float = 0.0, seed: int = 0,
                      workers: int = 1, audit_limit: int | None = None, pareto: bool = False
                      ) -> pb.RepairOptions:
    if method not in _METHOD_ENUM:
        raise InputError("method", f"must be one of {sorted(_METHOD_ENUM)}, got {method!r}")
    o = pb.RepairOptions(method=_METHOD_ENUM[method], time_limit=float(time_limit or 0.0),
                         flip_price=float(flip_price), seed=int(seed), workers=int(workers),
                         pareto=bool(pareto))
    if max_flips is not None:
        o.max_flips = int(max_flips)
    if audit_limit is not None:
        o.audit_limit = int(audit_limit)
    return o


# ------------------------------------------------------------------- result
def _named(d: Mapping) -> list:
    return [pb.NamedValue(name=str(k), value=float(v)) for k, v in d.items()]


def result_to_reply(res: RepairResult, *, audit_limit: int | None = None,
                    time_limit: float = 0.0, revision: int = 0) -> pb.RepairReply:
    b = res.best
    best = pb.Solution(
        candidate_id=b.candidate_id, repaired_from=b.repaired_from,
        values=array_to_packed(np.asarray(b.x, dtype=np.int8)),
        cost=float(b.cost), objective=float(b.objective), base_energy=float(b.base_energy),
        penalties=_named(b.penalties), flips=int(b.flips), feasible=bool(b.feasible),
        violation=float(b.violation), violations=_named(b.violations), method=b.method,
        changes=[pb.DecisionChange(decision=str(d), old_value=json.dumps(o), new_value=json.dumps(n))
                 for d, o, n in b.changes],
        decisions_changed=int(b.decisions_changed))
    rows = res.audit if audit_limit is None else res.audit[:audit_limit]
    return pb.RepairReply(
        status=res.status, message=res.message, method=res.method, seed=int(res.seed),
        seconds=float(res.seconds), time_limit=float(time_limit), best=best,
        audit=[pb.AuditRow(candidate_id=r.candidate_id, cost_before=float(r.cost_before),
                           feasible_before=bool(r.feasible_before), cost=float(r.cost_after),
                           objective=float(r.objective_after), flips=int(r.flips),
                           feasible=bool(r.feasible), violation=float(r.violation),
                           method=r.method, seconds=float(r.seconds),
                           decisions_changed=int(r.decisions_changed),
                           encoding_issues=[pb.EncodingIssue(decision=d, how=h)
                                            for d, h in r.encoding_issues]) for r in rows],
        audit_total=len(res.audit),
        pareto=[pb.ParetoPoint(cost=float(p.cost), flips=int(p.flips), candidate_id=p.candidate_id,
                               method=p.method) for p in res.pareto],
        scaling_error=float(res.scaling_error), cpsat_status=res.cpsat_status, revision=revision)


def reply_values(r: pb.RepairReply, problem: Problem) -> np.ndarray:
    """The best answer of a reply as int8 (n,) in 0/1 form, ``problem.labels`` order
    (``problem``: the model repaired, i.e. of revision ``r.revision`` or the inline one)."""
    return packed_to_array(r.best.values, problem.n, field="best.values", count=1)[0]


def reply_to_dict(r: pb.RepairReply, problem: Problem | None = None) -> dict:
    """A RepairReply -> the same layout as :meth:`RepairResult.to_dict` (the CLI's JSON).

    ``problem`` (the model repaired) gives the labels and vartype of ``best.assignment``;
    without it the reply has no ``assignment`` (the packed values need the label order).
    """
    b = r.best
    best = {
        "candidate_id": b.candidate_id, "repaired_from": b.repaired_from, "cost": b.cost,
        "objective": b.objective, "base_energy": b.base_energy,
        "penalties": {p.name: p.value for p in b.penalties}, "flips": int(b.flips),
        "feasible": bool(b.feasible), "violation": b.violation,
        "violations": {p.name: p.value for p in b.violations}, "method": b.method,
    }
    if problem is not None:
        vals = problem.to_caller(reply_values(r, problem))
        best["assignment"] = dict(zip(problem.labels, vals.tolist()))
    best["changes"] = [{"decision": c.decision, "old": json.loads(c.old_value),
                        "new": json.loads(c.new_value)} for c in b.changes]
    best["decisions_changed"] = int(b.decisions_changed)
    return {
        "status": r.status, "message": r.message, "method": r.method, "seed": int(r.seed),
        "seconds": round(r.seconds, 6), "scaling_error": r.scaling_error,
        "cpsat_status": r.cpsat_status, "best": best,
        "audit": [
            {"candidate_id": a.candidate_id, "cost_before": a.cost_before,
             "feasible_before": bool(a.feasible_before), "cost": a.cost, "objective": a.objective,
             "flips": int(a.flips), "feasible": bool(a.feasible), "violation": a.violation,
             "method": a.method, "seconds": round(a.seconds, 6),
             "decisions_changed": int(a.decisions_changed),
             "encoding_issues": [{"decision": e.decision, "how": e.how}
                                 for e in a.encoding_issues]} for a in r.audit
        ],
        "pareto": [{"cost": p.cost, "flips": int(p.flips), "candidate_id": p.candidate_id,
                    "method": p.method} for p in r.pareto],
    }


# -------------------------------------------------------------- audit (issue 5)
#: METHOD_UNSPECIFIED in the audit requests: greedy (fast, deterministic)
_AUDIT_METHOD_NAMES = {**METHOD_NAMES, pb.METHOD_UNSPECIFIED: "greedy"}
_REFERENCE_NAMES = {pb.REFERENCE_UNSPECIFIED: "uniform", pb.UNIFORM: "uniform",
                    pb.PERTURBED: "perturbed"}
_REFERENCE_ENUM = {"uniform": pb.UNIFORM, "perturbed": pb.PERTURBED}
_SELECTION_NAMES = {pb.SELECTION_UNSPECIFIED: "greedy", pb.FORWARD: "greedy",
                    pb.EXHAUSTIVE: "exhaustive"}
DEFAULT_SCENARIOS = 20


def _nonneg(v: float, field: str) -> float:
    if not math.isfinite(v) or v < 0:
        raise InputError(field, f"must be a finite number >= 0, got {v!r}")
    return float(v)


def _set_opt(msg, name: str, v: float | None) -> None:
    if v is not None and math.isfinite(v):
        setattr(msg, name, float(v))


def _get_opt(msg, name: str) -> float:
    return getattr(msg, name) if msg.HasField(name) else math.nan


def family_to_domain(f: pb.ScenarioFamily, problem: Problem, *, field: str = "family"):
    """ScenarioFamily proto -> validated :class:`flipfix.repair.audit.stress.ScenarioFamily`."""
    from flipfix.repair.audit.stress import ScenarioFamily

    if f.reference not in _REFERENCE_NAMES:
        raise InputError(field + ".reference", "must be UNIFORM or PERTURBED")
    if f.hamming_shape not in _SHAPE_NAMES:
        raise InputError(field + ".hamming_shape", "must be LINEAR, QUADRATIC or THRESHOLD")
    weights = None
    if len(f.capacity_weights):
        weights = {}
        for k, t in enumerate(f.capacity_weights):
            lab = label_to_py(t.label, f"{field}.capacity_weights[{k}].label")
            problem.lookup(lab, f"{field}.capacity_weights[{k}].label")
            if lab in weights:
                raise InputError(f"{field}.capacity_weights[{k}].label", f"{lab!r} given twice")
            weights[lab] = _nonneg(t.bias, f"{field}.capacity_weights[{k}].bias")
    fam = ScenarioFamily(
        hamming_weight=float(f.hamming_weight), hamming_shape=_SHAPE_NAMES[f.hamming_shape],
        hamming_threshold=float(f.hamming_threshold),
        hamming_fraction=float(f.hamming_fraction) if f.hamming_fraction != 0 else 1.0,
        reference=_REFERENCE_NAMES[f.reference],
        perturb_rate=float(f.perturb_rate) if f.HasField("perturb_rate") else 0.1,
        fix_k=int(f.fix_k), capacity_cut_percent=float(f.capacity_cut_percent),
        capacity_weights=weights)
    fam.validate(problem, field_name=field)
    return fam


def family_to_proto(fam) -> pb.ScenarioFamily:
    """:class:`flipfix.repair.audit.stress.ScenarioFamily` -> proto (the client's side)."""
    msg = pb.ScenarioFamily(
        hamming_weight=fam.hamming_weight, hamming_shape=_SHAPE_ENUM[fam.hamming_shape],
        hamming_threshold=fam.hamming_threshold, hamming_fraction=fam.hamming_fraction,
        reference=_REFERENCE_ENUM[fam.reference], perturb_rate=fam.perturb_rate,
        fix_k=int(fam.fix_k), capacity_cut_percent=fam.capacity_cut_percent)
    for lab, w in (fam.capacity_weights or {}).items():
        msg.capacity_weights.append(pb.LinearTerm(label=py_to_label(lab), bias=float(w)))
    return msg


def stress_to_kwargs(r: pb.StressRequest, problem: Problem, *, default_time_limit: float,
                     max_scenarios: int | None = None, field: str = "") -> tuple[Any, dict]:
    """StressRequest -> (ScenarioFamily, keyword arguments of :func:`flipfix.service.audit_jobs.stress`).

    ``time_limit`` is the requested whole-run budget (the server caps it); ``field``
    prefixes the error fields (``"stress."`` inside a CurateRequest).
    """
    fam = family_to_domain(r.family, problem, field=field + "family")
    scenarios = int(r.scenarios) or DEFAULT_SCENARIOS
    if max_scenarios is not None and scenarios > max_scenarios:
        raise LimitError(field + "scenarios", f"{scenarios} scenarios exceed the limit of {max_scenarios}")
    if r.method not in _AUDIT_METHOD_NAMES:
        raise InputError(field + "method", f"unknown method {r.method}")
    t = _nonneg(r.time_limit, field + "time_limit")
    opts: dict = {"flip_price": _nonneg(r.flip_price, field + "flip_price")}
    if r.HasField("max_flips"):
        opts["max_flips"] = int(r.max_flips)
    return fam, {
        "scenarios": scenarios, "seed": int(r.seed), "method": _AUDIT_METHOD_NAMES[r.method],
        "time_limit": t if t > 0 else float(default_time_limit),
        "epsilon": _nonneg(r.epsilon, field + "epsilon"), "repair_options": opts,
    }


def pareto_to_kwargs(r: pb.ParetoRequest, *, default_time_limit: float) -> dict:
    """ParetoRequest options -> keyword arguments of :func:`flipfix.service.audit_jobs.pareto`."""
    methods = []
    for k, m in enumerate(r.methods):
        if m not in METHOD_NAMES:
            raise InputError(f"methods[{k}]", f"unknown method {m}")
        methods.append(METHOD_NAMES[m])
    if r.seed >= 2**31:
        raise InputError("seed", f"must be below 2^31, got {r.seed}")
    t = _nonneg(r.time_limit, "time_limit")
    if r.HasField("fewest_flips_within_percent"):
        _nonneg(r.fewest_flips_within_percent, "fewest_flips_within_percent")
    return {"methods": tuple(methods) or ("greedy", "cpsat"),
            "time_limit": t if t > 0 else float(default_time_limit), "seed": int(r.seed),
            "include_unchanged": not r.exclude_unchanged}


# replies (server side) ------------------------------------------------------
def robustness_to_reply(rep, *, revision: int = 0) -> pb.RobustnessReply:
    """:class:`flipfix.repair.audit.robustness.RobustnessReport` -> RobustnessReply."""
    return pb.RobustnessReply(
        epsilon=rep.epsilon, best_id=rep.best_id, num_variables=rep.n_variables,
        num_decisions=rep.n_decisions, revision=revision,
        profiles=[pb.CandidateProfile(
            candidate_id=p.candidate_id, energy=p.energy, free_variables=p.free_variables,
            free_decisions=p.free_decisions, improving=p.improving,
            min_flip_cost=p.min_flip_cost, within_1pct=p.within_1pct, within_5pct=p.within_5pct,
            distance_to_best=p.distance_to_best, nearest_other=p.nearest_other,
            nearest_other_id=p.nearest_other_id, spectrum=[float(v) for v in p.spectrum])
            for p in rep.profiles])


def stress_to_reply(rep, *, matrices: bool = False, time_limit: float = 0.0,
                    revision: int = 0) -> pb.StressReply:
    """:class:`flipfix.repair.audit.stress.StressReport` -> StressReply (NaN figures left unset)."""
    out = pb.StressReply(
        method=rep.method, seed=rep.seed, epsilon=rep.epsilon,
        scenarios_requested=rep.scenarios_requested, scenarios_done=rep.scenarios_done,
        stopped=rep.stopped, message=rep.message, seconds=rep.seconds, time_limit=time_limit,
        correlated=rep.correlated, revision=revision)
    _set_opt(out, "pearson", rep.pearson)
    _set_opt(out, "spearman", rep.spearman)
    for c in rep.candidates:
        row = pb.CandidateStress(candidate_id=c.candidate_id, energy=c.energy,
                                 free_variables=c.free_variables, wins=c.wins,
                                 win_rate=c.win_rate if math.isfinite(c.win_rate) else 0.0,
                                 worst_flips=c.worst_flips, failures=c.failures)
        for name in ("mean_cost", "worst_cost", "mean_regret", "mean_flips"):
            _set_opt(row, name, getattr(c, name))
        out.candidates.append(row)
    for s, d, b, w in zip(rep.scenario_seeds, rep.scenario_descriptions, rep.scenario_best,
                          rep.winners):
        sc = pb.StressScenario(seed=int(s), description=d, winners=list(w))
        _set_opt(sc, "best_cost", b)
        out.scenarios.append(sc)
    if matrices:
        for c, f, ok in zip(rep.cost, rep.flips, rep.feasible):
            out.rows.append(pb.StressRow(cost=[float(v) for v in c], flips=[int(v) for v in f],
                                         feasible=[bool(v) for v in ok]))
    return out


def _point_proto(p) -> pb.ParetoPoint:
    return pb.ParetoPoint(cost=float(p.cost), flips=int(p.flips), candidate_id=p.candidate_id,
                          method=p.method)


def pareto_to_reply(front, *, cheapest=None, fewest=None, seconds: float = 0.0,
                    time_limit: float = 0.0, revision: int = 0) -> pb.ParetoReply:
    out = pb.ParetoReply(front=[_point_proto(p) for p in front], seconds=seconds,
                         time_limit=time_limit, revision=revision)
    if cheapest is not None:
        out.cheapest_within.CopyFrom(_point_proto(cheapest))
    if fewest is not None:
        out.fewest_flips_within.CopyFrom(_point_proto(fewest))
    return out


def curation_to_reply(stress: pb.StressReply, cur, *, kept: bool = False,
                      removed: Sequence[str] = (), message: str = "",
                      revision: int = 0) -> pb.CurateReply:
    """A StressReply plus :class:`flipfix.repair.audit.curation.CurationResult` (or None) -> CurateReply."""
    out = pb.CurateReply(stress=stress, kept=kept, removed_ids=list(removed), message=message,
                         revision=revision)
    if cur is not None:
        out.kept_ids.extend(cur.kept_ids)
        out.scenarios = cur.scenarios
        out.total_cost, out.full_total_cost = cur.total_cost, cur.full_total_cost
        out.uncovered = cur.uncovered
        out.mean_gap, out.worst_gap, out.relative_gap = cur.mean_gap, cur.worst_gap, cur.relative_gap
        out.curve.extend(cur.curve)
    return out


# replies -> domain objects (client side) -----------------------------------
def reply_to_robustness(r: pb.RobustnessReply):
    """RobustnessReply -> :class:`flipfix.repair.audit.robustness.RobustnessReport`."""
    from flipfix.repair.audit.robustness import CandidateProfile, RobustnessReport

    return RobustnessReport(
        epsilon=r.epsilon, best_id=r.best_id, n_variables=r.num_variables,
        n_decisions=r.num_decisions,
        profiles=[CandidateProfile(
            candidate_id=p.candidate_id, energy=p.energy, free_variables=p.free_variables,
            free_decisions=p.free_decisions, improving=p.improving,
            min_flip_cost=p.min_flip_cost, within_1pct=p.within_1pct, within_5pct=p.within_5pct,
            distance_to_best=p.distance_to_best, nearest_other=p.nearest_other,
            nearest_other_id=p.nearest_other_id, spectrum=list(p.spectrum)) for p in r.profiles])


def reply_to_stress(r: pb.StressReply, *, family: dict | None = None):
    """StressReply -> :class:`flipfix.repair.audit.stress.StressReport` (matrices empty unless requested)."""
    from flipfix.repair.audit.stress import CandidateStress, StressReport

    return StressReport(
        family=dict(family or {}), method=r.method, seed=int(r.seed), epsilon=r.epsilon,
        scenarios_requested=r.scenarios_requested, scenarios_done=r.scenarios_done,
        stopped=r.stopped, seconds=r.seconds,
        candidates=[CandidateStress(
            candidate_id=c.candidate_id, energy=c.energy, free_variables=c.free_variables,
            wins=c.wins, win_rate=c.win_rate, mean_cost=_get_opt(c, "mean_cost"),
            worst_cost=_get_opt(c, "worst_cost"), mean_regret=_get_opt(c, "mean_regret"),
            mean_flips=_get_opt(c, "mean_flips"), worst_flips=c.worst_flips,
            failures=c.failures) for c in r.candidates],
        scenario_seeds=[int(s.seed) for s in r.scenarios],
        scenario_descriptions=[s.description for s in r.scenarios],
        scenario_best=[_get_opt(s, "best_cost") for s in r.scenarios],
        winners=[list(s.winners) for s in r.scenarios],
        cost=[list(row.cost) for row in r.rows], flips=[list(row.flips) for row in r.rows],
        feasible=[list(row.feasible) for row in r.rows],
        pearson=r.pearson if r.HasField("pearson") else None,
        spearman=r.spearman if r.HasField("spearman") else None,
        correlated=r.correlated, message=r.message)


def reply_to_point(p: pb.ParetoPoint):
    from flipfix.repair.result import ParetoPoint

    return ParetoPoint(cost=p.cost, flips=int(p.flips), candidate_id=p.candidate_id, method=p.method)


def reply_to_curation(r: pb.CurateReply, m: int, selection: str = "greedy"):
    """CurateReply -> :class:`flipfix.repair.audit.curation.CurationResult` (None when nothing was chosen).

    ``kept_indices`` are positions in the audited library (the stress report's order).
    """
    from flipfix.repair.audit.curation import CurationResult

    if not r.kept_ids:
        return None
    pos = {c.candidate_id: k for k, c in enumerate(r.stress.candidates)}
    return CurationResult(
        method=selection, m=m, kept_ids=list(r.kept_ids),
        kept_indices=[pos.get(i, -1) for i in r.kept_ids], scenarios=r.scenarios,
        total_cost=r.total_cost, full_total_cost=r.full_total_cost, uncovered=r.uncovered,
        mean_gap=r.mean_gap, worst_gap=r.worst_gap, relative_gap=r.relative_gap,
        curve=list(r.curve))
