"""Repair versus re-solving from scratch.

For each instance, a library of 100 distinct local minima (seeded random starts) and each
late scenario: flipfix portfolio repair at budget T against CP-SAT on the new problem with
no hint (same worker count) at T and at 10T. Costs are the late problem's objective
(``Compiled.evaluate``), energy for the knapsacks being minus the profit.

Targets, per row:
* cost: the repaired cost at T is no worse than the from-scratch cost at 10T
  (an infeasible or missing answer counts as +inf);
* flips: the repaired answer's flips (from the candidate it came from) are at least 30 %
  fewer than the from-scratch answer at 10T measured from that same candidate.

``apart`` is the Hamming distance between the repaired and the from-scratch answer: 0 means
both found the same assignment, so the flips target cannot be met in that row at no worse cost
unless an equally cheap assignment lies nearer the candidate (the portfolio's closing
fewest-flips step searches for one).

``front flips`` (information, not a target): the same repair run's cost-flips front
(``pareto=True``, built from the attempts it made anyway) offers, among its points that cost
no more than the from-scratch answer at 10T, the one with the fewest flips; ``front<=70%``
compares it, like the target, with the from-scratch answer's distance from that point's own
candidate. It is what a planner who accepts the re-solve's quality can take instead of the
cheapest answer (``flipfix.repair.audit.pareto.fewest_flips_within`` and friends).
"""

from __future__ import annotations

import math
import sys
import time

import numpy as np

from flipfix.repair import CandidateSet, repair
from flipfix.repair.lowering.compiled import compile_constraints
from flipfix.repair.solvers.cpsat import solve_cpsat

from bench.common import build_library, hamming, load_instance, scenarios, table

__all__ = ["run", "CONFIG"]

CONFIG = {
    "quick": {"instances": ["bqp100-1", "jeu_100_25_1", "rand1000"], "scenarios": ["a", "c"],
              "budgets": {0.1: None, 1.0: None}, "library": 100},
    # budget -> scenarios run at that budget (None: all)
    "full": {"instances": ["bqp100-1", "jeu_100_25_1", "jeu_100_50_1", "rand1000", "rand5000"],
             "scenarios": ["a", "b_lin", "b_thr", "c", "d"],
             "budgets": {0.1: None, 1.0: None, 5.0: ["d"]}, "library": 100},
}

COLUMNS = ["instance", "scen", "T s", "repair cost", "gap %", "flips", "near", "wall s",
           "scratch@T", "scratch@10T", "gap@10T %", "scratch flips", "apart", "wall@10T s",
           "cost", "flips<=70%", "front flips", "front<=70%"]


def _score(compiled, x):
    if x is None:
        return math.inf, False
    ev = compiled.evaluate(np.asarray(x, dtype=np.int8)[None, :])
    feas = bool(ev.feasible[0])
    return (float(ev.cost[0]) if feas else math.inf), feas


def _front(front, s10, lib):
    """(flips, meets 70 %) of the front point with the fewest flips (ties: cheaper) among
    those costing no more than the from-scratch answer at 10T; (None, None) when there is
    none. Its flips and the from-scratch distance are both counted from that point's
    candidate. ``front``: [(cost, flips, candidate index)]."""
    ok = [f for f in front if f[0] <= s10["cost"] + 1e-9 * max(1.0, abs(f[0]))]
    if not ok:
        return None, None
    cost, flips, k = min(ok, key=lambda f: (f[1], f[0]))
    if s10["x"] is None:
        return flips, True
    return flips, bool(flips <= 0.7 * int(hamming(lib[k][None, :], s10["x"])[0]))


def _gap(cost, best):
    if not math.isfinite(cost) or not math.isfinite(best):
        return math.inf
    return 100.0 * (cost - best) / max(1.0, abs(best))


