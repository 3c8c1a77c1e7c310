"""The general kernel's arrays for one compiled problem: groups and narrow maps.

A row or count penalty over more than :data:`WIDE` variables is "wide": its share of a
flip's change is taken per group of variables (all members of a group move every wide
structure the same way, see :mod:`~flipfix.repair.solvers.greedy.groups`), not re-keyed
per member. The other ("narrow") structures keep per-variable maps: the variable's terms
and rows among them, and the members it shares a narrow structure with (re-keyed when
it flips). Everything here is built once per compiled problem (numpy) and cached on it.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

from flipfix.repair.kernels.bundles import Counts, Rows, late_arrays, objective_tol
from flipfix.repair.lowering.compiled import Compiled
from flipfix.repair.solvers.greedy.groups import Groups
from flipfix.repair.solvers.greedy.pairs import PairBounds, pair_bounds

__all__ = ["unique_rows", "WIDE", "MAX_WIDE", "MAX_GROUP_SHARE", "MIN_GROUPS", "NarrowMaps", "Layout",
           "GeneralArrays", "general_arrays", "groups_pay"]

#: A row or count penalty over more than this many variables is "wide": its share of a
#: flip's change is taken per group (see "grouped single flips"), not re-keyed per member.
#: Common practice for such a split; the figure is ours, set by bench/kernel.py.
WIDE = 64
#: More wide structures than this: no groups (their signature matrix is (2, n, wide)).
MAX_WIDE = 16
#: Grouped trees pay only while there are few groups; past this share of the free
#: variables the plain scan over free variables is used instead.
MAX_GROUP_SHARE = 0.25
#: ... but up to this many groups always use them.
MIN_GROUPS = 4


class NarrowMaps(NamedTuple):
    """The narrow structures' maps, n variables, m rows, P count penalties.

    vt_ptr int64 (n+1,), vt_term int64, vt_lit int64: each variable's literals in narrow
    count penalties (the :class:`~flipfix.repair.kernels.bundles.Counts` map restricted);
    col_ptr int64 (n+1,), col_row int64, col_val float64: each variable's narrow rows
    (the :class:`~flipfix.repair.kernels.bundles.Rows` map restricted); vs_ptr int64
    (n+1,), vs_struct int64: each variable's narrow structures (rows 0..m-1, then
    penalties m..m+P-1); sm_ptr int64 (m+P+1,), sm_var int64: each narrow structure's
    members. The kernel joins them to the problem's bundles
    (:func:`~flipfix.repair.solvers.greedy.groups.narrow_view`).
    """

    vt_ptr: np.ndarray
    vt_term: np.ndarray
    vt_lit: np.ndarray
    col_ptr: np.ndarray
    col_row: np.ndarray
    col_val: np.ndarray
    vs_ptr: np.ndarray
    vs_struct: np.ndarray
    sm_ptr: np.ndarray
    sm_var: np.ndarray


class Layout(NamedTuple):
    """groups int: base groups (n + 1 when the wide structures are too many: never worth
    trees); members int64 (groups,): how many free variables can be in each; trees:
    :class:`~flipfix.repair.solvers.greedy.groups.Groups`; narrow: :class:`NarrowMaps`;
    most int: the longest re-key list of one flip (the size of its scratch)."""

    groups: int
    members: np.ndarray
    trees: Groups
    narrow: NarrowMaps
    most: int


class GeneralArrays(NamedTuple):
    """What the general kernel takes for one problem: the late objective's counts and
    rows (:mod:`~flipfix.repair.kernels.bundles`), its :class:`Layout` and the pair moves'
    :class:`~flipfix.repair.solvers.greedy.pairs.PairBounds`."""

    counts: Counts
    rows: Rows
    layout: Layout
    bounds: PairBounds


def _csr(keys: np.ndarray, values: np.ndarray, n: int):
    """(ptr int64 (n+1,), values sorted by key, stable)."""
    order = np.argsort(keys, kind="stable")
    ptr = np.zeros(n + 1, dtype=np.int64)
    np.add.at(ptr, keys + 1, 1)
    return np.cumsum(ptr), values[order]


def unique_rows(M: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The distinct rows of M float64 (R, W), ascending (lexicographic, as
    ``np.unique(M, axis=0)`` orders them), and each row's position among them: (uniq
    float64 (U, W), inverse int64 (R,)). One stable sort of W keys (a 1-D sort when W is 1)
    instead of numpy's sort of R structured rows: at 200,000 rows and W = 1 about 10 times
    sooner. -0.0 and 0.0 are the same value here."""
    R, W = M.shape
    if W == 0:
        return np.zeros((min(R, 1), 0)), np.zeros(R, dtype=np.int64)
    order = np.argsort(M[:, 0], kind="stable") if W == 1 else np.lexsort(M.T[::-1])
    S = M[order]
    new = np.ones(R, dtype=bool)
    new[1:] = (S[1:] != S[:-1]).any(axis=1)
    inverse = np.empty(R, dtype=np.int64)
    inverse[order] = np.cumsum(new) - 1
    return S[new], inverse


