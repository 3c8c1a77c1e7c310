"""Stress tests on a Dask cluster against the local pool, and what each task costs.

Model: the seeded random sparse QUBO of 1,000 variables (``random_sparse``), a library of
1,000 distinct local minima (``descend_qubo`` from seeded random starts), 200 scenarios of
the family "10 random variables fixed + a linear Hamming penalty (weight 1) to a uniform
random reference", greedy repair. Runs:

* local: ``stress_test`` in this process, one scenario after another (what a repair worker
  of ``flipfix serve`` does without ``--dask``), repair with 1 thread and with 2 threads;
* dask: the same call with a :class:`flipfix.service.cluster.DaskRunner` on ``local:2``
  (a scheduler and 2 single-threaded worker processes on loopback; start-up not counted).

Also measured: the bytes broadcast once per worker (problem + library, pickled), the bytes
of one task (its scenario, pickled), and the scheduler's overhead per task (200 tasks that
do nothing, one per task, through the same runner, wall / 200). The runner sends about
four tasks per worker thread (a chunk of scenarios each). Checks: the Dask answers equal the
1-thread local answers exactly (same seeds); 2 Dask workers beat the 1-thread local run.
Quick mode: 40 scenarios x 200 candidates.

A large repair (second table): 5,000 candidates (local minima, as above) of a 2,000-variable
``random_sparse`` QUBO under a quadratic Hamming penalty to a random plan (weight 0.05:
every candidate moves, ~300 flips each), greedy, one call of ``repair``: locally on one
thread, and with the same :class:`DaskRunner` as its ``candidate_runner`` (the greedy stage
in chunks of 64 candidates on the 2 workers; scoring, polish and the result here). Checks:
every candidate's repaired cost and flips and the best answer equal the local run's; the
Dask run is faster. Also measured: the bytes broadcast once per worker (late problem +
library + anchor, pickled). Quick mode: 2,000 candidates (the smallest library that
goes to the cluster by default: 4,000,000 bits).

The PostgreSQL store's write locks (third table; skipped without PostgreSQL): a server
started like the tests' (tests/pg_server.py), one store, 4 threads each committing 50
batches of 5 candidates (16 variables), all to one problem, then each to its own problem:
acknowledged commits per second (fsync on). Check: 4 problems commit faster than one.
"""

from __future__ import annotations

import pickle
import time

import numpy as np

from bench.common import random_sparse, table

__all__ = ["run", "render"]

COLUMNS = ["run", "scenarios", "candidates", "n", "seconds", "per scenario ms", "speed-up",
           "same answers"]
REPAIR_COLUMNS = ["run", "candidates", "n", "seconds", "search s", "per candidate ms",
                  "speed-up", "same answers"]


def _nothing(problem, candidates, item, *, time_limit, cancel, **options):
    return None


