"""Annealing from the candidates, by turning depth, against greedy alone and a re-run.

A measurement, not a target table. For each instance and late event (1 % of the variables
forced opposite to the published plan, the library's best candidate, plus a linear Hamming
penalty to that plan, weak = 0.05 x or strong = 1 x the median |coupling|) and budget T:

* greedy: greedy repair of the 100-candidate library (its time counts against T);
* anneal d: then flipfix.repair.solvers.anneal from the 1 or 8 best repaired candidates
  at depth d, its sweeps refitted run after run until the whole (greedy included) takes
  T, best of greedy and anneal;
* re-run: dwave-samplers' SimulatedAnnealingSampler from scratch on the penalised model
  with the fixed variables clamped, its sweeps calibrated so that its time is T
  (best of its reads; 1, 4 and 16 reads tried, the best reported).

All single-threaded (the re-run has no threads) and timed by this thread's CPU time (T is
CPU seconds: steadier than the wall clock on a shared machine). Costs are
Compiled.evaluate of the late problem; "vs re-run %" is (cost - re-run) / |re-run|
(negative: flipfix cheaper).

    .venv/bin/python -m bench.anneal_depths [bqp250-1 G14 G67 rand5000] [--seed S] [--weak]
        [--sa-library SWEEPS]

(needs ``pip install dwave-samplers``)
"""

from __future__ import annotations

import sys
import time

import numpy as np

from flipfix.repair.documents.instances import read_bqp, read_gset
from flipfix.repair.lowering.compiled import compile_constraints
from flipfix.repair.model.constraints import FixVariables, HammingPenalty
from flipfix.repair.solvers.anneal import anneal, flip_scale, warm_up
from flipfix.repair.solvers.greedy import greedy_repair

from bench.common import BENCHMARKS, Instance, build_library, random_sparse, table

#: Both sides run single-threaded in this thread, so its CPU time is the work done; on a
#: shared machine it is far steadier than the wall clock (which other processes stretch).
_clock = time.thread_time

DEPTHS = (0.15, 0.3, 0.5, 0.7, 0.85, 1.0)
READS = (1, 4, 16)
STARTS = (1, 8)


def _instances(names):
    read = {"rand5000": lambda: random_sparse(5000, seed=0),"bqp250-1": lambda: read_bqp(BENCHMARKS / "bqp" / "bqp250-1.sparse"),
            "G14": lambda: read_gset(BENCHMARKS / "gset" / "G14.txt"),
            "G67": lambda: read_gset(BENCHMARKS / "gset" / "G67.txt")}
    return [(name, read[name]()) for name in names]


