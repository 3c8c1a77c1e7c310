"""Repair jobs in a process pool, with cancellation and progress through shared memory.

The server owns a :class:`RepairPool`: a ``ProcessPoolExecutor`` (spawn context)
plus a fixed number of *slots* (workers + queue length). A job takes a slot or is
refused (:class:`flipfix.service.errors.QueueFullError` -> RESOURCE_EXHAUSTED). Each slot
is a row of a shared ``float64`` array, ``SLOT_WIDTH`` wide:

    [0] cancel flag (set by the server; the worker turns it into a threading.Event)
    [1] candidates done   [2] total   [3] best cost so far (NaN: none)   [4] update count
    [5] 1 once the worker has started the job (the budget clock starts then)
    [6] phase sequence number (odd while the worker writes the phase name)

and a row of a shared byte array, ``PHASE_BYTES`` wide, holding the core's phase
name (``greedy``, ``kicks``, ``neighbourhood``, ``full``, ``cpsat``, ``stress``, ...),
so a cancelled gRPC call stops its solver, and a streaming call can report progress,
without a manager process or pipes per job.

A job is :func:`flipfix.repair.repair` (:meth:`RepairPool.submit`) or any module-level
function taking ``cancel=`` and ``progress=`` keywords (:meth:`RepairPool.submit_call`,
used by the audit RPCs, see :mod:`flipfix.service.audit_jobs`).
"""

from __future__ import annotations

import math
import multiprocessing as mp
import os
import threading
from concurrent.futures import Future, ProcessPoolExecutor
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass

from flipfix.repair.errors import InputError, LimitError

from flipfix.service.errors import QueueFullError, TransientError

__all__ = ["RepairPool", "Job", "Progress", "SLOT_WIDTH", "PHASE_BYTES", "WorkerInputError"]

SLOT_WIDTH = 7
PHASE_BYTES = 32
_FLAGS = None  # the shared arrays, in a worker process
_PHASES = None


class WorkerInputError(InputError):
    """An :class:`InputError` raised in a worker, rebuilt in the server (plain InputError
    does not survive pickling: its args are the joined message)."""

    def __reduce__(self):
        return (type(self), (self.field, self.message))


class WorkerLimitError(LimitError):
    def __reduce__(self):
        return (type(self), (self.field, self.message))


# ------------------------------------------------------------ worker side
def _init(flags, phases=None) -> None:
    global _FLAGS, _PHASES
    _FLAGS = flags
    _PHASES = phases


def _write_phase(slot: int, phase: str) -> None:
    if _PHASES is None:
        return
    raw = phase.encode("utf-8", "replace")[:PHASE_BYTES]
    base = slot * SLOT_WIDTH + 6
    _FLAGS[base] += 1.0  # odd: writing
    start = slot * PHASE_BYTES
    _PHASES[start:start + PHASE_BYTES] = raw.ljust(PHASE_BYTES, b"\0")
    _FLAGS[base] += 1.0  # even: done


def _warm() -> int:
    """Import the core (and compile its kernels) before the first real job."""
    import numpy as np

    from flipfix.repair import CandidateSet, Problem, repair

    from flipfix.repair.model.constraints import FixVariables, HammingPenalty, LinearConstraint

    p = Problem.from_terms({0: 1.0, 1: -1.0, 2: 0.5}, [(0, 1, 0.5), (1, 2, -1.0)])
    cands = CandidateSet.from_array(p, np.array([[1, 0, 1], [0, 1, 1]]))
    late = [FixVariables({0: 1}), LinearConstraint({1: 1.0, 2: 1.0}, "<=", 1.0),
            HammingPenalty({0: 1, 1: 0, 2: 1}, weight=0.5, shape="quadratic")]
    try:
        repair(p, cands, [], method="greedy", time_limit=0.5)
        repair(p, cands, late, method="portfolio", time_limit=0.5)
    except Exception:  # noqa: BLE001 - warming is best effort
        pass
    return os.getpid()


def _run(slot: int, problem, candidates, constraints, kwargs: dict):
    """Run :func:`flipfix.repair.repair` for one job; honours the slot's cancel flag."""
    from flipfix.repair import repair

    return _run_call(slot, repair, (problem, candidates, constraints), kwargs)


def _run_call(slot: int, fn, args: tuple, kwargs: dict):
    """Run ``fn(*args, cancel=event, progress=callback, **kwargs)`` in the slot."""
    base = slot * SLOT_WIDTH
    cancel = threading.Event()
    finished = threading.Event()

    def watch() -> None:
        while not finished.wait(0.02):
            if _FLAGS[base] != 0.0:
                cancel.set()
                return

    # the compiled kernels load (or, on a machine's first run, compile) before the job's
    # budget clock starts: compilation is set-up, not search time
    from flipfix.repair.solvers.greedy import warm_up

    warm_up()
    _FLAGS[base + 5] = 1.0
    if _FLAGS[base] != 0.0:
        cancel.set()
    threading.Thread(target=watch, daemon=True, name="flipfix-cancel-watch").start()

    last_phase = [None]

    def progress(info: dict) -> None:
        phase = str(info.get("phase") or "")
        if phase != last_phase[0]:
            _write_phase(slot, phase)
            last_phase[0] = phase
        _FLAGS[base + 1] = float(info.get("done", 0) or 0)
        _FLAGS[base + 2] = float(info.get("total", 0) or 0)
        best = info.get("best_cost")
        _FLAGS[base + 3] = math.nan if best is None else float(best)
        _FLAGS[base + 4] += 1.0

    try:
        return fn(*args, cancel=cancel, progress=progress, **kwargs)
    except LimitError as err:  # rebuilt as the same kind in the server
        raise WorkerLimitError(err.field, err.message) from None
    except InputError as err:
        raise WorkerInputError(err.field, err.message) from None
    finally:
        finished.set()


