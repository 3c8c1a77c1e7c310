"""Replies inside the budget: the reply's ``seconds`` against 1.05 x T + 0.05 s.

For seeded sparse random models (:func:`sparse_model`, ~10 neighbours a variable) of 1,000 to
100,000 variables and libraries of K = 100 to 10,000 candidates, a late event is repaired by
the default portfolio (2 workers) at budgets T = 0.1, 1 and 5 s; each row compares
``RepairResult.seconds`` (measured by ``repair`` from its entry, after the one-time kernel
warm-up, to its return: lowering and building the result included) with the target.

Late events (the best candidate is the published plan):

* ``fix+ham``  1 % of the variables forced opposite to the plan, plus a linear Hamming penalty
  to the plan of weight 1 x the median |coupling|;
* ``fix+ham+card``  the same plus a cardinality row ``sum x <= 0.9 * sum(plan)``.

The library: ``LIB_SEEDS`` local minima (steepest descent from seeded random starts), then K
candidates, each one of them with 0.5 % of its bits (at least 20) flipped and descended
again (local minima near each other, as a sampler's reads tend to be).

Columns: ``lower``, ``score``, ``search`` and ``result`` split ``seconds`` by stage
(``RepairResult.stats["seconds"]``): lowering the constraints, scoring the library (each
candidate's cost before repair, for the ranking and the audit), the search, building the
result; ``plan`` is the reply's ``plan_distance`` (the answer's Hamming distance from the
Hamming penalty's reference); ``wall s`` is the time around the call (information: the
first call of a process also loads the compiled kernels, which no budget pays for).
"""

from __future__ import annotations

import math
import time

import numpy as np

from flipfix.repair import CandidateSet, Problem, repair
from flipfix.repair.model.constraints import FixVariables, HammingPenalty, LinearConstraint
from flipfix.repair.solvers.greedy import descend_qubo

from bench.common import table

__all__ = ["run", "render", "CONFIG", "sparse_model", "library", "late_event", "target"]

#: (n, K) pairs and budgets; "full" is the whole grid (about 6 minutes; 100,000 x 10,000
#: holds 1 GB of candidates)
CONFIG = {
    "quick": {"sizes": [(1000, 100), (10000, 1000), (20000, 1000)], "budgets": [0.1, 1.0],
              "events": ["fix+ham", "fix+ham+card"]},
    "full": {"sizes": [(n, K) for n in (1000, 10000, 20000, 100000) for K in (100, 1000, 10000)],
             "budgets": [0.1, 1.0, 5.0], "events": ["fix+ham", "fix+ham+card"]},
    # the largest libraries only (about 5 minutes; run alone: python -m bench.budget --large)
    "large": {"sizes": [(20000, 10000), (100000, 1000), (100000, 10000)],
              "budgets": [0.1, 1.0], "events": ["fix+ham", "fix+ham+card"]},
}
LIB_SEEDS = 8
COLUMNS = ["n", "K", "event", "T s", "seconds", "limit s", "target", "lower s", "score s",
           "search s", "result s", "scored", "status", "cost", "flips", "plan", "wall s"]


def target(time_limit: float) -> float:
    """The longest acceptable reply: 1.05 x T + 0.05 s."""
    return 1.05 * time_limit + 0.05


def sparse_model(n: int, *, degree: int = 10, seed: int = 0, weight: int = 100) -> Problem:
    """Seeded random sparse QUBO (0/1), ~``degree`` neighbours per variable, integer
    coefficients uniform in [-weight, weight] (zero couplings dropped by the assembly)."""
    rng = np.random.default_rng(seed)
    m = n * degree // 2
    u = rng.integers(0, n, size=m)
    v = (u + rng.integers(1, n, size=m)) % n  # never u itself
    bias = rng.integers(-weight, weight + 1, size=m).astype(np.float64)
    bias[bias == 0] = 1.0
    h = rng.integers(-weight, weight + 1, size=n).astype(np.float64)
    return Problem.from_arrays(range(n), h, u, v, bias)


