"""Cold compilation of the search kernels: wall and CPU time per kernel family.

Each measurement runs in a fresh Python process whose ``NUMBA_CACHE_DIR`` is an empty
temporary folder, so numba compiles every kernel (nothing is loaded from a cache):

* ``serial``: the families one after another in one process, timed each (greedy, scoring,
  annealing, grow), with the numba specialisations each one compiled;
* ``warm_up``: :func:`flipfix.repair.kernels.readiness.warm_up` with ``grow=True`` as
  shipped (what ``make`` runs on a cold cache: the search kernels and the growing kernel,
  compiled by this process and a helper process at once); its CPU time includes the
  helper's, shown apart too (on two idle cores the wall time is about the larger share);
* ``search``: the same without the growing kernel (what a first ``flipfix repair``,
  ``audit`` or ``serve`` pays; the cold notice quotes this figure);
* ``second``: a second process on the cache the one before filled (a load, no compile).

CPU time is the process's user + system time (``resource.getrusage`` of the waited-for
child processes); wall time is what a user waits. The machine is shared: the load average
(``uptime``) is recorded with every figure, and the wall time of a loaded machine is long
while its CPU time is about what an idle one would need.

Target: a cold set-up (``warm_up`` plus grow) in at most 20 s of wall time on 2 cores.
``python -m bench.run --only compile``; ``python -m bench.compile`` prints the same table.
"""

from __future__ import annotations

import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from bench.common import table

__all__ = ["run", "render", "measure", "TARGET_S"]

TARGET_S = 20.0
FAMILIES = ("greedy", "scoring", "annealing", "grow")
COLUMNS = ["run", "family", "wall s", "cpu s", "specialisations", "load avg", "target"]


def _uptime() -> str:
    try:
        return " ".join(Path("/proc/loadavg").read_text().split()[:3])
    except OSError:
        return "?"


def _specialisations() -> dict:
    """name -> number of compiled signatures, for every numba dispatcher of the kernel
    modules imported so far."""
    from numba.core.registry import CPUDispatcher

    out = {}
    for name, mod in list(sys.modules.items()):
        if not name.startswith("flipfix.repair") or mod is None:
            continue
        for attr, obj in list(vars(mod).items()):
            if isinstance(obj, CPUDispatcher) and obj.overloads:
                out[f"{obj.py_func.__module__}.{obj.py_func.__qualname__}"] = len(obj.overloads)
    return out


def _family(name: str):
    if name == "greedy":
        from flipfix.repair.solvers.greedy import warm_up
    elif name == "scoring":
        from flipfix.repair.kernels.scores import warm_up
    elif name == "annealing":
        from flipfix.repair.solvers.anneal import warm_up
    else:
        from flipfix.repair.grow.neighbours import warm_up
    return warm_up


def _child(mode: str) -> dict:
    """Runs inside the measured process; returns its figures."""
    t0, c0 = time.perf_counter(), time.process_time()
    import flipfix.repair.api  # noqa: F401  (imports numba and every kernel module)

    out = {"import": {"wall": time.perf_counter() - t0, "cpu": time.process_time() - c0}}
    if mode == "serial":
        seen: dict = {}
        for fam in FAMILIES:
            warm = _family(fam)
            t, c = time.perf_counter(), time.process_time()
            warm()
            specs = _specialisations()
            new = {k: v - seen.get(k, 0) for k, v in specs.items() if v > seen.get(k, 0)}
            seen = specs
            out[fam] = {"wall": time.perf_counter() - t, "cpu": time.process_time() - c,
                        "specialisations": sum(new.values()),
                        "several": {k: v for k, v in specs.items() if v > 1}}
    else:
        from flipfix.repair.kernels import readiness

        t = time.perf_counter()
        readiness.warm_up(notice=None, grow=mode == "warm_up")
        own = resource.getrusage(resource.RUSAGE_SELF)
        helper = resource.getrusage(resource.RUSAGE_CHILDREN)
        out["warm_up"] = {"wall": time.perf_counter() - t,
                          "own_cpu": own.ru_utime + own.ru_stime,
                          "helper_cpu": helper.ru_utime + helper.ru_stime}
        out["cached"] = readiness.is_cached()
        out["specialisations"] = sum(_specialisations().values())
    return out


