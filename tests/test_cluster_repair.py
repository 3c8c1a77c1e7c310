"""Large repairs on a real Dask cluster: a scheduler and worker processes on loopback.

The greedy stage of a repair goes to the cluster in candidate chunks
(:mod:`flipfix.repair.solvers.candidate_runner`, :class:`flipfix.service.cluster.DaskRunner`).
Checked: the answers equal the local run's for the same seed (the local, serial path is
the reference: every candidate's repaired cost and flips, and the best answer), through
the core and through ``serve --dask``; a cancel and the deadline reach a chunk that is
running (seen by Dask Events the chunk sets, not by timing); a chunk whose worker dies
runs again elsewhere with the same answers; a cluster without workers is a clean
TransientError (UNAVAILABLE), not a hang.
"""

from __future__ import annotations

import os
import sys
import threading

import cloudpickle
import numpy as np
import pytest

distributed = pytest.importorskip("distributed")

from flipfix.repair.api import repair  # noqa: E402
from flipfix.repair.documents.forms import constraints_document  # noqa: E402
from flipfix.repair.model.candidates import CandidateSet  # noqa: E402
from flipfix.repair.model.constraints import HammingPenalty, LinearConstraint  # noqa: E402
from flipfix.repair.model.problem import Problem  # noqa: E402
from flipfix.repair.solvers import candidate_runner  # noqa: E402
from flipfix.service.cluster import DaskRunner, connect  # noqa: E402
from flipfix.service.errors import TransientError  # noqa: E402

# the task wrappers below live in this test module, which workers cannot import
cloudpickle.register_pickle_by_value(sys.modules[__name__])


def _library(n: int = 60, k: int = 300, seed: int = 3):
    """A random sparse QUBO with real-valued weights, random candidates, and late
    constraints that make every candidate move: a cardinality row and a Hamming penalty."""
    rng = np.random.default_rng(seed)
    labels = [f"x{i}" for i in range(n)]
    linear = {lab: float(rng.normal()) for lab in labels}
    quadratic = [(labels[i], labels[int(j)], float(rng.normal()))
                 for i in range(n) for j in rng.choice(n, size=4, replace=False) if j != i]
    problem = Problem.from_terms(linear, quadratic, vartype="BINARY")
    bits = rng.integers(0, 2, size=(k, n), dtype=np.int8)
    cands = CandidateSet.from_array(problem, bits, ids=[f"c{j}" for j in range(k)])
    late = [LinearConstraint({lab: 1.0 for lab in labels[:30]}, "==", 8.0, name="eight"),
            HammingPenalty({lab: int(v) for lab, v in zip(labels, rng.integers(0, 2, n))},
                           weight=0.3)]
    return problem, cands, late


def _figures(res):
    return ([(r.candidate_id, r.cost_after, r.flips, r.feasible, r.method) for r in res.audit],
            res.best.x.tolist(), res.best.cost, res.best.flips)


def test_the_repair_on_dask_equals_the_local_run(cluster):
    problem, cands, late = _library()
    local = repair(problem, cands, late, method="greedy", time_limit=120, seed=5)
    runner = DaskRunner(cluster.client, min_bits=0)
    spread = repair(problem, cands, late, method="greedy", time_limit=120, seed=5,
                    candidate_runner=runner)
    assert runner.tasks > 0  # the greedy stage did go to the cluster
    assert local.stats["greedy_done"] == spread.stats["greedy_done"] == len(cands.ids)
    assert _figures(spread) == _figures(local)
    assert local.best.feasible and sum(r.flips > 0 for r in local.audit) > 100  # real work
    # the portfolio runs its later stages here on the cluster's greedy results
    port = repair(problem, cands, late, method="portfolio", time_limit=3, seed=5,
                  candidate_runner=runner)
    assert port.stats["greedy_done"] == len(cands.ids)
    assert port.best.feasible and port.best.objective <= local.best.objective + 1e-9


