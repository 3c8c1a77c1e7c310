"""One candidate's search state under the late objective, and a flip's effect on it.

The objective is the QUBO ``x h + x J x / 2`` plus the count penalties
``table_p[d_p]`` plus ``price`` times the Hamming distance from the candidate; hard rows
``lo <= A x <= hi`` are kept as activities. A flip is evaluated in O(degree) from the
state (:func:`eval_flip`) and applied in O(degree) (:func:`flip_state`): fields, term
states, counts and activities change only where the flipped variable appears.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

from flipfix.repair.kernels.rows import row_viol
from flipfix.repair.solvers.greedy.jit import kernel

__all__ = ["State", "delta", "row_viol", "total_viol", "eval_flip", "leave", "flip_state",
           "fresh_counts"]


class State(NamedTuple):
    """One candidate's state, n variables, P count penalties, T terms, m rows.

    x int8 (n,) the current bits (a row of the batch, changed in place); o int8 (n,) the
    candidate as given (distances count from it); field float64 (n,) h + J x; dcount
    int64 (P,) each penalty's count d_p; sat int64 (T,) each term's satisfied literals;
    act float64 (m,) each row's activity A x; dd int64 (P,) zeros (scratch of
    :func:`eval_flip`, left zero).
    """

    x: np.ndarray
    o: np.ndarray
    field: np.ndarray
    dcount: np.ndarray
    sat: np.ndarray
    act: np.ndarray
    dd: np.ndarray


@kernel
def delta(x, o, field, price, i):
    """The QUBO-and-price change of flipping variable i (int64): float64."""
    d = (1.0 - 2.0 * x[i]) * field[i]
    return d + price if x[i] == o[i] else d - price


@kernel
def total_viol(act, rows):
    """Total violation of the rows (:class:`~flipfix.repair.kernels.bundles.Rows`) at
    activities ``act`` float64 (m,)."""
    lo, hi, rtol = rows.lo, rows.hi, rows.rtol
    v = 0.0
    for r in range(act.size):
        v += row_viol(act[r], lo[r], hi[r], rtol[r])
    return v


@kernel
def eval_flip(i, S, dist, C, R, price):
    """(objective change, violation change, new distance) of flipping variable i.

    S :class:`State`; dist int64 its distance from the candidate; C
    :class:`~flipfix.repair.kernels.bundles.Counts` and R
    :class:`~flipfix.repair.kernels.bundles.Rows` (the full maps, or the narrow ones of
    :class:`~flipfix.repair.solvers.greedy.groups.Narrow`); price float64.
    """
    x, o, field, dcount, sat, act, dd = S
    cp_ptr, cp_table, term_pen, term_coef, term_arity = (C.cp_ptr, C.cp_table, C.term_pen,
                                                         C.term_coef, C.term_arity)
    lit_val, vt_ptr, vt_term, vt_lit = C.lit_val, C.vt_ptr, C.vt_term, C.vt_lit
    col_ptr, col_row, col_val, lo, hi, rtol = (R.col_ptr, R.col_row, R.col_val, R.lo, R.hi,
                                               R.rtol)
    xi = x[i]
    dobj = (1.0 - 2.0 * xi) * field[i]
    # count penalties: term t containing i changes its satisfied-literal count by +-1
    for q in range(vt_ptr[i], vt_ptr[i + 1]):
        t = vt_term[q]
        lit = vt_lit[q]
        a = term_arity[t]
        s = sat[t]
        before = 1 if s == a else 0
        s2 = s - 1 if xi == lit_val[lit] else s + 1
        after = 1 if s2 == a else 0
        dd[term_pen[t]] += term_coef[t] * (after - before)
    for q in range(vt_ptr[i], vt_ptr[i + 1]):
        pen = term_pen[vt_term[q]]
        if dd[pen] != 0:
            base = cp_ptr[pen]
            d0 = dcount[pen]
            dobj += cp_table[base + d0 + dd[pen]] - cp_table[base + d0]
            dd[pen] = 0
    dviol = 0.0
    sgn = 1.0 - 2.0 * xi
    for q in range(col_ptr[i], col_ptr[i + 1]):
        r = col_row[q]
        a0 = act[r]
        a1 = a0 + sgn * col_val[q]
        dviol += row_viol(a1, lo[r], hi[r], rtol[r]) - row_viol(a0, lo[r], hi[r], rtol[r])
    nd = dist + 1 if xi == o[i] else dist - 1
    dobj += price * (nd - dist)
    return dobj, dviol, nd


@kernel
def leave(i, xi, S, C, R):
    """Variable i leaves value xi (int8): S's term states, counts and row activities
    follow (its fields and x are the caller's). Order-free: applying several variables'
    moves in any order gives the same state."""
    dcount, sat, act = S.dcount, S.sat, S.act
    term_pen, term_coef, term_arity, lit_val = C.term_pen, C.term_coef, C.term_arity, C.lit_val
    vt_ptr, vt_term, vt_lit = C.vt_ptr, C.vt_term, C.vt_lit
    col_ptr, col_row, col_val = R.col_ptr, R.col_row, R.col_val
    sgn = 1.0 - 2.0 * xi
    for q in range(vt_ptr[i], vt_ptr[i + 1]):
        t = vt_term[q]
        a = term_arity[t]
        s = sat[t]
        before = 1 if s == a else 0
        s2 = s - 1 if xi == lit_val[vt_lit[q]] else s + 1
        sat[t] = s2
        after = 1 if s2 == a else 0
        dcount[term_pen[t]] += term_coef[t] * (after - before)
    for q in range(col_ptr[i], col_ptr[i + 1]):
        act[col_row[q]] += sgn * col_val[q]


@kernel
def flip_state(i, S, dist, Q, C, R):
    """Flip variable i in S (fields by Q :class:`~flipfix.repair.kernels.bundles.Qubo`,
    term states, counts, activities), in O(degree); returns the new distance."""
    x, o, field = S.x, S.o, S.field
    indptr, indices, data = Q.indptr, Q.indices, Q.data
    xi = x[i]
    sgn = 1.0 - 2.0 * xi
    leave(i, xi, S, C, R)
    for p in range(indptr[i], indptr[i + 1]):
        field[indices[p]] += sgn * data[p]
    x[i] = 1 - xi
    return dist + 1 if xi == o[i] else dist - 1


@kernel
def fresh_counts(x, C, R, dcount, sat, act):
    """x's count-penalty counts ``dcount`` int64 (P,), term states ``sat`` int64 (T,) and
    row activities ``act`` float64 (m,), computed anew."""
    cp_const, term_pen, term_coef, term_arity = C.cp_const, C.term_pen, C.term_coef, C.term_arity
    lit_ptr, lit_var, lit_val = C.lit_ptr, C.lit_var, C.lit_val
    a_ptr, a_col, a_val = R.a_ptr, R.a_col, R.a_val
    for p in range(cp_const.size):
        dcount[p] = cp_const[p]
    for t in range(term_pen.size):
        s = 0
        for q in range(lit_ptr[t], lit_ptr[t + 1]):
            s += x[lit_var[q]] == lit_val[q]
        sat[t] = s
        if s == term_arity[t]:
            dcount[term_pen[t]] += term_coef[t]
    for r in range(act.size):
        a = 0.0
        for q in range(a_ptr[r], a_ptr[r + 1]):
            a += a_val[q] * x[a_col[q]]
        act[r] = a
