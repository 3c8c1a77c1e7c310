"""Grouped single flips: one tournament tree per group of variables.

With late rows or count penalties, the change of a flip has a local part (QUBO field,
flip price, the narrow structures the variable is in) and a part from the wide
structures (long rows, long count penalties of single-literal terms) that depends only
on which way the flip moves each of them. Variables with the same such signature form a
group (:mod:`~flipfix.repair.solvers.greedy.layout`); each group keeps its variables in a
tournament tree by local part, so a step looks at one top per group
(:func:`best_group_top`) and a flip re-keys only the variables that share a structure
with it (:func:`flip`).

With a radius (``par`` 2) each group has two trees, by whether a flip moves the variable
away from the candidate (tree ``2 g + 1``, holding the variables at their candidate's
bit) or back towards it (tree ``2 g``).
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

from flipfix.repair.kernels.bundles import Counts, Rows
from flipfix.repair.solvers.greedy.jit import inline, kernel
from flipfix.repair.solvers.greedy.state import delta, eval_flip, flip_state, row_viol
from flipfix.repair.solvers.greedy.tournament import tree_clear, tree_drain, tree_set

__all__ = ["Groups", "Narrow", "narrow_view", "Trees", "trees_for", "init_trees", "drain_trees",
           "rekey_all", "best_group_top", "flip"]

_INF = np.inf


class Groups(NamedTuple):
    """The groups of one problem, n variables, G base groups.

    gbase int64 (n, 2): the base group of variable i when it holds bit b; lp int64 (n, 2):
    its leaf in that group's tree; glb float64 (G,): the least offset each group's wide
    structures can ever add; gmem_ptr int64 (G+1,), gmem int64: each group's members,
    ascending (leaf p holds member p); gs_ptr int64 (G+1,), gs_kind int64, gs_id int64,
    gs_val float64: each group's signature, the change of each wide structure (kind 0: a
    row, its activity change; kind 1: a count penalty, the change of its count d);
    qualify float64 (2, n): the QUBO-and-price change below which variable j holding bit b
    may enter its tree (see :func:`rekey_all`).
    """

    gbase: np.ndarray
    lp: np.ndarray
    glb: np.ndarray
    gmem_ptr: np.ndarray
    gmem: np.ndarray
    gs_ptr: np.ndarray
    gs_kind: np.ndarray
    gs_id: np.ndarray
    gs_val: np.ndarray
    qualify: np.ndarray


class Narrow(NamedTuple):
    """The narrow structures as the kernels read them: counts, rows: the problem's
    :class:`~flipfix.repair.kernels.bundles.Counts` and
    :class:`~flipfix.repair.kernels.bundles.Rows` with their by-variable maps restricted
    to narrow structures (what a flip's local change depends on); vs_ptr, vs_struct,
    sm_ptr, sm_var: variable -> narrow structures -> members (see
    :class:`~flipfix.repair.solvers.greedy.layout.NarrowMaps`)."""

    counts: Counts
    rows: Rows
    vs_ptr: np.ndarray
    vs_struct: np.ndarray
    sm_ptr: np.ndarray
    sm_var: np.ndarray


@inline
def narrow_view(C, R, maps):
    """The :class:`Narrow` of the problem's bundles C, R and its
    :class:`~flipfix.repair.solvers.greedy.layout.NarrowMaps` (no copies)."""
    counts = Counts(C.cp_ptr, C.cp_table, C.cp_const, C.term_pen, C.term_coef, C.term_arity,
                    C.lit_ptr, C.lit_var, C.lit_val, maps.vt_ptr, maps.vt_term, maps.vt_lit)
    rows = Rows(R.a_ptr, R.a_col, R.a_val, maps.col_ptr, maps.col_row, maps.col_val, R.lo,
                R.hi, R.rtol)
    return Narrow(counts, rows, maps.vs_ptr, maps.vs_struct, maps.sm_ptr, maps.sm_var)


class Trees(NamedTuple):
    """The trees of one kernel call, T = G * par of them (none without groups).

    key float64 (slots,), item int64 (slots,): the trees' nodes, tree t's from base[t]
    (:mod:`~flipfix.repair.solvers.greedy.tournament`); base int64 (T,); size int64 (T,)
    each tree's leaf count (a power of two, at least its group's members).
    """

    key: np.ndarray
    item: np.ndarray
    base: np.ndarray
    size: np.ndarray


def trees_for(members: np.ndarray, par: int, use_groups: bool):
    """(base, size) int64 (T,) of the trees for groups of ``members`` int64 (G,) free
    variables each, ``par`` trees per group; empty without groups."""
    if not use_groups:
        return np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64)
    leaves = 1 << np.ceil(np.log2(np.maximum(members, 1))).astype(np.int64)
    size = np.repeat(leaves, par).astype(np.int64)
    base = np.zeros(size.size, dtype=np.int64)
    base[1:] = np.cumsum(2 * size[:-1])
    return base, size


@kernel
def init_trees(T, groups, par):
    """Set every tree's leaf items (they never change) and clear its keys."""
    tkey, titem, tb, tn = T
    gmem_ptr, gmem = groups.gmem_ptr, groups.gmem
    for g in range(tn.size):
        gb = g // par
        cnt = gmem_ptr[gb + 1] - gmem_ptr[gb]
        for p in range(tn[g]):
            titem[tb[g] + tn[g] + p] = gmem[gmem_ptr[gb] + p] if p < cnt else -1
        tree_clear(tkey, titem, tb[g], tn[g])


@kernel
def drain_trees(T, stack):
    """Every tree's leaves +inf again (``stack`` int64 scratch, see ``tree_drain``)."""
    for g in range(T.size.size):
        tree_drain(T.key, T.base[g], T.size[g], stack)


