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

Extending: :data:`CONSTRAINT_PARSERS` maps a ``"type"`` to a parser
``parser(obj: dict, problem: Problem, field: str) -> constraint``. Integer-decision
kinds come from :mod:`flipfix.repair.model.encodings` (its ``CONSTRAINT_PARSERS`` are merged in
when that module exists), and so does ``parse_decisions(obj, field)`` for a
problem's ``"decisions"``.
"""

from __future__ import annotations

import math
import re
from typing import Any, Callable, Hashable, Mapping

from flipfix.repair.model.candidates import CandidateSet
from flipfix.repair.model.constraints import (
    SENSES, SHAPES, ExtraTerms, FixVariables, ForbidAssignment, HammingPenalty,
    LinearConstraint,
)
from flipfix.repair.errors import InputError
from flipfix.repair.model.problem import VARTYPES, Problem

__all__ = [
    "parse_problem", "parse_candidates", "parse_candidate_records", "parse_constraints",
    "parse_constraint", "problem_document", "resolve_label", "resolve_mapping",
    "CONSTRAINT_PARSERS", "constraint_parsers",
]

_CANONICAL_INT = re.compile(r"-?(0|[1-9][0-9]*)\Z")
_PROBLEM_KEYS = {"vartype", "linear", "quadratic", "offset", "labels", "decisions", "name"}
_CANDIDATE_KEYS = {"id", "assignment", "source", "energy", "tags", "revision"}


def _canonical_int(key: str) -> int | None:
    return int(key) if _CANONICAL_INT.match(key) else None


def _json_label(value: Any, field: str) -> Hashable:
    """A label written in a JSON list: str or int (bool and float are errors)."""
    if isinstance(value, bool) or not isinstance(value, (str, int)):
        raise InputError(field, f"label {value!r} must be a string or an integer")
    return value


def _mapping(obj: Any, field: str) -> Mapping:
    if not isinstance(obj, Mapping):
        raise InputError(field, f"must be an object {{label: value}}, got {type(obj).__name__}")
    return obj


def _list(obj: Any, field: str) -> list:
    if not isinstance(obj, (list, tuple)):
        raise InputError(field, f"must be a list, got {type(obj).__name__}")
    return list(obj)


def _number(value: Any, field: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise InputError(field, f"{value!r} is not a number")
    v = float(value)
    if not math.isfinite(v):
        raise InputError(field, f"{value!r} is not finite")
    return v


def _check_keys(obj: Mapping, allowed: set, field: str) -> None:
    for key in obj:
        if key not in allowed:
            raise InputError(f"{field}.{key}", f"unknown field (allowed: {', '.join(sorted(allowed))})")


def _reprefix(err: InputError, field: str) -> InputError:
    """An error raised by a domain constructor with a bare field name, under ``field``."""
    if err.field.startswith(field):
        return err
    return InputError(f"{field}.{err.field}", err.message)


# ------------------------------------------------------------------- labels
def resolve_label(problem: Problem, key: Any, field: str) -> Hashable:
    """A label as written in a candidates/constraints document -> the problem's label.

    JSON integers stay integers; strings follow rule 2 of the module docstring.
    A string that names no variable is an :class:`InputError` naming ``field``.
    """
    if isinstance(key, bool) or not isinstance(key, (str, int)):
        raise InputError(field, f"label {key!r} must be a string or an integer")
    if isinstance(key, int):
        return key
    if key in problem.index:
        return key
    as_int = _canonical_int(key)
    if as_int is not None and as_int in problem.index:
        return as_int
    raise InputError(field, f"unknown variable {key!r}")


def resolve_mapping(problem: Problem, obj: Any, field: str) -> dict:
    """``{key: value}`` with keys resolved to the problem's labels (values untouched)."""
    out: dict = {}
    for key, value in _mapping(obj, field).items():
        lab = resolve_label(problem, key, f"{field}[{key!r}]")
        out[lab] = value
    return out


