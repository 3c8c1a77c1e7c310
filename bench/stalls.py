"""Bench-only: where a server process's threads are when its interpreter stalls.

``python -m bench.stalls OUT.json serve ...`` runs ``flipfix serve ...`` with a sampler
thread that sleeps ``INTERVAL`` s at a time. A wake-up later than ``THRESHOLD`` s means
some thread held the interpreter lock (or the process was not scheduled) for that long: a
health check arriving then waits too. At each late wake-up the sampler takes every other
thread's stack (``sys._current_frames``) and keeps its innermost frames in flipfix or
grpc code; every second (``serve`` ends with ``os._exit``: no exit hook runs) it writes, per
innermost location, how many stalls saw a thread there and their summed lateness. The thread that
held the lock has usually just returned from the long call, so its location is the line
after (or inside) it: read the table as evidence, not as an exact profile.
"""

from __future__ import annotations

import collections
import json
import os
import sys
import threading
import time

__all__ = ["install", "summary", "INTERVAL", "THRESHOLD"]

INTERVAL = 0.005  # s between the sampler's wake-ups
THRESHOLD = 0.03  # s of lateness that counts as a stall
#: innermost frames that mean "waiting, not working" (blocked in C with the lock released)
IDLE = ("wait", "_wait", "get", "select", "poll", "recv", "_recv", "_recv_bytes", "accept",
        "_serve", "sleep", "_listen", "_poll_connectivity", "run", "result", "wait_for",
        "_worker", "_watch_cancel", "join", "_wait_for_tstate_lock", "read", "readline",
        "_readinto")


def _where(frame) -> str:
    """The innermost frames of one stack, in flipfix/grpc/bench files, as ``file:line fn``."""
    out = []
    while frame is not None and len(out) < 3:
        code = frame.f_code
        name = code.co_filename
        if any(k in name for k in ("flipfix", "/service/", "/repair/", "grpc", "sqlite3",
                                   "json", "pickle", "multiprocessing", "concurrent")):
            short = "/".join(name.rsplit("/", 2)[-2:])
            out.append(f"{short}:{frame.f_lineno} {code.co_name}")
        frame = frame.f_back
    return " < ".join(out)


def install(path: str) -> None:
    """Start the sampler; it writes its table to ``path`` (JSON) every second."""
    seen: collections.Counter = collections.Counter()
    late_ms: collections.Counter = collections.Counter()
    stalls = {"count": 0, "late_ms": 0.0, "max_ms": 0.0}
    me = threading.get_ident()

    def sample() -> None:
        written = time.perf_counter()
        while True:
            if time.perf_counter() - written > 1.0:
                write()
                written = time.perf_counter()
            t0 = time.perf_counter()
            time.sleep(INTERVAL)
            late = time.perf_counter() - t0 - INTERVAL
            if late < THRESHOLD:
                continue
            stalls["count"] += 1
            stalls["late_ms"] += late * 1e3
            stalls["max_ms"] = max(stalls["max_ms"], late * 1e3)
            for ident, frame in sys._current_frames().items():
                if ident == me or frame.f_code.co_name in IDLE:
                    continue
                where = _where(frame)
                if where:
                    seen[where] += 1
                    late_ms[where] += late * 1e3

    def write() -> None:
        rows = [{"where": w, "stalls": n, "late_ms": round(late_ms[w], 1)}
                for w, n in seen.most_common(25)]
        with open(path + ".tmp", "w") as fh:
            json.dump({"threshold_ms": THRESHOLD * 1e3, **stalls, "rows": rows}, fh, indent=1)
        os.replace(path + ".tmp", path)

    threading.Thread(target=sample, daemon=True, name="bench-stall-sampler").start()


def summary(path: str, top: int = 6) -> str:
    """One line per most-seen location of a table written by :func:`install`."""
    try:
        with open(path) as fh:
            doc = json.load(fh)
    except (OSError, ValueError):
        return "stall sampler: no table written"
    lines = [f"stalls >= {doc['threshold_ms']:.0f} ms: {doc['count']} (summed lateness "
             f"{doc['late_ms']:.0f} ms, max {doc['max_ms']:.0f} ms); threads seen at:"]
    lines += [f"  {r['stalls']:4d} x, {r['late_ms']:7.0f} ms  {r['where']}"
              for r in doc["rows"][:top]]
    return "\n".join(lines)


if __name__ == "__main__":
    install(sys.argv[1])
    from flipfix.service.cli import main

    sys.exit(main(sys.argv[2:]))
