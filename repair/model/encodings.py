"""Integer decisions encoded in bits: validation, decoding, lowering, integer constraints.

A :class:`flipfix.repair.model.problem.Decision` chooses one of k ``values``; its ``variables``
are bit labels of the problem. Two encodings:

* ``one_hot``: k bits, bit m set means value m; valid iff exactly one bit is set.
* ``domain_wall``: k-1 bits read as a run of ones followed by zeros; the value
  index m is the number of ones (the wall sits between bit m-1 and bit m), so
  ``x_i = [m > i]``. Valid iff no 0 is followed by a 1. Moving the value one
  step flips exactly one bit (the bit at the wall's edge).

Validity is a hard constraint of every repair (:func:`encoding_pieces`): one-hot
is the row ``sum x == 1``, domain wall the chain ``x_{i+1} - x_i <= 0``.

Integer-level late constraints (:class:`ForbidValues`, :class:`ForceValue`,
:class:`AllowValues`, :class:`DecisionChangePenalty`) lower to
:class:`flipfix.repair.lowering.compiled.Pieces`, so the solvers need no change. Every count they
build stays in range for *every* bit string, valid or not.

Candidates that break an encoding are accepted as repair input (a broken
encoding is one more violated hard row, which the repair fixes) and are
reported per candidate: :func:`check_candidates` lists (candidate, decision,
how), the repair audit carries the list per candidate, and their value before
repair is reported as ``None``.

Model building over decisions (the same model in either encoding, exact on
valid strings): :func:`unary_terms` and :func:`pair_terms`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Hashable, Mapping, NamedTuple, Sequence

import numpy as np

from flipfix.repair.lowering.compiled import CountSpec, Pieces, RowSpec, count_pieces
from flipfix.repair.model.constraints import SHAPES, _number, shape_table
from flipfix.repair.errors import InputError
from flipfix.repair.model.problem import Decision, Problem, check_label

__all__ = [
    "ONE_HOT", "DOMAIN_WALL", "ENCODINGS", "DISTANCES",
    "validate_decisions", "encoding_pieces", "decision_bits",
    "decode_indices", "decode", "check_candidates", "EncodingIssue", "integer_changes",
    "encode", "codewords", "unary_terms", "pair_terms", "validity_penalty",
    "ForbidValues", "ForceValue", "AllowValues", "DecisionChangePenalty",
    "parse_decisions", "CONSTRAINT_PARSERS",
]

ONE_HOT = "one_hot"
DOMAIN_WALL = "domain_wall"
ENCODINGS = (ONE_HOT, DOMAIN_WALL)
DISTANCES = ("changed", "absolute")

#: Largest distance table an "absolute" change penalty may build.
MAX_TABLE = 1_000_000


# ------------------------------------------------------------------ validation
def _check_value(value: Any, field_name: str) -> Any:
    """Decision values are strings or finite numbers (not bool)."""
    if isinstance(value, bool) or not isinstance(value, (str, int, float, np.integer, np.floating)):
        raise InputError(field_name, f"value {value!r} must be a string or a number")
    if isinstance(value, (float, np.floating)):
        if not math.isfinite(float(value)):
            raise InputError(field_name, f"value {value!r} is not finite")
        return int(value) if float(value).is_integer() else float(value)
    return int(value) if isinstance(value, np.integer) else value


def validate_decisions(problem: Problem, *, field_prefix: str = "decisions") -> None:
    """Check every declared decision of ``problem``; raise :class:`InputError` naming the field.

    Checks: names are unique non-empty strings; the encoding is known; every bit
    exists and belongs to at most one decision (and appears once in it); one-hot
    has k bits for k values, domain wall k-1 bits; at least two values, distinct.
    """
    names: set = set()
    owner: dict = {}
    for k, d in enumerate(problem.decisions):
        f = f"{field_prefix}[{k}]"
        if not isinstance(d, Decision):
            raise InputError(f, f"must be a Decision, got {type(d).__name__}")
        if not isinstance(d.name, str) or d.name == "":
            raise InputError(f + ".name", f"must be a non-empty string, got {d.name!r}")
        if d.name in names:
            raise InputError(f + ".name", f"duplicate decision name {d.name!r}")
        names.add(d.name)
        if d.encoding not in ENCODINGS:
            raise InputError(f + ".encoding", f"must be one of {ENCODINGS}, got {d.encoding!r}")
        values = list(d.values)
        if len(values) < 2:
            raise InputError(f + ".values", f"needs at least 2 values, got {len(values)}")
        seen_values: set = set()
        for m, v in enumerate(values):
            v = _check_value(v, f"{f}.values[{m}]")
            key = (type(v) is str, v)
            if key in seen_values:
                raise InputError(f"{f}.values[{m}]", f"duplicate value {v!r}")
            seen_values.add(key)
        want = len(values) if d.encoding == ONE_HOT else len(values) - 1
        if len(d.variables) != want:
            kind = "k" if d.encoding == ONE_HOT else "k-1"
            raise InputError(
                f + ".variables",
                f"{d.encoding} with {len(values)} values needs {want} bits ({kind}), "
                f"got {len(d.variables)}",
            )
        for j, lab in enumerate(d.variables):
            fj = f"{f}.variables[{j}]"
            i = problem.lookup(check_label(lab, fj), fj)
            if i in owner:
                other = owner[i]
                where = "twice in this decision" if other == d.name else f"also in decision {other!r}"
                raise InputError(fj, f"bit {lab!r} is {where}")
            owner[i] = d.name


def decision_bits(problem: Problem, d: Decision) -> np.ndarray:
    """Positions of the decision's bits in ``problem.labels`` order: int64 (len(variables),)."""
    return np.asarray([problem.index[lab] for lab in d.variables], dtype=np.int64)


