"""Metropolis single-flip sweeps on the complete late objective, one start state at a time.

The objective of a state x (0/1, int8 (n,)) is the one greedy repair minimises:

* the merged search QUBO (:class:`~flipfix.repair.kernels.bundles.Qubo`);
* the non-linear count penalties ``table_p[d_p]``, whose change under a flip is read
  exactly from the tables at d before and after (:class:`~flipfix.repair.kernels.bundles.Counts`);
* ``price`` times the Hamming distance from the start's origin, and that distance kept
  within ``radius`` (a move that would leave the radius is not proposed);
* the hard rows (:class:`~flipfix.repair.kernels.bundles.Rows`) as exact penalties
  ``w_r * violation_r`` whose weight doubles after every sweep that ends with row r
  violated, so it rises until the state is feasible; and equality rows whose
  coefficients are all equal (one-hot, "exactly k of these") kept by the moves: a variable
  of such a row, while the row holds, moves only by a swap with a row member of the other
  value (one up, one down), which leaves the row as it is; and in a row whose members'
  |coefficients| differ (a knapsack capacity), a flip that would break the row while it
  holds is proposed together with a random member whose flip moves the row back (an item
  out as another goes in), one Metropolis decision on the pair's total change: between two
  full knapsacks a single flip is either uphill (an item out) or breaks the row;
* the fixings: pinned variables are set at the start and never visited.

Every state change is incremental: a flip attempt costs the variable's couplings, count
terms and rows (O(degree)); an accepted flip updates the local fields ``h + J x``, the
count-term states, the counts and the row activities where the variable appears. Nothing
is allocated inside the sweeps: the caller passes a :class:`Chain` of scratch arrays.

:func:`advance` is resumable: it runs a bounded amount of work (a "slice") and records
where it stopped in ``pos``, so the caller can check a deadline or a cancel event between
slices; slicing never changes the answers, since every start's random stream, schedule
and state live in the arrays passed in.
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numba as nb
import numpy as np

from flipfix.repair.kernels.jit import copy_into, counted_entry, counted_kernel, kernel
from flipfix.repair.kernels.rows import row_viol

__all__ = ["Moves", "Plan", "Chain", "advance", "flip_changes", "new_chain", "temperature",
           "temperature_at"]

_U = np.uint64
_GOLDEN = np.uint64(0x9E3779B97F4A7C15)
_MIX1 = np.uint64(0xBF58476D1CE4E5B9)
_MIX2 = np.uint64(0x94D049BB133111EB)
_S11, _S27, _S30, _S31 = np.uint64(11), np.uint64(27), np.uint64(30), np.uint64(31)
#: Metropolis never accepts a move with change/T above this (exp(-40) ~ 4e-18), so it is
#: rejected without drawing a random number.
_CUT = 40.0
#: A row's penalty weight stops rising at this multiple of its first weight (keeps the
#: products finite; 2**40 is far beyond any gain a move could offer).
_WEIGHT_CAP = 2.0 ** 40
#: Rows longer than this look for a swap partner by random probes instead of a scan.
SWAP_SCAN = 64
_PROBES = 16


class Moves(NamedTuple):
    """Per-problem move structure, built once (see ``flipfix.repair.solvers.anneal``).

    free int64 (nf,): the free variables, in sweep order (ascending);
    partner int64 (n,): the swap row of each variable (an equality row with equal
    coefficients containing it), -1 if none;
    wunit float64 (m,): each row's first penalty weight per unit of temperature scale
    (1 / the median |coefficient| of the row, so a typical member's violation costs one
    unit of scale); pairs bool (m,): the rows whose members' |coefficients| differ (a
    flip that would break such a row while it holds is proposed together with a member
    moving the row back, see :func:`_sweep`).
    """

    free: np.ndarray
    partner: np.ndarray
    wunit: np.ndarray
    pairs: np.ndarray


class Plan(NamedTuple):
    """One call's scalars: ``sweeps`` per start, the first ``heat`` of them heating from
    ``t_quench`` to ``t_turn``, the rest cooling back (see :func:`temperature`); ``price``
    per flip away from the origin; ``radius`` the largest distance from it; ``seed`` the
    call's seed (each start k draws from its own stream of (seed, k)); ``randomise``:
    start from uniformly random free bits instead of the given state; ``scale`` the
    temperature unit (row weights start at ``scale * wunit``); ``timed``: the schedule
    follows the chain's phase (``Chain.sched``, which the caller may pace between slices
    so that the chain ends cold at a given time) instead of the sweep count (see
    :func:`advance`)."""

    sweeps: int
    heat: int
    t_quench: float
    t_turn: float
    price: float
    radius: int
    seed: np.uint64
    randomise: bool
    scale: float
    timed: bool = False


class Chain(NamedTuple):
    """Scratch state of the start in progress (one per thread).

    x, best int8 (n,): the state and the best state seen at a sweep's end; field float64
    (n,) ``h + J x``; dcount int64 (P,), sat int64 (T,), dd int64 (P,) (zeros): the
    counts, each term's satisfied literals, a scratch of count changes; act, w float64 (m,):
    row activities and penalty weights; rng uint64 (1,); num float64 (4,): objective,
    violation, best objective, best violation; dist int64 (1,): distance from the origin;
    sched float64 (2,): the phase of the schedule (0 at the start, 1 at the quench) and its
    step per sweep (timed plans only).
    """

    x: np.ndarray
    best: np.ndarray
    field: np.ndarray
    dcount: np.ndarray
    sat: np.ndarray
    dd: np.ndarray
    act: np.ndarray
    w: np.ndarray
    rng: np.ndarray
    num: np.ndarray
    dist: np.ndarray
    sched: np.ndarray


def new_chain(n: int, P: int, T: int, m: int) -> Chain:
    """Scratch arrays for one thread (n variables, P count penalties, T terms, m rows)."""
    return Chain(np.zeros(n, np.int8), np.zeros(n, np.int8), np.zeros(n), np.zeros(P, np.int64),
                 np.zeros(T, np.int64), np.zeros(P, np.int64), np.zeros(m), np.zeros(m),
                 np.zeros(1, np.uint64), np.zeros(4), np.zeros(1, np.int64), np.zeros(2))


# ------------------------------------------------------------------ randomness
@nb.njit(cache=True, inline="always")
def _mix(z):
    """splitmix64's output function (a bijection of uint64 with good avalanche)."""
    z = (z ^ (z >> _S30)) * _MIX1
    z = (z ^ (z >> _S27)) * _MIX2
    return z ^ (z >> _S31)


