"""Run the benchmarks: ``python -m bench.run [--quick] [--only NAME ...]``.

Sections: repair (repair vs re-solve), kernel (greedy throughput), service (gRPC overhead),
memory (peak RSS), mix (which portfolio budget mix wins at each budget), rerun (repair vs a
simulated annealer re-run from scratch; needs the ``bench`` extra), cluster (stress tests on
Dask vs the local pool), grow (original vs grown library on held-out scenarios), load (50
clients against one server process: rejections, latency, health p99, peak memory, shutdown
time), conflicts (a minimal conflict among many hard rows), compile (cold compilation of the
search kernels on an empty numba cache, per kernel family). Prints a table per section and
writes bench/results/latest.json
(the figures, the machine, the command). Never part of the test suite.
"""

from __future__ import annotations

import argparse
import sys
import time

from bench import compile as kernel_compile
from bench import (budget, cluster, conflicts, grow, kernel, load, memory, mix,
                   repair_vs_rerun, repair_vs_resolve,
                   service_overhead)
from bench.common import machine, write_results

__all__ = ["main", "SECTIONS"]

SECTIONS = {
    "repair": repair_vs_resolve,
    "kernel": kernel,
    "service": service_overhead,
    "memory": memory,
    "mix": mix,
    "budget": budget,
    "rerun": repair_vs_rerun,
    "cluster": cluster,
    "grow": grow,
    "load": load,
    "conflicts": conflicts,
    "compile": kernel_compile,
}


def _log(msg: str) -> None:
    print(msg, flush=True)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(prog="python -m bench.run", description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="short run (~3 min)")
    ap.add_argument("--only", action="append", choices=sorted(SECTIONS),
                    help="run only this section (repeatable)")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--output", default="latest.json", help="file name under bench/results/")
    args = ap.parse_args(argv)
    names = args.only or list(SECTIONS)
    cmd = "python -m bench.run" + (" --quick" if args.quick else "") + "".join(
        f" --only {n}" for n in (args.only or []))
    doc = {"command": cmd, "machine": machine(), "seed": args.seed, "quick": args.quick,
           "started": time.strftime("%Y-%m-%d %H:%M:%S"), "sections": {}}
    m = doc["machine"]
    _log(f"# {cmd}\n# machine: {m['nproc']} x {m['cpu']}; python {m['python']}, numpy "
         f"{m['numpy']}, ortools {m['ortools']}, numba {m['numba']}, grpcio {m['grpcio']}")
    t_all = time.perf_counter()
    rendered = []
    for name in names:
        mod = SECTIONS[name]
        _log(f"\n## {name}")
        t = time.perf_counter()
        section = mod.run(quick=args.quick, seed=args.seed, log=_log)
        section["seconds"] = time.perf_counter() - t
        doc["sections"][name] = section
        text = mod.render(section)
        rendered.append(text)
        _log("\n" + text + f"\n\n({name}: {section['seconds']:.0f} s)")
        doc["seconds"] = time.perf_counter() - t_all
        doc["markdown"] = "\n\n".join(rendered)
        write_results(doc, args.output)
    _log(f"\n# total {time.perf_counter() - t_all:.0f} s; figures in bench/results/{args.output}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
