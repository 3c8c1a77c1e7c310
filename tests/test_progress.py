"""Progress people can follow: plain lines at least every 0.5 s off a terminal (stage,
candidates done, best cost so far, time left), a tqdm bar on one; for ``repair`` and ``audit``,
in process and with ``--server``.

The best cost a line shows is checked against the reply's own cost (it can only come down
to it), the models are seeded random QUBOs (invented data for timing only).
"""

from __future__ import annotations

import io
import json
import re

import numpy as np
import pytest

from flipfix.service.cli import main
from flipfix.service.client import FlipfixClient
from flipfix.service.progress import Progress
from flipfix.service.server import create_server

LINE = re.compile(r"^flipfix (repair|audit): +([0-9.]+) s, ([0-9.]+) s left  ([^:]+): "
                  r"(\d+/\d+ \w+|0 \w+ yet), best cost (\S+)$")


def _model(n=150, k=24, seed=3):
    rng = np.random.default_rng(seed)
    linear = {f"v{i}": float(rng.integers(-5, 6)) for i in range(n)}
    quad = [[f"v{i}", f"v{j}", float(rng.integers(-4, 5))] for i in range(n)
            for j in range(i + 1, n) if rng.random() < 0.08]
    cands = [{"id": f"k{c}", "assignment": {f"v{i}": int(b) for i, b in
                                            enumerate(rng.integers(0, 2, n))}} for c in range(k)]
    ref = {f"v{i}": int(b) for i, b in enumerate(rng.integers(0, 2, n))}
    cons = [{"type": "hamming", "reference": ref, "weight": 2.0},
            {"type": "linear", "terms": {f"v{i}": 1 for i in range(n)}, "sense": "<=",
             "rhs": n // 3}]
    return {"vartype": "BINARY", "linear": linear, "quadratic": quad}, cands, cons


def _files(tmp_path):
    paths = []
    for name, doc in zip(("problem", "candidates", "constraints"), _model()):
        path = tmp_path / f"{name}.json"
        path.write_text(json.dumps(doc))
        paths.append(str(path))
    return paths


def _check_lines(text: str, what: str, unit: str, budget: float) -> list:
    rows = [LINE.match(line) for line in text.splitlines() if line.startswith("flipfix " + what)]
    assert rows and all(rows), text
    times = [float(m.group(2)) for m in rows]
    # at least every 0.5 s (a little slack for a loaded machine), from the start
    assert times[0] < 0.9 and all(b - a < 0.9 for a, b in zip(times, times[1:])), times
    for m in rows:
        assert m.group(1) == what and unit in m.group(5)
        assert float(m.group(3)) == pytest.approx(max(0.0, budget - float(m.group(2))), abs=0.11)
    return rows


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    db = tmp_path_factory.mktemp("progress") / "s.sqlite3"
    with create_server("127.0.0.1:0", db_path=str(db), workers=1) as srv:
        with FlipfixClient(srv.address) as fx:
            fx.wait_ready(timeout=300)
        yield srv


@pytest.mark.parametrize("remote", [False, True])
def test_repair_prints_a_line_every_half_second(tmp_path, capsys, server, remote):
    extra = ["--server", server.address] if remote else []
    assert main(["repair", *_files(tmp_path), "--time-limit", "2", *extra]) == 0
    cap = capsys.readouterr()
    out = json.loads(cap.out)
    rows = _check_lines(cap.err, "repair", "candidates", 2.0)
    assert len(rows) >= 3  # a 2 s portfolio run: 0.5, 1.0, 1.5, ... and the last state
    last = rows[-1]
    # the last line is the answer's
    assert (last.group(4), last.group(5)) == ("done", "24/24 candidates")
    assert float(last.group(6)) == pytest.approx(out["best"]["cost"], rel=1e-5)
    # every best cost shown is a real cost, never better than the answer
    assert all(m.group(6) == "-" or float(m.group(6)) >= out["best"]["cost"] - 1e-3 for m in rows)
    stages = {m.group(4) for m in rows}
    assert stages - {"starting"}, stages


@pytest.mark.parametrize("remote", [False, True])
def test_audit_prints_lines_too(tmp_path, capsys, server, remote):
    problem, cands, _ = _model()
    if remote:
        with FlipfixClient(server.address) as fx:
            fx.create_problem("prog", problem)
            fx.add_candidates("prog", cands)
        args = ["audit", "prog", "--server", server.address]
    else:
        args = ["audit", *_files(tmp_path)[:2]]
    assert main([*args, "--scenarios", "12", "--weight", "2", "--time-limit", "3",
                 "--pareto-methods", "greedy", "--pareto-time", "1"]) == 0
    cap = capsys.readouterr()
    assert "stress test: 12/12 scenarios" in cap.out
    rows = _check_lines(cap.err, "audit", "scenarios", 4.0)
    assert rows[-1].group(4) == "pareto" and rows[-1].group(5) == "12/12 scenarios"


def test_a_terminal_gets_a_tqdm_bar():
    class Terminal(io.StringIO):
        def isatty(self):
            return True

    term = Terminal()
    with Progress("repair", budget=1.0, stream=term, interval=0.1) as show:
        show({"phase": "greedy", "done": 3, "total": 10, "best_cost": -4.5})
        show._stop.wait(0.35)
        show({"phase": "anneal", "done": 10, "total": 10, "best_cost": None})  # keeps -4.5
    text = term.getvalue()
    assert show.lines == 0 and "\r" in text  # redrawn in place, not line by line
    assert "flipfix repair:" in text and "s left" in text
    assert "anneal: 10/10 candidates, best cost -4.5" in text
    assert re.search(r"[0-9.]+/1\.0 s", text)


def test_quiet_shows_nothing():
    buf = io.StringIO()
    with Progress("repair", budget=1.0, stream=buf, enabled=False, interval=0.05) as show:
        show({"phase": "greedy", "done": 1, "total": 2})
    assert buf.getvalue() == ""


def test_the_greedy_stage_reports_its_best_cost_before_the_search_goes_on():
    """The core's progress: once greedy has repaired the library, the next report carries
    the best repaired cost (not "no cost yet" until the first annealing round), and that
    cost is one the run can reach: never below the final answer's."""
    from flipfix.repair import CandidateSet, Problem, repair
    from flipfix.repair.model.constraints import FixVariables

    rng = np.random.default_rng(3)
    n = 60
    labels = [f"x{i}" for i in range(n)]
    quad = [(labels[i], labels[j], float(rng.integers(-5, 6)))
            for i in range(n) for j in range(i + 1, n) if rng.random() < 0.1]
    p = Problem.from_terms({lab: float(rng.integers(-5, 6)) for lab in labels}, quad)
    cands = CandidateSet.from_array(p, rng.integers(0, 2, size=(12, n)))
    seen: list = []
    res = repair(p, cands, [FixVariables({"x0": 1, "x1": 0})], method="portfolio",
                 time_limit=1.0, seed=0, progress=seen.append)
    greedy = [d for d in seen if d.get("phase") == "greedy" and d.get("best_cost") is not None]
    assert greedy, seen[:5]
    assert greedy[0]["best_cost"] >= res.best.cost - 1e-9
