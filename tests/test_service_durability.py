"""Durability under kill -9: a `flipfix serve` process killed while clients write, ten times.

Every acknowledged write must be found after the kill (problems and their candidates),
unacknowledged batches are all there or not at all, and SQLite's integrity and foreign-key
checks are clean after every cycle.
"""

from __future__ import annotations

import signal
import sqlite3
import subprocess
import sys
import threading
import time
from pathlib import Path

import grpc

from flipfix.service.client import FlipfixClient
from flipfix.service.store import Store

ROOT = Path(__file__).resolve().parents[1]
DOC = {"vartype": "BINARY", "linear": {"a": 1.0, "b": -1.0, "c": 0.5}, "quadratic": [["a", "b", 1.0]]}
BATCH = [{"id": f"k{k}", "assignment": {"a": k % 2, "b": (k // 2) % 2, "c": 1}} for k in range(4)]
CYCLES, WRITERS = 10, 3


def _serve(db: Path):
    proc = subprocess.Popen([sys.executable, "-m", "flipfix.service.cli", "serve", "--port", "0",
                             "--db", str(db), "--workers", "1"],
                            cwd=ROOT, stderr=subprocess.PIPE, text=True)
    line = proc.stderr.readline()
    while "serving on" not in line:
        assert line, "server exited before serving"
        line = proc.stderr.readline()
    return proc, int(line.split("serving on ")[1].split()[0].rsplit(":", 1)[1])


def test_acknowledged_writes_survive_kill_9(tmp_path):
    db = tmp_path / "d.sqlite3"
    acked: dict[str, int] = {}  # problem -> candidates acknowledged (0 or len(BATCH))
    lock = threading.Lock()
    for cycle in range(CYCLES):
        proc, port = _serve(db)
        stop = threading.Event()

        def writer(w: int) -> None:
            with FlipfixClient(f"127.0.0.1:{port}", timeout=10) as fx:
                k = 0
                while not stop.is_set():
                    name = f"c{cycle}w{w}n{k}"
                    k += 1
                    try:
                        fx.create_problem(name, DOC)
                        with lock:
                            acked[name] = 0
                        fx.add_candidates(name, BATCH)
                        with lock:
                            acked[name] = len(BATCH)
                    except grpc.RpcError:
                        return  # the server is gone

        threads = [threading.Thread(target=writer, args=(w,)) for w in range(WRITERS)]
        for t in threads:
            t.start()
        time.sleep(0.3 + 0.1 * (cycle % 4))
        proc.send_signal(signal.SIGKILL)
        proc.wait()
        stop.set()
        for t in threads:
            t.join(timeout=30)
        con = sqlite3.connect(db)
        assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        assert con.execute("PRAGMA foreign_key_check").fetchall() == []
        con.close()
        s = Store(db)
        try:
            stored = {i.name: i.num_candidates for i in _all(s)}
        finally:
            s.close()
        for name, n in acked.items():
            assert name in stored, f"cycle {cycle}: acknowledged {name} lost"
            assert stored[name] >= n, f"cycle {cycle}: {name} lost candidates"
        assert set(stored.values()) <= {0, len(BATCH)}, "a half-written candidate batch"
    assert len(acked) > CYCLES  # writes were acknowledged in the cycles


def _all(store: Store):
    out, token = [], ""
    while True:
        page, token = store.list_problems(page_size=1000, page_token=token)
        out += page
        if not token:
            return out
