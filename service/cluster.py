"""Stress-test scenarios and large repairs on a Dask distributed cluster (:class:`DaskRunner`).

The core's stress test (:func:`flipfix.repair.audit.stress.stress_test`) takes a
:class:`~flipfix.repair.audit.stress.ScenarioRunner`, and its repair
(:func:`flipfix.repair.api.repair`) a
:class:`~flipfix.repair.solvers.candidate_runner.CandidateRunner` for the greedy stage of a
large library (chunks of candidates); :class:`DaskRunner` is both, and sends each
scenario's repair, or each chunk of candidates, to a Dask cluster:

* the problem and the library travel once per worker and run (``scatter`` with
  ``broadcast``); each task then carries only its scenarios (a few constraints each) or
  its chunks of candidate indices;
* results come back in scenario order, each waited for with ``Future.result(timeout)``
  up to the run's deadline (no polling);
* a cancel (the caller's token), the deadline or the end of the run sets a Dask ``Event``
  named for the run: in every worker process that ran a task of the run, one thread
  blocks on that Event and sets the cancel token
  (:class:`~flipfix.repair.cancel.CancelToken`) of each of the run's tasks running there,
  so their repairs stop at once; queued tasks are cancelled on the scheduler;
* a worker lost mid-task: the scheduler runs the task again on another worker (Dask's
  own retry of lost tasks); a task the scheduler gave up on (its data lost with the
  worker that held it) is sent again with the data, up to ``RESEND_LOST`` times; when no
  worker is left, or a task killed too many workers,
  :class:`~flipfix.service.errors.TransientError` (UNAVAILABLE) -- never a hang.

:func:`connect` takes what the operator gives: the address of a running scheduler
(``tcp://host:8786``), or ``local:N`` for a cluster of N worker processes started here on
loopback (closed with the :class:`Cluster`). A :class:`DaskRunner` pickles as its
scheduler's address: a repair job sent to a worker process of ``flipfix serve`` takes it
along and connects there on first use (one client per process, kept).
"""

from __future__ import annotations

import math
import threading
import time
import uuid
from concurrent.futures import CancelledError, TimeoutError as FutureTimeout
from dataclasses import dataclass
from typing import Any, Callable, Iterator, Mapping, Sequence

from flipfix.repair.cancel import CancelToken, as_token
from flipfix.repair.errors import InputError
from flipfix.repair.solvers.candidate_runner import DEFAULT_MIN_BITS

from flipfix.service.errors import TransientError

__all__ = ["DaskRunner", "Cluster", "connect", "parse_address", "client_at"]

# how long past its own time limit a task's cancel watcher waits for the run's Event
_WATCH_SLACK = 30.0
#: how many times a run sends its remaining tasks again after the cluster lost one (a
#: worker that died holding the only copy of the run's data); then UNAVAILABLE
RESEND_LOST = 2


def parse_address(text: str, *, field: str = "dask") -> tuple[str, int]:
    """``("address", 0)`` for a scheduler address, ``("", N)`` for ``local:N``.

    Raises :class:`InputError` naming ``field`` for anything else.
    """
    text = (text or "").strip()
    if text.startswith("local:"):
        n = text[len("local:"):]
        if not n.isdigit() or not 1 <= int(n) <= 256:
            raise InputError(field, f"local:N needs N = 1..256 worker processes, got {text!r}")
        return "", int(n)
    if "://" in text and text.split("://", 1)[1]:
        return text, 0
    raise InputError(field, "expected a scheduler address such as tcp://10.0.0.5:8786, "
                            f"or local:N, got {text!r}")


@dataclass
class Cluster:
    """A Dask client, and the local cluster it owns when flipfix started one."""

    client: Any
    local: Any = None

    @property
    def address(self) -> str:
        return self.client.scheduler.address

    def close(self) -> None:
        self.client.close()
        if self.local is not None:
            self.local.close()