def library(problem: Problem, K: int, *, seed: int = 0) -> np.ndarray:
    """K local minima: int8 (K, n), row 0 the cheapest (the published plan)."""
    rng = np.random.default_rng(seed + 1)
    n = problem.n
    args = (problem.linear, problem.indptr, problem.indices, problem.data)
    roots, _ = descend_qubo(*args, rng.integers(0, 2, size=(min(LIB_SEEDS, K), n), dtype=np.int8))
    X = roots[rng.integers(0, roots.shape[0], size=K)]
    flip = rng.integers(0, n, size=(K, max(20, n // 200)))
    X[np.arange(K)[:, None], flip] ^= 1
    X, _ = descend_qubo(*args, X)
    e = problem.energies(X)
    return np.ascontiguousarray(X[np.argsort(e, kind="stable")])


def late_event(problem: Problem, plan: np.ndarray, kind: str, *, seed: int = 0) -> list:
    """The late constraints of ``kind`` (see the module docstring) against ``plan`` int8 (n,)."""
    rng = np.random.default_rng(seed + 2)
    n = problem.n
    pick = rng.choice(n, size=max(1, n // 100), replace=False)
    fix = FixVariables({int(i): int(1 - plan[i]) for i in pick}, name="forced")
    w = float(np.median(np.abs(problem.data))) if problem.data.size else 1.0
    ham = HammingPenalty({i: int(plan[i]) for i in range(n)}, weight=w, shape="linear",
                         name="near_plan")
    out = [fix, ham]
    if kind == "fix+ham+card":
        out.append(LinearConstraint({i: 1.0 for i in range(n)}, "<=",
                                    float(int(0.9 * int(plan.sum()))), name="cardinality"))
    elif kind != "fix+ham":
        raise ValueError(f"unknown late event {kind!r}")
    return out


def run(*, quick: bool = False, seed: int = 0, workers: int = 2, log=print,
        config: str | None = None) -> dict:
    cfg = CONFIG[config or ("quick" if quick else "full")]
    rows = []
    for n, K in cfg["sizes"]:
        t = time.perf_counter()
        problem = sparse_model(n, seed=seed)
        lib = library(problem, K, seed=seed)
        cands = CandidateSet.from_array(problem, lib)
        log(f"# n={n} K={K}: model and library in {time.perf_counter() - t:.1f} s")
        for kind in cfg["events"]:
            cs = late_event(problem, lib[0], kind, seed=seed)
            for T in cfg["budgets"]:
                t = time.perf_counter()
                res = repair(problem, cands, cs, time_limit=T, seed=seed, workers=workers)
                wall = time.perf_counter() - t
                stage = res.stats.get("seconds", {})
                row = {"n": n, "K": K, "event": kind, "T s": T, "seconds": res.seconds,
                       "wall s": wall, "limit s": target(T),
                       "target": "PASS" if res.seconds <= target(T) else "MISS",
                       **{f"{short} s": stage.get(name, math.nan) for short, name in
                          (("lower", "lowering"), ("score", "scoring"), ("search", "search"),
                           ("result", "result"))},
                       "scored": K - res.stats.get("unscored", 0),
                       "status": res.status,
                       "cost": res.best.cost if res.best.feasible else math.inf,
                       "flips": res.best.flips,
                       "plan": getattr(res.best, "plan_distance", None),
                       "method": res.best.method, "stats": dict(res.stats)}
                rows.append(row)
                log(table([row], COLUMNS).splitlines()[-1])
        del cands, lib, problem
    passed = sum(r["target"] == "PASS" for r in rows)
    return {"rows": rows, "columns": COLUMNS, "workers": workers,
            "summary": {"rows": len(rows), "pass": passed},
            "config": {"sizes": [list(s) for s in cfg["sizes"]], "budgets": cfg["budgets"],
                       "events": cfg["events"]}}


def render(section: dict) -> str:
    s = section["summary"]
    head = (f"Replies inside the budget (workers={section['workers']}): seconds <= 1.05 x T + "
            f"0.05 s in {s['pass']}/{s['rows']} rows")
    return table(section["rows"], COLUMNS, title=head)


def main(argv=None) -> int:
    """``python -m bench.budget [--large]``: this section alone (``--large``: the largest
    libraries), its table printed and written to bench/results/budget[_large].json."""
    import argparse

    from bench.common import machine, write_results

    ap = argparse.ArgumentParser(prog="python -m bench.budget", description=__doc__.splitlines()[0])
    ap.add_argument("--large", action="store_true", help="20,000 x 10,000 and 100,000 x 1,000 / 10,000")
    ap.add_argument("--seed", type=int, default=0)
    args = ap.parse_args(argv)
    cfg = "large" if args.large else "full"
    t = time.perf_counter()
    section = run(seed=args.seed, config=cfg)
    section["seconds"] = time.perf_counter() - t
    text = render(section)
    print("\n" + text)
    write_results({"command": "python -m bench.budget" + (" --large" if args.large else ""),
                   "machine": machine(), "seed": args.seed, "sections": {"budget": section},
                   "started": time.strftime("%Y-%m-%d %H:%M:%S"), "markdown": text},
                  f"budget{'_large' if args.large else ''}.json")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
