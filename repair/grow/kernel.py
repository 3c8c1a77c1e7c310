"""Annealing from a stored candidate towards robust or diverse states (one chain per call).

The chain minimises the surrogate

    S(x) = E(x) - reward_free * F(x) - reward_distance * D(x)

under the hard cap ``E(x) - E(x0) <= cap`` (the energy tolerance), where

* E is the problem's own energy (the :class:`~flipfix.repair.kernels.bundles.Qubo` bundle:
  ``x h + x J x / 2``, J symmetric CSR, 0/1 bits);
* F counts the free moves: plain variables (outside declared decisions) whose single flip
  changes E by ``<= thr``, plus decisions with a valid one-step move (one-hot: swap of the
  "on" bit with another, a pair flip; domain wall: the wall one step, a single flip)
  changing E by ``<= thr`` -- the same definition as
  :mod:`flipfix.repair.audit.robustness`, which confirms every result afterwards;
* D is the distance to the nearest reference state (the stored library), in bits, or in
  decisions (a plain variable counts as a decision of its own).

Hard rows (:class:`~flipfix.repair.kernels.bundles.Rows`, ``lo <= A x <= hi``; none when the
bundle is empty) bound the search: x0 must satisfy them, a move that would break one is never
made, and a free move must keep them too (so F also changes when a row's activity moves: the
members of the rows a move touches are refreshed).

Moves keep every valid decision valid: plain variables flip singly, a one-hot decision
swaps its "on" bit with another bit of it, a domain wall moves one step; a decision whose
bits are not a valid code word never moves. Each proposal is applied tentatively (fields of
the neighbours, free flags of the touched variables and decisions, distances), accepted by
Metropolis on the change of S, or undone. Nothing is approximated: F and D are exact after
every move.

Randomness, the schedule and the acceptance rule are the annealing kernel's own
(:mod:`flipfix.repair.kernels.metropolis`: ``_stream``, ``_uniform``, ``_accept``,
``temperature`` over a :class:`~flipfix.repair.kernels.metropolis.Plan`): a chain's answer
depends on (seed, chain index) alone. ``stop[0] != 0`` (set by another thread) ends the
chain after the sweep in progress.
"""

from __future__ import annotations

from typing import NamedTuple

import numba as nb
import numpy as np

from flipfix.repair.kernels.metropolis import _accept, _stream, _uniform, temperature
from flipfix.repair.solvers.greedy.jit import entry, kernel

__all__ = ["Groups", "Scratch", "new_scratch", "run_chain", "ONE_HOT", "DOMAIN_WALL", "BITS",
           "DECISIONS"]

#: group kinds
ONE_HOT, DOMAIN_WALL = 0, 1
#: distance units
BITS, DECISIONS = 0, 1


class Groups(NamedTuple):
    """The problem's declared decisions as flat arrays (G decisions).

    plain int64 (np,): variables outside every decision, ascending; var_group int64 (n,):
    each variable's decision, -1 if plain; g_ptr int64 (G+1,), g_col int64 (total bits,):
    each decision's bit columns in encoding order (one-hot: bit m = value m; domain wall:
    bit i = [value > i]); g_kind int8 (G,): ONE_HOT or DOMAIN_WALL; j_ptr int64 (G+1,),
    j_val float64 (sum of b*b,): each decision's dense b x b block of couplings J between
    its own bits (row-major).
    """

    plain: np.ndarray
    var_group: np.ndarray
    g_ptr: np.ndarray
    g_col: np.ndarray
    g_kind: np.ndarray
    j_ptr: np.ndarray
    j_val: np.ndarray


class Scratch(NamedTuple):
    """One chain's working arrays (the kernels allocate nothing; see
    :mod:`flipfix.repair.solvers.greedy.jit` for why: no reference counting in the hot loop).

    x int8 (n,); field float64 (n,) ``h + J x``; act float64 (m,) row activities; gval int64
    (G,) decision values; pfree int8 (n,), gfree int8 (G,) free flags; dist int64 (K,)
    distances to the references; stamp int64 (n,), gstamp int64 (G,), cnt int64 (1,): the
    refresh stamps; rng uint64 (1,).
    """

    x: np.ndarray
    field: np.ndarray
    act: np.ndarray
    gval: np.ndarray
    pfree: np.ndarray
    gfree: np.ndarray
    dist: np.ndarray
    stamp: np.ndarray
    gstamp: np.ndarray
    cnt: np.ndarray
    rng: np.ndarray


