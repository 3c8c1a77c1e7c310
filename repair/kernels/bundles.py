"""The late objective as kernel arguments: a few named bundles of flat arrays.

Every compiled search kernel (greedy descent, annealing) works on the same arrays, built
once per :class:`~flipfix.repair.lowering.compiled.Compiled` and passed whole. numba
accepts tuples (and NamedTuples) of arrays, so a bundle costs nothing at run time and a
kernel signature names three things instead of thirty arrays.

* :class:`Qubo`: the merged search QUBO in 0/1 form (CSR couplings, symmetric) and the
  fixings.
* :class:`Counts`: the non-linear count penalties ``table_p[d_p]`` with
  ``d_p = const_p + sum_t coef_t * AND(literals of t)``; a literal is "variable i has
  bit b".
* :class:`Rows`: the hard rows ``lo <= A x <= hi`` as CSR (by row) and CSC (by
  variable), with a per-row feasibility tolerance.

:func:`late_arrays` builds all three once per compiled problem (cached on it).
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

from flipfix.repair.lowering.compiled import FEAS_TOL, Compiled

__all__ = ["Qubo", "Counts", "Rows", "LateArrays", "late_arrays", "coupling_rows",
           "unsigned", "objective_tol"]


class Qubo(NamedTuple):
    """Search QUBO ``x h + x J x / 2`` over 0/1 bits, J symmetric in CSR.

    h float64 (n,); indptr int64 (n+1,); indices uint32 (nnz,) (a view of the int32
    column indices: numba then skips its negative-index check); data float64 (nnz,);
    fixed int8 (n,) -1 (free) or the pinned bit.
    """

    h: np.ndarray
    indptr: np.ndarray
    indices: np.ndarray
    data: np.ndarray
    fixed: np.ndarray


class Counts(NamedTuple):
    """Count penalties, P penalties over T product terms and L literals.

    cp_ptr int64 (P+1,) and cp_table float64 (sum of table sizes,): penalty p's table is
    ``cp_table[cp_ptr[p]:cp_ptr[p+1]]``; cp_const int64 (P,).
    term_pen, term_coef, term_arity int64 (T,): each term's penalty, coefficient in d and
    number of literals; lit_ptr int64 (T+1,), lit_var int64 (L,), lit_val int8 (L,): each
    term's literals. vt_ptr int64 (n+1,), vt_term int64 (L,), vt_lit int64 (L,): the
    literals of each variable (term and literal index), by variable.
    """

    cp_ptr: np.ndarray
    cp_table: np.ndarray
    cp_const: np.ndarray
    term_pen: np.ndarray
    term_coef: np.ndarray
    term_arity: np.ndarray
    lit_ptr: np.ndarray
    lit_var: np.ndarray
    lit_val: np.ndarray
    vt_ptr: np.ndarray
    vt_term: np.ndarray
    vt_lit: np.ndarray


class Rows(NamedTuple):
    """Hard rows ``lo <= sum_i a_ri x_i <= hi``, m rows.

    a_ptr int64 (m+1,), a_col int64 (nnz,), a_val float64 (nnz,): by row (CSR);
    col_ptr int64 (n+1,), col_row int64 (nnz,), col_val float64 (nnz,): by variable (CSC);
    lo, hi float64 (m,) (infinite where open); rtol float64 (m,) the violation each row
    tolerates (:data:`FEAS_TOL` scaled by the row's size).
    """

    a_ptr: np.ndarray
    a_col: np.ndarray
    a_val: np.ndarray
    col_ptr: np.ndarray
    col_row: np.ndarray
    col_val: np.ndarray
    lo: np.ndarray
    hi: np.ndarray
    rtol: np.ndarray


class LateArrays(NamedTuple):
    qubo: Qubo
    counts: Counts
    rows: Rows


def unsigned(indices) -> np.ndarray:
    """CSR column indices as a uint32 view of their int32 values (no copy): numba then
    indexes without its negative-index wraparound, ~10 % of the greedy start-up scatter."""
    return np.ascontiguousarray(indices, dtype=np.int32).view(np.uint32)


def objective_tol(compiled: Compiled) -> float:
    """Smallest objective change counted as an improvement (1e-9 of the largest coefficient)."""
    scale = max(np.abs(compiled.h).max(initial=0.0), np.abs(compiled.data).max(initial=0.0), 1.0)
    return 1e-9 * scale


def _counts(compiled: Compiled, n: int) -> Counts:
    tables, consts, t_pen, t_coef, t_ar, l_ptr, l_var, l_val = [], [], [], [], [], [0], [], []
    for p, spec in enumerate(compiled.counts):
        tables.append(np.asarray(spec.table, dtype=np.float64))
        consts.append(spec.const)
        for coef, lits in spec.terms:
            t_pen.append(p)
            t_coef.append(coef)
            t_ar.append(len(lits))
            for i, b in lits:
                l_var.append(i)
                l_val.append(b)
            l_ptr.append(len(l_var))
    cp_ptr = np.zeros(len(tables) + 1, dtype=np.int64)
    cp_ptr[1:] = np.cumsum([t.size for t in tables]) if tables else []
    cp_table = np.concatenate(tables) if tables else np.zeros(0)
    l_var_a = np.asarray(l_var, dtype=np.int64)
    lit_term = np.repeat(np.arange(len(t_pen), dtype=np.int64), np.diff(np.asarray(l_ptr)))
    order = np.argsort(l_var_a, kind="stable")
    vt_ptr = np.zeros(n + 1, dtype=np.int64)
    np.add.at(vt_ptr, l_var_a + 1, 1)
    vt_ptr = np.cumsum(vt_ptr)
    return Counts(cp_ptr, cp_table, np.asarray(consts, dtype=np.int64),
                  np.asarray(t_pen, dtype=np.int64), np.asarray(t_coef, dtype=np.int64),
                  np.asarray(t_ar, dtype=np.int64), np.asarray(l_ptr, dtype=np.int64), l_var_a,
                  np.asarray(l_val, dtype=np.int8), vt_ptr, lit_term[order],
                  order.astype(np.int64))


def _rows(compiled: Compiled, n: int) -> Rows:
    a_ptr = np.asarray(compiled.a_indptr, dtype=np.int64)
    a_col = compiled.a_indices.astype(np.int64)
    a_val = np.asarray(compiled.a_data, dtype=np.float64)
    rows = np.repeat(np.arange(a_ptr.size - 1, dtype=np.int64), np.diff(a_ptr))
    order = np.argsort(a_col, kind="stable")
    col_ptr = np.zeros(n + 1, dtype=np.int64)
    np.add.at(col_ptr, a_col + 1, 1)
    col_ptr = np.cumsum(col_ptr)
    rtol = np.asarray([FEAS_TOL * (1.0 + np.abs(r.coef).sum()) for r in compiled.rows],
                      dtype=np.float64)
    return Rows(a_ptr, a_col, a_val, col_ptr, rows[order], a_val[order],
                np.asarray(compiled.lo, dtype=np.float64),
                np.asarray(compiled.hi, dtype=np.float64), rtol)


def late_arrays(compiled: Compiled) -> LateArrays:
    """The three bundles of ``compiled``, built on first use and cached on it."""
    cached = getattr(compiled, "_late_arrays", None)
    if cached is None:
        n = compiled.n
        qubo = Qubo(np.asarray(compiled.h, dtype=np.float64),
                    np.asarray(compiled.indptr, dtype=np.int64), unsigned(compiled.indices),
                    np.asarray(compiled.data, dtype=np.float64),
                    np.asarray(compiled.fixed, dtype=np.int8))
        cached = LateArrays(qubo, _counts(compiled, n), _rows(compiled, n))
        compiled._late_arrays = cached
    return cached


def coupling_rows(compiled: Compiled) -> np.ndarray:
    """int64 (nnz,): the row of each coupling of ``late_arrays(compiled).qubo`` (its CSR
    ``indices`` give the columns), built on first use and cached on ``compiled``."""
    cached = getattr(compiled, "_coupling_rows", None)
    if cached is None:
        q = late_arrays(compiled).qubo
        cached = np.repeat(np.arange(q.h.size, dtype=np.int64), np.diff(q.indptr))
        compiled._coupling_rows = cached
    return cached
