"""Load: many clients against one ``flipfix serve`` process with its default settings.

A real server process (``flipfix serve``, defaults: 2 workers, a queue of 64, 2 heavy calls
at once) on loopback. Measured:

* 50 clients x 20 small repairs each (a stored 60-variable problem, 8 candidates, one
  variable fixed, greedy, 0.2 s budget): calls ok / rejected, p50 and p99 latency;
* meanwhile, health checks from a separate process every 20 ms: p50, p99 and max latency;
  in the full run 4 more clients each upload the largest model the server allows
  (label-keyed, the coupling cap ``ServerConfig.max_couplings`` = ``serve --max-couplings``
  default, 2,000,000 couplings, over ``max_variables`` = 100,000 variables: about 59 MiB,
  within the 64 MiB message cap and, at 25 x its bytes, within ``--memory-mb`` 2048) during
  the repairs, so that health is measured beside uploads too;
* where the server's interpreter stalls: the server runs under :mod:`bench.stalls` (a
  bench-only sampler thread; stalls of 30 ms or more and where the threads were);
* peak memory (VmHWM) of the server process and of its largest worker;
* shutdown: SIGTERM with a repair in flight and ``--grace 2``: seconds to exit.

Targets: every call accepted (the defaults are sized for this load on 2 cores); health p99
<= 100 ms; exit within grace + 0.5 s. The client threads share one Python process, so call
latencies include client-side waiting; the health prober has a process of its own.
"""

from __future__ import annotations

import multiprocessing as mp
import os
import shutil
import signal
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

from bench import stalls
from bench.common import table

__all__ = ["run", "render"]

CLIENTS, CALLS = 50, 20
HEALTH_P99_MS = 100.0
GRACE = 2.0
SHUTDOWN_SLACK = 0.5
COLUMNS = ["measure", "value", "target", "result"]


def _start_server(db: str, *extra: str, stalls: str | None = None):
    wrapper = ["bench.stalls", stalls] if stalls else ["flipfix.service.cli"]
    proc = subprocess.Popen([sys.executable, "-m", *wrapper, "serve", "--port", "0",
                             "--db", db, "--grace", str(GRACE), *extra],
                            stderr=subprocess.PIPE, text=True)
    line = proc.stderr.readline()
    while "serving on" not in line:
        if not line:
            raise RuntimeError("the server exited before serving")
        line = proc.stderr.readline()
    port = int(line.split("serving on ")[1].split()[0].rsplit(":", 1)[1])
    threading.Thread(target=lambda: [None for _ in proc.stderr], daemon=True).start()
    return proc, f"127.0.0.1:{port}"


def _probe(target: str, stop, out) -> None:
    """Health checks every 20 ms until ``stop`` is set; latencies (s) to ``out``."""
    import grpc
    from grpc_health.v1 import health_pb2, health_pb2_grpc

    lat = []
    with grpc.insecure_channel(target) as ch:
        stub = health_pb2_grpc.HealthStub(ch)
        stub.Check(health_pb2.HealthCheckRequest(), timeout=60)
        while not stop.wait(0.02):
            t = time.perf_counter()
            try:
                stub.Check(health_pb2.HealthCheckRequest(), timeout=10)
                lat.append(time.perf_counter() - t)
            except grpc.RpcError:
                lat.append(float("inf"))
    out.put(lat)


