"""CP-SAT model of a late problem, warm-started with a complete hint.

Model (data, variables, constraints, objective, solve, status — in that order):

* one Boolean ``x_i`` per bit; fixings as unit constraints;
* one Boolean ``y_ij`` per coupling of the merged QUBO, linked to ``x_i AND x_j`` on
  the side the objective pushes against (``y <= x_i, y <= x_j`` for a negative
  coupling, ``y >= x_i + x_j - 1`` for a positive one: common practice, exact at
  every optimum and for every hint, and a third fewer constraints to build);
* per count penalty: ``z_t = AND(literals)`` for terms of two or more literals,
  an integer ``d = const + sum coef_t z_t`` and ``f = table[d]`` by an element
  constraint;
* hard rows as linear constraints; an optional local-branching radius
  ``sum_i |x_i - c_i| <= R`` around a centre ``c``; an optional price per flip;
* an optional objective cut-off (``objective <= upper``) for improving searches;
* or, lexicographically (:meth:`LateModel.fewest_flips`), the objective as a cut-off
  (``objective <= best cost + slack``) and the Hamming distance to a centre minimised:
  the fewest flips at the best cost.

The model is built once (:class:`LateModel`) and cloned for each search, which
then adds its own objective (price per flip), radius, cut-off and hint.

The hint is complete: every auxiliary (products, term ANDs, d, f) is hinted with
the value implied by the hinted bits, since CP-SAT makes little use of partial
hints. Float coefficients are scaled to integers; the largest absolute error of
one scaled coefficient is reported as ``scaling_error`` (0.0 when exact).
"""

from __future__ import annotations

import math
import threading
import time
from dataclasses import dataclass

import numpy as np
from ortools.sat.python import cp_model

from flipfix.repair.cancel import CancelToken, as_token
from flipfix.repair.lowering.compiled import Compiled

__all__ = ["CpsatOutput", "LateModel", "solve_cpsat", "integer_scale", "add_row"]

_STATUS = {
    cp_model.OPTIMAL: "optimal",
    cp_model.FEASIBLE: "feasible",
    cp_model.INFEASIBLE: "infeasible",
    cp_model.UNKNOWN: "unknown",
    cp_model.MODEL_INVALID: "invalid",
}

#: largest scaled coefficient magnitude when coefficients are not decimals (common practice:
#: keep CP-SAT's integer objective well inside int64 while keeping ~9 significant digits).
_FLOAT_RANGE = 1e9


@dataclass
class CpsatOutput:
    """x: int8 (n,) best assignment found (None when none); status: optimal / feasible /
    infeasible / unknown; objective: scaled-back objective of x (float, nan if none);
    bound: scaled-back best bound; scaling_error: largest coefficient rounding error."""

    x: np.ndarray | None
    status: str
    objective: float
    bound: float
    seconds: float
    scaling_error: float
    scale: float


def integer_scale(values: np.ndarray) -> tuple[float, float]:
    """Smallest power of ten (up to 1e6) making ``values`` integral, else a range-based scale.

    Returns (scale, largest absolute rounding error of a value after scaling back).
    """
    v = np.asarray(values, dtype=np.float64)
    v = v[np.isfinite(v)]
    if v.size == 0:
        return 1.0, 0.0
    for p in range(7):
        s = 10.0 ** p
        if np.all(np.abs(v * s - np.round(v * s)) <= 1e-9 * np.maximum(1.0, np.abs(v * s))):
            return s, float(np.max(np.abs(np.round(v * s) / s - v)))
    top = float(np.max(np.abs(v)))
    s = _FLOAT_RANGE / top
    return s, float(np.max(np.abs(np.round(v * s) / s - v)))


def _price_multiplier(scaled_price: float, largest: int) -> int:
    """Smallest power of ten m (up to 1e6) making ``scaled_price * m`` whole, provided the
    largest scaled coefficient times m stays below 2**40; else 1 (the price is rounded and
    the rounding is reported as scaling error)."""
    m = 1
    while m <= 10**6 and largest * m < 2**40:
        v = scaled_price * m
        if abs(v - round(v)) <= 1e-9 * max(1.0, abs(v)):
            return m
        m *= 10
    return 1