@nb.njit(cache=True, inline="always")
def _uniform(rng):
    """Next number of the splitmix64 stream in rng[0], as a float64 in [0, 1)."""
    z = rng[0] + _GOLDEN
    rng[0] = z
    return nb.int64(_mix(z) >> _S11) * (1.0 / 9007199254740992.0)


@nb.njit(cache=True, inline="always")
def _stream(seed, k):
    """The first state of start k's stream under ``seed``."""
    return _mix(_mix(seed + _GOLDEN) ^ (_U(k) * _MIX2 + _GOLDEN))


# ---------------------------------------------------------------- schedule
@kernel
def temperature(plan, s):
    """Temperature of sweep s (0 <= s < plan.sweeps): geometric from ``t_quench`` up to
    ``t_turn`` over the ``heat`` first sweeps (ending at ``t_turn``), then geometric from
    ``t_turn`` down to ``t_quench`` (the last sweep is at ``t_quench``)."""
    lq = math.log(plan.t_quench)
    lt = math.log(plan.t_turn)
    if s < plan.heat:
        return math.exp(lq + (lt - lq) * (s + 1) / plan.heat)
    cool = plan.sweeps - plan.heat
    if cool <= 1:
        return plan.t_turn
    return math.exp(lt + (lq - lt) * (s - plan.heat) / (cool - 1))


@nb.njit(cache=True)
def temperature_at(plan, phi):
    """Temperature at phase phi in [0, 1] of a timed plan: geometric from ``t_quench`` up to
    ``t_turn`` over the first ``heat / sweeps`` of the phase, then geometric back down to
    ``t_quench`` at phi = 1 (the shape of :func:`temperature`, by phase)."""
    lq = math.log(plan.t_quench)
    lt = math.log(plan.t_turn)
    hf = plan.heat / plan.sweeps if plan.sweeps > 0 else 0.0
    phi = min(1.0, max(0.0, phi))
    if phi < hf:
        return math.exp(lq + (lt - lq) * phi / hf)
    return math.exp(lt + (lq - lt) * (phi - hf) / (1.0 - hf))