def run(*, quick: bool = False, workers: int = 2, seed: int = 0, log=print) -> dict:
    cfg = CONFIG["quick" if quick else "full"]
    rows: list = []
    raw: list = []
    for name in cfg["instances"]:
        inst = load_instance(name, seed=seed)
        t0 = time.perf_counter()
        lib = build_library(inst, size=cfg["library"], seed=seed)
        lib_s = time.perf_counter() - t0
        cands = CandidateSet.from_array(inst.problem, lib)
        scen = scenarios(inst, lib, seed=seed)
        log(f"# {name}: n={inst.problem.n}, library {lib.shape[0]} local minima in {lib_s:.2f} s")
        for sname in cfg["scenarios"]:
            sc = scen[sname]
            comp = compile_constraints(inst.problem, sc.constraints)
            lib_cost, lib_feas = comp.evaluate(lib).cost, comp.evaluate(lib).feasible
            budgets = [T for T, only in cfg["budgets"].items() if only is None or sname in only]
            scratch_budgets = sorted(set(budgets) | {10 * T for T in budgets})
            scratch: dict = {}
            for S in scratch_budgets:
                t = time.perf_counter()
                r = solve_cpsat(comp, hint=None, time_limit=S, workers=workers, seed=seed)
                wall = time.perf_counter() - t
                cost, feas = _score(comp, r.x)
                scratch[S] = {"x": r.x, "cost": cost, "feasible": feas, "wall": wall,
                              "status": r.status}
            reps: dict = {}
            for T in budgets:
                t = time.perf_counter()
                res = repair(inst.problem, cands, sc.constraints, method="portfolio",
                             time_limit=T, workers=workers, seed=seed, compiled=comp,
                             pareto=True)
                wall = time.perf_counter() - t
                k = cands.ids.index(res.best.candidate_id)
                cost, feas = _score(comp, res.best.x)
                reps[T] = {"x": res.best.x, "k": k, "cost": cost, "feasible": feas,
                           "flips": int(res.best.flips), "wall": wall, "status": res.status,
                           "method": res.best.method,
                           "near": int(hamming(lib, res.best.x).min()),
                           "front": [(p.cost, p.flips, cands.ids.index(p.candidate_id))
                                     for p in res.pareto]}
            found = [v["cost"] for v in list(scratch.values()) + list(reps.values())]
            found += [float(c) for c, f in zip(lib_cost, lib_feas) if f]
            best = min(found) if found else math.inf
            for T in budgets:
                rp, s1, s10 = reps[T], scratch[T], scratch[10 * T]
                sflips = (int(hamming(lib[rp["k"]][None, :], s10["x"])[0])
                          if s10["x"] is not None else None)
                # how far the two answers are from each other (0: the same assignment)
                apart = (int(hamming(np.asarray(rp["x"], dtype=np.int8)[None, :], s10["x"])[0])
                         if s10["x"] is not None else None)
                cost_ok = rp["cost"] <= s10["cost"] + 1e-9 * max(1.0, abs(rp["cost"]))
                flips_ok = (sflips is not None and rp["flips"] <= 0.7 * sflips) or (
                    sflips is None and rp["feasible"])
                front_flips, front_ok = _front(rp["front"], s10, lib)
                row = {"instance": name, "scen": sname, "T s": T, "repair cost": rp["cost"],
                       "gap %": _gap(rp["cost"], best), "flips": rp["flips"],
                       "near": rp["near"], "wall s": rp["wall"], "scratch@T": s1["cost"],
                       "scratch@10T": s10["cost"], "gap@10T %": _gap(s10["cost"], best),
                       "scratch flips": "-" if sflips is None else sflips,
                       "apart": "-" if apart is None else apart,
                       "wall@10T s": s10["wall"], "cost": "PASS" if cost_ok else "MISS",
                       "flips<=70%": "PASS" if flips_ok else "MISS",
                       "front flips": "-" if front_flips is None else front_flips,
                       "front<=70%": {True: "yes", False: "no", None: "-"}[front_ok]}
                rows.append(row)
                log(table([row], COLUMNS).splitlines()[-1])
                sys.stdout.flush()
                raw.append({**{k: v for k, v in row.items()}, "scenario_note": sc.note,
                            "best_found": best, "repair_status": rp["status"],
                            "repair_method": rp["method"], "repair_feasible": rp["feasible"],
                            "scratch_T_status": s1["status"], "scratch_10T_status": s10["status"],
                            "scratch_T_wall": s1["wall"],
                            "scratch_T_flips": None if s1["x"] is None else
                            int(hamming(lib[rp["k"]][None, :], s1["x"])[0]),
                            "scratch_near_10T":
                            None if s10["x"] is None else int(hamming(lib, s10["x"]).min()),
                            "library_seconds": lib_s, "published_original": inst.published})
    n_cost = sum(r["cost"] == "PASS" for r in rows)
    n_flip = sum(r["flips<=70%"] == "PASS" for r in rows)
    n_front = sum(r["front<=70%"] == "yes" for r in rows)
    return {"rows": raw, "columns": COLUMNS, "table_rows": rows, "workers": workers,
            "summary": {"rows": len(rows), "cost_pass": n_cost, "flips_pass": n_flip,
                        "front_yes": n_front},
            "config": {k: (v if k != "budgets" else {str(b): s for b, s in v.items()})
                       for k, v in cfg.items()}}


def render(section: dict) -> str:
    s = section["summary"]
    head = (f"Repair vs re-solve (CP-SAT workers={section['workers']}): cost target met in "
            f"{s['cost_pass']}/{s['rows']} rows, flips target in {s['flips_pass']}/{s['rows']}")
    if "front_yes" in s:
        head += (f"; the cost-flips front offers 30 % fewer flips at no more than the "
                 f"re-solve's cost in {s['front_yes']}/{s['rows']}")
    return table(section["table_rows"], COLUMNS, title=head)