def connect(text: str, *, field: str = "dask", timeout: float = 30.0) -> Cluster:
    """Connect to a scheduler, or start ``local:N`` (N single-threaded worker processes
    on 127.0.0.1; its HTTP status page on a free loopback port). Returns once every worker
    has the search kernels loaded (:mod:`flipfix.service.cluster_warm`); workers that join
    later load them as they join."""
    address, n = parse_address(text, field=field)
    try:
        from distributed import Client, LocalCluster
    except ImportError:
        raise InputError(field, "needs Dask distributed: pip install 'flipfix[cluster]'") from None
    from flipfix.service.cluster_warm import register

    if n:
        local = LocalCluster(n_workers=n, threads_per_worker=1, processes=True,
                             host="127.0.0.1", dashboard_address="127.0.0.1:0")
        cluster = Cluster(Client(local, timeout=timeout), local)
    else:
        try:
            cluster = Cluster(Client(address, timeout=timeout))
        except (OSError, TimeoutError) as exc:
            raise TransientError("dask", f"scheduler {address} not reachable: {exc}") from exc
    try:
        register(cluster.client)  # kernels loaded in every worker before its first task
    except BaseException:
        cluster.close()
        raise
    return cluster


_CLIENTS: dict[str, Cluster] = {}  # scheduler address -> Cluster, in this process
_CLIENTS_LOCK = threading.Lock()


def client_at(address: str, *, field: str = "dask"):
    """A Dask client of the scheduler at ``address``, connected once per process and kept
    (a ``local:N`` text starts a cluster once, too)."""
    with _CLIENTS_LOCK:
        if address not in _CLIENTS:
            _CLIENTS[address] = connect(address, field=field)
        return _CLIENTS[address].client


_RUNS: dict[str, set] = {}  # run name -> cancel tokens of its tasks running here
_RUNS_LOCK = threading.Lock()


def _watch(run: str, event, timeout: float) -> None:
    """One thread per run and worker process: wait for the run's Event, then cancel every
    task of the run that is running here. The runner sets the Event when the run ends, so
    the thread ends with the run (``timeout`` bounds it if the caller vanished)."""
    event.wait(timeout=timeout)
    with _RUNS_LOCK:
        tokens = _RUNS.pop(run, set())
    for token in tokens:
        token.set()


def _run_task(fn: Callable, shared: tuple, items: list, *, time_limit: float, event_name: str,
              run_seconds: float, options: Mapping[str, Any]) -> list:
    """One task on a Dask worker: ``fn(*shared, item, ...)`` for each of its items in turn,
    with a cancel token that the run's Dask Event sets; stops at the first item the cancel
    cuts short (its result and the rest are left out)."""
    from distributed import Event, get_client

    token = CancelToken()
    with _RUNS_LOCK:
        first = event_name not in _RUNS
        _RUNS.setdefault(event_name, set()).add(token)
    if first:  # bound here: the watcher thread has no worker context of its own
        event = Event(event_name, client=get_client())
        threading.Thread(target=_watch, args=(event_name, event, run_seconds + _WATCH_SLACK),
                         daemon=True, name="flipfix-dask-cancel").start()
    out = []
    try:
        for item in items:
            if token.is_set():
                break
            result = fn(*shared, item, time_limit=time_limit, cancel=token, **dict(options))
            if token.is_set():
                break
            out.append(result)
        return out
    finally:
        with _RUNS_LOCK:
            _RUNS.get(event_name, set()).discard(token)


def _left(deadline: float) -> float | None:
    """Seconds to ``deadline`` (a perf_counter instant); None for no deadline."""
    return None if math.isinf(deadline) else max(0.0, deadline - time.perf_counter())


