"""Stress tests on a real Dask cluster: a scheduler and worker processes on loopback.

Checked: the answers equal the serial run's for the same seed, a cancel reaches a task
that is running (seen by an event the task sets, not by timing), a task whose worker dies
is run again elsewhere, an empty cluster is a clean TransientError, and bad addresses are
refused naming the field.
"""

from __future__ import annotations

import os
import sys
import threading

import cloudpickle
import numpy as np
import pytest

distributed = pytest.importorskip("distributed")

from flipfix.repair.audit.stress import ScenarioFamily, stress_test  # noqa: E402
from flipfix.repair.errors import InputError  # noqa: E402
from flipfix.repair.model.candidates import CandidateSet  # noqa: E402
from flipfix.repair.model.problem import Problem  # noqa: E402
from flipfix.service.cluster import DaskRunner, connect, parse_address  # noqa: E402
from flipfix.service.errors import TransientError  # noqa: E402

# the task functions below live in this test module, which workers cannot import
cloudpickle.register_pickle_by_value(sys.modules[__name__])


def _model(n: int = 40, k: int = 24, seed: int = 5):
    rng = np.random.default_rng(seed)
    linear = {f"x{i}": float(rng.integers(-20, 21)) for i in range(n)}
    quadratic = []
    for i in range(n):
        for j in rng.choice(n, size=4, replace=False):
            if j != i:
                quadratic.append((f"x{i}", f"x{int(j)}", float(rng.integers(-20, 21))))
    problem = Problem.from_terms(linear, quadratic, vartype="BINARY")
    bits = rng.integers(0, 2, size=(k, n), dtype=np.int8)
    return problem, CandidateSet.from_array(problem, bits)


def _kernels_warm() -> bool:
    from flipfix.repair.kernels.readiness import is_warm

    return is_warm()


def test_every_worker_has_the_kernels_loaded_before_its_first_task(cluster):
    """connect() returns once each worker process has run warm_up (a worker plugin), so
    no repair chunk or scenario pays for loading the kernels inside its budget; a worker
    that joins later loads them as it joins."""
    assert cluster.client.run(_kernels_warm) and all(cluster.client.run(_kernels_warm).values())
    if cluster.local is not None:
        cluster.local.scale(3)
        cluster.client.wait_for_workers(3, timeout=120)
        flags = cluster.client.run(_kernels_warm)
        assert len(flags) == 3 and all(flags.values())
        cluster.local.scale(2)


def test_dask_answers_equal_the_serial_run(cluster):
    problem, cands = _model()
    family = ScenarioFamily(fix_k=3, hamming_weight=2.0)
    serial = stress_test(problem, cands, family, scenarios=10, seed=11, method="greedy",
                         time_limit=120)
    spread = stress_test(problem, cands, family, scenarios=10, seed=11, method="greedy",
                         time_limit=120, runner=DaskRunner(cluster.client))
    assert serial.stopped == spread.stopped == "done"
    assert spread.scenarios_done == 10
    assert spread.scenario_seeds == serial.scenario_seeds
    assert spread.cost == serial.cost
    assert spread.flips == serial.flips
    assert spread.feasible == serial.feasible
    assert [c.wins for c in spread.candidates] == [c.wins for c in serial.candidates]


def _wait_for_cancel(a, b, item, *, time_limit, cancel, tag):
    """Tell the test it runs, then block until the run's cancel arrives; say so."""
    from distributed import Event

    Event(f"{tag}-running").set()
    if cancel.wait(time_limit):
        Event(f"{tag}-saw-cancel").set()
    return item


def test_a_cancel_reaches_the_running_task(cluster):
    from distributed import Event

    tag = "cancel-test"
    runner = DaskRunner(cluster.client)
    cancel = threading.Event()
    out = []

    def run():
        gen = runner.map(_wait_for_cancel, (None, None), [1, 2], seconds_each=600,
                         deadline=float("inf"), cancel=cancel, options={"tag": tag})
        out.append(next(gen))
        gen.close()

    t = threading.Thread(target=run)
    t.start()
    assert Event(f"{tag}-running", client=cluster.client).wait(timeout=60)
    cancel.set()
    # the task sees the cancel long before its own 600 s are up
    assert Event(f"{tag}-saw-cancel", client=cluster.client).wait(timeout=60)
    t.join(timeout=60)
    assert not t.is_alive()
    assert out == [None]


def _die_once(a, b, item, *, time_limit, cancel, tag):
    """The first time item 0 runs anywhere, its worker process dies mid-task."""
    from distributed import Variable

    flag = Variable(tag)
    if item == 0:
        try:
            flag.get(timeout=0)
        except TimeoutError:
            flag.set(os.getpid())
            os._exit(9)
    return item * 10


