"""``decision_change`` (soft): ``weight * shape(d)``, d = distance of decisions from a reference."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Mapping, Sequence

import numpy as np

from flipfix.repair.documents.fields import as_list, number, require
from flipfix.repair.errors import InputError
from flipfix.repair.lowering.decisions import value_literals
from flipfix.repair.lowering.pieces import CountSpec, Pieces, count_pieces
from flipfix.repair.model.constraints.kind import ConstraintKind
from flipfix.repair.model.constraints.shapes import check_penalty, shape_table
from flipfix.repair.model.encodings import decision_bits, encode, find_decision, value_index
from flipfix.repair.model.problem import DOMAIN_WALL, Decision, Problem

__all__ = ["DecisionChangePenalty", "DISTANCES", "MAX_TABLE", "KIND"]

#: ``changed``: number of decisions whose value differs; ``absolute``: sum of |value - reference|.
DISTANCES = ("changed", "absolute")

#: Largest distance table an "absolute" change penalty may build.
MAX_TABLE = 1_000_000


@dataclass(frozen=True)
class DecisionChangePenalty:
    """Soft: ``weight * shape(d)``, d = distance of the decisions from ``reference``.

    ``reference`` maps decision names to values (only those decisions count).
    ``distance``: ``"changed"`` = number of decisions whose value differs;
    ``"absolute"`` = sum of ``|value - reference value|`` (integer values only).
    ``shape`` as for :class:`flipfix.repair.model.constraints.HammingPenalty`: linear,
    quadratic, threshold (``threshold`` d0) or table (``table[d]``).

    Lowered as a count ``d = const + sum coef * AND(literals)`` that equals the
    distance on valid strings and stays within ``0..d_max`` on every string;
    a linear shape is merged into the QUBO.
    """

    reference: Mapping[str, Any]
    weight: float = 1.0
    shape: str = "linear"
    threshold: float = 0.0
    table: Sequence[float] | None = None
    distance: str = "changed"
    name: str = "decision_change"

    def __post_init__(self):
        check_penalty(self.weight, self.shape, self.threshold)
        if self.distance not in DISTANCES:
            raise InputError("distance", f"must be one of {DISTANCES}, got {self.distance!r}")


def read_json(obj: Mapping, problem: Problem, field: str) -> dict:
    ref = require(obj, "reference", field)
    if not isinstance(ref, Mapping) or len(ref) == 0:
        raise InputError(field + ".reference", "must be a non-empty object of decision -> value")
    out: dict = {"reference": dict(ref)}
    for key in ("weight", "threshold"):
        if key in obj:
            out[key] = number(obj[key], f"{field}.{key}")
    for key in ("shape", "distance"):
        if key in obj:
            out[key] = obj[key]
    if obj.get("table") is not None:
        out["table"] = [number(v, f"{field}.table[{j}]")
                        for j, v in enumerate(as_list(obj["table"], field + ".table"))]
    return out


def write_json(c: DecisionChangePenalty) -> dict:
    out = {"reference": dict(c.reference), "weight": float(c.weight), "shape": c.shape,
           "threshold": float(c.threshold), "distance": c.distance}
    if c.table is not None:
        out["table"] = [float(v) for v in c.table]
    return out


def lower(problem: Problem, c: DecisionChangePenalty, name: str, field: str) -> Pieces:
    ref = c.reference
    if not hasattr(ref, "items") or len(ref) == 0:
        raise InputError(field + ".reference", "must be a non-empty map of decision -> value")
    const, terms, d_max = 0, [], 0
    plan_idx, plan_bits = [], []  # the reference's bits: each decision at its value's code
    for dname, value in ref.items():
        f = f"{field}.reference[{dname!r}]"
        d = find_decision(problem, dname, f)
        r = value_index(d, value, f)
        idx = decision_bits(problem, d)
        plan_idx.append(idx)
        plan_bits.append(encode(d, r))
        if c.distance == "changed":
            k, t = _changed_terms(d, idx, r)
            d_max += 1
        else:
            k, t, top = _absolute_terms(d, idx, r, f)
            d_max += top
        const += k
        terms.extend(t)
    if d_max > MAX_TABLE:
        raise InputError(field + ".reference", f"distance can reach {d_max} (limit {MAX_TABLE})")
    table = shape_table(c.shape, c.weight, d_max, threshold=c.threshold, table=c.table,
                        field=field)
    p = count_pieces(name, CountSpec(name, table, const, terms))
    p.reference = (np.concatenate(plan_idx), np.concatenate(plan_bits).astype(np.int8))
    return p


def _changed_terms(d: Decision, idx: np.ndarray, r: int) -> tuple[int, list]:
    """[value != r] as const + terms; in {0, 1} for every bit string."""
    lits = value_literals(d, idx, r)
    if len(lits) == 1:
        (i, b), = lits
        return 0, [(1, [(i, 1 - b)])]
    # 1 - AND(x_{r-1} = 1, x_r = 0): the wall is not at r
    return 1, [(-1, lits)]


def _integral(v: Any) -> int | None:
    if isinstance(v, str) or isinstance(v, bool):
        return None
    f = float(v)
    return int(f) if f.is_integer() else None


def _absolute_terms(d: Decision, idx: np.ndarray, r: int, f: str) -> tuple[int, list, int]:
    """|value - value_r| as const + terms with non-negative coefficients, and its largest value."""
    ints = [_integral(v) for v in d.values]
    if any(v is None for v in ints):
        raise InputError(f, f"distance 'absolute' needs integer values; decision {d.name!r} has "
                            f"{', '.join(map(repr, d.values))}")
    cost = [abs(v - ints[r]) for v in ints]
    k = len(ints)
    steps = np.diff(ints)
    if d.encoding == DOMAIN_WALL and (np.all(steps > 0) or np.all(steps < 0)):
        # monotone values: the distance is a weighted Hamming distance to the
        # reference wall string; each bit i carries the step |v_{i+1} - v_i|
        w = np.abs(steps)
        terms = [(int(w[i]), [(int(idx[i]), 0 if i < r else 1)]) for i in range(k - 1)]
        return 0, terms, int(w.sum())
    terms = [(int(cost[m]), value_literals(d, idx, m)) for m in range(k) if cost[m] > 0]
    return 0, terms, int(sum(cost))


KIND = ConstraintKind(
    name="decision_change", cls=DecisionChangePenalty,
    json_keys=frozenset({"reference", "weight", "shape", "threshold", "table", "distance"}),
    read_json=read_json, write_json=write_json, lower=lower)