# ------------------------------------------------------------- one flip
@nb.njit(cache=True, inline="always")
def _change(i, x, o, field, dist, price, C, dcount, sat, dd, R, act, w):
    """Flipping i: (objective change, weighted row-penalty change, violation change,
    new distance). The objective is QUBO + count penalties + price * distance."""
    xi = x[i]
    dobj = (1.0 - 2.0 * xi) * field[i]
    vt_ptr, vt_term, vt_lit = C.vt_ptr, C.vt_term, C.vt_lit
    for q in range(vt_ptr[i], vt_ptr[i + 1]):
        t = vt_term[q]
        a = C.term_arity[t]
        s = sat[t]
        s2 = s - 1 if xi == C.lit_val[vt_lit[q]] else s + 1
        dd[C.term_pen[t]] += C.term_coef[t] * ((1 if s2 == a else 0) - (1 if s == a else 0))
    for q in range(vt_ptr[i], vt_ptr[i + 1]):
        pen = C.term_pen[vt_term[q]]
        if dd[pen] != 0:
            base = C.cp_ptr[pen] + dcount[pen]
            dobj += C.cp_table[base + dd[pen]] - C.cp_table[base]
            dd[pen] = 0
    dpen = 0.0
    dviol = 0.0
    sgn = 1.0 - 2.0 * xi
    for q in range(R.col_ptr[i], R.col_ptr[i + 1]):
        r = R.col_row[q]
        a0 = act[r]
        dv = (row_viol(a0 + sgn * R.col_val[q], R.lo[r], R.hi[r], R.rtol[r])
              - row_viol(a0, R.lo[r], R.hi[r], R.rtol[r]))
        dviol += dv
        dpen += w[r] * dv
    nd = dist + 1 if xi == o[i] else dist - 1
    return dobj + price * (nd - dist), dpen, dviol, nd


@nb.njit(cache=True, inline="always")
def _apply(i, x, field, Q, C, dcount, sat, R, act):
    """Flip i: fields, count-term states, counts and row activities follow."""
    xi = x[i]
    sgn = 1.0 - 2.0 * xi
    for p in range(Q.indptr[i], Q.indptr[i + 1]):
        field[Q.indices[p]] += sgn * Q.data[p]
    for q in range(C.vt_ptr[i], C.vt_ptr[i + 1]):
        t = C.vt_term[q]
        a = C.term_arity[t]
        s = sat[t]
        s2 = s - 1 if xi == C.lit_val[C.vt_lit[q]] else s + 1
        sat[t] = s2
        dcount[C.term_pen[t]] += C.term_coef[t] * ((1 if s2 == a else 0) - (1 if s == a else 0))
    for q in range(R.col_ptr[i], R.col_ptr[i + 1]):
        act[R.col_row[q]] += sgn * R.col_val[q]
    x[i] = 1 - xi


@nb.njit(cache=True, inline="always")
def _accept(delta, beta, rng):
    """Metropolis: always downhill, uphill with probability exp(-delta * beta). The
    exponential is computed only when u falls between two bounds of it, 1 - z <= e^-z <=
    1 / (1 + z + z^2 / 2) (z >= 0), which decide most draws with two multiplications."""
    if delta <= 0.0:
        return True
    z = delta * beta
    if z >= _CUT:
        return False
    u = _uniform(rng)
    if u * (1.0 + z * (1.0 + 0.5 * z)) >= 1.0:
        return False
    if u < 1.0 - z:
        return True
    return u < math.exp(-z)


@nb.njit(cache=True, inline="always")
def _broken(i, x, R, act, pairs):
    """The entry (an index into ``R.col_row``) of a row marked in ``pairs`` that holds now
    and that flipping i alone would break; -1 if none."""
    sgn = 1.0 - 2.0 * x[i]
    for q in range(R.col_ptr[i], R.col_ptr[i + 1]):
        r = R.col_row[q]
        a0 = act[r]
        if (pairs[r] and row_viol(a0, R.lo[r], R.hi[r], R.rtol[r]) == 0.0
                and row_viol(a0 + sgn * R.col_val[q], R.lo[r], R.hi[r], R.rtol[r]) > 0.0):
            return q
    return -1


