"""The problem: a binary quadratic model in 0/1 form with an explicit variable order.

Energy of an assignment ``x`` in {0,1}^n::

    E(x) = offset + sum_i linear[i] x_i + sum_{i<j} J_ij x_i x_j

``J`` is held as a symmetric CSR adjacency (each pair stored in both rows with
the full coefficient ``J_ij``), so a single-flip update touches only the
neighbours of the flipped variable.

SPIN input (s in {-1,+1}) is converted exactly with s = 2x - 1; the caller's
vartype is remembered so results can be reported back in it.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Hashable, Iterable, Mapping, Sequence

import numpy as np

from flipfix.repair.errors import InputError
from flipfix.repair.kernels.energy import csr_energies, csr_local_fields
from flipfix.repair.model import vartypes
from flipfix.repair.model.vartypes import BINARY, SPIN, VARTYPES

__all__ = ["Problem", "Decision", "BINARY", "SPIN", "VARTYPES", "ONE_HOT", "DOMAIN_WALL",
           "ENCODINGS", "check_label", "check_value", "finite", "validate_decisions"]

ONE_HOT = "one_hot"
DOMAIN_WALL = "domain_wall"
ENCODINGS = (ONE_HOT, DOMAIN_WALL)


def check_label(label: Any, field: str) -> Hashable:
    """Labels are str or int (not bool); anything else is an error naming the field."""
    if isinstance(label, bool) or not isinstance(label, (str, int, np.integer)):
        raise InputError(field, f"label {label!r} must be a string or an integer")
    return int(label) if isinstance(label, np.integer) else label


def finite(value: Any, field: str) -> float:
    """A finite float, or an InputError naming the field (booleans are not numbers)."""
    if isinstance(value, bool):
        raise InputError(field, f"{value!r} is not a number")
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise InputError(field, f"{value!r} is not a number") from None
    if not math.isfinite(v):
        raise InputError(field, f"{value!r} is not finite")
    return v


def check_value(value: Any, field: str) -> Any:
    """A decision value: a string or a finite number (not bool); integral floats become int."""
    if isinstance(value, bool) or not isinstance(value, (str, int, float, np.integer, np.floating)):
        raise InputError(field, f"value {value!r} must be a string or a number")
    if isinstance(value, (float, np.floating)):
        if not math.isfinite(float(value)):
            raise InputError(field, f"value {value!r} is not finite")
        return int(value) if float(value).is_integer() else float(value)
    return int(value) if isinstance(value, np.integer) else value


@dataclass(frozen=True)
class Decision:
    """An integer decision encoded in bits (see :mod:`flipfix.repair.model.encodings`).

    ``encoding`` is ``"one_hot"`` (k bits for k values) or ``"domain_wall"``
    (k-1 bits for k values); ``variables`` are bit labels in order and
    ``values`` the k values the decision can take.
    """

    name: str
    encoding: str
    variables: tuple
    values: tuple


@dataclass(frozen=True, eq=False)
class Problem:
    """A binary quadratic model held in 0/1 form.

    Attributes:
        labels: tuple of n labels; position i is variable i.
        linear: float64 (n,) linear biases (0/1 form).
        indptr, indices, data: CSR of the symmetric coupling matrix J,
            int64 (n+1,), int32 (nnz,), float64 (nnz,); no diagonal entries.
        offset: constant term (0/1 form).
        vartype: the vartype the caller speaks ("BINARY" or "SPIN").
        decisions: integer decisions declared over the bits (may be empty).
    """

    labels: tuple
    linear: np.ndarray
    indptr: np.ndarray
    indices: np.ndarray
    data: np.ndarray
    offset: float
    vartype: str = BINARY
    decisions: tuple = ()
    index: dict = field(default_factory=dict, repr=False)

    # ------------------------------------------------------------------ build
    @classmethod
    def from_terms(
        cls,
        linear: Mapping[Hashable, float] | Iterable[tuple[Hashable, float]],
        quadratic: Iterable[tuple[Hashable, Hashable, float]],
        *,
        offset: float = 0.0,
        vartype: str = BINARY,
        labels: Sequence[Hashable] | None = None,
        decisions: Sequence[Decision] = (),
        field: str = "",
    ) -> "Problem":
        """Build from label-keyed terms in the caller's vartype.

        ``labels`` fixes the variable order; by default it is the order of
        first appearance in ``linear`` and then ``quadratic``. Duplicate
        quadratic pairs are summed (as dimod does); a pair (u, u) is an error.
        Errors name ``field.<part>`` (just ``<part>`` when ``field`` is empty).
        """
        p = f"{field}." if field else ""
        if vartype not in VARTYPES:
            raise InputError(p + "vartype", f"must be one of {VARTYPES}, got {vartype!r}")
        lin_items = list(linear.items()) if isinstance(linear, Mapping) else list(linear)
        quad_items = list(quadratic)
        index: dict = {}
        order: list = []
        if labels is not None:
            for pos, lab in enumerate(labels):
                lab = check_label(lab, f"{p}labels[{pos}]")
                if lab in index:
                    raise InputError(f"{p}labels[{pos}]", f"duplicate label {lab!r}")
                index[lab] = len(order)
                order.append(lab)

        def locate(lab: Any, fname: str) -> int:
            lab = check_label(lab, fname)
            if lab not in index:
                if labels is not None:
                    raise InputError(fname, f"unknown label {lab!r}")
                index[lab] = len(order)
                order.append(lab)
            return index[lab]

        lin_pos: list[int] = []
        lin_val: list[float] = []
        seen_lin: set = set()
        for k, (lab, bias) in enumerate(lin_items):
            fname = f"{p}linear[{lab!r}]"
            i = locate(lab, fname)
            if i in seen_lin:
                raise InputError(fname, f"duplicate label {lab!r}")
            seen_lin.add(i)
            lin_pos.append(i)
            lin_val.append(finite(bias, fname))
        rows: list[int] = []
        cols: list[int] = []
        vals: list[float] = []
        for k, term in enumerate(quad_items):
            fname = f"{p}quadratic[{k}]"
            try:
                u, v, bias = term
            except (TypeError, ValueError):
                raise InputError(fname, "must be [u, v, bias]") from None
            i = locate(u, fname)
            j = locate(v, fname)
            if i == j:
                raise InputError(fname, f"self-loop on {u!r}: put it in linear instead")
            rows.append(i)
            cols.append(j)
            vals.append(finite(bias, fname))
        n = len(order)
        h = np.zeros(n, dtype=np.float64)
        np.add.at(h, np.asarray(lin_pos, dtype=np.int64), np.asarray(lin_val, dtype=np.float64))
        return cls._assemble(
            order, h, np.asarray(rows, dtype=np.int64), np.asarray(cols, dtype=np.int64),
            np.asarray(vals, dtype=np.float64), finite(offset, p + "offset"), vartype,
            tuple(decisions), p,
        )

    @classmethod
    def from_arrays(
        cls, labels: Sequence[Hashable], linear, u, v, bias, *, offset: float = 0.0,
        vartype: str = BINARY, decisions: Sequence[Decision] = (), field: str = "",
        fields: tuple[str, str, str, str] = ("linear", "u", "v", "bias"),
    ) -> "Problem":
        """Build from terms by position, in the caller's vartype, without per-term Python.

        ``labels`` (n) fix the order; ``linear`` float64 (n,) or empty; term k of
        ``u``, ``v`` int (m,) and ``bias`` float64 (m,) couples ``labels[u[k]]`` and
        ``labels[v[k]]`` (duplicate pairs are summed, u == v is an error). ``fields``
        names the four arrays in errors (as ``field.<name>``, or ``<name>`` when ``field``
        is empty).
        """
        p = f"{field}." if field else ""
        if vartype not in VARTYPES:
            raise InputError(p + "vartype", f"must be one of {VARTYPES}, got {vartype!r}")
        order: list = []
        index: dict = {}
        for pos, lab in enumerate(labels):
            lab = check_label(lab, f"{p}labels[{pos}]")
            if lab in index:
                raise InputError(f"{p}labels[{pos}]", f"duplicate label {lab!r}")
            index[lab] = pos
            order.append(lab)
        n = len(order)
        f_lin, f_u, f_v, f_b = (p + f for f in fields)
        h = np.asarray(linear, dtype=np.float64).ravel()
        if h.size == 0:
            h = np.zeros(n, dtype=np.float64)
        elif h.size != n:
            raise InputError(f_lin, f"has {h.size} biases for {n} labels")
        rows = np.asarray(u, dtype=np.int64).ravel()
        cols = np.asarray(v, dtype=np.int64).ravel()
        vals = np.asarray(bias, dtype=np.float64).ravel()
        if not rows.size == cols.size == vals.size:
            raise InputError(f_b, f"{f_u}, {f_v} and {f_b} have {rows.size}, {cols.size} and "
                                  f"{vals.size} entries (must be equal)")
        for arr, f in ((h, f_lin), (vals, f_b)):
            bad = np.flatnonzero(~np.isfinite(arr))
            if bad.size:
                raise InputError(f"{f}[{bad[0]}]", f"{arr[bad[0]]!r} is not finite")
        for arr, f in ((rows, f_u), (cols, f_v)):
            bad = np.flatnonzero((arr < 0) | (arr >= n))
            if bad.size:
                raise InputError(f"{f}[{bad[0]}]", f"index {arr[bad[0]]} is outside 0..{n - 1}")
        loop = np.flatnonzero(rows == cols)
        if loop.size:
            k = int(loop[0])
            raise InputError(f"{f_u}[{k}]", f"self-loop on {order[rows[k]]!r}: put it in linear instead")
        return cls._assemble(order, h, rows, cols, vals, finite(offset, p + "offset"), vartype,
                             tuple(decisions), p)

    @classmethod
    def _assemble(cls, order, h, rows, cols, vals, offset, vartype, decisions, p=""):
        """Convert to 0/1 form if needed, symmetrise, merge duplicates, build CSR."""
        n = len(order)
        if n == 0:
            raise InputError(p.rstrip(".") or "problem",
                             "has no variables: give at least one label or term")
        if vartype == SPIN:
            idx, lin, vals, offset = vartypes.change_vartype(
                np.arange(n), h, rows, cols, vals, offset, source=SPIN, target=BINARY)
            h = np.zeros(n, dtype=np.float64)
            np.add.at(h, idx, lin)
        a = np.minimum(rows, cols)
        b = np.maximum(rows, cols)
        key = a * max(n, 1) + b
        uniq, inv = np.unique(key, return_inverse=True)
        summed = np.zeros(uniq.size, dtype=np.float64)
        np.add.at(summed, inv, vals)
        keep = summed != 0.0
        ua, ub, uv = uniq[keep] // max(n, 1), uniq[keep] % max(n, 1), summed[keep]
        r = np.concatenate([ua, ub])
        c = np.concatenate([ub, ua])
        v = np.concatenate([uv, uv])
        order_idx = np.lexsort((c, r))
        r, c, v = r[order_idx], c[order_idx], v[order_idx]
        indptr = np.zeros(n + 1, dtype=np.int64)
        np.add.at(indptr, r + 1, 1)
        indptr = np.cumsum(indptr)
        prob = cls(
            labels=tuple(order), linear=h.astype(np.float64), indptr=indptr,
            indices=c.astype(np.int32), data=v.astype(np.float64), offset=float(offset),
            vartype=vartype, decisions=tuple(decisions),
            index={lab: i for i, lab in enumerate(order)},
        )
        if decisions:
            validate_decisions(prob, field=p + "decisions")
        return prob

    @classmethod
    def from_bqm(cls, bqm, *, decisions: Sequence[Decision] = ()) -> "Problem":
        """From a ``dimod.BinaryQuadraticModel`` (BINARY or SPIN); order = ``bqm.variables``."""
        import dimod

        if not isinstance(bqm, dimod.BinaryQuadraticModel):
            raise InputError("bqm", f"expected a dimod.BinaryQuadraticModel, got {type(bqm).__name__}")
        vartype = SPIN if bqm.vartype is dimod.SPIN else BINARY
        labels = list(bqm.variables)
        return cls.from_terms(
            list(bqm.linear.items()), [(u, v, b) for (u, v), b in bqm.quadratic.items()],
            offset=float(bqm.offset), vartype=vartype, labels=labels, decisions=decisions,
        )

    @classmethod
    def from_matrix(
        cls, Q, *, labels: Sequence[Hashable] | None = None, vartype: str = BINARY,
        offset: float = 0.0, decisions: Sequence[Decision] = (),
    ) -> "Problem":
        """From a dense array or a scipy.sparse matrix Q (n, n).

        Energy = offset + sum_i Q_ii v_i + sum_{i != j} Q_ij v_i v_j, i.e. v^T Q v
        for BINARY (upper, lower or symmetric Q alike: both triangles count).
        """
        if hasattr(Q, "tocoo"):
            coo = Q.tocoo()
            n0, n1 = coo.shape
            r, c, v = (np.asarray(coo.row, np.int64), np.asarray(coo.col, np.int64),
                       np.asarray(coo.data, np.float64))
        else:
            arr = np.asarray(Q, dtype=np.float64)
            if arr.ndim != 2:
                raise InputError("Q", f"must be a 2-D matrix, got shape {arr.shape}")
            n0, n1 = arr.shape
            r, c = np.nonzero(arr)
            v = arr[r, c]
        if n0 != n1:
            raise InputError("Q", f"must be square, got shape {(n0, n1)}")
        if not np.all(np.isfinite(v)):
            raise InputError("Q", "contains NaN or infinite entries")
        n = n0
        if labels is None:
            labels = list(range(n))
        elif len(labels) != n:
            raise InputError("labels", f"has {len(labels)} labels for a {n}x{n} matrix")
        diag = r == c
        h = np.zeros(n, dtype=np.float64)
        np.add.at(h, r[diag], v[diag])
        quad = [(labels[i], labels[j], b) for i, j, b in zip(r[~diag], c[~diag], v[~diag])]
        return cls.from_terms(
            [(labels[i], h[i]) for i in range(n)], quad, offset=offset,
            vartype=vartype, labels=labels, decisions=decisions,
        )

    # -------------------------------------------------------------- inspect
    @property
    def n(self) -> int:
        return len(self.labels)

    @property
    def num_interactions(self) -> int:
        return int(self.indices.size // 2)

    def pairs(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Upper-triangle couplings: (i int64 (m,), j int64 (m,), J float64 (m,)) with i < j."""
        rows = np.repeat(np.arange(self.n, dtype=np.int64), np.diff(self.indptr))
        cols = self.indices.astype(np.int64)
        up = rows < cols
        return rows[up], cols[up], self.data[up]

    def energies(self, X: np.ndarray) -> np.ndarray:
        """Energy of each row of X (int8 (K, n), 0/1) -> float64 (K,)."""
        X = np.asarray(X)
        if X.ndim == 1:
            X = X[None, :]
        return csr_energies(X, self.linear, self.indptr, self.indices, self.data, self.offset)

    def local_fields(self, X: np.ndarray) -> np.ndarray:
        """h_i + sum_j J_ij x_j for every row of X: float64 (K, n)."""
        X = np.asarray(X)
        if X.ndim == 1:
            X = X[None, :]
        return csr_local_fields(X, self.linear, self.indptr, self.indices, self.data)

    def flip_costs(self, X: np.ndarray) -> np.ndarray:
        """Energy change of flipping each single variable: float64 (K, n)."""
        X = np.asarray(X)
        if X.ndim == 1:
            X = X[None, :]
        return (1.0 - 2.0 * X.astype(np.float64)) * self.local_fields(X)

    # ------------------------------------------------------------- vartype
    def to_caller(self, X: np.ndarray) -> np.ndarray:
        """0/1 values -> the caller's vartype values (int8, same shape)."""
        return vartypes.to_caller(X, self.vartype)

    def from_caller(self, values: np.ndarray, field: str = "values") -> np.ndarray:
        """Caller's vartype values -> 0/1 int8; values outside the vartype are an error."""
        arr = np.asarray(values)
        lo, hi = (-1, 1) if self.vartype == SPIN else (0, 1)
        ok = (arr == lo) | (arr == hi)  # bool temporaries only: one byte per value
        if arr.size and not ok.all():
            bad = arr[~ok].ravel()[0]
            bad = bad.item() if hasattr(bad, "item") else bad
            raise InputError(field, f"value {bad!r} is not {self.vartype} (allowed: {lo} or {hi})")
        return vartypes.to_bits(arr, self.vartype)

    def value_to_bit(self, value: Any, field: str) -> int:
        """One caller-vartype value -> 0/1, with a field-named error."""
        allowed = (-1, 1) if self.vartype == SPIN else (0, 1)
        if isinstance(value, bool):
            value = int(value)
        if not isinstance(value, (int, np.integer, float)) or value not in allowed:
            raise InputError(field, f"value {value!r} is not {self.vartype} "
                                    f"(allowed: {allowed[0]} or {allowed[1]})")
        return vartypes.value_to_bit(value, self.vartype)

    def lookup(self, label: Any, field: str) -> int:
        """Label -> position, with a field-named error for unknown labels."""
        if isinstance(label, bool) or not isinstance(label, (str, int, np.integer)):
            raise InputError(field, f"label {label!r} must be a string or an integer")
        try:
            return self.index[label]
        except KeyError:
            raise InputError(field, f"unknown variable {label!r}") from None

    def to_bqm(self):
        """The model as a ``dimod.BinaryQuadraticModel`` in the caller's vartype."""
        import dimod

        i, j, J = self.pairs()
        bqm = dimod.BinaryQuadraticModel(
            {self.labels[k]: self.linear[k] for k in range(self.n)},
            {(self.labels[a], self.labels[b]): w for a, b, w in zip(i, j, J)},
            self.offset, dimod.BINARY,
        )
        return bqm.change_vartype(dimod.SPIN, inplace=False) if self.vartype == SPIN else bqm


def validate_decisions(problem: Problem, *, field: str = "decisions") -> None:
    """Check every declared decision of ``problem``; raise :class:`InputError` naming the field.

    Checks: names are unique non-empty strings; the encoding is known; every bit
    exists and belongs to at most one decision (and appears once in it); one-hot
    has k bits for k values, domain wall k-1 bits; at least two values, distinct.
    """
    names: set = set()
    owner: dict = {}
    for k, d in enumerate(problem.decisions):
        f = f"{field}[{k}]"
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
            v = check_value(v, f"{f}.values[{m}]")
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