def test_a_small_library_stays_local(cluster):
    problem, cands, late = _library(n=20, k=10)
    runner = DaskRunner(cluster.client)  # the default threshold
    assert 20 * 10 < runner.min_bits == candidate_runner.DEFAULT_MIN_BITS
    res = repair(problem, cands, late, method="greedy", time_limit=30, candidate_runner=runner)
    assert runner.tasks == 0 and res.stats["greedy_done"] == 10


def test_a_runner_pickles_as_its_address(cluster):
    runner = DaskRunner(cluster.client, min_bits=7, chunk=3)
    back = cloudpickle.loads(cloudpickle.dumps(runner))
    assert (back.address, back.min_bits, back.chunk) == (cluster.address, 7, 3)
    assert back._client is None  # connects on first use, in the process that uses it


# ------------------------------------------------ cancel, deadline, lost workers
def _gated(fn, *args, time_limit, cancel, tag, **options):
    """Say the chunk runs, wait for the run's cancel (the deadline or the caller's), say
    it came, then run the real chunk (which stops at once: its token is set)."""
    from distributed import Event

    Event(f"{tag}-running").set()
    if cancel.wait(time_limit):
        Event(f"{tag}-saw-cancel").set()
    return fn(*args, time_limit=time_limit, cancel=cancel, **options)


def _die_once(fn, *args, time_limit, cancel, tag, **options):
    """The first chunk to run anywhere kills its worker process mid-task."""
    from distributed import Variable

    flag = Variable(tag)
    try:
        flag.get(timeout=0)
    except TimeoutError:
        flag.set(os.getpid())
        os._exit(9)
    return fn(*args, time_limit=time_limit, cancel=cancel, **options)


class _Wrapped(DaskRunner):
    """A runner whose chunks go through ``wrapper`` (a module-level function above)."""

    def __init__(self, client, wrapper, tag):
        super().__init__(client, min_bits=0)
        self.wrapper, self.tag = wrapper, tag

    def map(self, fn, shared, items, *, options, **kw):
        return super().map(self.wrapper, (fn, *shared), items,
                           options={**options, "tag": self.tag}, **kw)


def _run_in_thread(target):
    out = {}

    def run():
        try:
            out["result"] = target()
        except BaseException as exc:  # noqa: BLE001 - handed to the test
            out["error"] = exc

    t = threading.Thread(target=run)
    t.start()
    return t, out


def test_a_cancel_reaches_the_running_chunks(cluster):
    from distributed import Event

    problem, cands, late = _library()
    tag = "repair-cancel"
    cancel = threading.Event()
    runner = _Wrapped(cluster.client, _gated, tag)
    t, out = _run_in_thread(lambda: repair(problem, cands, late, method="greedy",
                                           time_limit=600, cancel=cancel,
                                           candidate_runner=runner))
    assert Event(f"{tag}-running", client=cluster.client).wait(timeout=60)
    cancel.set()
    # the chunk sees the cancel long before its 600 s are up
    assert Event(f"{tag}-saw-cancel", client=cluster.client).wait(timeout=60)
    t.join(timeout=60)
    assert not t.is_alive() and "error" not in out
    res = out["result"]
    assert res.stats["greedy_done"] == 0  # nothing came back: the candidates as they were
    assert all(r.flips == 0 for r in res.audit)


def test_the_deadline_reaches_the_running_chunks(cluster):
    from distributed import Event

    problem, cands, late = _library()
    tag = "repair-deadline"
    runner = _Wrapped(cluster.client, _gated, tag)
    t, out = _run_in_thread(lambda: repair(problem, cands, late, method="greedy",
                                           time_limit=3.0, candidate_runner=runner))
    assert Event(f"{tag}-running", client=cluster.client).wait(timeout=60)
    # nobody cancels: the run's own deadline sets the chunks' tokens
    assert Event(f"{tag}-saw-cancel", client=cluster.client).wait(timeout=60)
    t.join(timeout=60)
    assert not t.is_alive() and "error" not in out
    assert out["result"].stats["greedy_done"] == 0