def _int(v: float, s: float) -> int:
    return int(round(v * s))


def add_row(m: cp_model.CpModel, x: list, r, enforce=None) -> None:
    """Hard row ``r.lo <= sum r.coef[k] * x[r.idx[k]] <= r.hi`` (a
    :class:`flipfix.repair.lowering.pieces.RowSpec`), coefficients scaled to integers
    row by row; with ``enforce`` (a Boolean literal) it holds only when that literal is true."""
    bounds = [v for v in (r.lo, r.hi) if math.isfinite(v)]
    rs, _ = integer_scale(np.concatenate([r.coef, bounds]))
    expr = cp_model.LinearExpr.weighted_sum(
        [x[int(i)] for i in r.idx], [_int(a, rs) for a in r.coef])
    parts = []
    if math.isfinite(r.lo):
        parts.append(m.add(expr >= math.ceil(r.lo * rs - 1e-9)))
    if math.isfinite(r.hi):
        parts.append(m.add(expr <= math.floor(r.hi * rs + 1e-9)))
    if enforce is not None:
        for c in parts:
            c.only_enforce_if(enforce)


class LateModel:
    """The CP-SAT model of a compiled late problem, built once, solved many times."""

    def __init__(self, compiled: Compiled):
        t0 = time.perf_counter()
        self.compiled = compiled
        n = compiled.n
        m = cp_model.CpModel()
        pi, pj, pv = compiled.objective_model.pairs()
        h = compiled.h
        self.decisions = None
        if compiled.problem.decisions:
            h, pi, pj, pv, self.decisions = _decision_terms(compiled, h, pi, pj, pv)
        obj_values = [h, pv] + [spec.table - spec.table[0] for spec in compiled.counts]
        if self.decisions is not None:
            obj_values += [u for u in self.decisions.unary] + [
                g.ravel() for g in self.decisions.pair_cost.values()]
        s, self.scale_error = integer_scale(np.concatenate(obj_values))
        self.scale = s
        x = [m.new_bool_var(f"x{i}") for i in range(n)]
        self.x = x
        lin = np.round(h * s).astype(np.int64)  # objective coefficient of each x
        obj_idx: list = []
        obj_coef: list = []
        self.products = []
        for a, b, w in zip(pi.tolist(), pj.tolist(), pv.tolist()):
            c = _int(w, s)
            if c == 0:
                continue
            y = m.new_bool_var(f"y{a}_{b}")
            if c > 0:
                m.add_bool_or([~x[a], ~x[b], y])
            else:
                m.add_implication(y, x[a])
                m.add_implication(y, x[b])
            self.products.append((y, a, b))
            obj_idx.append(y.index)
            obj_coef.append(c)
        if self.decisions is not None:
            self.decisions.build(m, x, s, obj_idx, obj_coef)
        self.const = compiled.offset
        self.counts = []
        for p, spec in enumerate(compiled.counts):
            parts = []
            z_list = []
            for t, (coef, lits) in enumerate(spec.terms):
                if len(lits) == 1:
                    i, b = lits[0]
                    parts.append(coef * (x[i] if b == 1 else 1 - x[i]))
                else:
                    z = m.new_bool_var(f"z{p}_{t}")
                    lv = [x[i] if b == 1 else ~x[i] for i, b in lits]
                    m.add_bool_and(lv).only_enforce_if(z)
                    m.add_bool_or([~lit for lit in lv] + [z])
                    parts.append(coef * z)
                    z_list.append((z, lits))
            d = m.new_int_var(0, spec.table.size - 1, f"d{p}")
            m.add(d == spec.const + sum(parts))
            tab = [_int(v - spec.table[0], s) for v in spec.table]
            f = m.new_int_var(min(tab), max(tab), f"f{p}")
            m.add_element(d, tab, f)
            obj_idx.append(f.index)
            obj_coef.append(1)
            self.const += spec.table[0]
            self.counts.append((d, f, z_list, spec, tab))
        for i in np.flatnonzero(compiled.fixed >= 0):
            m.add(x[int(i)] == int(compiled.fixed[i]))
        for r in compiled.rows:
            add_row(m, x, r)
        self.model = m
        self.lin = lin
        self.obj_idx = np.asarray(obj_idx, dtype=np.int64)
        self.obj_coef = np.asarray(obj_coef, dtype=np.int64)
        self.build_seconds = time.perf_counter() - t0

    # ------------------------------------------------------------------ solve
    def solve(self, *, hint: np.ndarray | None = None, center: np.ndarray | None = None,
              radius: int | None = None, flip_price: float = 0.0, upper: float | None = None,
              time_limit: float = 1.0, workers: int = 1, seed: int = 0,
              cancel: threading.Event | CancelToken | None = None) -> CpsatOutput:
        """One search on a clone of the model; see :func:`solve_cpsat` for the options."""
        t0 = time.perf_counter()
        m = self.model.clone()
        proto = m.proto
        self._add_radius(proto, center, radius)
        idx, coef, const_units, err, s = self._objective_terms(center, flip_price)
        proto.objective.vars.extend(idx.tolist())
        proto.objective.coeffs.extend(coef.tolist())
        proto.objective.offset = float(const_units)
        if upper is not None:
            self._add_cut(proto, idx, coef, self._units(upper, const_units, s))
        if hint is not None:
            self._hint(proto, np.asarray(hint, dtype=np.int64))
        solver, status, xs = self._run(m, t0=t0, time_limit=time_limit, workers=workers,
                                       seed=seed, cancel=cancel)
        value = bound = float("nan")
        if xs is not None:
            value = solver.objective_value / s + self.const
            bound = solver.best_objective_bound / s + self.const
        return CpsatOutput(x=xs, status=status, objective=value, bound=bound,
                           seconds=time.perf_counter() - t0, scaling_error=err, scale=s)

    def fewest_flips(self, *, center: np.ndarray, upper: float, hint: np.ndarray | None = None,
                     radius: int | None = None, flip_price: float = 0.0, slack: float = 1e-9,
                     time_limit: float = 1.0, workers: int = 1, seed: int = 0,
                     cancel: threading.Event | CancelToken | None = None) -> CpsatOutput:
        """Fewest flips from ``center`` (int8 (n,)) among assignments costing at most ``upper``.

        The cost is the objective :meth:`solve` minimises with the same ``center`` and
        ``flip_price`` (cost + flip_price * flips from ``center``), on the integer-scaled
        model, and must be <= ``upper + slack * max(1, |upper|)``. With a ``hint`` (int8 (n,),
        normally the answer whose cost gave ``upper``) the bound is widened, if needed, to the
        hint's own scaled objective, so that rounding never makes the hint infeasible.
        Fixings, hard rows and ``radius`` (around ``center``) hold as in :meth:`solve`.

        Returns a :class:`CpsatOutput` whose ``objective`` is the Hamming distance of ``x`` from
        ``center`` and ``bound`` the proven lower bound on it: status "optimal" means no
        assignment within the cost bound (in the scaled model, so within ``scaling_error``
        per coefficient) has fewer flips.
        """
        t0 = time.perf_counter()
        m = self.model.clone()
        proto = m.proto
        c = np.asarray(center, dtype=np.int64)
        self._add_radius(proto, c, radius)
        idx, coef, const_units, err, s = self._objective_terms(c, flip_price)
        top = self._units(upper + slack * max(1.0, abs(upper)), const_units, s)
        if hint is not None:
            hv = np.asarray(hint, dtype=np.int64)
            vars_, vals = self._hint_values(hv)
            val_of = dict(zip(vars_, vals))
            if all(int(v) in val_of for v in idx.tolist()):
                own = sum(int(a) * val_of[int(v)] for v, a in zip(idx.tolist(), coef.tolist()))
                top = max(top, own)
            proto.solution_hint.vars.extend(vars_)
            proto.solution_hint.values.extend(vals)
        self._add_cut(proto, idx, coef, top)
        x_idx = [v.index for v in self.x]
        sign = 1 - 2 * c  # flips = sum_i sign_i x_i + sum_i c_i
        proto.objective.vars.extend(x_idx)
        proto.objective.coeffs.extend(sign.tolist())
        proto.objective.offset = float(c.sum())
        solver, status, xs = self._run(m, t0=t0, time_limit=time_limit, workers=workers,
                                       seed=seed, cancel=cancel)
        value = bound = float("nan")
        if xs is not None:
            value = float(solver.objective_value)
            bound = float(solver.best_objective_bound)
        return CpsatOutput(x=xs, status=status, objective=value, bound=bound,
                           seconds=time.perf_counter() - t0, scaling_error=err, scale=s)

    # ------------------------------------------------------------------ parts of a search
    def _add_radius(self, proto, center, radius) -> None:
        """Local branching: ``sum_i |x_i - center_i| <= radius`` (nothing without both)."""
        if center is None or radius is None:
            return
        c = np.asarray(center, dtype=np.int64)
        ct = proto.constraints.add()
        ct.linear.vars.extend([v.index for v in self.x])
        ct.linear.coeffs.extend((1 - 2 * c).tolist())
        ct.linear.domain.extend([-(2**40), int(radius) - int(c.sum())])

    def _objective_terms(self, center, flip_price):
        """The scaled late objective, with ``flip_price`` per flip from ``center`` if both given.

        Returns (vars int64, coefs int64 (nonzero), constant in scaled units, largest
        coefficient scaling error, scale). The objective in caller units is
        ``(sum coef * value + constant) / scale + self.const``. A price the model's scale
        cannot hold exactly (0.5 on a whole-number model) multiplies every objective
        coefficient by the smallest power of ten that can, while the coefficients stay small.
        """
        s = self.scale
        lin = self.lin.copy()
        obj = self.obj_coef
        const_units = 0
        err = self.scale_error
        if center is not None and flip_price:
            c = np.asarray(center, dtype=np.int64)
            mult = _price_multiplier(flip_price * s, max(np.abs(lin).max(initial=0),
                                                        np.abs(obj).max(initial=0), 1))
            lin, obj, s = lin * mult, obj * mult, s * mult
            ps = _int(flip_price, s)
            err = max(err, abs(ps / s - flip_price))
            lin = lin + ps * (1 - 2 * c)
            const_units += ps * int(c.sum())
        x_idx = np.asarray([v.index for v in self.x], dtype=np.int64)
        idx = np.concatenate([x_idx, self.obj_idx])
        coef = np.concatenate([lin, obj])
        keep = coef != 0
        return idx[keep], coef[keep], const_units, err, s

    def _units(self, upper: float, const_units: int, scale: float) -> int:
        """Largest scaled objective (without the constant) whose value is <= ``upper``."""
        return int(math.floor((upper - self.const) * scale + 1e-6) - const_units)

    @staticmethod
    def _add_cut(proto, idx, coef, top: int) -> None:
        ct = proto.constraints.add()
        ct.linear.vars.extend(idx.tolist())
        ct.linear.coeffs.extend(coef.tolist())
        ct.linear.domain.extend([-(2**62), int(top)])

    def _run(self, m, *, t0, time_limit, workers, seed, cancel):
        """Solve ``m`` within what is left of ``time_limit`` since ``t0``; stop on ``cancel``.

        ``cancel`` (None, a ``threading.Event`` or a :class:`CancelToken`) stops the search
        at once: the token calls :func:`_stopper` of the solver while the search runs, so
        a cancel set at any moment before or during the search stops it.

        Returns (solver, status name, the bits int8 (n,) of the solution found or None)."""
        token = as_token(cancel)
        solver = cp_model.CpSolver()
        limit = max(0.01, float(time_limit) - (time.perf_counter() - t0))
        solver.parameters.max_time_in_seconds = limit
        solver.parameters.num_workers = max(1, int(workers))
        solver.parameters.random_seed = int(seed)
        solver.parameters.log_search_progress = False
        with token.subscribed(_stopper(solver), timeout=limit + 1.0):
            code = solver.solve(m)
        xs = None
        if code in (cp_model.OPTIMAL, cp_model.FEASIBLE):
            xs = np.asarray([solver.value(v) for v in self.x], dtype=np.int8)
        return solver, _STATUS.get(code, "unknown"), xs

    def _hint(self, proto, hv: np.ndarray) -> None:
        """A complete hint: the bits and every auxiliary value they imply."""
        vars_, vals = self._hint_values(hv)
        proto.solution_hint.vars.extend(vars_)
        proto.solution_hint.values.extend(vals)

    def _hint_values(self, hv: np.ndarray) -> tuple[list, list]:
        """(variable indices, values) of the complete hint of the bits ``hv`` int64 (n,)."""
        vars_, vals = [v.index for v in self.x], hv.tolist()
        for y, a, b in self.products:
            vars_.append(y.index)
            vals.append(int(hv[a] & hv[b]))
        for d, f, z_list, spec, tab in self.counts:
            for z, lits in z_list:
                vars_.append(z.index)
                vals.append(int(all(hv[i] == b for i, b in lits)))
            dv = spec.const + sum(coef * int(all(hv[i] == b for i, b in lits))
                                  for coef, lits in spec.terms)
            vars_ += [d.index, f.index]
            vals += [int(dv), int(tab[dv])]
        if self.decisions is not None:
            self.decisions.hint(self.compiled.problem, hv, vars_, vals)
        return vars_, vals


