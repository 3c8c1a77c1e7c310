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

__all__ = ["install", "summary", "INTERVAL", "THRESHOLD", "SNAPSHOT"]

INTERVAL = 0.005  # s between the sampler's wake-ups
THRESHOLD = 0.03  # s of lateness that counts as a stall
SNAPSHOT = 0.1  # s between looks at the threads' CPU times
#: innermost frames that mean "waiting, not working" (blocked in C with the lock released)
IDLE = ("wait", "_wait", "get", "select", "poll", "recv", "_recv", "_recv_bytes", "accept",
        "_serve", "sleep", "_listen", "_poll_connectivity", "run", "result", "wait_for",
        "_worker", "_watch_cancel", "join", "_wait_for_tstate_lock", "read", "readline",
        "_readinto")


def _where(frame) -> str:
    """The innermost frames of one stack, in flipfix/grpc/bench files, as ``file:line fn``."""
    out = []
    top = frame
    while frame is not None and len(out) < 3:
        code = frame.f_code
        name = code.co_filename
        if any(k in name for k in ("flipfix", "/service/", "/repair/", "grpc", "sqlite3",
                                   "json", "pickle", "multiprocessing", "concurrent")):
            short = "/".join(name.rsplit("/", 2)[-2:])
            out.append(f"{short}:{frame.f_lineno} {code.co_name}")
        frame = frame.f_back
    if not out and top is not None:
        out.append(f"{top.f_code.co_filename.rsplit('/', 1)[-1]}:{top.f_lineno} {top.f_code.co_name}")
    return " < ".join(out)


def _cpu_ns() -> dict[int, int]:
    """CPU time (ns) of each of this process's threads by native id (``schedstat``)."""
    out = {}
    for tid in os.listdir("/proc/self/task"):
        try:
            with open(f"/proc/self/task/{tid}/schedstat") as fh:
                out[int(tid)] = int(fh.read().split()[0])
        except (OSError, ValueError, IndexError):
            pass
    return out


def _thread_name(tid: int) -> str:
    try:
        with open(f"/proc/self/task/{tid}/comm") as fh:
            return fh.read().strip()
    except OSError:
        return "?"


def install(path: str) -> None:
    """Start the sampler; it writes its table to ``path`` (JSON) every second.

    Two views of each stall: ``rows``, every thread's innermost location (waiting threads
    too); ``culprits``, the thread that used the most CPU since the sampler's previous
    look (every ``SNAPSHOT`` s and at each stall: ``/proc/self/task/*/schedstat``) -- the
    one that held the interpreter lock, when the process ran at all (``cpu_share``: the
    process's CPU over the stall's length; far below 1, the process mostly waited for a
    core or for memory, not for the lock)."""
    seen: collections.Counter = collections.Counter()
    late_ms: collections.Counter = collections.Counter()
    culprit_n: collections.Counter = collections.Counter()
    culprit_ms: collections.Counter = collections.Counter()
    stalls = {"count": 0, "late_ms": 0.0, "max_ms": 0.0, "cpu_ms": 0.0}

    def sample() -> None:
        me, mine = threading.get_ident(), threading.get_native_id()
        written = looked = time.perf_counter()
        before = _cpu_ns()
        while True:
            now = time.perf_counter()
            if now - written > 1.0:
                write()
                written = now
            if now - looked > SNAPSHOT:
                before, looked = _cpu_ns(), now
            t0 = time.perf_counter()
            time.sleep(INTERVAL)
            late = time.perf_counter() - t0 - INTERVAL
            if late < THRESHOLD:
                continue
            after = _cpu_ns()
            stalls["count"] += 1
            stalls["late_ms"] += late * 1e3
            stalls["max_ms"] = max(stalls["max_ms"], late * 1e3)
            deltas = {tid: ns - before.get(tid, 0) for tid, ns in after.items()
                      if tid != mine}  # the sampler's own reading is not the stall
            stalls["cpu_ms"] += min(sum(deltas.values()) / 1e6, (time.perf_counter() - looked) * 2e3)
            frames = sys._current_frames()
            by_native = {t.native_id: t.ident for t in threading.enumerate()}
            if deltas:
                tid = max(deltas, key=deltas.get)
                ident = by_native.get(tid)
                where = (_where(frames[ident]) if ident in frames else "") or \
                    f"(no Python frame: thread {_thread_name(tid)!r})"
                culprit_n[where] += 1
                culprit_ms[where] += late * 1e3
            for ident, frame in frames.items():
                if ident == me or frame.f_code.co_name in IDLE:
                    continue
                where = _where(frame)
                if where:
                    seen[where] += 1
                    late_ms[where] += late * 1e3
            before, looked = after, time.perf_counter()

    def write() -> None:
        rows = [{"where": w, "stalls": n, "late_ms": round(late_ms[w], 1)}
                for w, n in seen.most_common(25)]
        culprits = [{"where": w, "stalls": n, "late_ms": round(culprit_ms[w], 1)}
                    for w, n in culprit_n.most_common(25)]
        with open(path + ".tmp", "w") as fh:
            json.dump({"threshold_ms": THRESHOLD * 1e3, **stalls, "culprits": culprits,
                       "rows": rows}, fh, indent=1)
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
             f"{doc['late_ms']:.0f} ms, max {doc['max_ms']:.0f} ms; the server's CPU meanwhile "
             f"{doc.get('cpu_ms', 0):.0f} ms); busiest thread during the stall:"]
    lines += [f"  {r['stalls']:4d} x, {r['late_ms']:7.0f} ms  {r['where']}"
              for r in doc.get("culprits", [])[:top]]
    lines.append("threads seen at (waiting ones too):")
    lines += [f"  {r['stalls']:4d} x, {r['late_ms']:7.0f} ms  {r['where']}"
              for r in doc["rows"][:3]]
    return "\n".join(lines)


if __name__ == "__main__":
    install(sys.argv[1])
    from flipfix.service.cli import main

    sys.exit(main(sys.argv[2:]))