def run(*, quick: bool = False, seed: int = 0, log=print) -> dict:
    import cloudpickle

    from flipfix.repair import CandidateSet
    from flipfix.repair.audit.stress import ScenarioFamily, draw_scenarios, stress_test
    from flipfix.repair.solvers.greedy import descend_qubo
    from flipfix.service.cluster import DaskRunner, connect

    n, K, S = (1000, 200, 40) if quick else (1000, 1000, 200)
    p = random_sparse(n, seed=seed)
    rng = np.random.default_rng(seed)
    X, _ = descend_qubo(p.linear, p.indptr, p.indices, p.data,
                        rng.integers(0, 2, size=(K, n), dtype=np.int8))
    cands = CandidateSet.from_array(p, X, ids=[f"c{k}" for k in range(K)])
    family = ScenarioFamily(fix_k=10, hamming_weight=1.0)
    common = dict(scenarios=S, seed=seed, method="greedy", time_limit=3600.0)
    rows, reports = [], {}
    for threads in (1, 2):
        log(f"local, {threads} thread(s): {S} scenarios x {K} candidates")
        t = time.perf_counter()
        reports[threads] = stress_test(p, cands, family, repair_options={"workers": threads},
                                       **common)
        rows.append({"run": f"local, {threads} thread(s)", "seconds": time.perf_counter() - t})
    log("dask local:2 (start-up not counted)")
    cluster = connect("local:2")
    try:
        runner = DaskRunner(cluster.client)
        stress_test(p, cands, family, **{**common, "scenarios": 2},
                    repair_options={"workers": 1}, runner=runner)  # workers load the kernels
        t = time.perf_counter()
        dask_rep = stress_test(p, cands, family, repair_options={"workers": 1}, runner=runner,
                               **common)
        rows.append({"run": "dask local:2 (2 processes x 1 thread)",
                     "seconds": time.perf_counter() - t})
        t = time.perf_counter()
        gen = DaskRunner(cluster.client, chunk=1).map(_nothing, (p, cands), list(range(S)),
                                                      seconds_each=60.0,
                         deadline=float("inf"), cancel=None, options={})
        for _ in range(S):
            next(gen)
        gen.close()
        overhead = (time.perf_counter() - t) / S
        repair_section = _large_repair(cluster, quick=quick, seed=seed, log=log)
    finally:
        cluster.close()
    store_section = _store_locks(log=log)
    same = dask_rep.cost == reports[1].cost and dask_rep.flips == reports[1].flips
    base = rows[0]["seconds"]
    for r in rows:
        r.update({"scenarios": S, "candidates": K, "n": n,
                  "per scenario ms": 1000.0 * r["seconds"] / S,
                  "speed-up": base / r["seconds"]})
    rows[2]["same answers"] = "PASS" if same else "MISS"
    scen = draw_scenarios(p, cands, family, count=1, seed=seed)[0]
    return {
        "rows": rows,
        "shared_bytes": len(cloudpickle.dumps((p, cands), protocol=pickle.HIGHEST_PROTOCOL)),
        "task_bytes": len(cloudpickle.dumps(scen, protocol=pickle.HIGHEST_PROTOCOL)),
        "overhead_ms": 1000.0 * overhead,
        "faster": rows[2]["seconds"] < rows[0]["seconds"],
        "same": same,
        "repair": repair_section,
        "store": store_section,
    }


def _store_locks(*, log, writers: int = 4, batches: int = 50) -> dict | None:
    """Commits per second of ``writers`` threads on one problem, then on one each."""
    import sys
    import threading
    from pathlib import Path

    from flipfix.repair import Problem
    from flipfix.service.store import Store

    sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
    try:
        from pg_server import PostgresServer

        server = PostgresServer().start()
    except Exception as exc:  # noqa: BLE001 - no PostgreSQL here: the table is skipped
        log(f"store locks skipped: {exc}")
        return None
    labels = [f"x{i}" for i in range(16)]
    problem = Problem.from_terms({lab: 1.0 for lab in labels},
                                 [(labels[i], labels[i + 1], 1.0) for i in range(15)],
                                 vartype="BINARY")
    X = np.zeros((5, 16), dtype=np.int8)

    def rate(store, names) -> float:
        def write(name):
            for _ in range(batches):
                store.add_candidates(name, 1, [""] * 5, X, [{}] * 5)
        threads = [threading.Thread(target=write, args=(name,)) for name in names]
        t = time.perf_counter()
        for th in threads:
            th.start()
        for th in threads:
            th.join()
        return len(names) * batches / (time.perf_counter() - t)

    try:
        store = Store(server.new_database())
        try:
            for k in range(writers):
                store.create_problem(f"p{k}", problem)
            log(f"store locks: {writers} writers on one problem, then on {writers}")
            rows = [{"writers": writers, "problems": 1,
                     "commits/s": rate(store, ["p0"] * writers)},
                    {"writers": writers, "problems": writers,
                     "commits/s": rate(store, [f"p{k}" for k in range(writers)])}]
        finally:
            store.close()
    finally:
        server.stop()
    for r in rows:
        r["ratio"] = r["commits/s"] / rows[0]["commits/s"]
    rows[1]["target"] = "PASS" if rows[1]["ratio"] > 1.0 else "MISS"
    return {"rows": rows}


def _audit_figures(res) -> tuple:
    return ([(r.candidate_id, r.cost_after, r.flips, r.feasible) for r in res.audit],
            res.best.x.tolist(), res.best.cost)