def _find(problem: Problem, name: Any, field_name: str) -> Decision:
    for d in problem.decisions:
        if d.name == name:
            return d
    known = ", ".join(repr(d.name) for d in problem.decisions[:8]) or "none declared"
    raise InputError(field_name, f"unknown decision {name!r} (known: {known})")


def _index_of(d: Decision, value: Any, field_name: str) -> int:
    if isinstance(value, bool):
        raise InputError(field_name, f"{value!r} is not a value of decision {d.name!r}")
    for m, v in enumerate(d.values):
        if type(v) is str or type(value) is str:
            if v == value and type(v) is type(value):
                return m
        elif v == value:
            return m
    raise InputError(field_name, f"{value!r} is not a value of decision {d.name!r} {list(d.values)}")


# --------------------------------------------------------------------- lowering
def encoding_pieces(problem: Problem) -> list[Pieces]:
    """One hard :class:`Pieces` per decision keeping its encoding valid.

    one-hot: ``sum_m x_m == 1``; domain wall: ``x_{i+1} - x_i <= 0`` for each
    neighbouring pair (k = 2 has one free bit and no row).
    """
    out = []
    for d in problem.decisions:
        idx = decision_bits(problem, d)
        name = f"encoding[{d.name}]"
        if d.encoding == ONE_HOT:
            rows = [RowSpec(name, idx, np.ones(idx.size), 1.0, 1.0)]
        else:
            rows = [RowSpec(f"{name}[{i}]", idx[[i + 1, i]], np.asarray([1.0, -1.0]), -np.inf, 0.0)
                    for i in range(idx.size - 1)]
        out.append(Pieces(name, rows=rows, hard=True))
    return out


def _is_value_lits(d: Decision, idx: np.ndarray, m: int) -> list:
    """Literals whose AND is ``[value index == m]`` on valid strings."""
    if d.encoding == ONE_HOT:
        return [(int(idx[m]), 1)]
    k = len(d.values)
    if m == 0:
        return [(int(idx[0]), 0)]
    if m == k - 1:
        return [(int(idx[k - 2]), 1)]
    return [(int(idx[m - 1]), 1), (int(idx[m]), 0)]