@nb.njit(cache=True, inline="always")
def _counter(i, r, way, x, fixed, R, rng):
    """A free member of row r (not i) whose flip moves the row's activity the other way
    than ``way`` (the sign of i's move), uniformly at random (random probes in rows longer
    than SWAP_SCAN); -1 if none is found. In a row whose coefficients are all equal, that is
    a member holding the other value than i (a swap partner)."""
    a, b = R.a_ptr[r], R.a_ptr[r + 1]
    if b - a > SWAP_SCAN:
        for _ in range(_PROBES):
            q = a + int(_uniform(rng) * (b - a))
            j = R.a_col[q]
            if j != i and fixed[j] < 0 and (1.0 - 2.0 * x[j]) * R.a_val[q] * way < 0.0:
                return j
        return -1
    c = 0
    for q in range(a, b):
        j = R.a_col[q]
        c += j != i and fixed[j] < 0 and (1.0 - 2.0 * x[j]) * R.a_val[q] * way < 0.0
    if c == 0:
        return -1
    pick = int(_uniform(rng) * c)
    for q in range(a, b):
        j = R.a_col[q]
        if j != i and fixed[j] < 0 and (1.0 - 2.0 * x[j]) * R.a_val[q] * way < 0.0:
            if pick == 0:
                return j
            pick -= 1
    return -1


@nb.njit(cache=True, inline="always")
def _pair(i, j, first, x, o, field, dist, radius, beta, Q, C, dcount, sat, dd, R, act, w, rng,
          num, price):
    """Propose flipping i and j together (Metropolis on the pair's total change), ``first``
    being i's own change (:func:`_change`); on acceptance the objective and violation in
    num[0], num[1] follow. Returns the new distance from the origin."""
    o1, p1, v1, d1 = first
    _apply(i, x, field, Q, C, dcount, sat, R, act)
    o2, p2, v2, d2 = _change(j, x, o, field, d1, price, C, dcount, sat, dd, R, act, w)
    if (d2 <= radius or d2 <= dist) and _accept(o1 + p1 + o2 + p2, beta, rng):
        _apply(j, x, field, Q, C, dcount, sat, R, act)
        num[0] += o1 + o2
        num[1] += v1 + v2
        return d2
    _apply(i, x, field, Q, C, dcount, sat, R, act)  # undo
    return dist


# ----------------------------------------------------------------- sweeps
@kernel
def _sweep_plain(Q, M, plan, o, ch, beta):
    """:func:`_sweep` for a problem without count penalties nor rows: the QUBO, the flip
    price and the radius only (the same moves and random draws, less bookkeeping)."""
    x, field, rng = ch.x, ch.field, ch.rng
    indptr, indices, data = Q.indptr, Q.indices, Q.data
    E = ch.num[0]
    dist = ch.dist[0]
    price, radius = plan.price, plan.radius
    free = M.free
    for f in range(free.size):
        i = free[f]
        xi = x[i]
        away = xi == o[i]
        if away and dist >= radius:
            continue
        d = (1.0 - 2.0 * xi) * field[i] + (price if away else -price)
        if _accept(d, beta, rng):
            sgn = 1.0 - 2.0 * xi
            for p in range(indptr[i], indptr[i + 1]):
                field[indices[p]] += sgn * data[p]
            x[i] = 1 - xi
            E += d
            dist += 1 if away else -1
    ch.num[0] = E
    ch.dist[0] = dist