def new_scratch(n: int, G: int, K: int, m: int) -> Scratch:
    """Working arrays of one chain: n variables, G decisions, K references, m rows."""
    return Scratch(np.zeros(n, np.int8), np.zeros(n), np.zeros(m), np.zeros(G, np.int64),
                   np.zeros(n, np.int8), np.zeros(G, np.int8), np.zeros(K, np.int64),
                   np.zeros(n, np.int64), np.zeros(G, np.int64), np.zeros(1, np.int64),
                   np.zeros(1, np.uint64))


@nb.njit(cache=True, inline="always")
def _cost(x, field, i):
    return (1.0 - 2.0 * x[i]) * field[i]


@nb.njit(cache=True, inline="always")
def _shift(R, act, x, i, sign):
    """Add ``sign`` times the activity change of flipping bit i (at its current value)."""
    sgn = sign * (1.0 - 2.0 * x[i])
    for q in range(R.col_ptr[i], R.col_ptr[i + 1]):
        act[R.col_row[q]] += sgn * R.col_val[q]


@nb.njit(cache=True, inline="always")
def _rows_hold(R, act, i):
    """Every row containing bit i is within its bounds (with its tolerance)."""
    for q in range(R.col_ptr[i], R.col_ptr[i + 1]):
        r = R.col_row[q]
        if act[r] < R.lo[r] - R.rtol[r] or act[r] > R.hi[r] + R.rtol[r]:
            return False
    return True


@nb.njit(cache=True, inline="always")
def _feasible_move(R, act, x, i, j):
    """Flipping i (and j >= 0, i != j) keeps every hard row; act is left unchanged."""
    if R.lo.size == 0:
        return True
    _shift(R, act, x, i, 1.0)
    if j >= 0:
        _shift(R, act, x, j, 1.0)
    ok = _rows_hold(R, act, i) and (j < 0 or _rows_hold(R, act, j))
    _shift(R, act, x, i, -1.0)
    if j >= 0:
        _shift(R, act, x, j, -1.0)
    return ok


@nb.njit(cache=True, inline="always")
def _swap_cost(x, field, Gr, g, a, b):
    """Energy change of moving one-hot decision g from bit a to bit b (positions in g)."""
    s = Gr.g_ptr[g]
    k = Gr.g_ptr[g + 1] - s
    ia, ib = Gr.g_col[s + a], Gr.g_col[s + b]
    # pair flip: c_a + c_b + J_ab (1 - 2 x_a)(1 - 2 x_b), here (1 - 2)(1 - 0) = -1
    return _cost(x, field, ia) + _cost(x, field, ib) - Gr.j_val[Gr.j_ptr[g] + a * k + b]


@kernel
def _group_free(x, field, Gr, R, act, gval, g, thr):
    v = gval[g]
    if v < 0:
        return 0
    s = Gr.g_ptr[g]
    k = Gr.g_ptr[g + 1] - s
    if Gr.g_kind[g] == ONE_HOT:
        on = Gr.g_col[s + v]
        for m in range(k):
            if m != v and _swap_cost(x, field, Gr, g, v, m) <= thr \
                    and _feasible_move(R, act, x, on, Gr.g_col[s + m]):
                return 1
        return 0
    if v > 0 and _cost(x, field, Gr.g_col[s + v - 1]) <= thr \
            and _feasible_move(R, act, x, Gr.g_col[s + v - 1], -1):
        return 1
    if v < k and _cost(x, field, Gr.g_col[s + v]) <= thr \
            and _feasible_move(R, act, x, Gr.g_col[s + v], -1):
        return 1
    return 0


@nb.njit(cache=True, inline="always")
def _plain_free(x, field, R, act, v, thr):
    return 1 if _cost(x, field, v) <= thr and _feasible_move(R, act, x, v, -1) else 0


@nb.njit(cache=True, inline="always")
def _flip(Q, x, field, i):
    sgn = 1.0 - 2.0 * x[i]
    for p in range(Q.indptr[i], Q.indptr[i + 1]):
        field[Q.indices[p]] += sgn * Q.data[p]
    x[i] = 1 - x[i]


