"""The late constraints of a problem, lowered and merged: :class:`Compiled`.

:func:`compile_constraints` checks every constraint against the problem and
lowers it to :class:`flipfix.repair.lowering.pieces.Pieces` (through the kind's
record, :mod:`flipfix.repair.model.constraints.registry`), adds the validity rows
of the problem's decisions, and merges everything into the arrays the solvers
work on. :class:`Compiled` also evaluates a batch of assignments: cost split by
component and violation per hard constraint.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np

from flipfix.repair.errors import InputError
from flipfix.repair.kernels.batching import row_slices
from flipfix.repair.lowering.decisions import encoding_pieces
from flipfix.repair.lowering.pieces import CountSpec, Pieces, RowSpec
from flipfix.repair.model.constraints import registry
from flipfix.repair.model.problem import Problem

__all__ = ["Compiled", "Evaluation", "compile_constraints", "FEAS_TOL"]

#: Absolute tolerance on a hard row, scaled by the row's size (common practice).
FEAS_TOL = 1e-9


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
    def encoding_names(self) -> frozenset:
        """Names of the validity pieces of the problem's decisions (``encoding[NAME]``;
        :func:`compile_constraints` puts them first, one per decision)."""
        return frozenset(p.name for p in self.pieces[:len(self.problem.decisions)])

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
        if p.lin_idx.size:
            v += Xf[:, p.lin_idx] @ p.lin_coef
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
                if p.fix_idx.size:
                    v += (X[:, p.fix_idx] != p.fix_bits).sum(axis=1)
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
                        field: str = "constraints",
                        paths: Sequence[str] | None = None) -> Compiled:
    """Check every constraint against ``problem``, lower it, and merge (with the validity
    rows of the problem's decisions).

    Errors name ``paths[k]`` (default ``field[k]``) followed by the constraint's
    attribute, e.g. ``constraints[2].reference['x3']``; a caller whose request nests
    each constraint under its kind passes ``paths`` such as ``constraints[2].hamming``.
    """
    if not isinstance(constraints, (list, tuple)):
        raise InputError(field, "must be a list of constraints")
    if paths is None:
        paths = [f"{field}[{k}]" for k in range(len(constraints))]
    elif len(paths) != len(constraints):
        raise InputError(field, f"has {len(constraints)} constraints for {len(paths)} paths")
    used: set = set()
    pieces: list = encoding_pieces(problem)
    used.update(p.name for p in pieces)
    for c, path in zip(constraints, paths):
        kind = registry.kind_of(c, path)
        name = _unique_name(str(getattr(c, "name", None) or kind.name), used)
        pieces.append(kind.lower(problem, c, name, path))
    n = problem.n
    h = problem.linear.copy()
    offset = problem.offset
    extra_i, extra_j, extra_v = [], [], []
    counts: list = []
    rows: list = []
    fixed = np.full(n, -1, dtype=np.int8)
    conflicts: list = []  # (label, the piece that fixed it first, the one that disagrees)
    fixed_by = np.empty(n, dtype=object)  # the name of the piece that fixed each position
    for p in pieces:
        if p.lin_idx.size:  # in order, as a loop of h[i] += c would
            np.add.at(h, p.lin_idx, p.lin_coef)
        offset += p.offset
        for i, j, c in p.quadratic:
            extra_i.append(i)
            extra_j.append(j)
            extra_v.append(c)
        counts.extend(p.counts)
        rows.extend(p.rows)
        if p.fix_idx.size:
            # a position pinned both ways, by an earlier piece or twice in this one
            seen = np.full(n, -1, dtype=np.int8)
            seen[p.fix_idx] = p.fix_bits
            earlier = (fixed[p.fix_idx] >= 0) & (fixed[p.fix_idx] != p.fix_bits)
            clash = earlier | (seen[p.fix_idx] != p.fix_bits)
            named: set = set()
            for k in np.flatnonzero(clash).tolist():
                i = int(p.fix_idx[k])
                if i not in named:
                    named.add(i)
                    first = fixed_by[i] if earlier[k] else p.name
                    conflicts.append((problem.labels[i], first, p.name))
            fixed[p.fix_idx] = p.fix_bits
            fixed_by[p.fix_idx] = p.name
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
