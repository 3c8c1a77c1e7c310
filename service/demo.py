"""``flipfix demo`` (and ``make demo``): the main job, end to end, on the embedded default.

1. start a real server in-process on a free port with a temporary SQLite database;
2. store a problem and its library of candidate plans through the gRPC API;
3. send a late constraint and stream the repair's progress;
4. print the answer readably.

The scenario is the workshop timetable of :mod:`flipfix.service.demo_scenario`. All data
is invented for the demo.
"""

from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path
from typing import Any, Callable

__all__ = ["run_demo", "load_scenario"]

CAUTION = ("This is a proposal. A responsible person checks it before it is used, "
           "and local rules (working time, rest, agreements) apply.")


def load_scenario(seed: int = 0) -> dict[str, Any]:
    """The workshop scenario (:mod:`flipfix.service.demo_scenario`)."""
    from flipfix.service.demo_scenario import workshop_scenario

    sc = dict(workshop_scenario(seed=seed))
    sc.setdefault("name", "workshop")
    return sc


def _say(msg: str) -> None:
    print(msg, file=sys.stderr, flush=True)


def run_demo(*, seed: int = 0, time_limit: float = 3.0, out: Callable[[str], None] = print) -> int:
    """Run the demo; returns the exit code (0 when the repair found a feasible plan)."""
    from flipfix.service.client import FlipfixClient
    from flipfix.service.server import create_server

    sc = load_scenario(seed)
    name = sc.get("name", "demo")
    with tempfile.TemporaryDirectory(prefix="flipfix-demo-") as tmp:
        db = Path(tmp) / "flipfix.sqlite3"
        t0 = time.monotonic()
        srv = create_server("127.0.0.1:0", db_path=str(db), workers=1)
        try:
            _say(f"[demo] server listening on 127.0.0.1:{srv.port}, database {db.name} (temporary)")
            with FlipfixClient(srv.address, timeout=time_limit * 4 + 60) as fx:
                fx.wait_ready(notice=_say)  # the workers' kernels, outside the repair's deadline
                info = fx.create_problem(name, sc["problem"])
                _say(f"[demo] stored problem {name!r}: {info.num_variables} variables, "
                     f"{info.num_interactions} couplings, revision {info.revision}")
                ids = fx.add_candidates(name, sc["candidates"])
                _say(f"[demo] stored a library of {len(ids)} candidate plans")
                kinds = ", ".join(c.get("name", c["type"]) for c in sc["constraints"])
                _say(f"[demo] late event: {kinds}")

                def progress(p):
                    best = f"{p.best_cost:.4g}" if p.HasField("best_cost") else "-"
                    _say(f"[demo]   progress: {p.done}/{p.total} candidates, best cost {best}")

                result = fx.repair(name, sc["constraints"], time_limit=time_limit, seed=seed,
                                   on_progress=progress)
        finally:
            srv.shutdown(grace=2.0)
        b = result["best"]
        out("")
        out(f"flipfix demo: {name}  (repair status: {result['status']}, "
            f"{time.monotonic() - t0:.1f}s end to end)")
        out(f"best plan: repaired from candidate {b['candidate_id']!r} with {b['flips']} bit flip(s), "
            f"cost {b['cost']:.4g}, feasible: {'yes' if b['feasible'] else 'NO'}")
        if b.get("decisions_changed"):
            out(f"decisions changed: {b['decisions_changed']}")
        if b["penalties"]:
            out("cost breakdown: base " + f"{b['base_energy']:.4g}" + "".join(
                f", {k} {v:.4g}" for k, v in b["penalties"].items()))
        out("")
        render = sc.get("render")
        if render is not None:
            out(render(result))
            out("")
        out("per-candidate audit (cost before -> after, flips):")
        for row in result["audit"]:
            out(f"  {row['candidate_id']:>10}: {row['cost_before']:9.4g} -> {row['cost']:9.4g}"
                f"  flips {row['flips']:3d}  {'feasible' if row['feasible'] else 'infeasible'}")
        out("")
        out(CAUTION)
        return 0 if b["feasible"] else 1
