"""JSON documents -> domain objects (pure: no grpc, no files).

Three documents, as the CLI reads them and the README shows them:

* problem: ``{"vartype": "BINARY"|"SPIN", "linear": {label: bias},
  "quadratic": [[u, v, bias], ...], "offset": c, "labels": [...]?, "decisions": [...]?}``
* candidates: ``[{"id": "...", "assignment": {label: value}, "source"?, "energy"?, "tags"?}, ...]``
* constraints: ``[{"type": "hamming"|"extra"|"fix"|"linear"|"forbid"|..., ...}, ...]``

Labels (the int/str rule)
-------------------------
A label is a string or an integer. Inside JSON lists (``quadratic`` entries,
``labels``, a hamming ``variables`` list) a label keeps its JSON type: ``3`` is
the integer 3 and ``"3"`` the string "3". JSON object keys are always strings,
so a key is matched as follows:

1. in the problem document, the integer labels are those written as JSON
   integers in ``labels`` or ``quadratic``; a ``linear`` key in canonical
   decimal form (``"3"``, ``"-2"``; not ``"03"`` or ``"+3"``) names the integer
   label when that integer is one of them, otherwise the key is a string label.
   To declare integer labels that appear only in ``linear``, list them in
   ``"labels"``;
2. in every other document (candidates, constraints), a key names the string
   label when the problem has it, else the integer label of the same canonical
   decimal form; anything else is reported as an unknown variable.

A problem that uses both the integer 3 and the string "3" cannot be written with
object keys and is rejected (``problem.quadratic[k]``).

Errors are :class:`flipfix.repair.errors.InputError` naming the field as a dotted path,
e.g. ``constraints[2].weight`` or ``candidates[0].assignment['x3']``.

Constraint kinds: the JSON form of each kind (its ``"type"``, keys, reader and
writer) is part of the kind's record (:mod:`flipfix.repair.model.constraints`);
:func:`parse_constraints` and :func:`constraints_document` dispatch through it.
"""

from __future__ import annotations

from typing import Any, Mapping

from flipfix.repair.documents.fields import (
    as_list, as_mapping, canonical_int, check_keys, json_label, number, require,
    resolve_label, resolve_mapping,
)
from flipfix.repair.errors import InputError
from flipfix.repair.model.candidates import CandidateSet
from flipfix.repair.model.constraints import registry
from flipfix.repair.model.problem import ENCODINGS, VARTYPES, Decision, Problem, check_label, check_value

__all__ = [
    "parse_problem", "parse_decisions", "parse_candidates", "parse_candidate_records",
    "parse_constraints", "parse_constraint", "problem_document", "constraints_document",
    "resolve_label", "resolve_mapping",
]

_PROBLEM_KEYS = {"vartype", "linear", "quadratic", "offset", "labels", "decisions", "name"}
_CANDIDATE_KEYS = {"id", "assignment", "source", "energy", "tags", "revision"}
_DECISION_KEYS = {"name", "encoding", "variables", "values"}


# ------------------------------------------------------------------ problem
def parse_problem(obj: Any, *, field: str = "problem") -> Problem:
    """The problem document -> :class:`Problem` (labels per the module's int/str rule)."""
    f = field
    if not isinstance(obj, Mapping):
        raise InputError(f, f"must be a JSON object, got {type(obj).__name__}")
    check_keys(obj, _PROBLEM_KEYS, f)
    if "vartype" not in obj:
        raise InputError(f + ".vartype", f"is missing (one of {VARTYPES})")
    vartype = obj["vartype"]
    if not isinstance(vartype, str) or vartype.upper() not in VARTYPES:
        raise InputError(f + ".vartype", f"must be one of {VARTYPES}, got {vartype!r}")
    vartype = vartype.upper()
    linear = as_mapping(obj.get("linear", {}), f + ".linear")
    quadratic = as_list(obj.get("quadratic", []), f + ".quadratic")
    offset = number(obj.get("offset", 0.0), f + ".offset")

    labels = None
    int_labels: dict[int, str] = {}   # int label -> where it was seen
    str_labels: dict[str, str] = {}
    if "labels" in obj:
        labels = []
        for k, lab in enumerate(as_list(obj["labels"], f + ".labels")):
            lab = json_label(lab, f"{f}.labels[{k}]")
            (int_labels if isinstance(lab, int) else str_labels).setdefault(lab, f"{f}.labels[{k}]")
            labels.append(lab)
    quad = []
    for k, term in enumerate(quadratic):
        tf = f"{f}.quadratic[{k}]"
        if not isinstance(term, (list, tuple)) or len(term) != 3:
            raise InputError(tf, "must be [u, v, bias]")
        u = json_label(term[0], tf)
        v = json_label(term[1], tf)
        for lab in (u, v):
            (int_labels if isinstance(lab, int) else str_labels).setdefault(lab, tf)
        quad.append((u, v, number(term[2], tf)))
    for s, where in str_labels.items():
        i = canonical_int(s)
        if i is not None and i in int_labels:
            raise InputError(where, f"uses both the integer {i} and the string {s!r} as labels; "
                                    "JSON object keys cannot tell them apart")
    lin = []
    for key, bias in linear.items():
        kf = f"{f}.linear[{key!r}]"
        as_int = canonical_int(key) if isinstance(key, str) else None
        lab = as_int if as_int is not None and as_int in int_labels else key
        lin.append((lab, number(bias, kf)))

    decisions = tuple(parse_decisions(obj.get("decisions"), f + ".decisions"))
    return Problem.from_terms(lin, quad, offset=offset, vartype=vartype, labels=labels,
                              decisions=decisions, field=f)


