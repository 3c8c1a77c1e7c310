"""Admission control and shutdown: the heavy-call gate (capacity, bounded queue, memory
estimate, coupling cap), UNAVAILABLE at once after SIGTERM, exit within the grace period.

The long-running repair uses OR-Library bqp100-1 (../shared/benchmarks/bqp, J. E. Beasley
1998) with CP-SAT, on which no optimality proof comes within 30 s (benchmarks README).
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import grpc
import numpy as np
import pytest
from grpc_health.v1 import health_pb2, health_pb2_grpc

from flipfix.repair.documents.instances import read_bqp
from flipfix.service import convert
from flipfix.service.admission import AdmissionConfig, HeavyGate
from flipfix.service.errors import QueueFullError
from flipfix.service.generated import flipfix_pb2 as pb
from flipfix.service.generated import flipfix_pb2_grpc as pb_grpc
from flipfix.service.server import create_server

from conftest import rpc_error

ROOT = Path(__file__).resolve().parents[1]
SMALL = {"vartype": "BINARY", "linear": {"a": -1.0, "b": -1.0}, "quadratic": [["a", "b", 2.0]]}
CPSAT = 3  # Method CPSAT


# -------------------------------------------------------------------- the gate
def _hold(gate, size, entered, release, errors):
    try:
        with gate.admit(size, "test"):
            entered.release()
            release.wait()
    except QueueFullError as err:
        errors.append(err)
        entered.release()


def test_gate_runs_capacity_calls_queues_the_rest_and_refuses_beyond_the_queue():
    gate = HeavyGate(AdmissionConfig(capacity=2, queue=1, memory_bytes=10**9, memory_factor=1,
                                     light_bytes=0))
    entered, release, errors = threading.Semaphore(0), threading.Event(), []
    threads = [threading.Thread(target=_hold, args=(gate, 10, entered, release, errors))
               for _ in range(3)]
    for t in threads[:2]:
        t.start()
    entered.acquire()
    entered.acquire()
    assert gate.running == 2
    threads[2].start()  # waits: both places taken
    while gate.waiting < 1:  # test-side synchronisation only
        time.sleep(0.01)
    with pytest.raises(QueueFullError) as e:
        with gate.admit(10, "CreateProblem"):
            pass
    assert "CreateProblem" in str(e.value) and "waiting" in str(e.value)
    release.set()
    for t in threads:
        t.join(timeout=10)
    assert errors == [] and gate.admitted == 3 and gate.refused == 1 and gate.running == 0


def test_gate_memory_estimate_refuses_a_call_that_can_never_fit_and_queues_by_memory():
    gate = HeavyGate(AdmissionConfig(capacity=4, queue=4, memory_bytes=1000, memory_factor=10,
                                       light_bytes=0))
    with pytest.raises(QueueFullError) as e:
        with gate.admit(101, "CreateProblem"):
            pass
    assert "estimated memory" in str(e.value) and "--memory-mb" in str(e.value)
    with gate.admit(60, "a"):  # 600 of 1000 bytes
        with pytest.raises(QueueFullError) as e:  # 600 more does not fit: waits, times out
            with gate.admit(60, "b", timeout=0.2):
                pass
        assert "waited" in str(e.value)
        with gate.admit(30, "c", timeout=0.2):  # 300 more fits
            assert gate.running == 2


def test_gate_wakes_the_next_caller_when_a_place_frees():
    gate = HeavyGate(AdmissionConfig(capacity=1, queue=4, memory_bytes=10**9, memory_factor=1,
                                     light_bytes=0))
    order = []
    release = threading.Event()

    def first():
        with gate.admit(1, "first"):
            order.append("first in")
            release.wait()
        order.append("first out")

    def second():
        with gate.admit(1, "second", timeout=10):
            order.append("second in")

    a = threading.Thread(target=first)
    a.start()
    while gate.running < 1:
        time.sleep(0.01)
    b = threading.Thread(target=second)
    b.start()
    while gate.waiting < 1:
        time.sleep(0.01)
    t0 = time.monotonic()
    release.set()
    b.join(timeout=10)
    assert order[0] == "first in" and "second in" in order
    assert time.monotonic() - t0 < 1.0


def test_light_calls_pass_without_a_place():
    gate = HeavyGate(AdmissionConfig(capacity=1, queue=0, memory_bytes=10**9, memory_factor=1,
                                     light_bytes=100))
    with gate.admit(500, "upload"):  # the one place is taken, no queue
        with pytest.raises(QueueFullError):
            with gate.admit(100, "another upload"):
                pass
        with gate.admit(99, "small repair"):
            assert gate.running == 1


# ----------------------------------------------------------------- on a server
@pytest.fixture()
def small_server(tmp_path):
    srv = create_server("127.0.0.1:0", db_path=str(tmp_path / "a.sqlite3"), warm=False,
                        memory_mb=1.0, max_couplings=3)
    ch = grpc.insecure_channel(srv.address)
    yield srv, pb_grpc.FlipfixStub(ch)
    ch.close()
    srv.shutdown(grace=0.5)


def test_server_refuses_a_model_over_the_coupling_cap_and_the_memory_estimate(small_server):
    srv, stub = small_server
    doc = {"vartype": "BINARY", "quadratic": [[f"x{k}", f"x{k + 1}", 1.0] for k in range(4)]}
    e = rpc_error(lambda: stub.CreateProblem(pb.CreateProblemRequest(
        name="wide", model=convert.doc_to_model(doc))))
    assert e.code() == grpc.StatusCode.RESOURCE_EXHAUSTED
    assert e.details() == "model.quadratic: 4 couplings exceed the limit of 3"
    # 1 MiB budget / 25 = 41,943 bytes of request at most
    big = {"vartype": "BINARY", "linear": {f"variable_{k:06d}": 1.0 for k in range(3000)}}
    e = rpc_error(lambda: stub.CreateProblem(pb.CreateProblemRequest(
        name="big", model=convert.doc_to_model(big))))
    assert e.code() == grpc.StatusCode.RESOURCE_EXHAUSTED and "estimated memory" in e.details()
    assert stub.ListProblems(pb.ListProblemsRequest()).problems == []
    stub.CreateProblem(pb.CreateProblemRequest(name="ok", model=convert.doc_to_model(SMALL)))


def test_a_large_upload_is_converted_in_a_worker_with_the_same_answers(tmp_path):
    """Over 64 KiB the model is converted in a pool process: stored exactly, and a bad term
    is still INVALID_ARGUMENT naming it."""
    with create_server("127.0.0.1:0", db_path=str(tmp_path / "u.sqlite3"), warm=False,
                       workers=1) as srv:
        stub = pb_grpc.FlipfixStub(grpc.insecure_channel(srv.address))
        doc = {"vartype": "SPIN", "linear": {f"v{k}": 0.5 * (k % 7) for k in range(3000)},
               "quadratic": [[f"v{k}", f"v{k + 1}", -1.0] for k in range(2999)]}
        model = convert.doc_to_model(doc)
        assert model.ByteSize() > srv.servicer.gate.config.light_bytes
        bad = pb.ProblemModel()
        bad.CopyFrom(model)
        bad.quadratic[2500].bias = float("nan")
        e = rpc_error(lambda: stub.CreateProblem(pb.CreateProblemRequest(name="bad", model=bad)))
        assert e.code() == grpc.StatusCode.INVALID_ARGUMENT
        assert e.details().startswith("model.quadratic[2500].bias")
        stub.CreateProblem(pb.CreateProblemRequest(name="big", model=model))
        got = convert.model_to_problem(stub.GetProblem(pb.GetProblemRequest(name="big")).model)
        want = convert.model_to_problem(model)
        assert got.labels == want.labels and got.vartype == "SPIN"
        assert np.array_equal(got.linear, want.linear) and got.offset == want.offset
        assert np.array_equal(got.data, want.data) and np.array_equal(got.indices, want.indices)
        assert [p.name for p in stub.ListProblems(pb.ListProblemsRequest()).problems] == ["big"]


def _big_repair(benchmarks):
    p = read_bqp(benchmarks / "bqp" / "bqp100-1.sparse")
    X = np.random.default_rng(1).integers(0, 2, size=(4, p.n), dtype=np.int8)
    return pb.RepairRequest(inline=pb.InlineLibrary(
        model=convert.problem_to_model(p),
        candidates=convert.arrays_to_batch([f"r{k}" for k in range(4)], X)),
        options=pb.RepairOptions(method=CPSAT, time_limit=30.0))


def test_calls_after_shutdown_begins_get_unavailable_at_once(tmp_path, benchmarks):
    srv = create_server("127.0.0.1:0", db_path=str(tmp_path / "d.sqlite3"), workers=1)
    ch = grpc.insecure_channel(srv.address)
    stub = pb_grpc.FlipfixStub(ch)
    fut = stub.Repair.future(_big_repair(benchmarks), timeout=60)
    while not srv.pool.busy:
        time.sleep(0.01)
    srv.begin_shutdown()
    t0 = time.monotonic()
    e = rpc_error(lambda: stub.ListProblems(pb.ListProblemsRequest(), timeout=20))
    assert e.code() == grpc.StatusCode.UNAVAILABLE and "shutting down" in e.details()
    e = rpc_error(lambda: stub.Repair(_big_repair(benchmarks), timeout=20))
    assert e.code() == grpc.StatusCode.UNAVAILABLE
    assert time.monotonic() - t0 < 1.0
    health = health_pb2_grpc.HealthStub(ch).Check(health_pb2.HealthCheckRequest(), timeout=5)
    assert health.status == health_pb2.HealthCheckResponse.SERVING  # checks still answered
    assert not fut.done()  # the in-flight call keeps running within the grace period
    srv.shutdown(grace=0.5)
    assert rpc_error(fut.result).code() in (grpc.StatusCode.CANCELLED,
                                            grpc.StatusCode.UNAVAILABLE)
    ch.close()


def test_serve_exits_within_the_grace_period_after_sigterm(tmp_path, benchmarks):
    grace = 1.0
    proc = subprocess.Popen([sys.executable, "-m", "flipfix.service.cli", "serve", "--port", "0",
                             "--db", str(tmp_path / "s.sqlite3"), "--workers", "1",
                             "--grace", str(grace)],
                            cwd=ROOT, stderr=subprocess.PIPE, text=True)
    try:
        line = proc.stderr.readline()
        while "serving on" not in line:
            assert line, "server exited before serving"
            line = proc.stderr.readline()
        port = int(line.split("serving on ")[1].split()[0].rsplit(":", 1)[1])
        ch = grpc.insecure_channel(f"127.0.0.1:{port}")
        stub = pb_grpc.FlipfixStub(ch)
        health_pb2_grpc.HealthStub(ch).Check(health_pb2.HealthCheckRequest(), timeout=60)
        fut = stub.Repair.future(_big_repair(benchmarks), timeout=120)
        time.sleep(1.0)  # the repair is running (its budget is 30 s)
        t0 = time.monotonic()
        proc.send_signal(signal.SIGTERM)
        line = proc.stderr.readline()  # printed by the handler once new calls are refused
        while "shutting down" not in line:
            assert line, "server exited"
            line = proc.stderr.readline()
        e = rpc_error(lambda: stub.ListProblems(pb.ListProblemsRequest(), timeout=30))
        assert e.code() == grpc.StatusCode.UNAVAILABLE
        assert time.monotonic() - t0 < 0.5
        assert proc.wait(timeout=30) == 0
        took = time.monotonic() - t0
        assert took <= grace + 0.5, f"exited {took:.2f} s after SIGTERM (grace {grace} s)"
        assert rpc_error(fut.result).code() in (grpc.StatusCode.CANCELLED,
                                                grpc.StatusCode.UNAVAILABLE)
        ch.close()
    finally:
        if proc.poll() is None:
            os.kill(proc.pid, signal.SIGKILL)
            proc.wait()