class _Decisions:
    """Value-indicator form of the objective over declared integer decisions.

    For each decision, Booleans ``e_v`` (value v chosen) with exactly one true and the
    bits channelled to them (bit = sum_v code[v, bit] e_v). Energy terms inside one
    decision become a cost per value; couplings between two decisions become a
    k1 x k2 cost table on products ``p_ac = e_a AND e_c``, with the marginal equalities
    ``sum_c p_ac = e_a`` and ``sum_a p_ac = e_c`` (the local-polytope relaxation, much
    tighter than products of domain-wall bits).
    """

    def __init__(self, problem, codes, bits, unary, pair_cost):
        self.codes = codes          # per decision: int8 (k, b) codewords
        self.bits = bits            # per decision: int64 (b,) bit positions
        self.unary = unary          # per decision: float64 (k,) cost per value
        self.pair_cost = pair_cost  # (d1, d2) -> float64 (k1, k2), d1 < d2
        self.e = []
        self.p = {}

    def build(self, m, x, s, obj_idx, obj_coef):
        for di, (code, bits) in enumerate(zip(self.codes, self.bits)):
            e = [m.new_bool_var(f"e{di}_{v}") for v in range(code.shape[0])]
            m.add_exactly_one(e)
            for col, i in enumerate(bits.tolist()):
                m.add(x[i] == cp_model.LinearExpr.weighted_sum(e, code[:, col].tolist()))
            for v, u in enumerate(self.unary[di]):
                if _int(u, s):
                    obj_idx.append(e[v].index)
                    obj_coef.append(_int(u, s))
            self.e.append(e)
        for (d1, d2), G in self.pair_cost.items():
            e1, e2 = self.e[d1], self.e[d2]
            P = [[m.new_bool_var(f"p{d1}_{d2}_{a}_{c}") for c in range(len(e2))]
                 for a in range(len(e1))]
            for a in range(len(e1)):
                m.add(sum(P[a]) == e1[a])
            for c in range(len(e2)):
                m.add(sum(P[a][c] for a in range(len(e1))) == e2[c])
            for a in range(len(e1)):
                for c in range(len(e2)):
                    if _int(G[a, c], s):
                        obj_idx.append(P[a][c].index)
                        obj_coef.append(_int(G[a, c], s))
            self.p[(d1, d2)] = P

    def hint(self, problem, hv, vars_, vals):
        from flipfix.repair.model.encodings import decode_indices

        M = decode_indices(problem, hv.astype(np.int8)[None, :])[0]
        for di, e in enumerate(self.e):
            if M[di] >= 0:
                vars_ += [v.index for v in e]
                vals += [int(v == M[di]) for v in range(len(e))]
        for (d1, d2), P in self.p.items():
            if M[d1] >= 0 and M[d2] >= 0:
                for a, row in enumerate(P):
                    for c, var in enumerate(row):
                        vars_.append(var.index)
                        vals.append(int(a == M[d1] and c == M[d2]))


