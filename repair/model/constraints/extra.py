"""``extra`` (soft): extra linear and quadratic terms in the caller's vartype."""

from __future__ import annotations

from dataclasses import dataclass, field as dataclass_field
from typing import Hashable, Mapping, Sequence

import numpy as np

from flipfix.repair.documents.fields import (
    as_list, number, resolve_label, resolve_mapping,
)
from flipfix.repair.errors import InputError
from flipfix.repair.lowering.pieces import Pieces
from flipfix.repair.model.constraints.kind import ConstraintKind
from flipfix.repair.model.problem import Problem, finite
from flipfix.repair.model.vartypes import BINARY, change_vartype

__all__ = ["ExtraTerms", "KIND"]


@dataclass(frozen=True)
class ExtraTerms:
    """Soft: extra linear and quadratic terms in the caller's vartype, added to the objective."""

    linear: Mapping[Hashable, float] = dataclass_field(default_factory=dict)
    quadratic: Sequence[tuple] = ()
    offset: float = 0.0
    name: str = "extra"


def read_json(obj: Mapping, problem: Problem, field: str) -> dict:
    lin = {lab: number(b, f"{field}.linear[{lab!r}]")
           for lab, b in resolve_mapping(problem, obj.get("linear", {}), field + ".linear").items()}
    quad = []
    for k, term in enumerate(as_list(obj.get("quadratic", []), field + ".quadratic")):
        tf = f"{field}.quadratic[{k}]"
        if not isinstance(term, (list, tuple)) or len(term) != 3:
            raise InputError(tf, "must be [u, v, bias]")
        quad.append((resolve_label(problem, term[0], tf), resolve_label(problem, term[1], tf),
                     number(term[2], tf)))
    if not lin and not quad and "offset" not in obj:
        raise InputError(field, "has no terms (give linear, quadratic or offset)")
    return {"linear": lin, "quadratic": tuple(quad),
            "offset": number(obj.get("offset", 0.0), field + ".offset")}


def write_json(c: ExtraTerms) -> dict:
    return {"linear": {str(lab): float(b) for lab, b in c.linear.items()},
            "quadratic": [[u, v, float(b)] for u, v, b in c.quadratic],
            "offset": float(c.offset)}


def lower(problem: Problem, c: ExtraTerms, name: str, field: str) -> Pieces:
    lin: dict = {}
    for lab, bias in dict(c.linear).items():
        i = problem.lookup(lab, f"{field}.linear[{lab!r}]")
        lin[i] = lin.get(i, 0.0) + finite(bias, f"{field}.linear[{lab!r}]")
    quad = []
    for k, term in enumerate(c.quadratic):
        f = f"{field}.quadratic[{k}]"
        try:
            u, v, bias = term
        except (TypeError, ValueError):
            raise InputError(f, "must be [u, v, bias]") from None
        i, j = problem.lookup(u, f), problem.lookup(v, f)
        if i == j:
            raise InputError(f, f"self-loop on {u!r}: put it in linear instead")
        quad.append((i, j, finite(bias, f)))
    qi, qj, qv = (np.asarray(col) for col in zip(*quad)) if quad else ([], [], [])
    idx, h, qv, offset = change_vartype(list(lin), list(lin.values()), qi, qj, qv,
                                        finite(c.offset, field + ".offset"),
                                        source=problem.vartype, target=BINARY)
    return Pieces(name, lin_idx=idx, lin_coef=h,
                  quadratic=list(zip(np.asarray(qi, dtype=np.int64).tolist(),
                                     np.asarray(qj, dtype=np.int64).tolist(), qv.tolist())),
                  offset=offset)


KIND = ConstraintKind(
    name="extra", cls=ExtraTerms, json_keys=frozenset({"linear", "quadratic", "offset"}),
    read_json=read_json, write_json=write_json, lower=lower)
