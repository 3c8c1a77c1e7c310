"""Naming a conflict among many hard constraints: time to a minimal set, and whether it is
the planted one.

Model: bqp250-1 (OR-Library, via the shared benchmark folder; only its 250 labels matter,
the conflict search has no objective). Planted conflict: G capacity rows over disjoint
groups (each group of 240 / G variables at most a third on) and one demand row (at least
91 of the 250 on); G capacity rows can hold 80 plus the 10 ungrouped variables, so the G + 1
rows conflict and dropping any one of them leaves a feasible set. Noise: rows "at most 20
of 30 random variables", which every plan of the planted conflict's neighbours can meet.
The reference is that construction (the planted set is the only minimal conflict).

Target: a minimal conflict within 5 s, the server's default repair budget.
"""

from __future__ import annotations

import time

import numpy as np

from bench.common import table

__all__ = ["run", "render"]

TARGET_S = 5.0
COLUMNS = ["hard rows", "planted", "named", "minimal", "planted found", "solves", "seconds",
           "target"]


def _case(problem, groups: int, noise: int, rng):
    from flipfix.repair.model.constraints import LinearConstraint

    labels = list(problem.labels)
    size = 240 // groups
    cons = [LinearConstraint({labels[g * size + i]: 1 for i in range(size)}, "<=", size // 3,
                             name=f"cap{g}") for g in range(groups)]
    for t in range(noise):
        pick = rng.choice(len(labels), 30, replace=False)
        cons.append(LinearConstraint({labels[i]: 1 for i in pick}, "<=", 20, name=f"noise{t}"))
    cons.append(LinearConstraint({lab: 1 for lab in labels}, ">=", 91, name="demand"))
    return [cons[i] for i in rng.permutation(len(cons))], {f"cap{g}" for g in range(groups)} | {
        "demand"}


def run(*, quick: bool = False, seed: int = 0, log=print) -> dict:
    from flipfix.repair.documents.instances import read_bqp
    from flipfix.repair.lowering.compiled import compile_constraints
    from flipfix.repair.solvers.conflicts import name_conflict

    from bench.common import _find_file

    problem = read_bqp(_find_file("bqp", "bqp250-1"))
    rng = np.random.default_rng(seed)
    rows = []
    for groups, noise in ((10, 50), (20, 200)) + (() if quick else ((40, 800),)):
        cons, planted = _case(problem, groups, noise, rng)
        compiled = compile_constraints(problem, cons)
        t0 = time.perf_counter()
        res = name_conflict(compiled, time_limit=60.0, seed=seed)
        dt = time.perf_counter() - t0
        named = {m.name for m in res.members}
        rows.append({"hard rows": len(cons), "planted": len(planted), "named": len(named),
                     "minimal": res.minimal, "planted found": named == planted,
                     "solves": res.solves, "seconds": dt,
                     "target": "PASS" if res.minimal and named == planted and dt <= TARGET_S
                     else "MISS"})
        log(f"  {len(cons)} hard rows: {len(named)} named in {dt:.2f} s ({res.solves} solves)")
    return {"rows": rows}


def render(section: dict) -> str:
    return table(section["rows"], COLUMNS, title=(
        f"Conflicts named, n = 250 (target: the planted minimal conflict within {TARGET_S:g} s; "
        "each test is one CP-SAT solve of ~0.05-0.1 s, divide and conquer needs about "
        "2 k log2(m / k) of them for k of m)"))