@kernel
def _tree_of(groups, par, j, b, o):
    """The tree of variable j holding bit b (o int8 (n,) the candidate)."""
    return groups.gbase[j, b] * par + (1 if par == 2 and b == o[j] else 0)


@kernel
def _rekey(j, S, narrow, groups, T, P, fixed):
    """Recompute variable j's local change; its leaf in its group's tree holds it only
    while it could be taken (local change + the group's least possible offset below -tol)."""
    if fixed[j] >= 0:
        return
    x, o = S.x, S.o
    par, tol = P.par, P.tol
    dobj, dviol, nd = eval_flip(j, S, np.int64(0), narrow.counts, narrow.rows, P.price)
    b = x[j]
    gb = groups.gbase[j, b]
    g = _tree_of(groups, par, j, b, o)
    ok = dviol <= 1e-12 and dobj + groups.glb[gb] < -tol
    tree_set(T.key, T.item, T.base[g], T.size[g], groups.lp[j, b], dobj if ok else _INF)


@kernel
def rekey_all(S, narrow, groups, T, P, fixed):
    """Re-key every free variable into empty trees. A variable in no narrow count penalty
    can only lose from its narrow rows, so its QUBO-and-price change already tells when it
    cannot qualify: below ``qualify[b, j]`` (float64 (2, n): -tol minus the least offset of
    j's group when j holds bit b; -inf for a pinned j; +inf for a j in a narrow count
    penalty, which always takes the full evaluation). One contiguous pass; near a minimum
    the branch is rarely taken, so a plain ``if`` beats a branch-free list here."""
    x, o, field = S.x, S.o, S.field
    qualify, price = groups.qualify, P.price
    for j in range(x.size):
        if delta(x, o, field, price, j) < qualify[x[j], j]:
            _rekey(j, S, narrow, groups, T, P, fixed)


@kernel
def best_group_top(S, dist, T, groups, C, R, P):
    """(change, variable) of the best feasible single flip below -tol, or (-tol, -1):
    each tree's top plus its group's offset under the current wide-structure state (C, R
    the full :mod:`~flipfix.repair.kernels.bundles`)."""
    act, dcount = S.act, S.dcount
    key, item, tb = T.key, T.item, T.base
    gs_ptr, gs_kind, gs_id, gs_val = groups.gs_ptr, groups.gs_kind, groups.gs_id, groups.gs_val
    cp_table, cp_ptr = C.cp_table, C.cp_ptr
    lo, hi, rtol = R.lo, R.hi, R.rtol
    par, radius = P.par, P.radius
    best = -P.tol
    bi = np.int64(-1)
    for g in range(tb.size):
        s0 = tb[g] + 1  # the root
        top = key[s0]
        if top == _INF:
            continue
        if par == 2:
            nd = dist + 1 if g % 2 == 1 else dist - 1
            if not (nd <= radius or nd < dist):
                continue
        gb = g // par
        off = 0.0
        ok = True
        for q in range(gs_ptr[gb], gs_ptr[gb + 1]):
            sid = gs_id[q]
            v = gs_val[q]
            if gs_kind[q] == 0:
                a0 = act[sid]
                if (row_viol(a0 + v, lo[sid], hi[sid], rtol[sid])
                        - row_viol(a0, lo[sid], hi[sid], rtol[sid])) > 1e-12:
                    ok = False
                    break
            else:
                b = cp_ptr[sid]
                d0 = dcount[sid]
                off += cp_table[b + d0 + int(v)] - cp_table[b + d0]
        if not ok:
            continue
        val = top + off
        if val < best or (val == best and item[s0] < bi):
            best = val
            bi = item[s0]
    return best, bi


@inline
def flip(i, S, dist, Q, C, R, narrow, groups, T, P, todo):
    """Flip variable i (all state) and, with groups, re-key every variable whose local
    change it alters: i, its QUBO neighbours, the members of its narrow structures.
    ``todo`` int64 (>= 1 + degree + co-members,) is scratch. Returns the new distance."""
    fixed = Q.fixed
    x, o, field = S.x, S.o, S.field
    par = P.par
    if P.use_groups:  # i leaves its group's tree: flipped, it belongs to another
        b = x[i]
        g = _tree_of(groups, par, i, b, o)
        tree_set(T.key, T.item, T.base[g], T.size[g], groups.lp[i, b], _INF)
    dist = flip_state(i, S, dist, Q, C, R)
    if not P.use_groups:
        return dist
    indptr, indices = Q.indptr, Q.indices
    vs_ptr, vs_struct = narrow.vs_ptr, narrow.vs_struct
    sm_ptr, sm_var = narrow.sm_ptr, narrow.sm_var
    cnt = 0
    todo[cnt] = i
    cnt += 1
    for p in range(indptr[i], indptr[i + 1]):
        todo[cnt] = indices[p]
        cnt += 1
    for q in range(vs_ptr[i], vs_ptr[i + 1]):
        s = vs_struct[q]
        for e in range(sm_ptr[s], sm_ptr[s + 1]):
            todo[cnt] = sm_var[e]
            cnt += 1
    qualify, price = groups.qualify, P.price
    for t in range(cnt):
        j = todo[t]
        b = x[j]
        if delta(x, o, field, price, j) < qualify[b, j]:
            _rekey(j, S, narrow, groups, T, P, fixed)
        elif fixed[j] < 0:  # what _rekey would conclude (narrow rows only add violation)
            g = _tree_of(groups, par, j, b, o)
            tree_set(T.key, T.item, T.base[g], T.size[g], groups.lp[j, b], _INF)
    return dist