def _event(p, best, strength: float, seed: int):
    rng = np.random.default_rng(seed)
    pick = rng.choice(p.n, size=max(1, p.n // 100), replace=False)
    w = strength * float(np.median(np.abs(p.data)))
    return [FixVariables({int(i): int(1 - best[i]) for i in pick}, name="forced"),
            HammingPenalty({i: int(b) for i, b in enumerate(best)}, weight=w, name="near_plan")]


def _best(comp, X):
    ev = comp.evaluate(X)
    return float(np.where(ev.feasible, ev.cost, np.inf).min())


def _fit(run, T: float, sweeps: int, tries: int = 6):
    """run(sweeps) -> (result, seconds): sweeps rescaled until the time is within
    [0.9, 1.05] x T (at most ``tries`` runs); returns the last (result, seconds, sweeps)."""
    for _ in range(tries):
        res, wall = run(sweeps)
        if 0.9 * T <= wall <= 1.05 * T:
            break
        sweeps = max(1, int(sweeps * 0.97 * T / max(wall, 1e-6)))
    return res, wall, sweeps


def _rerun(comp, T: float, reads: int, seed: int):
    """dwave-samplers SA on the penalised model, fixed variables clamped, time ~ T."""
    from dwave.samplers import SimulatedAnnealingSampler

    p = comp.problem
    bqm = comp.objective_model.to_bqm()
    fixed = {lab: int(comp.fixed[i]) for i, lab in enumerate(p.labels) if comp.fixed[i] >= 0}
    for lab, v in fixed.items():
        bqm.fix_variable(lab, v)
    sa = SimulatedAnnealingSampler()

    def once(sweeps):
        t = _clock()
        ss = sa.sample(bqm, num_reads=reads, num_sweeps=sweeps, seed=seed)
        return ss, _clock() - t

    ss, wall, sweeps = _fit(once, T, 100)
    X = np.zeros((len(ss), p.n), dtype=np.int8)
    order = [ss.variables.index(lab) for lab in p.labels if lab not in fixed]
    free = [i for i, lab in enumerate(p.labels) if lab not in fixed]
    X[:, free] = np.asarray(ss.record.sample)[:, order]
    for lab, v in fixed.items():
        X[:, p.index[lab]] = v
    return _best(comp, X), wall, sweeps


def _ours(comp, lib, T: float, depth: float, seed: int, starts: int):
    def once(sweeps):
        t = _clock()
        g = greedy_repair(comp, lib)
        ev = comp.evaluate(g.X)
        order = np.lexsort((ev.cost, ~ev.feasible))
        chosen = g.X[order[:starts]]
        out = anneal(comp, chosen, depth=depth, sweeps=sweeps, seed=seed,
                     scale=flip_scale(comp, chosen))
        return min(_best(comp, g.X), _best(comp, out.X)), _clock() - t

    return _fit(once, T, 20)


def _sa_library(p, size: int, sweeps: int, seed: int) -> np.ndarray:
    """``size`` samples of dwave-samplers' SA on the base model (a library as a good
    annealer would publish it): int8 (size, n) in p's label order."""
    from dwave.samplers import SimulatedAnnealingSampler

    ss = SimulatedAnnealingSampler().sample(p.to_bqm(), num_reads=size, num_sweeps=sweeps,
                                            seed=seed)
    return np.asarray(ss.record.sample)[:, [ss.variables.index(v) for v in p.labels]].astype(
        np.int8)


def run(names=("bqp250-1", "G14", "G67"), seed: int = 0, weak_only: bool = False,
        sa_library: int = 0, log=print):
    """``sa_library`` > 0: the library is 16 SA samples of that many sweeps each instead of
    100 greedy local minima of random starts."""
    warm_up()
    rows = []
    budgets = (0.1, 1.0)
    events = (("weak", 0.05),) if weak_only else (("weak", 0.05), ("strong", 1.0))
    for name, p in _instances(names):
        lib = (_sa_library(p, 16, sa_library, seed) if sa_library
               else build_library(Instance(name, p), size=100, seed=seed))
        plan = lib[np.argmin(p.energies(lib))]
        for ev_name, strength in events:
            comp = compile_constraints(p, _event(p, plan, strength, seed))
            g0 = _clock()
            g = greedy_repair(comp, lib)
            g_wall = _clock() - g0
            greedy_cost = _best(comp, g.X)
            for T in budgets:
                if T < 1.5 * g_wall:
                    log(f"# {name} {ev_name} T={T}: greedy of the library alone takes "
                        f"{g_wall:.3f} s: skipped")
                    continue
                rr = {r: _rerun(comp, T, r, seed) for r in READS}
                r_best = min(rr, key=lambda r: rr[r][0])
                rc, rw, rs = rr[r_best]
                base = {"instance": name, "n": p.n, "event": ev_name, "T s": T,
                        "greedy": greedy_cost, "greedy s": round(g_wall, 3),
                        "re-run": rc, "re-run reads x sweeps": f"{r_best}x{rs}",
                        "re-run time/T": round(rw / T, 2)}
                for d, k in [(d, k) for k in STARTS for d in DEPTHS]:
                    c, w, s = _ours(comp, lib, T, d, seed, k)
                    row = dict(base, depth=d, starts=k, cost=c, sweeps=s,
                               **{"time/T": round(w / T, 2)},
                               **{"vs re-run %": round(100 * (c - rc) / abs(rc), 3),
                                  "vs greedy %": round(100 * (c - greedy_cost) /
                                                       abs(greedy_cost), 3)})
                    rows.append(row)
                    log(" ".join(f"{k}={v}" for k, v in row.items()))
    cols = ["instance", "n", "event", "T s", "greedy", "re-run", "re-run reads x sweeps",
            "re-run time/T", "starts", "depth", "cost", "sweeps", "time/T", "vs greedy %", "vs re-run %"]
    log(table(rows, cols))
    return rows


if __name__ == "__main__":
    args = sys.argv[1:]
    seed = int(args[args.index("--seed") + 1]) if "--seed" in args else 0
    names = [a for a in args if not a.startswith("--") and not a.isdigit()]
    sa = int(args[args.index("--sa-library") + 1]) if "--sa-library" in args else 0
    run(names or ("bqp250-1", "G14", "G67"), seed=seed, weak_only="--weak" in args,
        sa_library=sa)