def _spawn(mode: str, cache: str) -> dict:
    env = dict(os.environ, NUMBA_CACHE_DIR=cache)
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    load = _uptime()
    t = time.perf_counter()
    proc = subprocess.run([sys.executable, "-m", "bench.compile", "--child", mode],
                          env=env, capture_output=True, text=True,
                          cwd=str(Path(__file__).resolve().parent.parent))
    wall = time.perf_counter() - t
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    if proc.returncode:
        raise RuntimeError(f"bench.compile --child {mode} failed:\n{proc.stderr}")
    doc = json.loads(proc.stdout.strip().splitlines()[-1])
    doc["process"] = {"wall": wall, "cpu": (after.ru_utime - before.ru_utime)
                      + (after.ru_stime - before.ru_stime), "load": load,
                      "load_after": _uptime()}
    return doc


def measure(mode: str) -> dict:
    """One cold measurement (``serial`` or ``warm_up``) in a fresh process on an empty cache;
    ``warm_up`` also runs a second process on the cache it filled."""
    with tempfile.TemporaryDirectory(prefix="flipfix-numba-") as cache:
        doc = _spawn(mode, cache)
        if mode != "serial":
            doc["second"] = _spawn(mode, cache)
    return doc


def _verdict(wall: float) -> str:
    return "PASS" if wall <= TARGET_S else "MISS"


def _serial(rows: list, log) -> dict:
    serial = measure("serial")
    p = serial["process"]
    load = f"{p['load']} -> {p['load_after']}"
    for fam in FAMILIES:
        f = serial[fam]
        rows.append({"run": "serial", "family": fam, "wall s": f["wall"], "cpu s": f["cpu"],
                     "specialisations": f["specialisations"], "load avg": load, "target": ""})
        log(f"  serial {fam}: {f['wall']:.1f} s wall, {f['cpu']:.1f} s cpu, "
            f"{f['specialisations']} specialisations")
    rows.append({"run": "serial", "family": "process (import + all)", "wall s": p["wall"],
                 "cpu s": p["cpu"], "specialisations": sum(serial[f]["specialisations"]
                                                           for f in FAMILIES),
                 "load avg": load, "target": _verdict(p["wall"])})
    return serial["annealing"]["several"] | serial["grow"]["several"]


def _shipped(rows: list, log, mode: str) -> bool:
    run = "warm_up(grow=True)" if mode == "warm_up" else "warm_up()"
    what = "search + grow" if mode == "warm_up" else "search"
    warm = measure(mode)
    p, w = warm["process"], warm["warm_up"]
    load = f"{p['load']} -> {p['load_after']}"
    rows.append({"run": run, "family": f"{what}: process (import + all, 2 processes)",
                 "wall s": p["wall"], "cpu s": p["cpu"],
                 "specialisations": warm["specialisations"], "load avg": load,
                 "target": _verdict(p["wall"])})
    rows.append({"run": run, "family": "of which: this process",
                 "wall s": "", "cpu s": w["own_cpu"], "load avg": load, "target": ""})
    rows.append({"run": run, "family": "of which: the helper process",
                 "wall s": "", "cpu s": w["helper_cpu"], "load avg": load, "target": ""})
    log(f"  {run}: {p['wall']:.1f} s wall, {p['cpu']:.1f} s cpu (this process "
        f"{w['own_cpu']:.1f}, helper {w['helper_cpu']:.1f}; is_cached: {warm['cached']})")
    s = warm["second"]
    p = s["process"]
    rows.append({"run": "second process", "family": f"{what} (cache filled)",
                 "wall s": p["wall"], "cpu s": p["cpu"], "specialisations": s["specialisations"],
                 "load avg": f"{p['load']} -> {p['load_after']}", "target": ""})
    return warm["cached"]


def run(*, quick: bool = False, seed: int = 0, log=print) -> dict:
    rows: list = []
    several: dict = {}
    if not quick:  # the per-family split (a second cold compile)
        several = _serial(rows, log)
    cached = _shipped(rows, log, "search")  # what a first repair, audit or serve pays
    if not quick:
        cached = _shipped(rows, log, "warm_up") and cached  # what make pays
    return {"rows": rows, "several": several, "cached": cached}


def render(section: dict) -> str:
    text = table(section["rows"], COLUMNS, title=(
        f"Cold kernel compilation, empty NUMBA_CACHE_DIR, fresh process each (target: a cold "
        f"set-up, warm_up + grow, within {TARGET_S:g} s wall on 2 cores; the machine is "
        "shared: load average before -> after beside each figure)"))
    if section.get("several"):
        text += "\n\nKernels compiled for more than one argument type: " + ", ".join(
            f"{k} x{v}" for k, v in sorted(section["several"].items()))
    return text


def main(argv=None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    if argv[:1] == ["--child"]:
        print(json.dumps(_child(argv[1])))
        return 0
    section = run(quick="--quick" in argv)
    print(render(section))
    return 0


if __name__ == "__main__":
    sys.exit(main())