def _forbid_pieces(problem: Problem, d: Decision, forbidden: Sequence[int], name: str) -> Pieces:
    """Hard: the decision takes none of the value indices ``forbidden``."""
    idx = decision_bits(problem, d)
    p = Pieces(name, hard=True)
    for m in sorted(set(forbidden)):
        lits = _is_value_lits(d, idx, m)
        if len(lits) == 1:
            (i, b), = lits
            p.fixed.append((i, 1 - b))
        else:
            # not (x_{m-1} = 1 and x_m = 0):  x_{m-1} - x_m <= 0
            (i, _), (j, _) = lits
            p.rows.append(RowSpec(f"{name}[{d.values[m]!r}]", np.asarray([i, j], dtype=np.int64),
                                  np.asarray([1.0, -1.0]), -np.inf, 0.0))
    return p


def _values_list(values: Any, field_name: str) -> list:
    if isinstance(values, (str, bytes)) or not isinstance(values, Sequence):
        raise InputError(field_name, "must be a list of values")
    if len(values) == 0:
        raise InputError(field_name, "is empty")
    return list(values)


def _decision_values(problem: Problem, decision: Any, values: Any, prefix: str):
    """(the named decision, the value indices of ``values``), errors naming the field."""
    d = _find(problem, decision, prefix + "decision")
    vals = _values_list(values, prefix + "values")
    return d, [_index_of(d, v, f"{prefix}values[{k}]") for k, v in enumerate(vals)]


@dataclass(frozen=True)
class ForbidValues:
    """Hard: decision ``decision`` takes none of ``values`` ("machine M is down in slots 3-4")."""

    decision: str
    values: Sequence[Any]
    name: str = "forbid_values"

    def lower(self, problem: Problem, name: str, prefix: str) -> Pieces:
        d, ms = _decision_values(problem, self.decision, self.values, prefix)
        return _forbid_pieces(problem, d, ms, name)


@dataclass(frozen=True)
class AllowValues:
    """Hard: decision ``decision`` takes one of ``values``."""

    decision: str
    values: Sequence[Any]
    name: str = "allow_values"

    def lower(self, problem: Problem, name: str, prefix: str) -> Pieces:
        d, keep = _decision_values(problem, self.decision, self.values, prefix)
        return _forbid_pieces(problem, d, [m for m in range(len(d.values)) if m not in keep], name)


@dataclass(frozen=True)
class ForceValue:
    """Hard: decision ``decision`` takes ``value`` (every bit of the decision is pinned)."""

    decision: str
    value: Any
    name: str = "force_value"

    def lower(self, problem: Problem, name: str, prefix: str) -> Pieces:
        d = _find(problem, self.decision, prefix + "decision")
        m = _index_of(d, self.value, prefix + "value")
        bits = encode(d, m)
        return Pieces(name, fixed=list(zip(decision_bits(problem, d).tolist(), bits.tolist())),
                      hard=True)


def _integral(v: Any) -> int | None:
    if isinstance(v, str) or isinstance(v, bool):
        return None
    f = float(v)
    return int(f) if f.is_integer() else None


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
        w = _number(self.weight, "weight")
        if w < 0:
            raise InputError("weight", f"must be >= 0, got {self.weight!r}")
        if self.shape not in SHAPES:
            raise InputError("shape", f"must be one of {SHAPES}, got {self.shape!r}")
        _number(self.threshold, "threshold")
        if self.distance not in DISTANCES:
            raise InputError("distance", f"must be one of {DISTANCES}, got {self.distance!r}")

    def lower(self, problem: Problem, name: str, prefix: str) -> Pieces:
        ref = self.reference
        if not hasattr(ref, "items") or len(ref) == 0:
            raise InputError(prefix + "reference", "must be a non-empty map of decision -> value")
        const, terms, d_max = 0, [], 0
        for dname, value in ref.items():
            f = f"{prefix}reference[{dname!r}]"
            d = _find(problem, dname, f)
            r = _index_of(d, value, f)
            idx = decision_bits(problem, d)
            if self.distance == "changed":
                c, t = _changed_terms(d, idx, r)
                d_max += 1
            else:
                c, t, top = _absolute_terms(d, idx, r, f)
                d_max += top
            const += c
            terms.extend(t)
        if d_max > MAX_TABLE:
            raise InputError(prefix + "reference", f"distance can reach {d_max} (limit {MAX_TABLE})")
        table = shape_table(self.shape, self.weight, d_max, threshold=self.threshold,
                            table=self.table, field_name=prefix + "shape")
        return count_pieces(name, CountSpec(name, table, const, terms))