# ------------------------------------------------------------------ problem
def parse_problem(obj: Any, *, field: str = "problem") -> Problem:
    """The problem document -> :class:`Problem` (labels per the module's int/str rule)."""
    f = field
    if not isinstance(obj, Mapping):
        raise InputError(f, f"must be a JSON object, got {type(obj).__name__}")
    _check_keys(obj, _PROBLEM_KEYS, f)
    if "vartype" not in obj:
        raise InputError(f + ".vartype", f"is missing (one of {VARTYPES})")
    vartype = obj["vartype"]
    if not isinstance(vartype, str) or vartype.upper() not in VARTYPES:
        raise InputError(f + ".vartype", f"must be one of {VARTYPES}, got {vartype!r}")
    vartype = vartype.upper()
    linear = _mapping(obj.get("linear", {}), f + ".linear")
    quadratic = _list(obj.get("quadratic", []), f + ".quadratic")
    offset = _number(obj.get("offset", 0.0), f + ".offset")

    labels = None
    int_labels: dict[int, str] = {}   # int label -> where it was seen
    str_labels: dict[str, str] = {}
    if "labels" in obj:
        labels = []
        for k, lab in enumerate(_list(obj["labels"], f + ".labels")):
            lab = _json_label(lab, f"{f}.labels[{k}]")
            (int_labels if isinstance(lab, int) else str_labels).setdefault(lab, f"{f}.labels[{k}]")
            labels.append(lab)
    quad = []
    for k, term in enumerate(quadratic):
        tf = f"{f}.quadratic[{k}]"
        if not isinstance(term, (list, tuple)) or len(term) != 3:
            raise InputError(tf, "must be [u, v, bias]")
        u = _json_label(term[0], tf)
        v = _json_label(term[1], tf)
        for lab in (u, v):
            (int_labels if isinstance(lab, int) else str_labels).setdefault(lab, tf)
        quad.append((u, v, _number(term[2], tf)))
    for s, where in str_labels.items():
        i = _canonical_int(s)
        if i is not None and i in int_labels:
            raise InputError(where, f"uses both the integer {i} and the string {s!r} as labels; "
                                    "JSON object keys cannot tell them apart")
    lin = []
    for key, bias in linear.items():
        kf = f"{f}.linear[{key!r}]"
        as_int = _canonical_int(key) if isinstance(key, str) else None
        lab = as_int if as_int is not None and as_int in int_labels else key
        lin.append((lab, _number(bias, kf)))

    decisions = ()
    if obj.get("decisions") not in (None, []):
        from flipfix.repair.model import encodings

        decisions = tuple(encodings.parse_decisions(obj["decisions"], f + ".decisions"))
    return Problem.from_terms(lin, quad, offset=offset, vartype=vartype, labels=labels,
                              decisions=decisions, field_prefix=f + ".")


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


# --------------------------------------------------------------- candidates
def parse_candidate_records(obj: Any, problem: Problem, *, field: str = "candidates") -> list[dict]:
    """Candidates document -> records ``{"id", "assignment" {label: value}, "source",
    "energy", "tags"}`` with labels resolved; the assignment is checked by
    :func:`parse_candidates`, not here."""
    items = _list(obj, field)
    out = []
    for k, item in enumerate(items):
        f = f"{field}[{k}]"
        if not isinstance(item, Mapping):
            raise InputError(f, 'must be an object {"id": ..., "assignment": {label: value}}')
        _check_keys(item, _CANDIDATE_KEYS, f)
        if "assignment" not in item:
            raise InputError(f + ".assignment", "is missing")
        rec = {"id": item.get("id", f"c{k}"),
               "assignment": resolve_mapping(problem, item["assignment"], f + ".assignment"),
               "source": item.get("source", ""), "energy": item.get("energy"),
               "tags": item.get("tags", [])}
        if not isinstance(rec["source"], str):
            raise InputError(f + ".source", "must be a string")
        if rec["energy"] is not None:
            rec["energy"] = _number(rec["energy"], f + ".energy")
        tags = _list(rec["tags"], f + ".tags")
        for t, tag in enumerate(tags):
            if not isinstance(tag, str):
                raise InputError(f"{f}.tags[{t}]", "must be a string")
        out.append(rec)
    return out


def parse_candidates(obj: Any, problem: Problem, *, field: str = "candidates") -> CandidateSet:
    """Candidates document -> :class:`CandidateSet` (every variable assigned, ids unique)."""
    recs = parse_candidate_records(obj, problem, field=field)
    return CandidateSet.from_mappings(
        problem, [{"id": r["id"], "assignment": r["assignment"]} for r in recs], field_name=field)


# -------------------------------------------------------------- constraints
def _opt_name(obj: Mapping, field: str, default: str) -> str:
    name = obj.get("name", default)
    if not isinstance(name, str) or not name:
        raise InputError(field + ".name", "must be a non-empty string")
    return name


def _parse_hamming(obj: Mapping, problem: Problem, field: str) -> HammingPenalty:
    _check_keys(obj, {"type", "name", "reference", "weight", "shape", "threshold", "table",
                      "variables"}, field)
    if "reference" not in obj:
        raise InputError(field + ".reference", "is missing")
    ref = resolve_mapping(problem, obj["reference"], field + ".reference")
    weight = _number(obj.get("weight", 1.0), field + ".weight")
    if weight < 0:
        raise InputError(field + ".weight", f"must be >= 0, got {weight!r}")
    shape = obj.get("shape", "linear")
    if shape not in SHAPES:
        raise InputError(field + ".shape", f"must be one of {SHAPES}, got {shape!r}")
    threshold = _number(obj.get("threshold", 0.0), field + ".threshold")
    table = None
    if "table" in obj:
        table = [_number(v, f"{field}.table[{k}]")
                 for k, v in enumerate(_list(obj["table"], field + ".table"))]
    if shape == "table" and not table:
        raise InputError(field + ".table", "a table shape needs a non-empty list of values")
    variables = None
    if "variables" in obj:
        variables = [resolve_label(problem, v, f"{field}.variables[{k}]")
                     for k, v in enumerate(_list(obj["variables"], field + ".variables"))]
    return HammingPenalty(ref, weight=weight, shape=shape, threshold=threshold, table=table,
                          variables=variables, name=_opt_name(obj, field, "hamming"))


