"""Repair jobs in a process pool, with cancellation and progress as events across processes.

The server owns a :class:`RepairPool`: a ``ProcessPoolExecutor`` (spawn context) plus a
fixed number of *slots* (workers + queue length). A job takes a slot or is refused
(:class:`flipfix.service.errors.QueueFullError` -> RESOURCE_EXHAUSTED). Each job gets a
generation number, new for every job, so a message meant for one job is never taken by
the next job in its slot. Each slot has:

* a duplex pipe between the server and whichever worker runs the slot's job. The server
  sends the job's generation to cancel it; in the worker one thread blocks on the pipe
  and sets the job's :class:`flipfix.repair.cancel.CancelToken` (CP-SAT then stops at
  once). The worker sends ``(generation, "started")`` when the job's budget clock starts
  and ``(generation, "progress")`` after each progress report; a server thread blocks on
  every slot's pipe and hands these to the job's :class:`queue.Queue`, which the RPC
  blocks on (:meth:`Job.next_event`). Pipes hold no lock a crashed worker could keep.
* a row of a shared ``float64`` array, ``SLOT_WIDTH`` wide, with the latest progress::

    [0] candidates done   [1] total   [2] best cost so far (NaN: none)   [3] update count
    [4] phase sequence number (odd while the worker writes the phase name)
    [5] the job's solver budget in s, when the job worked it out itself (NaN: not so)

  and a row of a shared byte array, ``PHASE_BYTES`` wide, holding the core's phase name
  (``greedy``, ``anneal``, ``neighbourhood``, ``full``, ``cpsat``, ``stress``, ...). The worker
  writes the row before it sends the "progress" message, so the row read after any message
  (or after the job's result) is at least as new as that message.

A cancel is checked and sent under the pool's lock, against the job the slot holds now:
a cancel that comes after its job ended (and the slot took a new job) does nothing.

A job is :func:`flipfix.repair.repair` (:meth:`RepairPool.submit`) or any module-level
function taking ``cancel=`` and ``progress=`` keywords (:meth:`RepairPool.submit_call`,
used by the audit RPCs, see :mod:`flipfix.service.audit_jobs`). A function marked
``fn.prepares = True`` prepares its job first (:func:`flipfix.service.prepared.stored_call`
reads the store) and also gets ``started=``: it calls ``started(budget)`` when its search
begins, and only then is "started" sent (the budget clock does not count the preparation).
"""

from __future__ import annotations

import itertools
import math
import multiprocessing as mp
import os
import queue
import threading
import time
from concurrent.futures import Future, ProcessPoolExecutor
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass
from multiprocessing.connection import wait as wait_ready

from flipfix.repair.cancel import CancelToken
from flipfix.repair.errors import InputError, LimitError

from flipfix.service.errors import QueueFullError, TransientError

__all__ = ["RepairPool", "Job", "Progress", "SLOT_WIDTH", "PHASE_BYTES", "WorkerInputError"]

SLOT_WIDTH = 6
PHASE_BYTES = 32
_SEQ = 4  # the phase sequence number's place in a slot row
_BUDGET = 5  # the budget a job reported (NaN: none)
_FLAGS = None  # the shared arrays and the workers' ends of the slot pipes, in a worker process
_PHASES = None
_PIPES = None


class WorkerInputError(InputError):
    """An :class:`InputError` raised in a worker, rebuilt in the server (plain InputError
    does not survive pickling: its args are the joined message)."""

    def __reduce__(self):
        return (type(self), (self.field, self.message))


class WorkerLimitError(LimitError):
    def __reduce__(self):
        return (type(self), (self.field, self.message))


# ------------------------------------------------------------ worker side
def _init(flags, phases, pipes) -> None:
    global _FLAGS, _PHASES, _PIPES
    _FLAGS, _PHASES, _PIPES = flags, phases, pipes