def _changed_terms(d: Decision, idx: np.ndarray, r: int) -> tuple[int, list]:
    """[value != r] as const + terms; in {0, 1} for every bit string."""
    lits = _is_value_lits(d, idx, r)
    if len(lits) == 1:
        (i, b), = lits
        return 0, [(1, [(i, 1 - b)])]
    # 1 - AND(x_{r-1} = 1, x_r = 0): the wall is not at r
    return 1, [(-1, lits)]


def _absolute_terms(d: Decision, idx: np.ndarray, r: int, f: str) -> tuple[int, list, int]:
    """|value - value_r| as const + terms with non-negative coefficients, and its largest value."""
    ints = [_integral(v) for v in d.values]
    if any(v is None for v in ints):
        raise InputError(f, f"distance 'absolute' needs integer values; decision {d.name!r} has "
                            f"{list(d.values)}")
    cost = [abs(v - ints[r]) for v in ints]
    k = len(ints)
    steps = np.diff(ints)
    if d.encoding == DOMAIN_WALL and (np.all(steps > 0) or np.all(steps < 0)):
        # monotone values: the distance is a weighted Hamming distance to the
        # reference wall string; each bit i carries the step |v_{i+1} - v_i|
        w = np.abs(steps)
        terms = [(int(w[i]), [(int(idx[i]), 0 if i < r else 1)]) for i in range(k - 1)]
        return 0, terms, int(w.sum())
    terms = [(int(cost[m]), _is_value_lits(d, idx, m)) for m in range(k) if cost[m] > 0]
    return 0, terms, int(sum(cost))


# ---------------------------------------------------------------- decode/report
def encode(d: Decision, m: int) -> np.ndarray:
    """The valid bit string of value index ``m``: int8 (len(variables),)."""
    if d.encoding == ONE_HOT:
        bits = np.zeros(len(d.values), dtype=np.int8)
        bits[m] = 1
    else:
        bits = (np.arange(len(d.values) - 1) < m).astype(np.int8)
    return bits


def codewords(d: Decision) -> np.ndarray:
    """The valid bit string of every value: int8 (k, len(variables)), row m encodes ``values[m]``."""
    return np.vstack([encode(d, m) for m in range(len(d.values))]).astype(np.int8)


def _decode_block(d: Decision, B: np.ndarray) -> np.ndarray:
    """Value index per row of the decision's bits B int8 (K, b); -1 where invalid."""
    if d.encoding == ONE_HOT:
        ok = B.sum(axis=1) == 1
        m = np.argmax(B, axis=1)
    else:
        ok = np.all(B[:, :-1] >= B[:, 1:], axis=1) if B.shape[1] > 1 else np.ones(B.shape[0], bool)
        m = B.sum(axis=1)
    return np.where(ok, m, -1).astype(np.int64)


def _as_batch(problem: Problem, X: np.ndarray) -> np.ndarray:
    X = np.asarray(X, dtype=np.int8)
    if X.ndim == 1:
        X = X[None, :]
    if X.ndim != 2 or X.shape[1] != problem.n:
        raise InputError("X", f"must have shape (K, {problem.n}), got {X.shape}")
    return X


