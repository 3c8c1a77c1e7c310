"""``hamming`` (soft): ``weight * shape(d)``, d = Hamming distance to a reference."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Hashable, Mapping, Sequence

import numpy as np

from flipfix.repair.documents.fields import as_list, number, require, resolve_label, resolve_mapping
from flipfix.repair.errors import InputError
from flipfix.repair.lowering.pieces import (CountSpec, Pieces, count_pieces, label_bits,
                                           distinct, linear_slope)
from flipfix.repair.model.constraints.fix import assignment_json
from flipfix.repair.model.constraints.kind import ConstraintKind
from flipfix.repair.model.constraints.shapes import check_penalty, shape_table
from flipfix.repair.model.problem import Problem

__all__ = ["HammingPenalty", "KIND"]


@dataclass(frozen=True)
class HammingPenalty:
    """Soft: ``weight * shape(d)`` with d the number of ``variables`` differing from ``reference``.

    ``reference`` maps labels to caller-vartype values; ``variables`` (default:
    every label in ``reference``) selects the subset that counts. ``shape`` is
    linear, quadratic, threshold (with ``threshold`` d0) or table (``table[d]``).
    """

    reference: Mapping[Hashable, int]
    weight: float = 1.0
    shape: str = "linear"
    threshold: float = 0.0
    table: Sequence[float] | None = None
    variables: Sequence[Hashable] | None = None
    name: str = "hamming"

    def __post_init__(self):
        check_penalty(self.weight, self.shape, self.threshold)


def read_json(obj: Mapping, problem: Problem, field: str) -> dict:
    out: dict = {"reference": resolve_mapping(problem, require(obj, "reference", field),
                                              field + ".reference")}
    for key in ("weight", "threshold"):
        if key in obj:
            out[key] = number(obj[key], f"{field}.{key}")
    if "shape" in obj:
        out["shape"] = obj["shape"]
    if "table" in obj:
        out["table"] = [number(v, f"{field}.table[{k}]")
                        for k, v in enumerate(as_list(obj["table"], field + ".table"))]
    if obj.get("shape") == "table" and not out.get("table"):
        raise InputError(field + ".table", "a table shape needs a non-empty list of values")
    if "variables" in obj:
        out["variables"] = [resolve_label(problem, v, f"{field}.variables[{k}]")
                            for k, v in enumerate(as_list(obj["variables"], field + ".variables"))]
    return out


def write_json(c: HammingPenalty) -> dict:
    out = {"reference": assignment_json(c.reference),
           "weight": float(c.weight), "shape": c.shape, "threshold": float(c.threshold)}
    if c.table is not None:
        out["table"] = [float(v) for v in c.table]
    if c.variables is not None:
        out["variables"] = list(c.variables)
    return out


def lower(problem: Problem, c: HammingPenalty, name: str, field: str) -> Pieces:
    idx, ref = label_bits(problem, c.reference, field + ".reference")
    plan = (idx, ref)  # every label of the reference: the published plan
    if c.variables is not None:
        chosen = [problem.lookup(lab, f"{field}.variables[{k}]") for k, lab in enumerate(c.variables)]
        pos = {int(i): int(b) for i, b in zip(idx, ref)}
        missing = [lab for lab, i in zip(c.variables, chosen) if i not in pos]
        if missing:
            raise InputError(field + ".variables", f"{missing[0]!r} has no value in reference")
        idx = np.asarray(chosen, dtype=np.int64)
        ref = np.asarray([pos[i] for i in chosen], dtype=np.int8)
        if not distinct(idx, problem.n):
            raise InputError(field + ".variables", "lists a variable twice")
    table = shape_table(c.shape, c.weight, int(idx.size), threshold=c.threshold, table=c.table,
                        field=field)
    slope = linear_slope(table)
    if slope is not None:  # as count_pieces merges it: [x_i != r_i] = r_i + (1 - 2 r_i) x_i
        r = ref.astype(np.float64)
        return Pieces(name, lin_idx=idx, lin_coef=slope * (1.0 - 2.0 * r),
                      offset=float(table[0] + slope * r.sum()), reference=plan)
    # d = number of i with x_i != ref_i: one single-literal term per variable
    terms = [(1, [(i, 1 - b)]) for i, b in zip(idx.tolist(), ref.tolist())]
    p = count_pieces(name, CountSpec(name, table, 0, terms))
    p.reference = plan
    return p


KIND = ConstraintKind(
    name="hamming", cls=HammingPenalty,
    json_keys=frozenset({"reference", "weight", "shape", "threshold", "table", "variables"}),
    read_json=read_json, write_json=write_json, lower=lower)
