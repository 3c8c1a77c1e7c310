"""Lowering of late constraints to the arrays the solvers work on.

Every late constraint, bit-level or integer-level, lowers to :class:`Pieces`:

* soft QUBO terms (linear, quadratic, offset) merged into the search objective;
* soft count penalties ``f(d)`` with ``d = const + sum_t coef_t * AND(literals_t)``
  (a literal is "variable i has bit value b"), for non-linear shapes;
* hard linear rows ``lo <= sum_i a_i x_i <= hi`` over 0/1 bits;
* hard fixings ``x_i = b``.

:class:`Compiled` holds the merged arrays and evaluates a batch of assignments:
cost split by component and violation per hard constraint.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Sequence

import numpy as np

from flipfix.repair.model.constraints import (
    ExtraTerms, FixVariables, ForbidAssignment, HammingPenalty, LinearConstraint, _number,
    shape_table,
)
from flipfix.repair.kernels.batching import row_slices
from flipfix.repair.errors import InputError
from flipfix.repair.model.problem import Problem

__all__ = ["CountSpec", "RowSpec", "Pieces", "Compiled", "compile_constraints", "lower",
           "FEAS_TOL"]

#: Absolute tolerance on a hard row, scaled by the row's size (common practice).
FEAS_TOL = 1e-9


@dataclass
class CountSpec:
    """Soft penalty ``table[d]`` with ``d = const + sum_t coef[t] * AND(lits of t)``.

    ``terms`` is a list of ``(coef int, [(var int, bit int), ...])``; d must stay in
    0..len(table)-1 for every assignment (the lowering guarantees it).
    """

    name: str
    table: np.ndarray
    const: int
    terms: list


@dataclass
class RowSpec:
    """Hard ``lo <= sum coef[k] * x[idx[k]] <= hi`` over 0/1 bits."""

    name: str
    idx: np.ndarray
    coef: np.ndarray
    lo: float
    hi: float


@dataclass
class Pieces:
    """What one constraint lowers to (indices are variable positions, bits 0/1)."""

    name: str
    linear: list = field(default_factory=list)      # [(i, coef)]
    quadratic: list = field(default_factory=list)   # [(i, j, coef)], i != j
    offset: float = 0.0
    counts: list = field(default_factory=list)      # [CountSpec]
    rows: list = field(default_factory=list)        # [RowSpec]
    fixed: list = field(default_factory=list)       # [(i, bit)]
    hard: bool = False


# --------------------------------------------------------------------- lowering
def _positions(problem: Problem, mapping, field_name: str) -> tuple[np.ndarray, np.ndarray]:
    """Label -> caller value mapping to (positions int64, bits int8)."""
    if not hasattr(mapping, "items"):
        raise InputError(field_name, "must map variable labels to values")
    fast = _positions_at_once(problem, mapping)
    if fast is not None:
        return fast
    idx, bits = [], []
    for lab, val in mapping.items():
        f = f"{field_name}[{lab!r}]"
        idx.append(problem.lookup(lab, f))
        bits.append(problem.value_to_bit(val, f))
    return np.asarray(idx, dtype=np.int64), np.asarray(bits, dtype=np.int8)


def _positions_at_once(problem: Problem, mapping):
    """:func:`_positions` without a Python call per entry, when every label is a known
    str / int and every value a number of the vartype; None otherwise (the entry by entry
    path then names the bad one)."""
    keys, values = mapping.keys(), mapping.values()
    if not _label_keys(keys):
        return None
    if not all(issubclass(t, (int, np.integer, float)) for t in set(map(type, values))):
        return None
    try:
        idx = np.fromiter(map(problem.index.__getitem__, keys), np.int64, len(mapping))
    except KeyError:
        return None
    v = np.fromiter(values, np.float64, len(mapping))
    lo = -1.0 if problem.vartype == "SPIN" else 0.0
    if not np.all((v == lo) | (v == 1.0)):
        return None
    return idx, (v == 1.0).astype(np.int8)


def _terms_at_once(problem: Problem, terms):
    """(positions int64, coefficients float64) of a label -> coefficient mapping without a
    Python call per entry, when every label is a known str / int and every coefficient a
    finite number; None otherwise (the entry by entry path then names the bad one)."""
    if not _label_keys(terms.keys()) or not all(
            issubclass(t, (int, float, np.integer, np.floating)) and t is not bool
            for t in set(map(type, terms.values()))):
        return None
    try:
        idx = np.fromiter(map(problem.index.__getitem__, terms.keys()), np.int64, len(terms))
    except KeyError:
        return None
    coef = np.fromiter(terms.values(), np.float64, len(terms))
    return (idx, coef) if np.all(np.isfinite(coef)) else None


def _label_keys(keys) -> bool:
    """Whether every key is a str or an int (not a bool): a label :meth:`Problem.lookup` takes."""
    return all(issubclass(t, (str, int, np.integer)) and t is not bool for t in set(map(type, keys)))


def lower_hamming(problem: Problem, c: HammingPenalty, name: str, prefix: str) -> Pieces:
    idx, ref = _positions(problem, c.reference, prefix + "reference")
    if idx.size == 0:
        raise InputError(prefix + "reference", "is empty")
    if c.variables is not None:
        chosen = [problem.lookup(lab, f"{prefix}variables[{k}]") for k, lab in enumerate(c.variables)]
        pos = {int(i): int(b) for i, b in zip(idx, ref)}
        missing = [lab for lab, i in zip(c.variables, chosen) if i not in pos]
        if missing:
            raise InputError(prefix + "variables", f"{missing[0]!r} has no value in reference")
        idx = np.asarray(chosen, dtype=np.int64)
        ref = np.asarray([pos[i] for i in chosen], dtype=np.int8)
        if np.unique(idx).size != idx.size:
            raise InputError(prefix + "variables", "lists a variable twice")
    table = shape_table(c.shape, c.weight, int(idx.size), threshold=c.threshold, table=c.table,
                        field_name=prefix + "shape")
    slope = _linear_slope(table)
    if slope is not None:  # as count_pieces merges it: [x_i != r_i] = r_i + (1 - 2 r_i) x_i
        r = ref.astype(np.float64)
        return Pieces(name, linear=list(zip(idx.tolist(), (slope * (1.0 - 2.0 * r)).tolist())),
                      offset=float(table[0] + slope * r.sum()))
    # d = number of i with x_i != ref_i: one single-literal term per variable
    terms = [(1, [(i, 1 - b)]) for i, b in zip(idx.tolist(), ref.tolist())]
    return count_pieces(name, CountSpec(name, table, 0, terms))


def _linear_slope(t: np.ndarray) -> float | None:
    """The slope of a penalty table that is linear in d (t[d] = t[0] + slope * d), else None."""
    d = np.arange(t.size, dtype=np.float64)
    slope = (t[-1] - t[0]) / max(t.size - 1, 1)
    if np.allclose(t, t[0] + slope * d, rtol=0, atol=1e-12 * (1 + np.abs(t).max())):
        return float(slope)
    return None


def count_pieces(name: str, spec: CountSpec) -> Pieces:
    """A count penalty; merged into QUBO terms when its table is linear in d and terms are small."""
    t = spec.table
    slope = _linear_slope(t)
    if slope is None or not all(len(lits) <= 2 for _, lits in spec.terms):
        return Pieces(name, counts=[spec])
    p = Pieces(name, offset=float(t[0] + slope * spec.const))
    for coef, lits in spec.terms:
        w = slope * coef
        # [x_i == b] = b*x_i + (1-b)*(1-x_i): an affine form a + s*x_i
        forms = [(1.0 - b, 2.0 * b - 1.0, i) for i, b in lits]
        if len(forms) == 1:
            a, s, i = forms[0]
            p.offset += w * a
            p.linear.append((i, w * s))
        else:
            (a1, s1, i), (a2, s2, j) = forms
            p.offset += w * a1 * a2
            p.linear.append((i, w * s1 * a2))
            p.linear.append((j, w * s2 * a1))
            p.quadratic.append((i, j, w * s1 * s2))
    return p


def lower_extra(problem: Problem, c: ExtraTerms, name: str, prefix: str) -> Pieces:
    lin = {}
    for lab, bias in dict(c.linear).items():
        i = problem.lookup(lab, f"{prefix}linear[{lab!r}]")
        lin[i] = lin.get(i, 0.0) + _number(bias, f"{prefix}linear[{lab!r}]")
    quad = []
    for k, term in enumerate(c.quadratic):
        f = f"{prefix}quadratic[{k}]"
        try:
            u, v, bias = term
        except (TypeError, ValueError):
            raise InputError(f, "must be [u, v, bias]") from None
        i, j = problem.lookup(u, f), problem.lookup(v, f)
        if i == j:
            raise InputError(f, f"self-loop on {u!r}: put it in linear instead")
        quad.append((i, j, _number(bias, f)))
    offset = _number(c.offset, prefix + "offset")
    p = Pieces(name)
    if problem.vartype == "SPIN":
        # s = 2x - 1, exactly as in Problem._assemble
        for i, h in lin.items():
            p.linear.append((i, 2.0 * h))
            offset -= h
        for i, j, w in quad:
            p.quadratic.append((i, j, 4.0 * w))
            p.linear.append((i, -2.0 * w))
            p.linear.append((j, -2.0 * w))
            offset += w
    else:
        p.linear.extend(lin.items())
        p.quadratic.extend(quad)
    p.offset = offset
    return p


def lower_fix(problem: Problem, c: FixVariables, name: str, prefix: str) -> Pieces:
    idx, bits = _positions(problem, c.values, prefix + "values")
    if idx.size == 0:
        raise InputError(prefix + "values", "is empty")
    return Pieces(name, fixed=list(zip(idx.tolist(), bits.tolist())), hard=True)


def lower_linear(problem: Problem, c: LinearConstraint, name: str, prefix: str) -> Pieces:
    if not hasattr(c.terms, "items") or len(c.terms) == 0:
        raise InputError(prefix + "terms", "must be a non-empty map of label -> coefficient")
    fast = _terms_at_once(problem, c.terms)
    if fast is None:
        acc: dict = {}
        for lab, coef in c.terms.items():
            f = f"{prefix}terms[{lab!r}]"
            i = problem.lookup(lab, f)
            acc[i] = acc.get(i, 0.0) + _number(coef, f)
        fast = (np.asarray(list(acc), dtype=np.int64),
                np.asarray(list(acc.values()), dtype=np.float64))
    idx, coef = fast
    rhs = _number(c.rhs, prefix + "rhs")
    if problem.vartype == "SPIN":  # a*s = 2a*x - a
        rhs += float(coef.sum())
        coef = 2.0 * coef
    lo = rhs if c.sense in ("==", ">=") else -np.inf
    hi = rhs if c.sense in ("==", "<=") else np.inf
    return Pieces(name, rows=[RowSpec(name, idx, coef, lo, hi)], hard=True)


def lower_forbid(problem: Problem, c: ForbidAssignment, name: str, prefix: str) -> Pieces:
    idx, bits = _positions(problem, c.assignment, prefix + "assignment")
    if idx.size == 0:
        raise InputError(prefix + "assignment", "is empty")
    # matches = sum_{b=1} x_i + sum_{b=0} (1 - x_i) <= |P| - 1
    coef = np.where(bits == 1, 1.0, -1.0)
    hi = float(idx.size - 1) - float((bits == 0).sum())
    return Pieces(name, rows=[RowSpec(name, idx, coef, -np.inf, hi)], hard=True)


_LOWER = {
    HammingPenalty: lower_hamming,
    ExtraTerms: lower_extra,
    FixVariables: lower_fix,
    LinearConstraint: lower_linear,
    ForbidAssignment: lower_forbid,
}


def lower(problem: Problem, constraint: Any, name: str, prefix: str) -> Pieces:
    """Lower one constraint; integer-level constraints provide ``lower(problem, name, prefix)``."""
    fn = _LOWER.get(type(constraint))
    if fn is not None:
        return fn(problem, constraint, name, prefix)
    if hasattr(constraint, "lower"):
        return constraint.lower(problem, name, prefix)
    raise InputError(prefix.rstrip("."), f"unknown constraint type {type(constraint).__name__}")


# --------------------------------------------------------------------- compiled
@dataclass(eq=False)
class Compiled:
    """A problem with its late constraints lowered and merged.

    Search objective (0/1 form): QUBO ``h, indptr, indices, data, offset`` plus the
    non-linear count penalties ``counts``. Hard part: rows ``A`` (CSR ``a_indptr``,
    ``a_indices``, ``a_data``) with bounds ``lo, hi`` float64 (m,), and
    ``fixed`` int8 (n,) holding -1 (free) or the pinned bit.
    """

    problem: Problem
    pieces: list
    h: np.ndarray
    indptr: np.ndarray
    indices: np.ndarray
    data: np.ndarray
    offset: float
    counts: list
    rows: list
    fixed: np.ndarray
    fix_conflicts: list
    a_indptr: np.ndarray
    a_indices: np.ndarray
    a_data: np.ndarray
    lo: np.ndarray
    hi: np.ndarray

    @property
    def n(self) -> int:
        return self.problem.n

    @property
    def has_hard(self) -> bool:
        return bool(self.rows) or bool((self.fixed >= 0).any())

    @property
    def objective_model(self) -> Problem:
        """The merged search QUBO (without count penalties) as a Problem in 0/1 form."""
        return Problem(self.problem.labels, self.h, self.indptr, self.indices, self.data,
                       self.offset, "BINARY", (), self.problem.index)

    # ------------------------------------------------------------ evaluate
    def count_values(self, spec: CountSpec, X: np.ndarray) -> np.ndarray:
        """d for every row of X: int64 (K,)."""
        d = np.full(X.shape[0], spec.const, dtype=np.int64)
        by_arity: dict = {}
        for coef, lits in spec.terms:
            by_arity.setdefault(len(lits), []).append((coef, lits))
        for arity, group in by_arity.items():
            coefs = np.asarray([c for c, _ in group], dtype=np.int64)
            var = np.asarray([[i for i, _ in lits] for _, lits in group], dtype=np.int64)
            val = np.asarray([[b for _, b in lits] for _, lits in group], dtype=np.int8)
            hit = np.all(X[:, var] == val[None, :, :], axis=2)  # (K, T)
            d += hit.astype(np.int64) @ coefs
        return d

    def _qubo_value(self, p: Pieces, X: np.ndarray) -> np.ndarray:
        Xf = X.astype(np.float64)
        v = np.full(X.shape[0], p.offset)
        if p.linear:
            i, c = zip(*p.linear)
            v += Xf[:, list(i)] @ np.asarray(c, dtype=np.float64)
        if p.quadratic:
            i, j, c = zip(*p.quadratic)
            v += (Xf[:, list(i)] * Xf[:, list(j)]) @ np.asarray(c, dtype=np.float64)
        return v

    def row_violation(self, r: RowSpec, X: np.ndarray) -> np.ndarray:
        act = X[:, r.idx].astype(np.float64) @ r.coef
        tol = FEAS_TOL * (1.0 + np.abs(r.coef).sum())
        viol = np.maximum(0.0, r.lo - act) + np.maximum(0.0, act - r.hi)
        return np.where(viol > tol, viol, 0.0)

    def evaluate(self, X: np.ndarray) -> "Evaluation":
        """Cost split and violations for X int8 (K, n), computed in row chunks."""
        X = np.asarray(X, dtype=np.int8)
        if X.ndim == 1:
            X = X[None, :]
        width = max(self.n, self.data.size, sum(len(s.terms) for s in self.counts) or 1)
        parts = [self._evaluate(X[sl]) for sl in row_slices(X.shape[0], width)]
        if len(parts) == 1:
            return parts[0]
        cat = np.concatenate
        return Evaluation(
            cost=cat([p.cost for p in parts]), base=cat([p.base for p in parts]),
            penalties={k: cat([p.penalties[k] for p in parts]) for k in parts[0].penalties},
            violations={k: cat([p.violations[k] for p in parts]) for k in parts[0].violations},
            violation=cat([p.violation for p in parts]))

    def _evaluate(self, X: np.ndarray) -> "Evaluation":
        base = self.problem.energies(X)
        penalties: dict = {}
        violations: dict = {}
        for p in self.pieces:
            if p.hard:
                v = np.zeros(X.shape[0])
                for r in p.rows:
                    v += self.row_violation(r, X)
                for i, b in p.fixed:
                    v += (X[:, i] != b).astype(np.float64)
                violations[p.name] = v
            else:
                v = self._qubo_value(p, X)
                for spec in p.counts:
                    v = v + spec.table[self.count_values(spec, X)]
                penalties[p.name] = v
        cost = base + sum(penalties.values()) if penalties else base.copy()
        total = sum(violations.values()) if violations else np.zeros(X.shape[0])
        return Evaluation(cost=cost, base=base, penalties=penalties, violations=violations,
                          violation=total)


@dataclass
class Evaluation:
    """Per-assignment figures, each float64 (K,)."""

    cost: np.ndarray
    base: np.ndarray
    penalties: dict
    violations: dict
    violation: np.ndarray

    @property
    def feasible(self) -> np.ndarray:
        return self.violation == 0.0


def _unique_name(base: str, used: set) -> str:
    name, k = base, 2
    while name in used:
        name, k = f"{base}#{k}", k + 1
    used.add(name)
    return name


def compile_constraints(problem: Problem, constraints: Sequence[Any], *,
                        field_name: str = "constraints") -> Compiled:
    """Validate and lower every constraint (and the problem's decision encodings)."""
    if not isinstance(constraints, (list, tuple)):
        raise InputError(field_name, "must be a list of constraints")
    used: set = set()
    pieces: list = []
    if problem.decisions:
        from flipfix.repair.model.encodings import encoding_pieces

        pieces.extend(encoding_pieces(problem))
        used.update(p.name for p in pieces)
    for k, c in enumerate(constraints):
        base = getattr(c, "name", None) or type(c).__name__.lower()
        pieces.append(lower(problem, c, _unique_name(str(base), used), f"{field_name}[{k}]."))
    n = problem.n
    h = problem.linear.copy()
    offset = problem.offset
    extra_i, extra_j, extra_v = [], [], []
    counts: list = []
    rows: list = []
    fixed = np.full(n, -1, dtype=np.int8)
    conflicts: list = []
    for p in pieces:
        if p.linear:  # in order, as a loop of h[i] += c would
            li, lc = zip(*p.linear)
            np.add.at(h, np.asarray(li, dtype=np.int64), np.asarray(lc, dtype=np.float64))
        offset += p.offset
        for i, j, c in p.quadratic:
            extra_i.append(i)
            extra_j.append(j)
            extra_v.append(c)
        counts.extend(p.counts)
        rows.extend(p.rows)
        for i, b in p.fixed:
            if fixed[i] >= 0 and fixed[i] != b:
                conflicts.append((problem.labels[i], p.name))
            fixed[i] = b
    if extra_i:
        qi, qj, qv = problem.pairs()
        merged = Problem._assemble(
            list(problem.labels), h,
            np.concatenate([qi, np.asarray(extra_i, dtype=np.int64)]),
            np.concatenate([qj, np.asarray(extra_j, dtype=np.int64)]),
            np.concatenate([qv, np.asarray(extra_v, dtype=np.float64)]), offset, "BINARY", (),
        )
    else:  # no new couplings: the problem's own (assembled) CSR, the new biases and offset
        merged = Problem(problem.labels, h, problem.indptr, problem.indices, problem.data,
                         float(offset), "BINARY", (), problem.index)
    a_indptr = np.zeros(len(rows) + 1, dtype=np.int64)
    a_indptr[1:] = np.cumsum([r.idx.size for r in rows]) if rows else []
    a_indices = (np.concatenate([r.idx for r in rows]) if rows else np.zeros(0)).astype(np.int32)
    a_data = (np.concatenate([r.coef for r in rows]) if rows else np.zeros(0)).astype(np.float64)
    return Compiled(
        problem=problem, pieces=pieces, h=merged.linear, indptr=merged.indptr,
        indices=merged.indices, data=merged.data, offset=merged.offset, counts=counts, rows=rows,
        fixed=fixed, fix_conflicts=conflicts, a_indptr=a_indptr, a_indices=a_indices,
        a_data=a_data, lo=np.asarray([r.lo for r in rows], dtype=np.float64),
        hi=np.asarray([r.hi for r in rows], dtype=np.float64),
    )