def decode_indices(problem: Problem, X: np.ndarray) -> np.ndarray:
    """Value index of every decision for X int8 (K, n) 0/1 -> int64 (K, D); -1 = invalid encoding."""
    X = _as_batch(problem, X)
    out = np.empty((X.shape[0], len(problem.decisions)), dtype=np.int64)
    for c, d in enumerate(problem.decisions):
        out[:, c] = _decode_block(d, X[:, decision_bits(problem, d)])
    return out


def decode(problem: Problem, X: np.ndarray) -> list[dict]:
    """Decision values for X int8 (K, n) 0/1 (a 1-D x counts as K = 1).

    Returns K dicts ``{decision name: value}`` with ``None`` for a decision whose
    bits break its encoding (see :func:`check_candidates` for why).
    """
    M = decode_indices(problem, X)
    return [{d.name: (d.values[m] if m >= 0 else None) for d, m in zip(problem.decisions, row)}
            for row in M]


class EncodingIssue(NamedTuple):
    """A candidate whose bits break a decision's encoding."""

    candidate: Any   # the candidate's id (or its row number when no ids are given)
    decision: str
    how: str


def _describe(d: Decision, bits: np.ndarray) -> str:
    s = "".join(map(str, bits.tolist()))
    if d.encoding == ONE_HOT:
        on = [d.values[m] for m in np.flatnonzero(bits)]
        if not on:
            return f"one_hot bits {s}: no bit set"
        return f"one_hot bits {s}: {len(on)} bits set (values {on})"
    bad = [i for i in range(bits.size - 1) if bits[i] == 0 and bits[i + 1] == 1]
    return (f"domain_wall bits {s}: not a run of ones followed by zeros "
            f"(a 0 before a 1 at bit {bad[0]}; {len(bad)} such place(s))")


def check_candidates(problem: Problem, X: np.ndarray, *,
                     ids: Sequence[Any] | None = None) -> list[EncodingIssue]:
    """Every (candidate, decision) whose bits break the encoding, in row then decision order.

    ``X`` int8 (K, n) 0/1; ``ids`` names the rows (default: row numbers).
    """
    X = _as_batch(problem, X)
    if ids is not None and len(ids) != X.shape[0]:
        raise InputError("ids", f"has {len(ids)} ids for {X.shape[0]} rows")
    M = decode_indices(problem, X)
    out = []
    for k, c in zip(*np.nonzero(M < 0)):
        d = problem.decisions[c]
        bits = X[k, decision_bits(problem, d)]
        out.append(EncodingIssue(ids[k] if ids is not None else int(k), d.name, _describe(d, bits)))
    return out


def integer_changes(problem: Problem, x_before: np.ndarray, x_after: np.ndarray) -> list[tuple]:
    """Decisions whose value differs: ``[(decision, old value, new value)]`` in declaration order.

    ``x_before``, ``x_after`` int8 (n,) 0/1. A value is ``None`` where the bits
    break the encoding (a broken decision that is repaired counts as changed).
    """
    both = np.vstack([np.asarray(x_before, np.int8).ravel(), np.asarray(x_after, np.int8).ravel()])
    M = decode_indices(problem, both)
    out = []
    for d, a, b in zip(problem.decisions, M[0], M[1]):
        if a != b or a < 0:
            out.append((d.name, d.values[a] if a >= 0 else None, d.values[b] if b >= 0 else None))
    return out


# -------------------------------------------------------------- model building
def unary_terms(d: Decision, costs: Sequence[float]) -> tuple[dict, float]:
    """``costs[value index]`` as (linear {label: bias}, offset) in 0/1 form, exact on valid strings.

    one-hot: ``sum_m c_m x_m``; domain wall (``x_i = [m > i]``):
    ``c_0 + sum_i (c_{i+1} - c_i) x_i``.
    """
    c = np.asarray(costs, dtype=np.float64)
    if c.shape != (len(d.values),):
        raise InputError("costs", f"needs {len(d.values)} values for decision {d.name!r}")
    if d.encoding == ONE_HOT:
        return {lab: float(v) for lab, v in zip(d.variables, c) if v != 0.0}, 0.0
    return ({lab: float(v) for lab, v in zip(d.variables, np.diff(c)) if v != 0.0}, float(c[0]))