def problem_document(problem: Problem) -> dict:
    """The inverse of :func:`parse_problem`: a JSON-ready document with explicit ``labels``.

    Biases are in the problem's own vartype (SPIN problems are written as SPIN),
    so ``parse_problem(problem_document(p))`` has the same energies and labels.
    """
    bqm = problem.to_bqm()
    doc = {
        "vartype": problem.vartype,
        "labels": list(problem.labels),
        "linear": {str(lab): float(bqm.get_linear(lab)) for lab in problem.labels},
        "quadratic": [[u, v, float(b)] for (u, v), b in bqm.quadratic.items()],
        "offset": float(bqm.offset),
    }
    if problem.decisions:
        doc["decisions"] = [
            {"name": d.name, "encoding": d.encoding, "variables": list(d.variables),
             "values": list(d.values)} for d in problem.decisions
        ]
    return doc


def parse_decisions(obj: Any, field: str = "decisions") -> list[Decision]:
    """The problem document's ``"decisions"`` list -> [Decision].

    Each item: ``{"name": str, "encoding": "one_hot" | "domain_wall",
    "variables": [label, ...], "values": [value, ...]}``. Shapes and bit
    ownership are checked against the problem when it is built
    (:func:`flipfix.repair.model.problem.validate_decisions`).
    """
    if obj is None:
        return []
    if not isinstance(obj, list):
        raise InputError(field, "must be a list of decisions")
    out = []
    for k, item in enumerate(obj):
        f = f"{field}[{k}]"
        if not isinstance(item, Mapping):
            raise InputError(f, f"must be an object, got {type(item).__name__}")
        check_keys(item, _DECISION_KEYS, f)
        for key in sorted(_DECISION_KEYS):
            require(item, key, f)
        if not isinstance(item["name"], str) or item["name"] == "":
            raise InputError(f + ".name", f"must be a non-empty string, got {item['name']!r}")
        if item["encoding"] not in ENCODINGS:
            raise InputError(f + ".encoding", f"must be one of {ENCODINGS}, got {item['encoding']!r}")
        for key in ("variables", "values"):
            if not isinstance(item[key], list):
                raise InputError(f"{f}.{key}", "must be a list")
        variables = tuple(check_label(lab, f"{f}.variables[{j}]")
                          for j, lab in enumerate(item["variables"]))
        values = tuple(check_value(v, f"{f}.values[{j}]") for j, v in enumerate(item["values"]))
        out.append(Decision(item["name"], item["encoding"], variables, values))
    return out


# --------------------------------------------------------------- candidates
def parse_candidate_records(obj: Any, problem: Problem, *, field: str = "candidates") -> list[dict]:
    """Candidates document -> records ``{"id", "assignment" {label: value}, "source",
    "energy", "tags"}`` with labels resolved; the assignment is checked by
    :func:`parse_candidates`, not here."""
    items = as_list(obj, field)
    out = []
    for k, item in enumerate(items):
        f = f"{field}[{k}]"
        if not isinstance(item, Mapping):
            raise InputError(f, 'must be an object {"id": ..., "assignment": {label: value}}')
        check_keys(item, _CANDIDATE_KEYS, f)
        if "assignment" not in item:
            raise InputError(f + ".assignment", "is missing")
        rec = {"id": item.get("id", f"c{k}"),
               "assignment": resolve_mapping(problem, item["assignment"], f + ".assignment"),
               "source": item.get("source", ""), "energy": item.get("energy"),
               "tags": item.get("tags", [])}
        if not isinstance(rec["source"], str):
            raise InputError(f + ".source", "must be a string")
        if rec["energy"] is not None:
            rec["energy"] = number(rec["energy"], f + ".energy")
        tags = as_list(rec["tags"], f + ".tags")
        for t, tag in enumerate(tags):
            if not isinstance(tag, str):
                raise InputError(f"{f}.tags[{t}]", "must be a string")
        out.append(rec)
    return out


def parse_candidates(obj: Any, problem: Problem, *, field: str = "candidates") -> CandidateSet:
    """Candidates document -> :class:`CandidateSet` (every variable assigned, ids unique)."""
    recs = parse_candidate_records(obj, problem, field=field)
    return CandidateSet.from_mappings(
        problem, [{"id": r["id"], "assignment": r["assignment"]} for r in recs], field=field)


# -------------------------------------------------------------- constraints
def parse_constraint(obj: Any, problem: Problem, *, field: str = "constraints[0]") -> Any:
    """One constraint object ``{"type": kind, "name"?: str, ...}`` -> its domain object."""
    return registry.read_json(obj, problem, field=field)


def parse_constraints(obj: Any, problem: Problem, *, field: str = "constraints") -> list:
    """Constraints document (a list, or one object) -> list of domain constraints."""
    if isinstance(obj, Mapping):
        obj = [obj]
    return [parse_constraint(c, problem, field=f"{field}[{k}]")
            for k, c in enumerate(as_list(obj, field))]


def constraints_document(constraints: Any) -> list[dict]:
    """The inverse of :func:`parse_constraints`: one JSON object per domain constraint."""
    return [registry.write_json(c) for c in constraints]