@kernel
def _touch(Gr, R, x, field, act, gval, pfree, gfree, stamp, gstamp, c, v, thr):
    """Recompute the free flag of v (or of its decision) once per stamp c; returns the
    change of F."""
    if stamp[v] == c:
        return 0
    stamp[v] = c
    g = Gr.var_group[v]
    if g < 0:
        new = _plain_free(x, field, R, act, v, thr)
        d = new - pfree[v]
        pfree[v] = new
        return d
    if gstamp[g] == c:
        return 0
    gstamp[g] = c
    new = _group_free(x, field, Gr, R, act, gval, g, thr)
    d = new - gfree[g]
    gfree[g] = new
    return d


@kernel
def _refresh(Q, Gr, R, x, field, act, gval, pfree, gfree, stamp, gstamp, cnt, i, j, thr):
    """Free flags of i, j (j = -1: none), their neighbours and the members of the rows they
    belong to, recomputed; returns the change of F."""
    cnt[0] += 1
    c = cnt[0]
    dF = 0
    for t in range(2):
        b = i if t == 0 else j
        if b < 0:
            continue
        dF += _touch(Gr, R, x, field, act, gval, pfree, gfree, stamp, gstamp, c, b, thr)
        for p in range(Q.indptr[b], Q.indptr[b + 1]):
            dF += _touch(Gr, R, x, field, act, gval, pfree, gfree, stamp, gstamp, c,
                         nb.int64(Q.indices[p]), thr)
        for q in range(R.col_ptr[b], R.col_ptr[b + 1]):
            r = R.col_row[q]
            for a in range(R.a_ptr[r], R.a_ptr[r + 1]):
                dF += _touch(Gr, R, x, field, act, gval, pfree, gfree, stamp, gstamp, c,
                             R.a_col[a], thr)
    return dF


@nb.njit(cache=True, inline="always")
def _bit_dist(x, i, L, dist):
    """Bit i has just flipped: distances in bits follow."""
    for r in range(dist.size):
        dist[r] += 1 if x[i] != L[r, i] else -1


@nb.njit(cache=True, inline="always")
def _value_dist(g, a, b, Lv, dist):
    """Decision g moved from value a to b: distances in decisions follow."""
    for r in range(dist.size):
        dist[r] += (1 if Lv[r, g] != b else 0) - (1 if Lv[r, g] != a else 0)


@nb.njit(cache=True, inline="always")
def _dmin(dist):
    if dist.size == 0:
        return 0.0
    m = dist[0]
    for r in range(1, dist.size):
        if dist[r] < m:
            m = dist[r]
    return float(m)


@nb.njit(cache=True, inline="always")
def _move(Q, Gr, R, x, field, act, gval, L, Lv, dist, unit, i, j, g, to):
    """Apply a move: flip i (and j >= 0); decision g (>= 0) takes value ``to``; row
    activities follow."""
    _shift(R, act, x, i, 1.0)
    _flip(Q, x, field, i)
    if j >= 0:
        _shift(R, act, x, j, 1.0)
        _flip(Q, x, field, j)
    if g >= 0:
        frm = gval[g]
        gval[g] = to
        if unit == DECISIONS:
            _value_dist(g, frm, to, Lv, dist)
    if unit == BITS or g < 0:
        _bit_dist(x, i, L, dist)
        if j >= 0:
            _bit_dist(x, j, L, dist)