def _basis(d: Decision) -> np.ndarray:
    """L (k, k) with indicator vector e = L @ y, y = (1, x_0, .., x_{k-2}) for domain wall."""
    k = len(d.values)
    L = np.eye(k)
    L[np.arange(k - 1), np.arange(1, k)] = -1.0   # [m = a] = [m > a-1] - [m > a]
    return L


def pair_terms(du: Decision, dv: Decision, G: np.ndarray) -> tuple[dict, dict, float]:
    """``G[value index of du, value index of dv]`` as 0/1 terms, exact on valid strings.

    Returns (linear {label: bias}, quadratic {(u, v): bias}, offset). One-hot:
    ``sum_ab G_ab x^u_a x^v_b``. Domain wall: the indicators are differences of
    the bits, so any interaction is bilinear in the bits (no higher order).
    """
    G = np.asarray(G, dtype=np.float64)
    if du.name == dv.name:
        raise InputError("G", "an interaction needs two different decisions")
    if G.shape != (len(du.values), len(dv.values)):
        raise InputError("G", f"must have shape {(len(du.values), len(dv.values))}, got {G.shape}")
    lin: dict = {}
    quad: dict = {}
    offset = 0.0
    if du.encoding == ONE_HOT:
        Lu, ylu = np.eye(len(du.values)), list(du.variables)
    else:
        Lu, ylu = _basis(du), [None] + list(du.variables)
    if dv.encoding == ONE_HOT:
        Lv, ylv = np.eye(len(dv.values)), list(dv.variables)
    else:
        Lv, ylv = _basis(dv), [None] + list(dv.variables)
    H = Lu.T @ G @ Lv
    for a, la in enumerate(ylu):
        for b, lb in enumerate(ylv):
            w = float(H[a, b])
            if w == 0.0:
                continue
            if la is None and lb is None:
                offset += w
            elif la is None:
                lin[lb] = lin.get(lb, 0.0) + w
            elif lb is None:
                lin[la] = lin.get(la, 0.0) + w
            else:
                quad[(la, lb)] = quad.get((la, lb), 0.0) + w
    return lin, quad, offset


def validity_penalty(d: Decision, strength: float = 1.0) -> tuple[dict, dict, float]:
    """A QUBO penalty that is 0 exactly on valid strings, in 0/1 form.

    one-hot: ``strength * (sum x - 1)^2``; domain wall: ``strength * sum_i x_{i+1} (1 - x_i)``,
    the number of places where a 0 is followed by a 1. For samplers that need an
    unconstrained model; the repair itself keeps validity as hard rows.
    """
    s = float(strength)
    lin: dict = {}
    quad: dict = {}
    v = list(d.variables)
    if d.encoding == ONE_HOT:
        for a in range(len(v)):
            lin[v[a]] = -s
            for b in range(a + 1, len(v)):
                quad[(v[a], v[b])] = 2.0 * s
        return lin, quad, s
    for i in range(len(v) - 1):
        lin[v[i + 1]] = lin.get(v[i + 1], 0.0) + s
        quad[(v[i], v[i + 1])] = -s
    return lin, quad, 0.0


# ----------------------------------------------------------------------- JSON
def _obj(obj: Any, field_name: str, allowed: set, required: set) -> Mapping:
    if not isinstance(obj, Mapping):
        raise InputError(field_name, f"must be an object, got {type(obj).__name__}")
    for key in obj:
        if key not in allowed:
            raise InputError(f"{field_name}.{key}", f"unknown key (allowed: {sorted(allowed)})")
    for key in sorted(required):
        if key not in obj:
            raise InputError(f"{field_name}.{key}", "is missing")
    return obj


def _opt_name(obj: Mapping, field_name: str, default: str) -> str:
    name = obj.get("name", default)
    if not isinstance(name, str) or name == "":
        raise InputError(field_name + ".name", f"must be a non-empty string, got {name!r}")
    return name


