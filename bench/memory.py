"""Peak memory (VmHWM of the child, and ru_maxrss) for K candidates of n variables, stored and repaired, in a fresh subprocess.

The child builds the n=5000 sparse model, makes K local minima (``descend_qubo`` from seeded
random starts), holds them as a ``CandidateSet``, stores them in the service's SQLite store
and loads them back, then runs the portfolio repair of scenario (a). It reports peak RSS
(``resource.getrusage(RUSAGE_SELF).ru_maxrss``) after each stage and the tracemalloc peak of
Python-level allocations (numpy arrays included). Target: well under 2 GiB.
"""

from __future__ import annotations

import json
import subprocess
import sys
import time

from bench.common import table

__all__ = ["run", "render"]

LIMIT_MB = 2048.0
COLUMNS = ["stage", "K", "n", "peak RSS MB", "ru_maxrss MB", "tracemalloc peak MB", "seconds", "target"]


def _child(K: int, n: int, T: float, seed: int) -> None:
    import resource
    import tempfile
    import tracemalloc
    from pathlib import Path

    import numpy as np

    def rss():
        """Peak RSS in MiB: VmHWM of this process image. ru_maxrss (KiB) is kept too, but
        Linux carries it over exec from the forking parent, so it can overstate the child."""
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return float(line.split()[1]) / 1024.0
        return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0

    def maxrss():
        return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0

    from flipfix.repair import CandidateSet
    from flipfix.repair.api import repair as run_repair
    from flipfix.repair.model.constraints import FixVariables
    from flipfix.repair.solvers.greedy import descend_qubo

    from bench.common import random_sparse

    from flipfix.repair.solvers.cpsat import solve_cpsat  # noqa: F401  (imports counted in the baseline)
    stages = [{"stage": "imports", "rss": rss(), "maxrss": maxrss(), "traced": 0.0,
               "seconds": 0.0}]
    tracemalloc.start()
    t = time.perf_counter()

    def mark(name):
        stages.append({"stage": name, "rss": rss(), "maxrss": maxrss(),
                       "traced": tracemalloc.get_traced_memory()[1] / 2**20,
                       "seconds": time.perf_counter() - t})

    p = random_sparse(n, seed=seed)
    rng = np.random.default_rng(seed)
    X = np.empty((K, n), dtype=np.int8)
    for s in range(0, K, 1000):
        X0 = rng.integers(0, 2, size=(min(1000, K - s), n), dtype=np.int8)
        X[s:s + X0.shape[0]], _ = descend_qubo(p.linear, p.indptr, p.indices, p.data, X0)
    cands = CandidateSet.from_array(p, X)
    mark("library in memory")
    try:
        from flipfix.service.store import Store

        with tempfile.TemporaryDirectory() as tmp:
            st = Store(Path(tmp) / "mem.sqlite3")
            rec = st.create_problem("mem", p)
            rev = getattr(rec, "revision", 1)
            st.add_candidates("mem", rev, list(cands.ids), cands.X, [{}] * K)
            _rev, p2, cands2 = st.library("mem")
            assert cands2.X.shape == (K, n)
            st.close()
            del cands2
        mark("stored + loaded (SQLite)")
    except Exception as err:  # the store is another engineer's module: report, do not fail
        stages.append({"stage": f"store skipped: {type(err).__name__}: {err}"[:120],
                       "rss": rss(), "maxrss": maxrss(), "traced": 0.0, "seconds": time.perf_counter() - t})
    pick = rng.choice(n, size=10, replace=False)
    fix = FixVariables({int(i): int(1 - X[0, i]) for i in pick}, name="forced")
    res = run_repair(p, cands, [fix], method="portfolio", time_limit=T, workers=2, seed=seed)
    mark(f"repaired (portfolio {T:g} s, status {res.status})")
    print(json.dumps({"stages": stages}))


def run(*, quick: bool = False, seed: int = 0, log=print) -> dict:
    K, n, T = (500, 5000, 1.0) if quick else (10_000, 5000, 10.0)
    t = time.perf_counter()
    proc = subprocess.run([sys.executable, "-m", "bench.memory", str(K), str(n), str(T),
                           str(seed)], capture_output=True, text=True, timeout=1800)
    if proc.returncode != 0:
        log(proc.stderr[-2000:])
        return {"rows": [], "columns": COLUMNS, "error": proc.stderr[-2000:]}
    stages = json.loads(proc.stdout.strip().splitlines()[-1])["stages"]
    rows = [{"stage": s["stage"], "K": K, "n": n, "peak RSS MB": s["rss"], "ru_maxrss MB": s["maxrss"],
             "tracemalloc peak MB": s["traced"], "seconds": s["seconds"],
             "target": "PASS" if s["rss"] < LIMIT_MB else "MISS"} for s in stages]
    for r in rows:
        log(table([r], COLUMNS).splitlines()[-1])
    return {"rows": rows, "columns": COLUMNS, "wall": time.perf_counter() - t,
            "limit_MB": LIMIT_MB}


def render(section: dict) -> str:
    if not section["rows"]:
        return f"### Memory\n\nfailed: {section.get('error', '')[:500]}"
    return table(section["rows"], COLUMNS,
                 title="Peak memory, fresh subprocess (target < 2 GiB)")


if __name__ == "__main__":
    _child(int(sys.argv[1]), int(sys.argv[2]), float(sys.argv[3]), int(sys.argv[4]))