@entry
def run_chain(Q, Gr, R, plan, params, unit, L, Lv, x0, gval0, chain, stop, sc, best, out):
    """Anneal one chain from x0 (int8 (n,), within the rows R) and write its best state into
    ``best``.

    params float64 (5,): reward_free, reward_distance, thr (free-move threshold, round-off
    included), cap (largest energy increase over x0), tol (objective round-off).
    unit: BITS or DECISIONS; L int8 (K, n) and Lv int64 (K, G): reference states and their
    decision values (-1 invalid); gval0 int64 (G,): x0's decision values; chain: this
    chain's stream index under ``plan.seed``; stop uint8 (1,): non-zero ends the run; sc: a
    :class:`Scratch` of matching sizes (overwritten).
    out float64 (5,): energy change of ``best`` over x0, its F, its D, its S, sweeps run.
    """
    rf, rd, thr, cap, tol = params[0], params[1], params[2], params[3], params[4]
    n = x0.size
    G = gval0.size
    x, field, act, gval = sc.x, sc.field, sc.act, sc.gval
    pfree, gfree, dist, stamp, gstamp, cnt, rng = (sc.pfree, sc.gfree, sc.dist, sc.stamp,
                                                   sc.gstamp, sc.cnt, sc.rng)
    for i in range(n):
        x[i] = x0[i]
        field[i] = Q.h[i]
        pfree[i] = 0
        stamp[i] = 0
    for g in range(G):
        gval[g] = gval0[g]
        gfree[g] = 0
        gstamp[g] = 0
    cnt[0] = 0
    for i in range(n):
        if x[i]:
            for p in range(Q.indptr[i], Q.indptr[i + 1]):
                field[Q.indices[p]] += Q.data[p]
    for r in range(R.lo.size):
        a = 0.0
        for q in range(R.a_ptr[r], R.a_ptr[r + 1]):
            a += R.a_val[q] * x[R.a_col[q]]
        act[r] = a
    F = 0
    for f in range(Gr.plain.size):
        i = Gr.plain[f]
        pfree[i] = _plain_free(x, field, R, act, i, thr)
        F += pfree[i]
    for g in range(G):
        gfree[g] = _group_free(x, field, Gr, R, act, gval, g, thr)
        F += gfree[g]
    K = L.shape[0]
    for r in range(K):
        d = 0
        if unit == BITS:
            for i in range(n):
                d += x[i] != L[r, i]
        else:
            for f in range(Gr.plain.size):
                i = Gr.plain[f]
                d += x[i] != L[r, i]
            for g in range(G):
                d += 1 if (gval[g] != Lv[r, g] or gval[g] < 0) else 0
        dist[r] = d
    D = _dmin(dist)
    rng[0] = _stream(plan.seed, chain)
    dE = 0.0
    S = -rf * F - rd * D
    for i in range(n):
        best[i] = x[i]
    bE, bF, bD, bS = 0.0, float(F), D, S
    sweeps = 0
    for s in range(plan.sweeps):
        if stop[0] != 0:
            break
        beta = 1.0 / temperature(plan, s)
        for f in range(Gr.plain.size + G):
            i, j, g, to = -1, -1, -1, -1
            if f < Gr.plain.size:
                i = Gr.plain[f]
                e = _cost(x, field, i)
            else:
                g = f - Gr.plain.size
                v = gval[g]
                if v < 0:
                    continue
                a = Gr.g_ptr[g]
                k = Gr.g_ptr[g + 1] - a
                if Gr.g_kind[g] == ONE_HOT:
                    if k < 2:
                        continue
                    to = int(_uniform(rng) * (k - 1))
                    if to >= v:
                        to += 1
                    i, j = Gr.g_col[a + v], Gr.g_col[a + to]
                    e = _swap_cost(x, field, Gr, g, v, to)
                else:
                    if k < 1:
                        continue
                    up = _uniform(rng) < 0.5
                    if v == 0:
                        up = True
                    elif v == k:
                        up = False
                    to = v + 1 if up else v - 1
                    i = Gr.g_col[a + v] if up else Gr.g_col[a + v - 1]
                    e = _cost(x, field, i)
            if dE + e > cap + tol or not _feasible_move(R, act, x, i, j):
                continue
            old = gval[g] if g >= 0 else -1
            _move(Q, Gr, R, x, field, act, gval, L, Lv, dist, unit, i, j, g, to)
            dF = _refresh(Q, Gr, R, x, field, act, gval, pfree, gfree, stamp, gstamp, cnt, i, j,
                          thr)
            D2 = _dmin(dist)
            change = e - rf * dF - rd * (D2 - D)
            if _accept(change, beta, rng):
                dE += e
                F += dF
                D = D2
                S += change
            else:
                _move(Q, Gr, R, x, field, act, gval, L, Lv, dist, unit, i, j, g, old)
                _refresh(Q, Gr, R, x, field, act, gval, pfree, gfree, stamp, gstamp, cnt, i, j,
                         thr)
        sweeps += 1
        if dE <= cap + tol and S < bS - tol:
            for i in range(n):
                best[i] = x[i]
            bE, bF, bD, bS = dE, float(F), D, S
    out[0] = bE
    out[1] = bF
    out[2] = bD
    out[3] = bS
    out[4] = sweeps