def _peak_kib(pid: int) -> int:
    try:
        for line in Path(f"/proc/{pid}/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1])
    except OSError:
        pass
    return 0


def _children(pid: int) -> list[int]:
    try:
        out = subprocess.run(["pgrep", "-P", str(pid)], capture_output=True, text=True)
        return [int(x) for x in out.stdout.split()]
    except OSError:
        return []


def _small_problem(seed: int):
    rng = np.random.default_rng(seed)
    n = 60
    linear = {f"x{i}": float(rng.normal()) for i in range(n)}
    quad = [[f"x{i}", f"x{j}", float(rng.normal())]
            for i in range(n) for j in range(i + 1, n) if rng.random() < 0.1]
    doc = {"vartype": "BINARY", "linear": linear, "quadratic": quad}
    cands = [{"id": f"k{k}", "assignment": {f"x{i}": int(v) for i, v in
                                            enumerate(rng.integers(0, 2, n))}} for k in range(8)]
    return doc, cands


def largest_allowed() -> tuple[int, int]:
    """(couplings, variables): the caps of a server with its defaults."""
    from flipfix.service.server import ServerConfig

    cfg = ServerConfig()
    return cfg.max_couplings, cfg.max_variables


def _big_model(couplings: int, seed: int, *, variables: int):
    from flipfix.service.generated import flipfix_pb2 as pb

    rng = np.random.default_rng(seed)
    n = min(variables, max(1000, couplings // 20))
    u = rng.integers(0, n, couplings)
    v = (u + 1 + rng.integers(0, n - 1, couplings)) % n
    lab = [pb.Label(str=f"v{i}") for i in range(n)]
    return pb.ProblemModel(vartype=1, quadratic=[
        pb.QuadraticTerm(u=lab[a], v=lab[b], bias=1.0) for a, b in zip(u.tolist(), v.tolist())])


def _pct(xs, q):
    return float(np.percentile(xs, q)) if xs else float("nan")


def run(*, quick: bool = False, seed: int = 0, log=print) -> dict:
    import grpc

    from flipfix.service.client import FlipfixClient
    from flipfix.service.generated import flipfix_pb2 as pb
    from flipfix.service.generated import flipfix_pb2_grpc as pb_grpc

    tmp = tempfile.mkdtemp(prefix="flipfix-load-")
    stalls_json = os.path.join(tmp, "stalls.json")
    proc, target = _start_server(os.path.join(tmp, "load.sqlite3"), stalls=stalls_json)
    rows, notes = [], []
    try:
        doc, cands = _small_problem(seed)
        with FlipfixClient(target, timeout=120) as fx:
            fx.create_problem("small", doc)
            fx.add_candidates("small", cands)
            fx.repair("small", [{"type": "fix", "values": {"x0": 1}}], method="greedy",
                      time_limit=0.2)  # the workers are warm
        ctx = mp.get_context("spawn")
        stop, out = ctx.Event(), ctx.Queue()
        prober = ctx.Process(target=_probe, args=(target, stop, out))
        prober.start()
        time.sleep(1.0)
        lat, codes, lock = [], {}, threading.Lock()

        def client(c: int) -> None:
            with FlipfixClient(target, timeout=120) as fx:
                for k in range(CALLS):
                    t = time.perf_counter()
                    try:
                        fx.repair("small", [{"type": "fix", "values": {f"x{(c + k) % 60}": 1}}],
                                  method="greedy", time_limit=0.2, seed=k)
                        code = "OK"
                    except grpc.RpcError as err:
                        code = err.code().name
                    with lock:
                        lat.append(time.perf_counter() - t)
                        codes[code] = codes.get(code, 0) + 1

        uploads, up_codes = [], {}
        if not quick:
            couplings, variables = largest_allowed()
            big = _big_model(couplings, seed, variables=variables)
            big_what = (f"{len(big.quadratic):,} couplings, "
                        f"{big.ByteSize() / 2**20:.1f} MiB")
            log(f"load: upload model {big_what}")

            def uploader(u: int) -> None:
                with grpc.insecure_channel(target, options=[
                        ("grpc.max_send_message_length", 2**30)]) as ch:
                    t = time.perf_counter()
                    try:
                        pb_grpc.FlipfixStub(ch).CreateProblem(
                            pb.CreateProblemRequest(name=f"big{u}", model=big), timeout=600)
                        code = "OK"
                    except grpc.RpcError as err:
                        code = err.code().name
                    with lock:
                        uploads.append(time.perf_counter() - t)
                        up_codes[code] = up_codes.get(code, 0) + 1

        t0 = time.perf_counter()
        threads = [threading.Thread(target=client, args=(c,)) for c in range(CLIENTS)]
        if not quick:
            threads += [threading.Thread(target=uploader, args=(u,)) for u in range(4)]
        for th in threads:
            th.start()
        for th in threads:
            th.join()
        wall = time.perf_counter() - t0
        stop.set()
        health = out.get(timeout=60)
        prober.join(timeout=30)
        peak = _peak_kib(proc.pid)
        worker_peak = max([_peak_kib(p) for p in _children(proc.pid)] or [0])
        total = CLIENTS * CALLS
        ok = codes.get("OK", 0)
        rejected = {k: v for k, v in codes.items() if k != "OK"}
        hp99 = _pct(health, 99) * 1e3
        rows += [
            {"measure": f"repairs ok ({CLIENTS} clients x {CALLS})", "value": f"{ok}/{total}",
             "target": "all", "result": "PASS" if ok == total else "MISS"},
            {"measure": "repairs rejected", "value": str(rejected or 0), "target": "0",
             "result": "PASS" if not rejected else "MISS"},
            {"measure": "repair latency p50 / p99 s",
             "value": f"{_pct(lat, 50):.2f} / {_pct(lat, 99):.2f}", "target": "-", "result": "-"},
            {"measure": "throughput repairs/s", "value": f"{ok / wall:.1f}", "target": "-",
             "result": "-"},
            {"measure": f"health p50 / p99 / max ms ({len(health)} checks)",
             "value": f"{_pct(health, 50) * 1e3:.1f} / {hp99:.1f} / {max(health) * 1e3:.0f}",
             "target": f"p99 <= {HEALTH_P99_MS:.0f}",
             "result": "PASS" if hp99 <= HEALTH_P99_MS else "MISS"},
            {"measure": "peak memory server / largest worker MiB",
             "value": f"{peak / 1024:.0f} / {worker_peak / 1024:.0f}", "target": "-",
             "result": "-"},
        ]
        if not quick:
            rows.append({"measure": f"uploads of the largest model ({big_what}; 4 clients) s",
                         "value": f"{max(uploads):.1f} max; {up_codes}", "target": "-",
                         "result": "-"})
        # shutdown with a repair in flight
        with FlipfixClient(target, timeout=120) as fx:
            fx.create_problem("long", doc)
            fx.add_candidates("long", cands)
        holder = threading.Thread(target=lambda: _quiet(lambda: FlipfixClient(
            target, timeout=120).repair("long", [], method="portfolio", time_limit=30.0)))
        holder.start()
        time.sleep(1.0)
        t = time.perf_counter()
        proc.send_signal(signal.SIGTERM)
        proc.wait(timeout=60)
        took = time.perf_counter() - t
        notes.append(stalls.summary(stalls_json))
        log(notes[-1])
        holder.join(timeout=60)
        rows.append({"measure": f"shutdown after SIGTERM s (grace {GRACE:g})",
                     "value": f"{took:.2f}", "target": f"<= {GRACE + SHUTDOWN_SLACK:g}",
                     "result": "PASS" if took <= GRACE + SHUTDOWN_SLACK else "MISS"})
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
        shutil.rmtree(tmp, ignore_errors=True)  # the database holds four large models
    return {"rows": rows, "columns": COLUMNS, "notes": notes}


def _quiet(fn) -> None:
    try:
        fn()
    except Exception:  # noqa: BLE001 - the call is cut by the shutdown, as intended
        pass


def render(section: dict) -> str:
    text = table(section["rows"], section["columns"],
                 title="load: one `flipfix serve` (defaults) on loopback")
    notes = "\n".join(section.get("notes") or [])
    return text + ("\n\n```\n" + notes + "\n```" if notes else "")
