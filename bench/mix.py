"""Which portfolio mix wins at each budget.

For a few instances and late scenarios (bench/common.py), the same library is repaired
with several budget mixes (flipfix.repair.solvers.portfolio.Mix) at budgets 0.1, 1 and 5 s:

* greedy        greedy repair only
* kicks         greedy + iterated local search (kicks), no CP-SAT
* hinted        greedy + local-branching CP-SAT around the best candidates, no full search
* unhinted      greedy + the unhinted whole-problem CP-SAT search only
* default       greedy + kicks + neighbourhoods + unhinted search (the shipped Mix())

The table gives each mix's cost and its gap to the best cost any mix found for that row.
"""

from __future__ import annotations

import math

from flipfix.repair import CandidateSet, repair
from flipfix.repair.solvers.portfolio import Mix

from bench.common import build_library, load_instance, scenarios, table

__all__ = ["run", "render", "MIXES"]

MIXES = {
    "greedy": (Mix(greedy=1.0, kicks=0.0, neighbourhoods=0, full_search=False), "portfolio"),
    "kicks": (Mix(greedy=0.6, kicks=1.0, neighbourhoods=0, full_search=False), "portfolio"),
    "hinted": (Mix(greedy=0.6, kicks=0.0, neighbourhoods=3, full_search=False), "portfolio"),
    "unhinted": (Mix(greedy=0.6, kicks=0.0, neighbourhoods=0, full_search=True), "portfolio"),
    "default": (Mix(), "portfolio"),
}

CONFIG = {
    "quick": {"instances": ["bqp100-1", "jeu_100_25_1"], "scenarios": ["a", "d"],
              "budgets": [0.1, 1.0]},
    "full": {"instances": ["bqp100-1", "bqp100-2", "jeu_100_25_1", "jeu_100_50_1", "rand1000"],
             "scenarios": ["a", "b_thr", "c", "d"], "budgets": [0.1, 1.0, 5.0]},
}


def run(*, quick: bool = False, seed: int = 0, workers: int = 2, log=print) -> dict:
    cfg = CONFIG["quick" if quick else "full"]
    rows = []
    wins = {name: {b: 0 for b in cfg["budgets"]} for name in MIXES}
    for inst_name in cfg["instances"]:
        inst = load_instance(inst_name, seed=seed)
        lib = build_library(inst, size=100, seed=seed)
        cands = CandidateSet.from_array(inst.problem, lib)
        scen = scenarios(inst, lib, seed=seed)
        for s_name in cfg["scenarios"]:
            cs = scen[s_name].constraints
            for budget in cfg["budgets"]:
                row = {"instance": inst_name, "scen": s_name, "T s": budget}
                costs = {}
                for name, (mix, method) in MIXES.items():
                    res = repair(inst.problem, cands, cs, method=method, time_limit=budget,
                                 seed=seed, workers=workers, mix=mix)
                    costs[name] = res.best.cost if res.best.feasible else math.inf
                best = min(costs.values())
                for name, c in costs.items():
                    row[name] = c
                    if c <= best + 1e-9:
                        wins[name][budget] += 1
                row["best mix"] = ",".join(n for n, c in costs.items() if c <= best + 1e-9)
                rows.append(row)
                log(f"  {inst_name} {s_name} T={budget}: " +
                    " ".join(f"{n}={c:.6g}" for n, c in costs.items()))
    return {"rows": rows, "wins": {n: {str(b): w for b, w in v.items()} for n, v in wins.items()},
            "budgets": cfg["budgets"]}


def render(section: dict) -> str:
    cols = ["instance", "scen", "T s"] + list(MIXES) + ["best mix"]
    out = [table(section["rows"], cols, title="Portfolio mixes: repaired cost (lower is better)")]
    win_rows = [{"mix": n, **{f"wins @ {b} s": v for b, v in w.items()}}
                for n, w in section["wins"].items()]
    out.append(table(win_rows, ["mix"] + [f"wins @ {b} s" for b in section["wins"]["default"]],
                     title="Rows where each mix found the best cost (ties count for each)"))
    return "\n\n".join(out)


if __name__ == "__main__":
    import sys

    sec = run(quick="--quick" in sys.argv)
    print(render(sec))