def _decision_terms(compiled, h, pi, pj, pv):
    """Move the objective terms over decision bits into value form (see :class:`_Decisions`).

    Returns (h float64 (n,), pi, pj, pv of the couplings left at bit level, _Decisions).
    """
    from flipfix.repair.model.encodings import codewords, decision_bits

    problem = compiled.problem
    n = problem.n
    dec_of = np.full(n, -1, dtype=np.int64)
    col_of = np.zeros(n, dtype=np.int64)
    codes, bits = [], []
    for di, d in enumerate(problem.decisions):
        idx = decision_bits(problem, d)
        dec_of[idx] = di
        col_of[idx] = np.arange(idx.size)
        codes.append(codewords(d).astype(np.int8))
        bits.append(idx)
    h = h.copy()
    unary = [np.zeros(c.shape[0]) for c in codes]
    for i in np.flatnonzero(dec_of >= 0):
        unary[dec_of[i]] += h[i] * codes[dec_of[i]][:, col_of[i]]
        h[i] = 0.0
    pair_cost: dict = {}
    keep = np.ones(pi.size, dtype=bool)
    for t, (a, b, w) in enumerate(zip(pi.tolist(), pj.tolist(), pv.tolist())):
        da, db = dec_of[a], dec_of[b]
        if da < 0 or db < 0:
            continue
        keep[t] = False
        ca, cb = codes[da][:, col_of[a]], codes[db][:, col_of[b]]
        if da == db:
            unary[da] += w * ca * cb
            continue
        if da > db:
            da, db, ca, cb = db, da, cb, ca
        G = pair_cost.setdefault((int(da), int(db)), np.zeros((codes[da].shape[0], codes[db].shape[0])))
        G += w * np.outer(ca, cb)
    return h, pi[keep], pj[keep], pv[keep], _Decisions(problem, codes, bits, unary, pair_cost)


