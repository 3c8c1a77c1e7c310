"""Integer decisions encoded in bits: encoding, decoding, reports, model building.

A :class:`flipfix.repair.model.problem.Decision` chooses one of k ``values``; its
``variables`` are bit labels of the problem. Two encodings:

* ``one_hot``: k bits, bit m set means value m; valid iff exactly one bit is set.
* ``domain_wall``: k-1 bits read as a run of ones followed by zeros; the value
  index m is the number of ones (the wall sits between bit m-1 and bit m), so
  ``x_i = [m > i]``. Valid iff no 0 is followed by a 1. Moving the value one
  step flips exactly one bit (the bit at the wall's edge).

A problem checks its decisions when it is built
(:func:`flipfix.repair.model.problem.validate_decisions`). Validity is a hard
constraint of every repair (:func:`flipfix.repair.lowering.decisions.encoding_pieces`);
the integer-level late constraints (``forbid_values``, ``force_value``,
``allow_values``, ``decision_change``) are kinds of :mod:`flipfix.repair.model.constraints`.

Candidates that break an encoding are accepted as repair input (a broken
encoding is one more violated hard row, which the repair fixes) and are
reported per candidate: :func:`check_candidates` lists (candidate, decision,
how), the repair audit carries the list per candidate, and their value before
repair is reported as ``None``.

Model building over decisions (the same model in either encoding, exact on
valid strings): :func:`unary_terms` and :func:`pair_terms`.
"""

from __future__ import annotations

from typing import Any, NamedTuple, Sequence

import numpy as np

from flipfix.repair.errors import InputError
from flipfix.repair.model.problem import (
    DOMAIN_WALL, ENCODINGS, ONE_HOT, Decision, Problem, validate_decisions,
)

__all__ = [
    "ONE_HOT", "DOMAIN_WALL", "ENCODINGS",
    "validate_decisions", "decision_bits", "find_decision", "value_index",
    "decode_indices", "decode", "check_candidates", "EncodingIssue", "integer_changes",
    "encode", "codewords", "unary_terms", "pair_terms", "validity_penalty",
]

# ------------------------------------------------------------------- lookups
def decision_bits(problem: Problem, d: Decision) -> np.ndarray:
    """Positions of the decision's bits in ``problem.labels`` order: int64 (len(variables),)."""
    return np.asarray([problem.index[lab] for lab in d.variables], dtype=np.int64)


def find_decision(problem: Problem, name: Any, field: str) -> Decision:
    """The declared decision called ``name``, or an InputError naming ``field``."""
    for d in problem.decisions:
        if d.name == name:
            return d
    known = ", ".join(repr(d.name) for d in problem.decisions[:8]) or "none declared"
    raise InputError(field, f"unknown decision {name!r} (known: {known})")


def value_index(d: Decision, value: Any, field: str) -> int:
    """Position of ``value`` in ``d.values`` (strings match strings only), or an InputError."""
    if isinstance(value, bool):
        raise InputError(field, f"{value!r} is not a value of decision {d.name!r}")
    for m, v in enumerate(d.values):
        if type(v) is str or type(value) is str:
            if v == value and type(v) is type(value):
                return m
        elif v == value:
            return m
    raise InputError(field, f"{value!r} is not a value of decision {d.name!r} (its values: "
                                 f"{', '.join(map(repr, d.values))})")


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