# ------------------------------------------------------------ server side
@dataclass
class Progress:
    done: int
    total: int
    best_cost: float | None
    updates: int
    phase: str = ""  # the core's phase name ("" before the first report)


class Job:
    """A submitted repair: its slot, its future, and the shared flags."""

    def __init__(self, slot: int, future: Future, flags, phases=None):
        self.slot = slot
        self.future = future
        self._flags = flags
        self._phases = phases
        self._phase = ""

    def cancel(self) -> None:
        """Ask the worker to stop (it returns its best so far); drop it if still queued."""
        if not self.future.done():
            self._flags[self.slot * SLOT_WIDTH] = 1.0
            self.future.cancel()

    @property
    def started(self) -> bool:
        return self._flags[self.slot * SLOT_WIDTH + 5] != 0.0

    @property
    def cancel_requested(self) -> bool:
        return self._flags[self.slot * SLOT_WIDTH] != 0.0

    def phase(self) -> str:
        """The last phase name the worker wrote (read under its sequence number)."""
        if self._phases is None:
            return self._phase
        seq_at = self.slot * SLOT_WIDTH + 6
        start = self.slot * PHASE_BYTES
        for _ in range(8):
            before = self._flags[seq_at]
            if int(before) % 2:
                continue
            raw = bytes(self._phases[start:start + PHASE_BYTES])
            if self._flags[seq_at] == before:
                self._phase = raw.rstrip(b"\0").decode("utf-8", "replace")
                break
        return self._phase

    def progress(self) -> Progress:
        b = self.slot * SLOT_WIDTH
        best = self._flags[b + 3]
        return Progress(int(self._flags[b + 1]), int(self._flags[b + 2]),
                        None if math.isnan(best) else float(best), int(self._flags[b + 4]),
                        self.phase())


class RepairPool:
    """``workers`` processes and ``workers + queue_size`` slots (running + waiting jobs)."""

    def __init__(self, *, workers: int = 1, queue_size: int = 4, warm: bool = True):
        if workers < 1:
            raise ValueError("workers must be >= 1")
        self.workers = workers
        self.slots = workers + max(0, queue_size)
        self._ctx = mp.get_context("spawn")
        self._flags = self._ctx.RawArray("d", self.slots * SLOT_WIDTH)
        self._phases = self._ctx.RawArray("c", self.slots * PHASE_BYTES)
        self._lock = threading.Lock()
        self._free = list(range(self.slots))
        self._jobs: dict[int, Job] = {}
        self._closed = False
        self._executor = self._new_executor()
        if warm:
            for _ in range(workers):
                self._executor.submit(_warm)

    def _new_executor(self) -> ProcessPoolExecutor:
        return ProcessPoolExecutor(max_workers=self.workers, mp_context=self._ctx,
                                   initializer=_init, initargs=(self._flags, self._phases))

    @property
    def busy(self) -> int:
        """Slots in use (running or queued jobs)."""
        with self._lock:
            return self.slots - len(self._free)

    def submit(self, problem, candidates, constraints, kwargs: dict) -> Job:
        """A :func:`flipfix.repair.repair` job (``kwargs`` are its options)."""
        return self._submit(_run, (problem, candidates, constraints, kwargs))

    def submit_call(self, fn, args: tuple = (), kwargs: dict | None = None) -> Job:
        """A job running ``fn(*args, cancel=, progress=, **kwargs)``; ``fn`` must be a
        module-level function (pickled by reference into the worker)."""
        return self._submit(_run_call, (fn, tuple(args), dict(kwargs or {})))

    def _submit(self, target, args: tuple) -> Job:
        with self._lock:
            if self._closed:
                raise TransientError("server", "shutting down")
            if not self._free:
                raise QueueFullError("repair", f"all {self.slots} repair slots are busy; retry later")
            slot = self._free.pop()
            b = slot * SLOT_WIDTH
            self._flags[b:b + SLOT_WIDTH] = [0.0, 0.0, 0.0, math.nan, 0.0, 0.0, 0.0]
            self._phases[slot * PHASE_BYTES:(slot + 1) * PHASE_BYTES] = b"\0" * PHASE_BYTES
            try:
                fut = self._executor.submit(target, slot, *args)
            except BrokenProcessPool:
                self._free.append(slot)
                self._executor = self._new_executor()
                raise TransientError("repair", "the worker pool was restarted; retry") from None
            except RuntimeError:  # executor shut down
                self._free.append(slot)
                raise TransientError("server", "shutting down") from None
            job = Job(slot, fut, self._flags, self._phases)
            self._jobs[slot] = job
        fut.add_done_callback(lambda _f, s=slot: self._release(s))
        return job

    def _release(self, slot: int) -> None:
        with self._lock:
            self._jobs.pop(slot, None)
            self._free.append(slot)

    def restart_if_broken(self) -> None:
        with self._lock:
            if getattr(self._executor, "_broken", False) and not self._closed:
                self._executor = self._new_executor()

    def cancel_all(self) -> None:
        with self._lock:
            jobs = list(self._jobs.values())
        for job in jobs:
            job.cancel()

    def shutdown(self, *, wait: bool = True) -> None:
        with self._lock:
            self._closed = True
        self.cancel_all()
        self._executor.shutdown(wait=wait, cancel_futures=True)