def test_a_chunk_whose_worker_dies_runs_again_with_the_same_answers():
    problem, cands, late = _library(seed=4)
    local = repair(problem, cands, late, method="greedy", time_limit=120, seed=2)
    c = connect("local:2")  # its own cluster: a worker is killed here
    try:
        runner = _Wrapped(c.client, _die_once, "repair-die-once")
        spread = repair(problem, cands, late, method="greedy", time_limit=120, seed=2,
                        candidate_runner=runner)
        from distributed import Variable

        assert Variable("repair-die-once", client=c.client).get(timeout=5) > 0  # it died
        assert _figures(spread) == _figures(local)
    finally:
        c.close()


def test_a_cluster_without_workers_is_unavailable_not_a_hang():
    from distributed import Client, LocalCluster

    problem, cands, late = _library(n=20, k=10)
    local = LocalCluster(n_workers=0, processes=True, host="127.0.0.1",
                         dashboard_address="127.0.0.1:0")
    client = Client(local)
    try:
        with pytest.raises(TransientError, match="no workers"):
            repair(problem, cands, late, method="greedy", time_limit=30,
                   candidate_runner=DaskRunner(client, min_bits=0))
    finally:
        client.close()
        local.close()


# ------------------------------------------------------------- through the server
def test_a_server_with_dask_repairs_like_the_core(tmp_path):
    """`serve --dask local:2`: the Repair RPC sends a large library's greedy stage to the
    cluster and answers exactly like the core in-process (same seed)."""
    from flipfix.service.client import FlipfixClient
    from flipfix.service.server import create_server

    problem, cands, late = _library(seed=6)
    ref = repair(problem, cands, late, method="greedy", time_limit=120, seed=1)
    srv = create_server("127.0.0.1:0", db_path=str(tmp_path / "db.sqlite3"), workers=1,
                        queue_size=2, dask="local:2")
    try:
        srv.servicer.dask_runner.min_bits = 0  # this library is small; send it anyway
        with FlipfixClient(srv.address, timeout=180.0) as fx:
            fx.create_problem("m", problem)
            fx.add_candidates("m", cands)
            got = fx.repair("m", constraints_document(late), method="greedy", time_limit=120,
                            seed=1)
        prefixes = srv.cluster.client.run_on_scheduler(
            lambda dask_scheduler: sorted(dask_scheduler.task_prefixes))
        assert "flipfix" in prefixes  # the chunks ran on the cluster
        rows = {r["candidate_id"]: r for r in got["audit"]}
        for r in ref.audit:
            assert rows[r.candidate_id]["flips"] == r.flips
            assert rows[r.candidate_id]["cost"] == pytest.approx(r.cost_after, abs=1e-9)
        assert got["best"]["cost"] == pytest.approx(ref.best.cost, abs=1e-9)
    finally:
        srv.shutdown(grace=1.0)


def test_a_server_whose_cluster_has_no_workers_answers_unavailable(tmp_path):
    """The repair runs in a pool worker of the server; the cluster's TransientError comes
    back whole and the RPC answers UNAVAILABLE (retry), and the server keeps serving."""
    import grpc
    from distributed import LocalCluster

    from flipfix.service.client import FlipfixClient
    from flipfix.service.server import create_server

    problem, cands, late = _library(n=20, k=10)
    empty = LocalCluster(n_workers=0, processes=True, host="127.0.0.1",
                         dashboard_address="127.0.0.1:0")
    srv = create_server("127.0.0.1:0", db_path=str(tmp_path / "db.sqlite3"), workers=1,
                        queue_size=2, dask=empty.scheduler_address)
    try:
        srv.servicer.dask_runner.min_bits = 0
        with FlipfixClient(srv.address, timeout=120.0) as fx:
            fx.create_problem("m", problem)
            fx.add_candidates("m", cands)
            with pytest.raises(grpc.RpcError) as err:
                fx.repair("m", constraints_document(late), method="greedy", time_limit=30)
            assert err.value.code() == grpc.StatusCode.UNAVAILABLE
            assert "no workers" in err.value.details()
            srv.servicer.dask_runner.min_bits = 10**12  # small libraries stay local again
            assert fx.repair("m", constraints_document(late), method="greedy",
                             time_limit=30)["best"]["feasible"] in (True, False)
    finally:
        srv.shutdown(grace=1.0)
        empty.close()
