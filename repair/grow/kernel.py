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

__all__ = ["Groups", "run_chain", "ONE_HOT", "DOMAIN_WALL", "BITS", "DECISIONS"]

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


@nb.njit(cache=True, inline="always")
def _cost(x, field, i):
    return (1.0 - 2.0 * x[i]) * field[i]


@nb.njit(cache=True, inline="always")
def _swap_cost(x, field, Gr, g, a, b):
    """Energy change of moving one-hot decision g from bit a to bit b (positions in g)."""
    s = Gr.g_ptr[g]
    k = Gr.g_ptr[g + 1] - s
    ia, ib = Gr.g_col[s + a], Gr.g_col[s + b]
    # pair flip: c_a + c_b + J_ab (1 - 2 x_a)(1 - 2 x_b), here (1 - 2)(1 - 0) = -1
    return _cost(x, field, ia) + _cost(x, field, ib) - Gr.j_val[Gr.j_ptr[g] + a * k + b]


@nb.njit(cache=True, inline="always")
def _group_free(x, field, Gr, gval, g, thr):
    v = gval[g]
    if v < 0:
        return 0
    s = Gr.g_ptr[g]
    k = Gr.g_ptr[g + 1] - s
    if Gr.g_kind[g] == ONE_HOT:
        for m in range(k):
            if m != v and _swap_cost(x, field, Gr, g, v, m) <= thr:
                return 1
        return 0
    if v > 0 and _cost(x, field, Gr.g_col[s + v - 1]) <= thr:
        return 1
    if v < k and _cost(x, field, Gr.g_col[s + v]) <= thr:
        return 1
    return 0


@nb.njit(cache=True, inline="always")
def _flip(Q, x, field, i):
    sgn = 1.0 - 2.0 * x[i]
    for p in range(Q.indptr[i], Q.indptr[i + 1]):
        field[Q.indices[p]] += sgn * Q.data[p]
    x[i] = 1 - x[i]


@nb.njit(cache=True)
def _refresh(Q, Gr, x, field, gval, pfree, gfree, stamp, gstamp, cnt, i, j, thr):
    """Free flags of i, j (j = -1: none) and their neighbours, recomputed; returns the
    change of F."""
    cnt[0] += 1
    c = cnt[0]
    dF = 0
    for t in range(2):
        b = i if t == 0 else j
        if b < 0:
            continue
        for p in range(Q.indptr[b], Q.indptr[b + 1] + 1):
            v = b if p == Q.indptr[b + 1] else nb.int64(Q.indices[p])
            if stamp[v] == c:
                continue
            stamp[v] = c
            g = Gr.var_group[v]
            if g < 0:
                new = 1 if _cost(x, field, v) <= thr else 0
                dF += new - pfree[v]
                pfree[v] = new
            elif gstamp[g] != c:
                gstamp[g] = c
                new = _group_free(x, field, Gr, gval, g, thr)
                dF += new - gfree[g]
                gfree[g] = new
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
def _move(Q, Gr, x, field, gval, L, Lv, dist, unit, i, j, g, to):
    """Apply a move: flip i (and j >= 0); decision g (>= 0) takes value ``to``."""
    _flip(Q, x, field, i)
    if j >= 0:
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


@nb.njit(cache=True, nogil=True)
def run_chain(Q, Gr, plan, params, unit, L, Lv, x0, gval0, chain, stop, best, out):
    """Anneal one chain from x0 (int8 (n,)) and write its best state into ``best``.

    params float64 (5,): reward_free, reward_distance, thr (free-move threshold, round-off
    included), cap (largest energy increase over x0), tol (objective round-off).
    unit: BITS or DECISIONS; L int8 (K, n) and Lv int64 (K, G): reference states and their
    decision values (-1 invalid); gval0 int64 (G,): x0's decision values; chain: this
    chain's stream index under ``plan.seed``; stop uint8 (1,): non-zero ends the run.
    out float64 (5,): energy change of ``best`` over x0, its F, its D, its S, sweeps run.
    """
    rf, rd, thr, cap, tol = params[0], params[1], params[2], params[3], params[4]
    n = x0.size
    G = gval0.size
    x = x0.copy()
    gval = gval0.copy()
    field = Q.h.copy()
    for i in range(n):
        if x[i]:
            for p in range(Q.indptr[i], Q.indptr[i + 1]):
                field[Q.indices[p]] += Q.data[p]
    pfree = np.zeros(n, np.int8)
    gfree = np.zeros(G, np.int8)
    F = 0
    for f in range(Gr.plain.size):
        i = Gr.plain[f]
        pfree[i] = 1 if _cost(x, field, i) <= thr else 0
        F += pfree[i]
    for g in range(G):
        gfree[g] = _group_free(x, field, Gr, gval, g, thr)
        F += gfree[g]
    K = L.shape[0]
    dist = np.zeros(K, np.int64)
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
    stamp = np.zeros(n, np.int64)
    gstamp = np.zeros(G, np.int64)
    cnt = np.zeros(1, np.int64)
    rng = np.zeros(1, np.uint64)
    rng[0] = _stream(plan.seed, chain)
    dE = 0.0
    S = -rf * F - rd * D
    best[:] = x
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
            if dE + e > cap + tol:
                continue
            old = gval[g] if g >= 0 else -1
            _move(Q, Gr, x, field, gval, L, Lv, dist, unit, i, j, g, to)
            dF = _refresh(Q, Gr, x, field, gval, pfree, gfree, stamp, gstamp, cnt, i, j, thr)
            D2 = _dmin(dist)
            change = e - rf * dF - rd * (D2 - D)
            if _accept(change, beta, rng):
                dE += e
                F += dF
                D = D2
                S += change
            else:
                _move(Q, Gr, x, field, gval, L, Lv, dist, unit, i, j, g, old)
                _refresh(Q, Gr, x, field, gval, pfree, gfree, stamp, gstamp, cnt, i, j, thr)
        sweeps += 1
        if dE <= cap + tol and S < bS - tol:
            best[:] = x
            bE, bF, bD, bS = dE, float(F), D, S
    out[0] = bE
    out[1] = bF
    out[2] = bD
    out[3] = bS
    out[4] = sweeps