@kernel
def _sweep(Q, C, R, M, plan, o, ch, beta):
    """One Metropolis pass over the free variables at inverse temperature beta."""
    if C.cp_const.size == 0 and R.lo.size == 0:
        _sweep_plain(Q, M, plan, o, ch, beta)
        return
    x, field, dcount, sat, dd, act, w, rng = (ch.x, ch.field, ch.dcount, ch.sat, ch.dd,
                                                ch.act, ch.w, ch.rng)
    num = ch.num
    dist = ch.dist[0]
    price, radius = plan.price, plan.radius
    free, partner, fixed = M.free, M.partner, Q.fixed
    for f in range(free.size):
        i = free[f]
        r = partner[i]
        if r >= 0 and row_viol(act[r], R.lo[r], R.hi[r], R.rtol[r]) == 0.0:
            # swap i and j: row r stays as it is
            j = _counter(i, r, (1.0 - 2.0 * x[i]) * R.a_val[R.a_ptr[r]], x, fixed, R, rng)
            if j >= 0:
                first = _change(i, x, o, field, dist, price, C, dcount, sat, dd, R, act, w)
                dist = _pair(i, j, first, x, o, field, dist, radius, beta, Q, C, dcount, sat,
                             dd, R, act, w, rng, num, price)
            continue
        first = _change(i, x, o, field, dist, price, C, dcount, sat, dd, R, act, w)
        dobj, dpen, dv, nd = first
        if dv > 0.0:  # i alone would break a row that holds: i with a member moving back
            q = _broken(i, x, R, act, M.pairs)
            if q >= 0:
                j = _counter(i, R.col_row[q], (1.0 - 2.0 * x[i]) * R.col_val[q], x, fixed, R,
                             rng)
                if j >= 0:
                    dist = _pair(i, j, first, x, o, field, dist, radius, beta, Q, C, dcount,
                                 sat, dd, R, act, w, rng, num, price)
                    continue
        if nd > radius and nd > dist:
            continue
        if _accept(dobj + dpen, beta, rng):
            _apply(i, x, field, Q, C, dcount, sat, R, act)
            num[0] += dobj
            num[1] += dv
            dist = nd
    ch.dist[0] = dist


@nb.njit(cache=True, inline="always")
def _close_sweep(R, M, plan, ch, tol):
    """After a sweep: the weights of violated rows double (up to their cap); the state
    becomes the best if it is less violated, or as violated and cheaper by more than
    ``tol``."""
    V = 0.0
    for r in range(ch.act.size):
        v = row_viol(ch.act[r], R.lo[r], R.hi[r], R.rtol[r])
        if v > 0.0:
            V += v
            if ch.w[r] < plan.scale * M.wunit[r] * _WEIGHT_CAP:
                ch.w[r] *= 2.0
    ch.num[1] = V
    E, bE, bV = ch.num[0], ch.num[2], ch.num[3]
    if V < bV - 1e-12 or (V <= bV + 1e-12 and E < bE - tol):
        copy_into(ch.best, ch.x)
        ch.num[2] = E
        ch.num[3] = V


@nb.njit(cache=True, inline="always")
def _fresh(x, Q, C, R, field, dcount, sat, act):
    """field = h + J x, the counts, term states and row activities of x, computed anew;
    returns the QUBO (without offset) and count-penalty value of x."""
    n = x.size
    e = 0.0
    for i in range(n):
        f = Q.h[i]
        for p in range(Q.indptr[i], Q.indptr[i + 1]):
            if x[Q.indices[p]]:
                f += Q.data[p]
        field[i] = f
        if x[i]:
            e += 0.5 * (Q.h[i] + f)  # x h + x J x / 2 = sum_i x_i (h_i + field_i) / 2
    for p in range(C.cp_const.size):
        dcount[p] = C.cp_const[p]
    for t in range(C.term_pen.size):
        s = 0
        for q in range(C.lit_ptr[t], C.lit_ptr[t + 1]):
            s += x[C.lit_var[q]] == C.lit_val[q]
        sat[t] = s
        if s == C.term_arity[t]:
            dcount[C.term_pen[t]] += C.term_coef[t]
    for p in range(C.cp_const.size):
        e += C.cp_table[C.cp_ptr[p] + dcount[p]]
    for r in range(act.size):
        a = 0.0
        for q in range(R.a_ptr[r], R.a_ptr[r + 1]):
            a += R.a_val[q] * x[R.a_col[q]]
        act[r] = a
    return e


