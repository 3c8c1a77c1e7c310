"""CP-SAT model of a late problem, warm-started with a complete hint.

Model (data, variables, constraints, objective, solve, status — in that order):

* one Boolean ``x_i`` per bit; fixings as unit constraints;
* one Boolean ``y_ij = x_i AND x_j`` per coupling of the merged QUBO;
* per count penalty: ``z_t = AND(literals)`` for terms of two or more literals,
  an integer ``d = const + sum coef_t z_t`` and ``f = table[d]`` by an element
  constraint;
* hard rows as linear constraints; an optional local-branching radius
  ``sum_i |x_i - c_i| <= R`` around a centre ``c``; an optional price per flip;
* an optional objective cut-off (``objective <= upper``) for improving searches.

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

from .compiled import Compiled

__all__ = ["CpsatOutput", "solve_cpsat", "integer_scale"]

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


def _int(v: float, s: float) -> int:
    return int(round(v * s))


def solve_cpsat(
    compiled: Compiled, *, hint: np.ndarray | None = None, center: np.ndarray | None = None,
    radius: int | None = None, flip_price: float = 0.0, upper: float | None = None,
    time_limit: float = 1.0, workers: int = 1, seed: int = 0,
    cancel: threading.Event | None = None,
) -> CpsatOutput:
    """Solve the compiled late problem with CP-SAT.

    hint: int8 (n,) bits to hint (completed over every auxiliary variable).
    center: int8 (n,) assignment that ``radius`` and ``flip_price`` are measured from.
    upper: only accept solutions whose objective (cost + price * flips) is <= upper.
    """
    t0 = time.perf_counter()
    n = compiled.n
    m = cp_model.CpModel()
    # ---- data: one scale for the whole objective
    pi, pj, pv = compiled.objective_model.pairs()
    obj_values = [compiled.h, pv]
    for spec in compiled.counts:
        obj_values.append(spec.table - spec.table[0])
    if flip_price:
        obj_values.append(np.asarray([flip_price]))
    s, scale_err = integer_scale(np.concatenate(obj_values))
    # ---- variables
    x = [m.new_bool_var(f"x{i}") for i in range(n)]
    obj_terms: list = []
    obj_const = 0.0
    for i in range(n):
        c = _int(compiled.h[i], s)
        if c:
            obj_terms.append(c * x[i])
    y_vars = []
    for a, b, w in zip(pi.tolist(), pj.tolist(), pv.tolist()):
        y = m.new_bool_var(f"y{a}_{b}")
        m.add_bool_or([x[a].Not(), x[b].Not(), y])
        m.add_implication(y, x[a])
        m.add_implication(y, x[b])
        y_vars.append((y, a, b))
        obj_terms.append(_int(w, s) * y)
    count_vars = []
    for p, spec in enumerate(compiled.counts):
        parts = []
        z_list = []
        for t, (coef, lits) in enumerate(spec.terms):
            if len(lits) == 1:
                i, b = lits[0]
                parts.append(coef * (x[i] if b == 1 else 1 - x[i]))
            else:
                z = m.new_bool_var(f"z{p}_{t}")
                lv = [x[i] if b == 1 else x[i].Not() for i, b in lits]
                m.add_bool_and(lv).only_enforce_if(z)
                m.add_bool_or([lit.Not() for lit in lv] + [z])
                parts.append(coef * z)
                z_list.append((z, lits))
        top = spec.table.size - 1
        d = m.new_int_var(0, top, f"d{p}")
        m.add(d == spec.const + sum(parts))
        tab = [_int(v - spec.table[0], s) for v in spec.table]
        f = m.new_int_var(min(tab), max(tab), f"f{p}")
        m.add_element(d, tab, f)
        obj_terms.append(f)
        obj_const += spec.table[0]
        count_vars.append((d, f, z_list, spec, tab))
    # ---- constraints
    for i in np.flatnonzero(compiled.fixed >= 0):
        m.add(x[int(i)] == int(compiled.fixed[i]))
    for r in compiled.rows:
        rs, _ = integer_scale(np.concatenate([r.coef, [v for v in (r.lo, r.hi) if math.isfinite(v)]]))
        expr = sum(_int(a, rs) * x[int(i)] for i, a in zip(r.idx, r.coef))
        if math.isfinite(r.lo):
            m.add(expr >= math.ceil(r.lo * rs - 1e-9))
        if math.isfinite(r.hi):
            m.add(expr <= math.floor(r.hi * rs + 1e-9))
    dist = None
    if center is not None and (radius is not None or flip_price):
        dist = sum(x[i] if center[i] == 0 else 1 - x[i] for i in range(n))
        if radius is not None:
            m.add(dist <= int(radius))
        if flip_price:
            obj_terms.append(_int(flip_price, s) * dist)
    objective = sum(obj_terms) if obj_terms else 0
    if upper is not None:
        m.add(objective <= math.floor((upper - compiled.offset - obj_const) * s + 1e-6))
    m.minimize(objective)
    # ---- complete hint
    if hint is not None:
        hv = [int(v) for v in hint]
        for i in range(n):
            m.add_hint(x[i], hv[i])
        for y, a, b in y_vars:
            m.add_hint(y, hv[a] & hv[b])
        for d, f, z_list, spec, tab in count_vars:
            for z, lits in z_list:
                m.add_hint(z, int(all(hv[i] == b for i, b in lits)))
            dv = spec.const + sum(coef * int(all(hv[i] == b for i, b in lits))
                                  for coef, lits in spec.terms)
            m.add_hint(d, dv)
            m.add_hint(f, tab[dv])
    # ---- solve
    solver = cp_model.CpSolver()
    solver.parameters.max_time_in_seconds = max(0.01, float(time_limit) - (time.perf_counter() - t0))
    solver.parameters.num_workers = max(1, int(workers))
    solver.parameters.random_seed = int(seed)
    solver.parameters.log_search_progress = False
    finished = threading.Event()
    watcher = None
    if cancel is not None:
        def watch():
            while not finished.wait(0.02):
                if cancel.is_set():
                    solver.stop_search()
                    return
        watcher = threading.Thread(target=watch, daemon=True)
        watcher.start()
    code = solver.solve(m)
    finished.set()
    if watcher is not None:
        watcher.join()
    status = _STATUS.get(code, "unknown")
    xs = None
    value = float("nan")
    bound = float("nan")
    if code in (cp_model.OPTIMAL, cp_model.FEASIBLE):
        xs = np.asarray([solver.value(v) for v in x], dtype=np.int8)
        value = solver.objective_value / s + compiled.offset + obj_const
        bound = solver.best_objective_bound / s + compiled.offset + obj_const
    return CpsatOutput(x=xs, status=status, objective=value, bound=bound,
                       seconds=time.perf_counter() - t0, scaling_error=scale_err, scale=s)