def _large_repair(cluster, *, quick: bool, seed: int, log) -> dict:
    """One greedy repair of a large library, locally and with the Dask runner."""
    import cloudpickle

    from flipfix.repair import CandidateSet
    from flipfix.repair.api import repair
    from flipfix.repair.lowering.compiled import compile_constraints
    from flipfix.repair.model.constraints import HammingPenalty
    from flipfix.repair.solvers.greedy import descend_qubo
    from flipfix.repair.solvers.greedy.start import consensus
    from flipfix.service.cluster import DaskRunner

    n, K = (2000, 2000) if quick else (2000, 5000)
    p = random_sparse(n, seed=seed + 1)
    rng = np.random.default_rng(seed + 1)
    X, _ = descend_qubo(p.linear, p.indptr, p.indices, p.data,
                        rng.integers(0, 2, size=(K, n), dtype=np.int8))
    cands = CandidateSet.from_array(p, X, ids=[f"c{k}" for k in range(K)])
    plan = rng.integers(0, 2, size=n)
    late = [HammingPenalty({i: int(plan[i]) for i in range(n)}, weight=0.05, shape="quadratic")]
    opts = dict(method="greedy", time_limit=3600.0, seed=seed, workers=1)
    runner = DaskRunner(cluster.client)
    # the workers load the general-path kernels once (not counted)
    repair(p, CandidateSet.from_array(p, X[:8], ids=[f"w{k}" for k in range(8)]), late,
           candidate_runner=DaskRunner(cluster.client, min_bits=0), **opts)
    rows, results = [], []
    for name, extra in (("repair local, 1 thread", {}),
                        ("repair dask local:2 (greedy stage in chunks)",
                         {"candidate_runner": runner})):
        log(f"{name}: {K} candidates x {n} variables")
        t = time.perf_counter()
        res = repair(p, cands, late, **opts, **extra)
        seconds = time.perf_counter() - t
        results.append(res)
        rows.append({"run": name, "candidates": K, "n": n, "seconds": seconds,
                     "search s": res.stats["seconds"]["search"],
                     "per candidate ms": 1000.0 * seconds / K})
    for r in rows:
        r["speed-up"] = rows[0]["seconds"] / r["seconds"]
    same = _audit_figures(results[0]) == _audit_figures(results[1])
    rows[1]["same answers"] = "PASS" if same else "MISS"
    compiled = compile_constraints(p, late)
    shared = (compiled, X, consensus(X[:64], compiled.fixed))
    return {"rows": rows, "same": same, "tasks": runner.tasks,
            "faster": rows[1]["seconds"] < rows[0]["seconds"],
            "flips_mean": float(np.mean([a.flips for a in results[0].audit])),
            "shared_bytes": len(cloudpickle.dumps(shared, protocol=pickle.HIGHEST_PROTOCOL))}


def render(section: dict) -> str:
    t = table(section["rows"], COLUMNS,
              title="Stress test: local pool vs Dask (2 worker processes)")
    return t + (
        f"\n\n- broadcast once per worker (problem + library, pickled): "
        f"{section['shared_bytes'] / 2**20:.2f} MiB; per task (one scenario, pickled): "
        f"{section['task_bytes']} bytes; scheduler overhead per task (empty tasks through "
        f"the same runner): {section['overhead_ms']:.2f} ms"
        f"\n- Dask answers equal the local 1-thread answers: "
        f"{'PASS' if section['same'] else 'MISS'}"
        f"\n- 2 Dask workers faster than the local 1-thread run: "
        f"{'PASS' if section['faster'] else 'MISS'}") + _render_repair(section.get("repair")) + (
        "\n\n" + table(section["store"]["rows"], ["writers", "problems", "commits/s", "ratio",
                                                   "target"],
                        title="PostgreSQL store: acknowledged commits per second, one problem "
                              "vs one problem per writer (target: faster)")
        if section.get("store") else "")


def _render_repair(rep: dict | None) -> str:
    if not rep:
        return ""
    t = table(rep["rows"], REPAIR_COLUMNS,
              title="A large repair: local vs its greedy stage on Dask (2 worker processes)")
    return "\n\n" + t + (
        f"\n\n- broadcast once per worker and repair (late problem + library + anchor, "
        f"pickled): {rep['shared_bytes'] / 2**20:.2f} MiB; tasks: {rep['tasks']}; "
        f"mean flips per candidate: {rep['flips_mean']:.1f}"
        f"\n- Dask answers (every candidate's cost and flips, the best answer) equal the "
        f"local ones: {'PASS' if rep['same'] else 'MISS'}"
        f"\n- 2 Dask workers faster than the local 1-thread repair: "
        f"{'PASS' if rep['faster'] else 'MISS'}")