@counted_kernel
def _begin(k, Q, C, R, M, plan, X, O, ch):
    """Load start k into the chain: pinned bits set, random free bits when ``randomise``."""
    x, o = ch.x, O[k]
    n = x.size
    ch.rng[0] = _stream(plan.seed, k)
    for i in range(n):
        x[i] = X[k, i] if Q.fixed[i] < 0 else Q.fixed[i]
    if plan.randomise:
        for f in range(M.free.size):
            x[M.free[f]] = 1 if _uniform(ch.rng) < 0.5 else 0
    dist = 0
    for i in range(n):
        dist += x[i] != o[i]
    e = _fresh(x, Q, C, R, ch.field, ch.dcount, ch.sat, ch.act)
    V = 0.0
    for r in range(ch.act.size):
        V += row_viol(ch.act[r], R.lo[r], R.hi[r], R.rtol[r])
        ch.w[r] = plan.scale * M.wunit[r]
    ch.dist[0] = dist
    ch.num[0] = e + plan.price * dist
    ch.num[1] = V
    ch.num[2] = ch.num[0]
    ch.num[3] = V
    copy_into(ch.best, x)
    for p in range(ch.dd.size):
        ch.dd[p] = 0
    ch.sched[0] = 0.0
    ch.sched[1] = 1.0 / max(1, plan.sweeps - 1)


@counted_entry
def advance(Q, C, R, M, plan, X, O, ch, pos, end, budget, tol, sweeps_out):
    """Run starts ``pos[0]`` .. ``end - 1`` of X (int8 (K, n), in place), resuming start
    ``pos[0]`` at sweep ``pos[1]`` (``pos[2]`` = 1 once it is loaded in ``ch``), until
    about ``budget`` flip attempts are spent (a sweep is not cut). A finished start's row
    of X becomes its best state; its sweeps go to ``sweeps_out``. O int8 (K, n): origins.
    Returns the attempts spent.

    A plain plan runs ``plan.sweeps`` sweeps per start at :func:`temperature`. A timed plan
    runs at :func:`temperature_at` of the chain's phase ``ch.sched[0]``, which grows by
    ``ch.sched[1]`` per sweep (1 / (sweeps - 1) when a start is loaded; the caller may
    change it between slices), the last sweep at phase 1 (the quench), where the start
    ends."""
    used = 0
    n = X.shape[1]
    per_sweep = max(1, M.free.size)
    while pos[0] < end and used < budget:
        k = pos[0]
        if pos[2] == 0:
            _begin(k, Q, C, R, M, plan, X, O, ch)
            pos[2] = 1
            used += n
        while (plan.timed or pos[1] < plan.sweeps) and used < budget:
            if plan.timed:
                phi = ch.sched[0]
                if phi > 1.0:
                    break
                _sweep(Q, C, R, M, plan, O[k], ch, 1.0 / temperature_at(plan, phi))
                nxt = phi + ch.sched[1]
                ch.sched[0] = 1.0 if phi < 1.0 < nxt else nxt  # the last sweep at the quench
                if phi >= 1.0:
                    ch.sched[0] = 2.0
            else:
                _sweep(Q, C, R, M, plan, O[k], ch, 1.0 / temperature(plan, pos[1]))
            _close_sweep(R, M, plan, ch, tol)
            pos[1] += 1
            used += per_sweep
        if ch.sched[0] > 1.0 if plan.timed else pos[1] >= plan.sweeps:
            copy_into(X[k], ch.best)
            sweeps_out[k] = pos[1]
            pos[0] += 1
            pos[1] = 0
            pos[2] = 0
    return used


@counted_entry
def flip_changes(Q, C, R, free, X, out):
    """The change of the QUBO-and-count-penalty objective when each free variable flips,
    for every row of X (int8 (K, n)): into out float64 (K, nf)."""
    n = X.shape[1]
    P = C.cp_const.size
    x, o, field = np.zeros(n, np.int8), np.zeros(n, np.int8), np.zeros(n)
    dcount, sat, dd = np.zeros(P, np.int64), np.zeros(C.term_pen.size, np.int64), np.zeros(P, np.int64)
    act, w = np.zeros(R.lo.size), np.zeros(R.lo.size)
    for k in range(X.shape[0]):
        for i in range(n):
            x[i] = X[k, i]
        _fresh(x, Q, C, R, field, dcount, sat, act)
        for f in range(free.size):
            out[k, f] = _change(free[f], x, o, field, 0, 0.0, C, dcount, sat, dd, R, act, w)[0]

