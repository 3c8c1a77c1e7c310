"""The repair pool (flipfix.service.worker): cancellation reaches the job it was meant for,
and only that job; progress and start reach the server as events.

A pool with one worker and no queue has one slot, so consecutive jobs reuse it. Jobs are
module-level functions of this file, run in the worker process.
"""

from __future__ import annotations

import os
from concurrent.futures.process import BrokenProcessPool

import pytest

from flipfix.service.worker import RepairPool

WAIT = 120.0  # bound on waits for an event that must come (never reached when it does)


def saw_cancel(*, cancel, progress, within: float) -> bool:
    """True when the job's cancel token is set within ``within`` seconds."""
    return cancel.wait(within)


def die(*, cancel, progress) -> None:
    """The worker process exits in the middle of the job (as if killed)."""
    progress({"done": 0, "total": 1, "phase": "greedy"})
    os._exit(3)


def report_then_wait(*, cancel, progress, steps: int) -> int:
    for k in range(steps):
        progress({"done": k + 1, "total": steps, "phase": "greedy", "best_cost": -float(k)})
    cancel.wait(WAIT)
    return steps


def until_done(job) -> None:
    """Wait for the job's last event: its future is done and its slot is free again."""
    while (kind := job.next_event(WAIT)) != "done":
        assert kind is not None, "no event from the worker"


@pytest.fixture()
def pool():
    p = RepairPool(workers=1, queue_size=0, warm=False)
    yield p
    p.shutdown(wait=True)


class _StaleFuture:
    """A job's future seen a moment too early: ``done()`` answers what it answered while
    the job still ran, as when a cancel looks at the future just before the job ends."""

    def __init__(self, future):
        self._future = future

    def done(self) -> bool:
        return False

    def __getattr__(self, name):
        return getattr(self._future, name)


def test_a_late_cancel_never_reaches_the_next_job_in_its_slot(pool):
    first = pool.submit_call(saw_cancel, kwargs={"within": 0.0})
    until_done(first)
    assert first.future.result() is False
    second = pool.submit_call(saw_cancel, kwargs={"within": 2.0})
    assert second.slot == first.slot, "one slot: the second job reuses it"
    # the interleaving of the race: the cancel of the first job saw its future running,
    # then the job ended, its slot was reused, and only then did the cancel act
    first.future = _StaleFuture(first.future)
    first.cancel()
    assert not second.cancel_requested
    assert second.future.result(WAIT) is False, "the first job's cancel stopped the second"


def test_cancel_reaches_a_running_job_and_a_queued_one(pool):
    job = pool.submit_call(saw_cancel, kwargs={"within": WAIT})
    job.cancel()
    until_done(job)
    assert job.future.result() is True
    again = pool.submit_call(saw_cancel, kwargs={"within": WAIT})
    again.cancel()
    assert again.future.cancelled() or again.future.result(WAIT) is True


def test_progress_and_start_arrive_as_events(pool):
    job = pool.submit_call(report_then_wait, kwargs={"steps": 3})
    kinds = []
    while len([k for k in kinds if k == "progress"]) < 3:
        kind = job.next_event(WAIT)
        assert kind is not None, "no event from the worker"
        kinds.append(kind)
    assert kinds[0] == "started" and job.started
    p = job.progress()
    assert (p.done, p.total, p.best_cost, p.phase) == (3, 3, -2.0, "greedy")
    job.cancel()
    while kinds[-1] != "done":
        kinds.append(job.next_event(WAIT))
    assert job.future.result(WAIT) == 3


def test_a_worker_that_dies_leaves_the_pool_working(pool):
    job = pool.submit_call(die)
    until_done(job)
    with pytest.raises(BrokenProcessPool):
        job.future.result()
    assert pool.busy == 0
    pool.restart_if_broken()
    again = pool.submit_call(saw_cancel, kwargs={"within": WAIT})
    assert again.next_event(WAIT) == "started"
    again.cancel()
    until_done(again)
    assert again.future.result() is True



def collector_state(*, cancel, progress) -> tuple:
    """(objects frozen out of collections, objects a full collection walks, its seconds)."""
    import gc
    import time

    t = time.perf_counter()
    gc.collect()
    return gc.get_freeze_count(), len(gc.get_objects()), time.perf_counter() - t


def test_a_warm_worker_keeps_what_it_loaded_out_of_full_collections():
    """After the warm-up (the core, OR-Tools, the kernels: about 150,000 objects) the worker
    freezes them (flipfix.service.collector), so a full collection walks only what jobs
    created since; without it every full collection walked them all (50-126 ms)."""
    warm = RepairPool(workers=1, queue_size=0, warm=True)
    try:
        assert warm.ready.wait(WAIT)
        job = warm.submit_call(collector_state)
        until_done(job)
        frozen, walked, _ = job.future.result()
    finally:
        warm.shutdown(wait=True)
    assert frozen > 50_000
    assert walked < frozen // 10


def test_a_cold_worker_is_not_frozen(pool):
    job = pool.submit_call(collector_state)
    until_done(job)
    frozen, walked, _ = job.future.result()
    assert frozen == 0 and walked > 0
