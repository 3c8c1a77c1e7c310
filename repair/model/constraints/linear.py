"""``linear`` (hard): ``sum_i a_i v_i  (<=, ==, >=)  rhs`` in the caller's vartype."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Hashable, Mapping

import numpy as np

from flipfix.repair.documents.fields import number, require, resolve_mapping
from flipfix.repair.errors import InputError
from flipfix.repair.lowering.pieces import Pieces, RowSpec, distinct, positions
from flipfix.repair.model.constraints.kind import ConstraintKind
from flipfix.repair.model.problem import Problem, finite
from flipfix.repair.model.vartypes import BINARY, change_vartype

__all__ = ["LinearConstraint", "SENSES", "KIND"]

SENSES = ("<=", "==", ">=")


@dataclass(frozen=True)
class LinearConstraint:
    """Hard: ``sum terms[label] * v_label  sense  rhs`` with v in the caller's vartype."""

    terms: Mapping[Hashable, float]
    sense: str
    rhs: float
    name: str = "linear"

    def __post_init__(self):
        if self.sense not in SENSES:
            raise InputError("sense", f"must be one of {SENSES}, got {self.sense!r}")
        finite(self.rhs, "rhs")


def read_json(obj: Mapping, problem: Problem, field: str) -> dict:
    terms = {lab: number(c, f"{field}.terms[{lab!r}]") for lab, c in
             resolve_mapping(problem, require(obj, "terms", field), field + ".terms").items()}
    if not terms:
        raise InputError(field + ".terms", "is empty")
    return {"terms": terms, "sense": obj.get("sense"),
            "rhs": number(require(obj, "rhs", field), field + ".rhs")}


def write_json(c: LinearConstraint) -> dict:
    return {"terms": {str(lab): float(a) for lab, a in c.terms.items()}, "sense": c.sense,
            "rhs": float(c.rhs)}


def _terms_at_once(problem: Problem, terms):
    """(positions int64, coefficients float64) of a label -> coefficient mapping without a
    Python call per entry, when every label is a distinct known str / int and every
    coefficient a finite number; None otherwise."""
    if not all(issubclass(t, (int, float, np.integer, np.floating)) and t is not bool
               for t in set(map(type, terms.values()))):
        return None
    idx = positions(problem, terms.keys(), len(terms))
    if idx is None:
        return None
    coef = np.fromiter(terms.values(), np.float64, len(terms))
    if not np.all(np.isfinite(coef)) or not distinct(idx, problem.n):
        return None
    return idx, coef


def lower(problem: Problem, c: LinearConstraint, name: str, field: str) -> Pieces:
    if not hasattr(c.terms, "items") or len(c.terms) == 0:
        raise InputError(field + ".terms", "must be a non-empty map of label -> coefficient")
    terms = _terms_at_once(problem, c.terms)
    if terms is None:  # entry by entry: names the bad label or coefficient
        acc: dict = {}
        for lab, coef in c.terms.items():
            f = f"{field}.terms[{lab!r}]"
            i = problem.lookup(lab, f)
            acc[i] = acc.get(i, 0.0) + finite(coef, f)
        terms = (list(acc), list(acc.values()))
    none = np.zeros(0)
    idx, coef, _, offset = change_vartype(terms[0], terms[1], none, none, none, 0.0,
                                          source=problem.vartype, target=BINARY)
    rhs = finite(c.rhs, field + ".rhs") - offset
    lo = rhs if c.sense in ("==", ">=") else -np.inf
    hi = rhs if c.sense in ("==", "<=") else np.inf
    return Pieces(name, rows=[RowSpec(name, idx, coef, lo, hi)], hard=True)


KIND = ConstraintKind(
    name="linear", cls=LinearConstraint, json_keys=frozenset({"terms", "sense", "rhs"}),
    read_json=read_json, write_json=write_json, lower=lower)
