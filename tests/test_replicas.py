"""Two `flipfix serve` processes on one PostgreSQL database (a real server, started by the
fixtures): concurrent writes through both keep batches all-or-nothing and ids unique,
revision conflicts are seen across replicas, and killing one replica with SIGKILL in the
middle of writes loses no acknowledged write.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import threading
from pathlib import Path

import grpc
import numpy as np
import pytest

from flipfix.repair import Problem
from flipfix.service.client import FlipfixClient

ROOT = Path(__file__).resolve().parents[1]
N = 16  # variables
BATCH = 5  # candidates per AddCandidates call


def _problem(offset: float = 0.0) -> Problem:
    labels = [f"x{i}" for i in range(N)]
    return Problem.from_terms({lab: float(i % 3 - 1) for i, lab in enumerate(labels)},
                              [(labels[i], labels[i + 1], 1.0) for i in range(N - 1)],
                              offset=offset, vartype="BINARY")


class Replica:
    """`flipfix serve --db <url> --port 0` in its own process."""

    def __init__(self, url: str):
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "flipfix.service.cli", "serve", "--port", "0", "--db", url,
             "--workers", "1"], cwd=ROOT, stderr=subprocess.PIPE, text=True)
        for line in self.proc.stderr:  # blocks on the process's own output
            if "serving on" in line:
                self.port = int(line.split("serving on ")[1].split()[0].rsplit(":", 1)[1])
                break
        else:
            raise RuntimeError(f"replica exited with {self.proc.wait()}")
        # keep draining stderr so the replica never blocks on a full pipe
        threading.Thread(target=self.proc.stderr.read, daemon=True).start()
        self.address = f"127.0.0.1:{self.port}"

    def kill(self) -> None:
        if self.proc.poll() is None:
            os.kill(self.proc.pid, signal.SIGKILL)
        self.proc.wait()

    def stop(self) -> None:
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(timeout=30)
            except subprocess.TimeoutExpired:
                self.kill()


@pytest.fixture
def replicas(postgres):
    url = postgres.new_database()
    a, b = Replica(url), Replica(url)
    try:
        yield a, b
    finally:
        a.stop()
        b.stop()


def _bits(seed: int, k: int) -> np.ndarray:
    return np.random.default_rng(seed).integers(0, 2, size=(k, N)).astype(np.int8)


def test_writes_through_two_replicas_keep_ids_unique_and_see_each_others_revisions(replicas):
    a, b = replicas
    with FlipfixClient(a.address, timeout=60) as fa, FlipfixClient(b.address, timeout=60) as fb:
        fa.create_problem("p", _problem())
        with pytest.raises(grpc.RpcError) as err:  # the name is taken, whichever replica asks
            fb.create_problem("p", _problem())
        assert err.value.code() == grpc.StatusCode.ALREADY_EXISTS

        acknowledged: list[list[str]] = []
        lock = threading.Lock()

        def writer(client: FlipfixClient, seed: int) -> None:
            for k in range(15):
                ids = client.add_candidates("p", _bits(seed * 100 + k, BATCH))  # server-assigned
                with lock:
                    acknowledged.append(list(ids))

        threads = [threading.Thread(target=writer, args=(c, s))
                   for s, c in enumerate([fa, fa, fb, fb])]
        for t in threads:
            t.start()
        for t in threads:
            t.join()
        stored = _all_ids(fb, "p")
        acked = [cid for batch in acknowledged for cid in batch]
        assert len(acknowledged) == 60 and len(acked) == 60 * BATCH
        assert len(set(acked)) == len(acked)  # ids unique across replicas
        assert sorted(stored) == sorted(acked)

        # a revision check made through one replica sees the other replica's write
        assert fa.replace_problem("p", _problem(1.0), expected_revision=1).revision == 2
        with pytest.raises(grpc.RpcError) as err:
            fb.replace_problem("p", _problem(2.0), expected_revision=1)
        assert err.value.code() == grpc.StatusCode.FAILED_PRECONDITION

        # two replicas racing on the same expected revision: exactly one wins
        outcomes: list = []
        start = threading.Barrier(2)

        def race(client: FlipfixClient, off: float) -> None:
            start.wait()
            try:
                outcomes.append(client.replace_problem("p", _problem(off), expected_revision=2)
                                .revision)
            except grpc.RpcError as exc:
                outcomes.append(exc.code())

        ts = [threading.Thread(target=race, args=(c, o)) for c, o in ((fa, 3.0), (fb, 4.0))]
        for t in ts:
            t.start()
        for t in ts:
            t.join()
        assert sorted(outcomes, key=str) == sorted([3, grpc.StatusCode.FAILED_PRECONDITION],
                                                   key=str)
        assert fb.get_problem("p")[0].revision == 3


def _all_ids(client: FlipfixClient, name: str) -> list[str]:
    """Every stored candidate id (all pages, every revision)."""
    return [cid for run in client.list_candidates(name) for cid in run.ids]


def test_killing_a_replica_mid_write_loses_no_acknowledged_write(replicas):
    a, b = replicas
    with FlipfixClient(b.address, timeout=60) as fb:
        fb.create_problem("p", _problem())
    acknowledged: list[str] = []  # batch names whose AddCandidates returned
    lock = threading.Lock()
    enough = threading.Event()

    def writer(t: int) -> None:
        with FlipfixClient(a.address, timeout=30) as fa:
            for k in range(10_000):
                name = f"w{t}-{k}"
                try:
                    fa.add_candidates("p", _bits(t * 10_000 + k, BATCH),
                                      ids=[f"{name}-{j}" for j in range(BATCH)])
                except grpc.RpcError:
                    return  # the replica is gone
                with lock:
                    acknowledged.append(name)
                    if len(acknowledged) >= 40:
                        enough.set()

    threads = [threading.Thread(target=writer, args=(t,)) for t in range(3)]
    for t in threads:
        t.start()
    assert enough.wait(timeout=120)
    a.kill()  # SIGKILL while the writers are still sending
    for t in threads:
        t.join(timeout=120)
    with FlipfixClient(b.address, timeout=60) as fb:
        stored = _all_ids(fb, "p")
    batches: dict[str, int] = {}
    for cid in stored:
        batch, _, _j = cid.rpartition("-")
        batches[batch] = batches.get(batch, 0) + 1
    assert set(acknowledged) <= set(batches)  # every acknowledged batch is there
    assert all(count == BATCH for count in batches.values())  # all-or-nothing
    assert len(stored) == len(set(stored))


# ------------------------------------------------------------- write locks
# Two stores on one database stand for two replicas. The second one's sessions give up a
# lock wait after LOCK_TIMEOUT_MS (PostgreSQL's lock_timeout): while the first holds a
# write transaction open, a write of the second that needs one of its locks fails for
# certain, and one that needs none succeeds -- an observation of the locks themselves,
# whatever the machine's speed (lock_timeout counts only time spent waiting for a lock).
LOCK_TIMEOUT_MS = 300


def _impatient(url: str) -> str:
    return url + ("&" if "?" in url else "?") + f"options=-c%20lock_timeout%3D{LOCK_TIMEOUT_MS}"


def _row(seed: int) -> np.ndarray:
    return np.random.default_rng(seed).integers(0, 2, size=(1, N), dtype=np.int8)


def _lock_timeout(call):
    from flipfix.service.errors import TransientError

    with pytest.raises(TransientError, match="lock timeout"):
        call()


def test_writes_to_different_problems_do_not_wait_and_one_problem_still_serialises(postgres):
    from flipfix.service.store import Store

    url = postgres.new_database()
    a, b = Store(url), Store(_impatient(url))
    try:
        for name in ("p1", "p2"):
            a.create_problem(name, _problem())
        with a._tx("p1") as db:  # a write to p1 under way (not committed yet)
            assert a.add_candidates("p1", 1, [""], _row(0), [{}], db=db) == ["c0"]
            # another problem: no wait (a single lock for all writes would time out here)
            assert b.add_candidates("p2", 1, [""], _row(1), [{}]) == ["c0"]
            b.create_problem("p3", _problem())
            # the same problem waits for the open write: it cannot number c0 twice
            _lock_timeout(lambda: b.add_candidates("p1", 1, [""], _row(2), [{}]))
            _lock_timeout(lambda: b.replace_problem("p1", _problem(1.0), expected_revision=1))
            # a write not tied to one problem waits for every write under way
            _lock_timeout(lambda: b._tx().__enter__())
        # committed: the waiting writes go through and see it
        assert b.add_candidates("p1", 1, [""], _row(2), [{}]) == ["c1"]
        assert b.replace_problem("p1", _problem(1.0), expected_revision=1).revision == 2
        assert [r.id for r in a.list_candidates("p1")[0]] == ["c0", "c1"]
    finally:
        a.close()
        b.close()


def test_quota_checks_of_one_tenant_wait_for_each_other(postgres):
    from flipfix.service.store import Store
    from flipfix.service.tenancy import QuotaError, Quotas

    url = postgres.new_database()
    quotas = Quotas(problems=3)
    a, b = Store(url, quotas=quotas), Store(_impatient(url), quotas=quotas)
    try:
        for name in ("p1", "p2"):
            a.create_problem(name, _problem(), tenant="t1")
        a.create_problem("p1", _problem(), tenant="t2")
        with a._tx(a._key("t1", "p1")) as db:  # t1's usage counted, the write not committed
            a.add_candidates("p1", 1, [""], _row(0), [{}], tenant="t1", db=db)
            # a write of t1 to another problem counts t1's usage too: it waits
            _lock_timeout(lambda: b.add_candidates("p2", 1, [""], _row(1), [{}], tenant="t1"))
            _lock_timeout(lambda: b.create_problem("p3", _problem(), tenant="t1"))
            # another tenant: no wait
            assert b.add_candidates("p1", 1, [""], _row(2), [{}], tenant="t2") == ["c0"]
        b.create_problem("p3", _problem(), tenant="t1")
        with pytest.raises(QuotaError):  # the fourth problem of t1
            b.create_problem("p4", _problem(), tenant="t1")
    finally:
        a.close()
        b.close()