def test_a_task_whose_worker_dies_runs_again():
    cluster = connect("local:2")  # its own cluster: a worker is killed here
    try:
        runner = DaskRunner(cluster.client)
        gen = runner.map(_die_once, (None, None), list(range(4)), seconds_each=60,
                         deadline=float("inf"), cancel=None, options={"tag": "die-once"})
        got = [next(gen) for _ in range(4)]
        gen.close()
        assert got == [0, 10, 20, 30]
        from distributed import Variable

        assert Variable("die-once", client=cluster.client).get(timeout=5) > 0  # it did die
    finally:
        cluster.close()


def test_a_cluster_without_workers_is_unavailable_not_a_hang():
    from distributed import Client, LocalCluster

    local = LocalCluster(n_workers=0, processes=True, host="127.0.0.1", dashboard_address="127.0.0.1:0")
    client = Client(local)
    try:
        gen = DaskRunner(client).map(_die_once, (None, None), [1], seconds_each=1,
                                     deadline=float("inf"), cancel=None, options={"tag": "x"})
        with pytest.raises(TransientError, match="no workers"):
            next(gen)
    finally:
        client.close()
        local.close()


@pytest.mark.parametrize("text", ["", "local:0", "local:x", "8786", "local:999"])
def test_bad_addresses_name_the_field(text):
    with pytest.raises(InputError) as err:
        parse_address(text, field="dask")
    assert err.value.field == "dask"


def test_addresses_parse():
    assert parse_address("local:3") == ("", 3)
    assert parse_address("tcp://10.0.0.5:8786") == ("tcp://10.0.0.5:8786", 0)


# ------------------------------------------------- through the server and the CLI
def test_a_server_with_dask_answers_like_the_core(tmp_path):
    """`serve --dask local:2`: the StressTest RPC runs its scenarios on the cluster and
    answers exactly like the core in-process (same seed)."""
    from flipfix.service.client import FlipfixClient
    from flipfix.service.server import create_server

    problem, cands = _model(seed=8)
    family = ScenarioFamily(fix_k=2, hamming_weight=1.5)
    ref = stress_test(problem, cands, family, scenarios=6, seed=4, method="greedy",
                      time_limit=120)
    srv = create_server("127.0.0.1:0", db_path=str(tmp_path / "db.sqlite3"), workers=1,
                        queue_size=2, dask="local:2")
    try:
        assert srv.cluster is not None and srv.servicer.dask_address.startswith("tcp://")
        with FlipfixClient(srv.address, timeout=180.0) as fx:
            fx.create_problem("m", problem)
            fx.add_candidates("m", cands)
            got = fx.stress_test("m", family, scenarios=6, seed=4, method="greedy",
                                 time_limit=120, matrices=True)
        assert got.stopped == "done" and got.scenarios_done == 6
        assert got.scenario_seeds == ref.scenario_seeds
        np.testing.assert_allclose(got.cost, ref.cost, atol=1e-9)
        assert got.flips == ref.flips and got.feasible == ref.feasible
    finally:
        srv.shutdown(grace=1.0)
    # the cluster was closed with the server
    assert srv.cluster.client.status in ("closed", "closing")


def test_audit_cli_with_dask_reports_the_serial_figures(tmp_path):
    import json

    from flipfix.repair.documents import forms as documents
    from flipfix.service.cli import main

    problem, cands = _model(seed=9)
    (tmp_path / "p.json").write_text(json.dumps(documents.problem_document(problem)))
    (tmp_path / "c.json").write_text(json.dumps(_candidates_doc(problem, cands)))
    outs = []
    for extra in ([], ["--dask", "local:2"]):
        out = tmp_path / f"audit{len(extra)}.json"
        rc = main(["audit", str(tmp_path / "p.json"), str(tmp_path / "c.json"), "--scenarios",
                   "5", "--fix-k", "2", "--seed", "3", "--time-limit", "120",
                   "--json", str(out)] + extra)
        assert rc == 0
        outs.append(json.loads(out.read_text())["stress"])
    assert outs[0]["cost"] == outs[1]["cost"]
    assert outs[0]["flips"] == outs[1]["flips"]


def test_audit_cli_refuses_a_bad_dask_address(tmp_path, capsys):
    import json

    from flipfix.repair.documents import forms as documents
    from flipfix.service.cli import main

    problem, cands = _model(n=8, k=3)
    (tmp_path / "p.json").write_text(json.dumps(documents.problem_document(problem)))
    (tmp_path / "c.json").write_text(json.dumps(_candidates_doc(problem, cands)))
    rc = main(["audit", str(tmp_path / "p.json"), str(tmp_path / "c.json"), "--dask", "local:0"])
    assert rc == 2
    assert "dask: local:N needs" in capsys.readouterr().err


def _candidates_doc(problem, cands) -> list:
    return [{"id": cid, "assignment": dict(zip(problem.labels, map(int, x)))}
            for cid, x in zip(cands.ids, cands.X)]