class DaskRunner:
    """A :class:`~flipfix.repair.audit.stress.ScenarioRunner` and
    :class:`~flipfix.repair.solvers.candidate_runner.CandidateRunner` over a Dask client.

    ``client``: a connected client, or None with ``address`` (a scheduler address): the
    client is then connected on first use (:func:`client_at`). ``chunk``: items per task
    (0: about four tasks per worker thread, so that the scheduler's cost per task stays
    small beside the work and the load still evens out). ``min_bits``: the smallest
    library (candidates x variables) whose repair's greedy stage goes to the cluster.
    ``tasks``: how many tasks this runner has submitted (all runs).
    """

    def __init__(self, client=None, *, address: str = "", chunk: int = 0,
                 min_bits: int = DEFAULT_MIN_BITS):
        if client is None and not address:
            raise InputError("dask", "a Dask runner needs a client or a scheduler address")
        self._client = client
        self.address = address or client.scheduler.address
        self.chunk = int(chunk)
        self.min_bits = int(min_bits)
        self.tasks = 0

    @property
    def client(self):
        if self._client is None:
            self._client = client_at(self.address)
        return self._client

    def __getstate__(self) -> dict:  # the address travels, not the connection
        return {"address": self.address, "chunk": self.chunk, "min_bits": self.min_bits}

    def __setstate__(self, state: dict) -> None:
        self.__init__(address=state["address"], chunk=state["chunk"],
                      min_bits=state["min_bits"])

    @property
    def parallel(self) -> int:
        workers = self.client.scheduler_info().get("workers", {})
        return max(1, sum(int(w.get("nthreads", 1)) for w in workers.values()))

    def map(self, fn: Callable, shared: tuple, items: Sequence, *, seconds_each: float,
            deadline: float, cancel, options: Mapping[str, Any]) -> Iterator[Any]:
        from distributed import Event

        client = self.client
        if not client.scheduler_info().get("workers"):
            raise TransientError("dask", f"the cluster at {client.scheduler.address} has no workers")
        token = as_token(cancel)
        run = f"flipfix-{uuid.uuid4().hex}"
        stop = Event(run, client=client)
        run_seconds = _left(deadline)
        run_seconds = seconds_each * len(items) if run_seconds is None else run_seconds
        size = self.chunk or max(1, math.ceil(len(items) / (4 * self.parallel)))
        chunks = [list(items[i:i + size]) for i in range(0, len(items), size)]
        futures: list = []  # one per chunk; the tail is replaced when a round is lost
        shared_futures: list = []

        def submit(first: int, round_: int) -> None:
            """(Re)send the shared data and chunks ``first``.. as round ``round_``."""
            client.cancel(futures[first:] + shared_futures)
            shared_futures[:] = client.scatter(list(shared), broadcast=True, hash=False)
            futures[first:] = [
                client.submit(_run_task, fn, shared_futures, chunk, time_limit=seconds_each,
                              event_name=run, run_seconds=run_seconds, options=dict(options),
                              pure=False, key=f"{run}-{round_}-{k}")
                for k, chunk in enumerate(chunks[first:], start=first)]
            self.tasks += len(chunks) - first

        submit(0, 0)
        stopped = threading.Event()

        def stop_all() -> None:
            if stopped.is_set():
                return
            stopped.set()
            stop.set()
            client.cancel(futures)

        resent = 0
        try:
            with token.subscribed(stop_all, timeout=_left(deadline)):
                k = 0
                while k < len(chunks):
                    left = _left(deadline)
                    if stopped.is_set() or (left is not None and left <= 0):
                        break
                    try:
                        results = futures[k].result(timeout=left)
                    except (FutureTimeout, TimeoutError):
                        break  # the deadline
                    except CancelledError as exc:
                        if stopped.is_set():
                            break
                        # not our cancel: the scheduler lost the task or the data it needs
                        # (a worker died holding the only copy): send the rest once more
                        if resent == RESEND_LOST:
                            raise TransientError("dask", f"the cluster lost a task: {exc}") \
                                from exc
                        resent += 1
                        submit(k, resent)
                        continue
                    except Exception as exc:  # a task that killed workers, or lost for good
                        if type(exc).__name__ == "KilledWorker":
                            raise TransientError("dask", f"workers kept dying on a task: {exc}") \
                                from exc
                        raise
                    yield from results
                    if len(results) < len(chunks[k]):
                        break  # a cancel cut this task short
                    k += 1
        finally:
            stop_all()
            client.cancel(shared_futures)
        while True:  # every item not completed
            yield None