def _stopper(solver: cp_model.CpSolver):
    """A callback that stops ``solver``'s search, whenever it comes.

    ``solve`` makes the search, then copies ``solver.parameters`` into it, then runs it;
    ``stop_search`` only reaches a search that exists. So the callback first sets the time
    limit to 0 (a search not yet made starts stopped), then calls ``stop_search`` (a search
    made stops now, and stays stopped if it has not started running).
    """
    def stop() -> None:
        solver.parameters.max_time_in_seconds = 0.0
        solver.stop_search()
    return stop


def solve_cpsat(
    compiled: "Compiled | LateModel", *, hint: np.ndarray | None = None,
    center: np.ndarray | None = None, radius: int | None = None, flip_price: float = 0.0,
    upper: float | None = None, time_limit: float = 1.0, workers: int = 1, seed: int = 0,
    cancel: threading.Event | CancelToken | None = None,
) -> CpsatOutput:
    """Solve the compiled late problem (or a prebuilt :class:`LateModel`) with CP-SAT.

    hint: int8 (n,) bits to hint (completed over every auxiliary variable).
    center: int8 (n,) assignment that ``radius`` and ``flip_price`` are measured from.
    upper: only accept solutions whose objective (cost + price * flips) is <= upper.
    ``time_limit`` covers the model build when a Compiled is passed.
    """
    t0 = time.perf_counter()
    model = compiled if isinstance(compiled, LateModel) else LateModel(compiled)
    left = time_limit - (time.perf_counter() - t0)
    out = model.solve(hint=hint, center=center, radius=radius, flip_price=flip_price,
                      upper=upper, time_limit=left, workers=workers, seed=seed, cancel=cancel)
    out.seconds = time.perf_counter() - t0
    return out