def _layout(compiled: Compiled, cnt: Counts, rows: Rows, qubo_indptr: np.ndarray,
            tol: float) -> Layout:
    """Groups of variables by their wide-structure signature, and the narrow maps."""
    n = compiled.n
    t_pen, t_coef, t_ar, l_ptr = cnt.term_pen, cnt.term_coef, cnt.term_arity, cnt.lit_ptr
    l_var, l_val = cnt.lit_var, cnt.lit_val
    vt_ptr, vt_term, vt_lit = cnt.vt_ptr, cnt.vt_term, cnt.vt_lit
    a_ptr, a_col, a_val = rows.a_ptr, rows.a_col, rows.a_val
    col_ptr, col_row, col_val = rows.col_ptr, rows.col_row, rows.col_val
    m, P = a_ptr.size - 1, cnt.cp_const.size
    row_len = np.diff(a_ptr)
    pen_len = np.bincount(t_pen, minlength=P) if P else np.zeros(0, dtype=np.int64)
    single = np.ones(P, dtype=bool)
    if t_pen.size:
        np.logical_and.at(single, t_pen, t_ar == 1)
    wide_row = row_len > WIDE
    wide_pen = (pen_len > WIDE) & single
    # signature matrix: for (i, b) the change of each wide structure when i flips from b
    wr, wp = np.flatnonzero(wide_row), np.flatnonzero(wide_pen)
    W = wr.size + wp.size
    if W > MAX_WIDE:  # the signatures would be many and their matrix large: scan instead
        wr, wp, W = wr[:0], wp[:0], 0
        wide_row[:] = False
        wide_pen[:] = False
        too_many = True
    else:
        too_many = False
    M = np.zeros((2, n, W))
    for c, r in enumerate(wr):
        cols = a_col[a_ptr[r]:a_ptr[r + 1]]
        vals = a_val[a_ptr[r]:a_ptr[r + 1]]
        np.add.at(M[0], (cols, c), vals)     # 0 -> 1 adds a
        np.add.at(M[1], (cols, c), -vals)    # 1 -> 0 removes it
    lit_term = np.repeat(np.arange(t_pen.size, dtype=np.int64), np.diff(l_ptr))
    for c, p in enumerate(wp, start=wr.size):
        sel = t_pen[lit_term] == p
        v, lit, coef = l_var[sel], l_val[sel], t_coef[lit_term[sel]]
        for b in (0, 1):  # the literal (v, lit) is satisfied now iff b == lit
            np.add.at(M[b], (v, c), np.where(lit == b, -coef, coef).astype(np.float64))
    uniq, inv = unique_rows(M.reshape(2 * n, W))
    gbase = np.ascontiguousarray(inv.reshape(2, n).T, dtype=np.int64)
    free = compiled.fixed < 0
    groups = n + 1 if too_many else uniq.shape[0]  # n + 1: never worth the trees
    members = np.zeros(groups, dtype=np.int64)
    g0, g1 = gbase[free, 0], gbase[free, 1]
    np.add.at(members, g0, 1)
    np.add.at(members, g1[g1 != g0], 1)
    # each base group's members, ascending, and every (variable, bit)'s leaf in its group
    fidx = np.flatnonzero(free)
    pairs = np.concatenate([np.stack([g0, fidx], 1), np.stack([g1, fidx], 1)[g1 != g0]])
    pairs = pairs[np.lexsort((pairs[:, 1], pairs[:, 0]))]
    gmem_ptr = np.concatenate([[0], np.cumsum(members)]).astype(np.int64)
    gmem = np.ascontiguousarray(pairs[:, 1], dtype=np.int64)
    rank = np.arange(gmem.size, dtype=np.int64) - gmem_ptr[pairs[:, 0]]
    codes = pairs[:, 0] * n + pairs[:, 1]
    lp = np.zeros((n, 2), dtype=np.int64)
    for b in (0, 1):
        pos = np.searchsorted(codes, gbase[fidx, b] * n + fidx)
        lp[fidx, b] = rank[pos]
    nz_g, nz_c = np.nonzero(uniq)
    kinds = np.concatenate([np.zeros(wr.size, np.int64), np.ones(wp.size, np.int64)])
    ids = np.concatenate([wr, wp]).astype(np.int64)
    gs_ptr = np.zeros(groups + 1, dtype=np.int64)
    np.add.at(gs_ptr, nz_g + 1, 1)
    # narrow maps: variable -> terms of narrow penalties, variable -> narrow rows
    keep_t = ~wide_pen[t_pen[vt_term]] if vt_term.size else np.zeros(0, dtype=bool)
    keep_r = ~wide_row[col_row] if col_row.size else np.zeros(0, dtype=bool)
    # members of each narrow structure (rows 0..m-1, then penalties m..m+P-1)
    s_of, v_of = [], []
    for r in np.flatnonzero(~wide_row):
        cols = a_col[a_ptr[r]:a_ptr[r + 1]]
        s_of.append(np.full(cols.size, r, dtype=np.int64))
        v_of.append(cols.astype(np.int64))
    for p in np.flatnonzero(~wide_pen):
        vs = np.unique(l_var[t_pen[lit_term] == p])
        s_of.append(np.full(vs.size, m + p, dtype=np.int64))
        v_of.append(vs.astype(np.int64))
    s_all = np.concatenate(s_of) if s_of else np.zeros(0, np.int64)
    v_all = np.concatenate(v_of) if v_of else np.zeros(0, np.int64)
    sm_ptr, sm_var = _csr(s_all, v_all, m + P)
    vs_ptr, vs_struct = _csr(v_all, s_all, n)
    nvt_ptr = np.concatenate([[0], np.cumsum(np.bincount(
        np.repeat(np.arange(n), np.diff(vt_ptr))[keep_t], minlength=n))]).astype(np.int64)
    ncol_ptr = np.concatenate([[0], np.cumsum(np.bincount(
        np.repeat(np.arange(n), np.diff(col_ptr))[keep_r], minlength=n))]).astype(np.int64)
    # least offset each group can ever get: rows add none, a count penalty its table's
    # smallest step of that size
    glb = np.zeros(groups)
    for g, c in zip(nz_g, nz_c):
        if c >= wr.size:
            t = compiled.counts[int(ids[c])].table
            step = int(round(uniq[g, c]))
            lo_d, hi_d = max(0, -step), min(t.size, t.size - step)
            if hi_d > lo_d:
                glb[g] += min(0.0, float((t[lo_d + step:hi_d + step] - t[lo_d:hi_d]).min()))
    # the QUBO-and-price change below which j holding b may enter its tree: -tol minus
    # its group's least offset; +inf (always evaluate) for a j in a narrow count penalty,
    # -inf (never) for a pinned j
    qualify = np.ascontiguousarray((-tol - glb[gbase]).T)
    qualify[:, np.diff(nvt_ptr) > 0] = np.inf
    qualify[:, compiled.fixed >= 0] = -np.inf
    trees = Groups(gbase, lp, glb, gmem_ptr, gmem, np.cumsum(gs_ptr), kinds[nz_c], ids[nz_c],
                   uniq[nz_g, nz_c].astype(np.float64), qualify)
    narrow = NarrowMaps(nvt_ptr, vt_term[keep_t], vt_lit[keep_t], ncol_ptr, col_row[keep_r],
                        col_val[keep_r], vs_ptr, vs_struct, sm_ptr, sm_var)
    # a flip re-keys itself, its QUBO neighbours and its narrow structures' members
    shared = np.zeros(n, dtype=np.int64)
    np.add.at(shared, np.repeat(np.arange(n), np.diff(vs_ptr)), np.diff(sm_ptr)[vs_struct])
    most = int((1 + np.diff(qubo_indptr) + shared).max(initial=0))
    return Layout(int(groups), members, trees, narrow, most)


def general_arrays(compiled: Compiled) -> GeneralArrays:
    """Every array the general kernel needs, built once per compiled problem (cached)."""
    cached = getattr(compiled, "_greedy_general", None)
    if cached is None:
        late = late_arrays(compiled)
        tol = objective_tol(compiled)
        cached = GeneralArrays(late.counts, late.rows,
                               _layout(compiled, late.counts, late.rows, late.qubo.indptr, tol),
                               pair_bounds(late.qubo, late.rows, tol))
        compiled._greedy_general = cached
    return cached


def groups_pay(trees: int, nfree: int) -> bool:
    """Whether ``trees`` grouped trees beat the plain scan over ``nfree`` free variables
    (:data:`MAX_GROUP_SHARE`, :data:`MIN_GROUPS`, read at each call)."""
    return trees <= max(MIN_GROUPS, MAX_GROUP_SHARE * nfree)