def _write_phase(slot: int, phase: str) -> None:
    raw = phase.encode("utf-8", "replace")[:PHASE_BYTES]
    seq = slot * SLOT_WIDTH + _SEQ
    _FLAGS[seq] += 1.0  # odd: writing
    start = slot * PHASE_BYTES
    _PHASES[start:start + PHASE_BYTES] = raw.ljust(PHASE_BYTES, b"\0")
    _FLAGS[seq] += 1.0  # even: done


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
    from flipfix.service.collector import settle

    settle()  # what the worker keeps is loaded: later collections skip it
    return os.getpid()


def _run(slot: int, gen: int, problem, candidates, constraints, kwargs: dict):
    """Run :func:`flipfix.repair.repair` for one job; honours the slot's cancel."""
    from flipfix.repair import repair

    return _run_call(slot, gen, repair, (problem, candidates, constraints), kwargs)


def _watch_cancel(pipe, ended, gen: int, token: CancelToken) -> None:
    """Block until the server cancels job ``gen`` (set ``token``) or the job ends.

    Messages for an earlier job of the slot (a cancel that came as it ended) are skipped."""
    while True:
        ready = wait_ready([pipe, ended])
        if ended in ready:
            return
        try:
            target = pipe.recv()
        except (EOFError, OSError):  # the server is gone
            return
        if target == gen:
            token.set()
            return


def _run_call(slot: int, gen: int, fn, args: tuple, kwargs: dict):
    """Run ``fn(*args, cancel=token, progress=callback, **kwargs)`` as job ``gen`` of ``slot``."""
    pipe = _PIPES[slot]
    base = slot * SLOT_WIDTH
    token = CancelToken()
    ended_r, ended_w = mp.Pipe(duplex=False)
    watcher = threading.Thread(target=_watch_cancel, args=(pipe, ended_r, gen, token),
                               daemon=True, name="flipfix-cancel-watch")
    watcher.start()
    send_lock = threading.Lock()

    def tell(kind: str) -> None:
        with send_lock:
            try:
                pipe.send((gen, kind))
            except OSError:  # the server is gone; the job's result has nowhere to go either
                pass

    try:
        # the compiled kernels load (or, on a machine's first run, compile) before the job's
        # budget clock starts: compilation is set-up, not search time
        from flipfix.repair.api import warm_up

        warm_up()
        if getattr(fn, "prepares", False):
            def started(budget: float) -> None:
                _FLAGS[base + _BUDGET] = float(budget)
                tell("started")
            kwargs = {**kwargs, "started": started}
        else:
            tell("started")
        last_phase = [None]

        def progress(info: dict) -> None:
            phase = str(info.get("phase") or "")
            if phase != last_phase[0]:
                _write_phase(slot, phase)
                last_phase[0] = phase
            _FLAGS[base] = float(info.get("done", 0) or 0)
            _FLAGS[base + 1] = float(info.get("total", 0) or 0)
            best = info.get("best_cost")
            _FLAGS[base + 2] = math.nan if best is None else float(best)
            _FLAGS[base + 3] += 1.0
            tell("progress")

        try:
            return fn(*args, cancel=token, progress=progress, **kwargs)
        except LimitError as err:  # rebuilt as the same kind in the server
            raise WorkerLimitError(err.field, err.message) from None
        except InputError as err:
            raise WorkerInputError(err.field, err.message) from None
    finally:
        # the watcher stops reading the slot's pipe before the job ends: the slot's next
        # job (maybe in another worker) is then the pipe's only reader
        ended_w.send(None)
        watcher.join()
        ended_r.close()
        ended_w.close()


# ------------------------------------------------------------ server side
@dataclass
class Progress:
    done: int
    total: int
    best_cost: float | None
    updates: int
    phase: str = ""  # the core's phase name ("" before the first report)