def _parse_extra(obj: Mapping, problem: Problem, field: str) -> ExtraTerms:
    _check_keys(obj, {"type", "name", "linear", "quadratic", "offset"}, field)
    lin = {lab: _number(b, f"{field}.linear[{lab!r}]")
           for lab, b in resolve_mapping(problem, obj.get("linear", {}), field + ".linear").items()}
    quad = []
    for k, term in enumerate(_list(obj.get("quadratic", []), field + ".quadratic")):
        tf = f"{field}.quadratic[{k}]"
        if not isinstance(term, (list, tuple)) or len(term) != 3:
            raise InputError(tf, "must be [u, v, bias]")
        quad.append((resolve_label(problem, term[0], tf), resolve_label(problem, term[1], tf),
                     _number(term[2], tf)))
    if not lin and not quad and "offset" not in obj:
        raise InputError(field, "has no terms (give linear, quadratic or offset)")
    return ExtraTerms(lin, tuple(quad), _number(obj.get("offset", 0.0), field + ".offset"),
                      name=_opt_name(obj, field, "extra"))


def _required_mapping(obj: Mapping, problem: Problem, field: str, key: str) -> dict:
    """``obj[key]``: a non-empty label -> value mapping, labels resolved against the problem."""
    if key not in obj:
        raise InputError(f"{field}.{key}", "is missing")
    out = resolve_mapping(problem, obj[key], f"{field}.{key}")
    if not out:
        raise InputError(f"{field}.{key}", "is empty")
    return out


def _parse_fix(obj: Mapping, problem: Problem, field: str) -> FixVariables:
    _check_keys(obj, {"type", "name", "values"}, field)
    return FixVariables(_required_mapping(obj, problem, field, "values"),
                        name=_opt_name(obj, field, "fix"))


def _parse_linear(obj: Mapping, problem: Problem, field: str) -> LinearConstraint:
    _check_keys(obj, {"type", "name", "terms", "sense", "rhs"}, field)
    if "terms" not in obj:
        raise InputError(field + ".terms", "is missing")
    terms = {lab: _number(c, f"{field}.terms[{lab!r}]")
             for lab, c in resolve_mapping(problem, obj["terms"], field + ".terms").items()}
    if not terms:
        raise InputError(field + ".terms", "is empty")
    sense = obj.get("sense")
    if sense not in SENSES:
        raise InputError(field + ".sense", f"must be one of {SENSES}, got {sense!r}")
    if "rhs" not in obj:
        raise InputError(field + ".rhs", "is missing")
    return LinearConstraint(terms, sense, _number(obj["rhs"], field + ".rhs"),
                            name=_opt_name(obj, field, "linear"))


def _parse_forbid(obj: Mapping, problem: Problem, field: str) -> ForbidAssignment:
    _check_keys(obj, {"type", "name", "assignment"}, field)
    return ForbidAssignment(_required_mapping(obj, problem, field, "assignment"),
                            name=_opt_name(obj, field, "forbid"))


Parser = Callable[[Mapping, Problem, str], Any]

#: ``"type"`` -> parser(obj, problem, field). Bit-level kinds; see :func:`constraint_parsers`.
CONSTRAINT_PARSERS: dict[str, Parser] = {
    "hamming": _parse_hamming,
    "extra": _parse_extra,
    "fix": _parse_fix,
    "linear": _parse_linear,
    "forbid": _parse_forbid,
}


def constraint_parsers() -> dict[str, Parser]:
    """Every known parser: :data:`CONSTRAINT_PARSERS` plus those of :mod:`flipfix.repair.model.encodings`."""
    parsers = dict(CONSTRAINT_PARSERS)
    try:
        from flipfix.repair.model import encodings
    except ImportError:
        return parsers
    for name, fn in getattr(encodings, "CONSTRAINT_PARSERS", {}).items():
        # encodings' parsers take (obj, field); decision names are checked when lowered
        parsers.setdefault(name, lambda obj, problem, field, fn=fn: fn(obj, field))
    return parsers


def parse_constraint(obj: Any, problem: Problem, *, field: str = "constraints[0]",
                     parsers: Mapping[str, Parser] | None = None) -> Any:
    """One constraint object -> its domain object."""
    parsers = constraint_parsers() if parsers is None else parsers
    if not isinstance(obj, Mapping):
        raise InputError(field, f"must be an object with a \"type\", got {type(obj).__name__}")
    kind = obj.get("type")
    if not isinstance(kind, str) or kind not in parsers:
        raise InputError(field + ".type", f"must be one of {sorted(parsers)}, got {kind!r}")
    try:
        return parsers[kind](obj, problem, field)
    except InputError as err:
        raise _reprefix(err, field) from None


def parse_constraints(obj: Any, problem: Problem, *, field: str = "constraints") -> list:
    """Constraints document (a list, or one object) -> list of domain constraints."""
    if isinstance(obj, Mapping):
        obj = [obj]
    items = _list(obj, field)
    parsers = constraint_parsers()
    return [parse_constraint(c, problem, field=f"{field}[{k}]", parsers=parsers)
            for k, c in enumerate(items)]