def parse_decisions(obj: Any, field: str = "decisions") -> list[Decision]:
    """The problem document's ``"decisions"`` list -> [Decision].

    Each item: ``{"name": str, "encoding": "one_hot" | "domain_wall",
    "variables": [label, ...], "values": [value, ...]}``. Shapes and bit
    ownership are checked against the problem by :func:`validate_decisions`.
    """
    if obj is None:
        return []
    if not isinstance(obj, list):
        raise InputError(field, "must be a list of decisions")
    out = []
    for k, item in enumerate(obj):
        f = f"{field}[{k}]"
        item = _obj(item, f, {"name", "encoding", "variables", "values"},
                    {"name", "encoding", "variables", "values"})
        if not isinstance(item["name"], str) or item["name"] == "":
            raise InputError(f + ".name", f"must be a non-empty string, got {item['name']!r}")
        if item["encoding"] not in ENCODINGS:
            raise InputError(f + ".encoding", f"must be one of {ENCODINGS}, got {item['encoding']!r}")
        for key in ("variables", "values"):
            if not isinstance(item[key], list):
                raise InputError(f"{f}.{key}", "must be a list")
        variables = tuple(check_label(lab, f"{f}.variables[{j}]") for j, lab in enumerate(item["variables"]))
        values = tuple(_check_value(v, f"{f}.values[{j}]") for j, v in enumerate(item["values"]))
        out.append(Decision(item["name"], item["encoding"], variables, values))
    return out


_KIND_KEYS = {"type", "kind", "name"}


def _parse_forbid(obj: Any, field: str) -> ForbidValues:
    o = _obj(obj, field, _KIND_KEYS | {"decision", "values"}, {"decision", "values"})
    return ForbidValues(o["decision"], _values_list(o["values"], field + ".values"),
                        _opt_name(o, field, "forbid_values"))


def _parse_allow(obj: Any, field: str) -> AllowValues:
    o = _obj(obj, field, _KIND_KEYS | {"decision", "values"}, {"decision", "values"})
    return AllowValues(o["decision"], _values_list(o["values"], field + ".values"),
                       _opt_name(o, field, "allow_values"))


def _parse_force(obj: Any, field: str) -> ForceValue:
    o = _obj(obj, field, _KIND_KEYS | {"decision", "value"}, {"decision", "value"})
    return ForceValue(o["decision"], o["value"], _opt_name(o, field, "force_value"))


def _parse_change(obj: Any, field: str) -> DecisionChangePenalty:
    keys = {"reference", "weight", "shape", "threshold", "table", "distance"}
    o = _obj(obj, field, _KIND_KEYS | keys, {"reference"})
    if not isinstance(o["reference"], Mapping) or len(o["reference"]) == 0:
        raise InputError(field + ".reference", "must be a non-empty object of decision -> value")
    table = o.get("table")
    if table is not None and not isinstance(table, list):
        raise InputError(field + ".table", "must be a list of numbers")
    kwargs = {}
    for key in ("weight", "threshold"):
        if key in o:
            kwargs[key] = _number(o[key], f"{field}.{key}")
    try:
        return DecisionChangePenalty(
            dict(o["reference"]), shape=o.get("shape", "linear"),
            table=None if table is None else [_number(v, f"{field}.table[{j}]") for j, v in enumerate(table)],
            distance=o.get("distance", "changed"), name=_opt_name(o, field, "decision_change"),
            **kwargs,
        )
    except InputError as e:  # __post_init__ names the bare key
        raise InputError(f"{field}.{e.field}", e.message) from None


#: JSON constraint kinds of integer decisions: kind -> fn(obj: dict, field: str) -> constraint.
CONSTRAINT_PARSERS = {
    "forbid_values": _parse_forbid,
    "force_value": _parse_force,
    "allow_values": _parse_allow,
    "decision_change": _parse_change,
}