class Job:
    """A submitted job: its slot, generation and future, and the events the worker sends.

    :meth:`next_event` gives, in order, "started" (the worker began the job: its budget
    clock runs), "progress" (the slot's progress row changed; read it with
    :meth:`progress`) and last "done" (the future is done and the slot is free).
    """

    def __init__(self, pool: "RepairPool", slot: int, gen: int, future: Future):
        self.slot = slot
        self.gen = gen
        self.future = future
        self.started_at: float | None = None  # time.monotonic() when the worker started it
        self.cancel_requested = False
        self._pool = pool
        self._events: queue.Queue[str] = queue.Queue()
        self._phase = ""

    def cancel(self) -> None:
        """Ask the worker to stop (it returns its best so far); drop it if still queued.

        Does nothing once the job has ended, even if its slot runs another job by then."""
        self._pool._cancel(self)

    @property
    def started(self) -> bool:
        return self.started_at is not None

    def next_event(self, timeout: float | None = None) -> str | None:
        """The next of "started", "progress", "done"; None when ``timeout`` s pass first."""
        try:
            return self._events.get(timeout=timeout)
        except queue.Empty:
            return None

    def _deliver(self, kind: str) -> None:
        if kind == "started":
            self.started_at = time.monotonic()
        self._events.put(kind)

    @property
    def budget(self) -> float | None:
        """The solver budget (s) the job reported as it started (None: it reported none)."""
        value = self._pool._flags[self.slot * SLOT_WIDTH + _BUDGET]
        return None if math.isnan(value) else float(value)

    def phase(self) -> str:
        """The last phase name the worker wrote (read under its sequence number)."""
        flags, phases = self._pool._flags, self._pool._phases
        seq_at = self.slot * SLOT_WIDTH + _SEQ
        start = self.slot * PHASE_BYTES
        for _ in range(8):
            before = flags[seq_at]
            if int(before) % 2:
                continue
            raw = bytes(phases[start:start + PHASE_BYTES])
            if flags[seq_at] == before:
                self._phase = raw.rstrip(b"\0").decode("utf-8", "replace")
                break
        return self._phase

    def progress(self) -> Progress:
        flags = self._pool._flags
        b = self.slot * SLOT_WIDTH
        best = flags[b + 2]
        return Progress(int(flags[b]), int(flags[b + 1]),
                        None if math.isnan(best) else float(best), int(flags[b + 3]),
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
        pipes = [self._ctx.Pipe(duplex=True) for _ in range(self.slots)]
        self._pipes = [server_end for server_end, _ in pipes]
        self._worker_pipes = [worker_end for _, worker_end in pipes]
        self._lock = threading.Lock()
        self._free = list(range(self.slots))
        self._jobs: dict[int, Job] = {}
        self._generations = itertools.count(1)
        self._closed = False
        self.shutdown_seconds: dict[str, float] = {}  # by step, once shut down
        self._stop_r, self._stop_w = self._ctx.Pipe(duplex=False)
        self._listener = threading.Thread(target=self._listen, daemon=True,
                                          name="flipfix-pool-events")
        self._listener.start()
        self._executor = self._new_executor()
        # set once every worker's warm-up ended (at once without warm-up): the server's
        # health is NOT_SERVING until then
        self.ready = threading.Event()
        self._ready_callbacks: list = []
        if warm:
            left = [workers]

            def warmed(_f) -> None:
                with self._lock:
                    left[0] -= 1
                    if left[0] or self._closed:  # closed: the warm-up was cut, not done
                        return
                self._set_ready()

            for _ in range(workers):
                self._executor.submit(_warm).add_done_callback(warmed)
        else:
            self._set_ready()

    def _set_ready(self) -> None:
        with self._lock:
            self.ready.set()
            callbacks, self._ready_callbacks = self._ready_callbacks, []
        for fn in callbacks:
            fn()

    def when_ready(self, fn) -> None:
        """Call ``fn()`` once the workers' kernels are warm (at once if they are)."""
        with self._lock:
            if not self.ready.is_set():
                self._ready_callbacks.append(fn)
                return
        fn()

    def _new_executor(self) -> ProcessPoolExecutor:
        return ProcessPoolExecutor(max_workers=self.workers, mp_context=self._ctx,
                                   initializer=_init,
                                   initargs=(self._flags, self._phases, self._worker_pipes))

    def _listen(self) -> None:
        """Hand each worker message to the job it is for (blocks on every slot's pipe)."""
        slot_of = {id(p): s for s, p in enumerate(self._pipes)}
        while True:
            for ready in wait_ready(self._pipes + [self._stop_r]):
                if ready is self._stop_r:
                    return
                try:
                    gen, kind = ready.recv()
                except (EOFError, OSError):
                    return
                with self._lock:
                    job = self._jobs.get(slot_of[id(ready)])
                if job is not None and job.gen == gen:
                    job._deliver(kind)

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
            gen = next(self._generations)
            b = slot * SLOT_WIDTH
            self._flags[b:b + SLOT_WIDTH] = [0.0, 0.0, math.nan, 0.0, 0.0, math.nan]
            self._phases[slot * PHASE_BYTES:(slot + 1) * PHASE_BYTES] = b"\0" * PHASE_BYTES
            try:
                fut = self._executor.submit(target, slot, gen, *args)
            except BrokenProcessPool:
                self._free.append(slot)
                self._executor = self._new_executor()
                raise TransientError("repair", "the worker pool was restarted; retry") from None
            except RuntimeError:  # executor shut down
                self._free.append(slot)
                raise TransientError("server", "shutting down") from None
            job = Job(self, slot, gen, fut)
            self._jobs[slot] = job
        fut.add_done_callback(lambda _f, j=job: self._release(j))
        return job

    def _cancel(self, job: Job) -> None:
        # checked and sent under the lock: the slot cannot change hands in between
        with self._lock:
            if self._jobs.get(job.slot) is not job or job.cancel_requested:
                return
            job.cancel_requested = True
            try:
                self._pipes[job.slot].send(job.gen)
            except OSError:  # the pool is closed
                pass
        job.future.cancel()  # outside the lock: a cancelled future releases its slot at once

    def _release(self, job: Job) -> None:
        with self._lock:
            if self._jobs.get(job.slot) is job:
                del self._jobs[job.slot]
                self._free.append(job.slot)
        job._deliver("done")

    def restart_if_broken(self) -> None:
        with self._lock:
            if getattr(self._executor, "_broken", False) and not self._closed:
                self._executor = self._new_executor()

    def cancel_all(self) -> None:
        with self._lock:
            jobs = list(self._jobs.values())
        for job in jobs:
            job.cancel()

    def shutdown(self, *, wait: bool = True, terminate: bool = False) -> None:
        """Close the pool: cancel every job; ``terminate``: end the worker processes at once
        (SIGTERM) rather than wait for them to finish their job and exit (they hold nothing
        durable: the store is the server's). Workers still loading their kernels are ended
        at once whatever ``terminate`` says: a first run's compile takes many seconds and
        cannot be cancelled (numba writes each cache file whole, under a temporary name)."""
        terminate = terminate or not self.ready.is_set()
        t = [time.perf_counter()]

        def lap(name: str) -> None:  # the seconds of each step, for the server's log
            t.append(time.perf_counter())
            self.shutdown_seconds[name] = round(t[-1] - t[-2], 3)

        with self._lock:
            self._closed = True
        self.cancel_all()
        lap("cancel")
        processes = list((getattr(self._executor, "_processes", None) or {}).values())
        if terminate:
            for proc in processes:
                proc.terminate()
        # terminated, the processes are joined below; the executor's own clean-up (its
        # manager thread noticing the ends, 0.3 s after a long run under load) is not waited
        self._executor.shutdown(wait=wait and not terminate, cancel_futures=True)
        lap("executor")
        for proc in processes if terminate else ():
            proc.join()
        lap("join")
        if self._listener.is_alive():
            self._stop_w.send(None)
            self._listener.join()
            for end in self._pipes + self._worker_pipes + [self._stop_r, self._stop_w]:
                end.close()
        lap("listener")
