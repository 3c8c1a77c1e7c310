"""The cancel token (flipfix.repair.cancel) and CP-SAT's stop on cancel.

Long searches use OR-Library bqp100-1 (../shared/benchmarks/bqp, J. E. Beasley 1998), on
which CP-SAT finds no optimality proof in 30 s (benchmarks README): a search given 600 s
that returns within the test's wait was stopped by the cancel, not by its own end. Every
wait below is on an event or a thread join, with a bound far from the search's limit.
"""

from __future__ import annotations

import threading

import numpy as np
import pytest
from ortools.sat.python import cp_model

from flipfix.repair import CandidateSet, repair
from flipfix.repair.cancel import CancelToken, as_token
from flipfix.repair.documents.instances import read_bqp
from flipfix.repair.errors import InputError
from flipfix.repair.lowering.compiled import compile_constraints
from flipfix.repair.model.constraints import FixVariables
from flipfix.repair.solvers.cpsat import LateModel

LONG = 600.0  # a search limit no test waits for
WAIT = 120.0  # how long a test waits for a cancelled search to return


# ------------------------------------------------------------------ the token
def test_callback_runs_once_when_set_and_not_after_the_block():
    token = CancelToken()
    calls = []
    with token.subscribed(lambda: calls.append("a")):
        assert calls == []
        token.set()
        token.set()
    assert calls == ["a"] and token.is_set() and token.wait(0)
    other = CancelToken()
    with other.subscribed(lambda: calls.append("b")):
        pass
    other.set()
    assert calls == ["a"], "a callback whose block has ended is not called"


def test_subscribing_to_a_set_token_runs_the_callback_at_once():
    token = CancelToken()
    token.set()
    calls = []
    with token.subscribed(lambda: calls.append(1)):
        assert calls == [1]
    assert calls == [1]


def test_set_racing_subscribe_calls_every_callback_exactly_once():
    # many threads subscribe while another sets: each callback runs once, whichever came first
    for _ in range(20):
        token = CancelToken()
        counts = [0] * 16
        go = threading.Barrier(17)

        def sub(i):
            go.wait()
            with token.subscribed(lambda i=i: counts.__setitem__(i, counts[i] + 1)):
                token.wait()

        threads = [threading.Thread(target=sub, args=(i,)) for i in range(16)]
        for t in threads:
            t.start()
        go.wait()
        token.set()
        for t in threads:
            t.join(WAIT)
        assert counts == [1] * 16


def test_a_token_follows_a_plain_event_set_by_the_caller():
    event = threading.Event()
    token = as_token(event)
    called = threading.Event()
    with token.subscribed(called.set, timeout=LONG):
        event.set()  # the caller's own Event, not token.set()
        assert called.wait(WAIT)
    assert token.is_set()


def test_as_token_accepts_none_tokens_and_events_and_names_the_field():
    assert not as_token(None).is_set()
    t = CancelToken()
    assert as_token(t) is t
    ev = threading.Event()
    ev.set()
    assert as_token(ev).is_set()
    with pytest.raises(InputError) as e:
        as_token(True)
    assert e.value.field == "cancel"


# ------------------------------------------------------------------ CP-SAT
@pytest.fixture(scope="module")
def hard(benchmarks):
    p = read_bqp(benchmarks / "bqp" / "bqp100-1.sparse")
    compiled = compile_constraints(p, [FixVariables({p.labels[0]: 1})])
    x0 = np.random.default_rng(1).integers(0, 2, size=p.n).astype(np.int8)
    return p, compiled, x0


def _solve_in_thread(model, x0, cancel):
    out = []
    t = threading.Thread(target=lambda: out.append(
        model.solve(hint=x0, time_limit=LONG, cancel=cancel)), daemon=True)
    t.start()
    return t, out


def _stopped(hard, token, *, after=None):
    """Solve bqp100-1 with a 600 s limit and ``token``; ``after()`` (if given) runs once the
    solve has started. Returns the output, failing if the search did not stop."""
    _p, compiled, x0 = hard
    t, out = _solve_in_thread(LateModel(compiled), x0, token)
    if after is not None:
        after()
    t.join(WAIT)
    assert not t.is_alive(), "the search did not stop on cancel"
    return out[0]


def test_cpsat_stops_when_the_token_is_set_during_the_search(hard, monkeypatch):
    token = CancelToken()
    searching = threading.Event()
    # the search is running once CP-SAT reports its first solution
    orig = cp_model.CpSolver.solve

    def solve(self, m, solution_callback=None):
        class Seen(cp_model.CpSolverSolutionCallback):
            def on_solution_callback(self):
                searching.set()
        return orig(self, m, Seen())

    monkeypatch.setattr(cp_model.CpSolver, "solve", solve)

    def cancel_once_searching():
        assert searching.wait(WAIT)
        token.set()

    out = _stopped(hard, token, after=cancel_once_searching)
    assert out.status == "feasible" and out.x is not None


def test_an_early_cancel_is_not_lost_before_cpsat_makes_its_search(hard, monkeypatch):
    # the token is set after the stop callback is registered but before CP-SAT's solve
    # has made its search: a bare stop_search() is ignored then
    token = CancelToken()
    orig = cp_model.CpSolver.solve

    def solve(self, m, solution_callback=None):
        token.set()
        return orig(self, m, solution_callback)

    monkeypatch.setattr(cp_model.CpSolver, "solve", solve)
    assert _stopped(hard, token).status in ("unknown", "feasible")


def test_a_cancel_between_cpsat_making_its_search_and_running_it_stops_it(hard, monkeypatch):
    # CpSolver.solve makes its search (SolveWrapper), copies the parameters into it, then
    # runs it; a cancel after the copy can only reach it through stop_search
    token = CancelToken()

    class SetAfterTheCopy(cp_model.cmh.SolveWrapper):
        def set_parameters(self, params):
            super().set_parameters(params)
            token.set()

    monkeypatch.setattr(cp_model.cmh, "SolveWrapper", SetAfterTheCopy)
    assert _stopped(hard, token).status in ("unknown", "feasible")


def test_cpsat_set_before_the_call_returns_at_once(hard):
    token = CancelToken()
    token.set()
    assert _stopped(hard, token).status in ("unknown", "feasible")


def test_repair_takes_a_plain_event_and_stops_cpsat_when_it_is_set(hard):
    p, _compiled, x0 = hard
    event = threading.Event()
    cands = CandidateSet(("k0",), x0[None, :])
    out = []
    t = threading.Thread(target=lambda: out.append(repair(
        p, cands, [FixVariables({p.labels[0]: 1})], method="cpsat", time_limit=LONG,
        cancel=event)), daemon=True)
    t.start()
    t.join(0.5)  # the search may or may not have started: either way the set stops it
    event.set()
    t.join(WAIT)
    assert not t.is_alive(), "repair did not stop when the caller's Event was set"
    assert out[0].best is not None
