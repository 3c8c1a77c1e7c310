"""``flipfix demo`` (and ``make demo``): the main job, end to end, on the embedded default.

1. start a real server in-process on a free port with a temporary SQLite database;
2. store a problem and its library of candidate plans through the gRPC API;
3. send a late constraint and stream the repair's progress;
4. print the answer readably.

The scenario comes from :mod:`flipfix.service.demo_scenario` when it is present (the
workshop timetable); otherwise a small invented shift-cover scenario of this
module is used. All data is invented for the demo.
"""

from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path
from typing import Any, Callable

import numpy as np

__all__ = ["run_demo", "fallback_scenario", "load_scenario"]

CAUTION = ("This is a proposal. A responsible person checks it before it is used, "
           "and local rules (working time, rest, agreements) apply.")


def fallback_scenario(seed: int = 0) -> dict[str, Any]:
    """Invented: a day's 8 shifts at a small depot, staffed by picking a cheap cover.

    Variables ``cover_<shift>`` (BINARY): 1 when an extra driver covers the shift.
    Cost: each cover has a price, overlapping covers are wasteful, uncovered peaks
    are expensive. The library holds the cheapest plans a seeded local search found;
    late event: no driver for the 10:00 shift, and the published plan should move little.
    """
    rng = np.random.default_rng(seed)
    shifts = ["06:00", "08:00", "10:00", "12:00", "14:00", "16:00", "18:00", "20:00"]
    labels = [f"cover_{s}" for s in shifts]
    peak = [0, 1, 1, 0, 0, 1, 1, 0]
    linear = {lab: round(float(2.0 - 5.0 * p + rng.uniform(-0.5, 0.5)), 2)
              for lab, p in zip(labels, peak)}
    quadratic = [[labels[i], labels[i + 1], 1.5] for i in range(len(labels) - 1)]
    problem = {"vartype": "BINARY", "linear": linear, "quadratic": quadratic, "offset": 0.0}

    def energy(x):
        return (sum(linear[lab] * v for lab, v in zip(labels, x))
                + sum(b for u, v, b in quadratic if x[labels.index(u)] and x[labels.index(v)]))

    plans = set()
    for _ in range(40):  # seeded single-flip descent from random plans
        x = list(rng.integers(0, 2, len(labels)))
        improved = True
        while improved:
            improved = False
            for i in range(len(x)):
                y = x.copy()
                y[i] = 1 - y[i]
                if energy(y) < energy(x) - 1e-12:
                    x, improved = y, True
        plans.add(tuple(int(v) for v in x))
    ranked = sorted(plans, key=energy)[:6]
    candidates = [{"id": f"plan-{k + 1}", "assignment": dict(zip(labels, p)), "source": "local search",
                   "energy": round(energy(p), 6)} for k, p in enumerate(ranked)]
    published = candidates[0]["assignment"]
    constraints = [
        {"type": "fix", "name": "no driver at 10:00", "values": {"cover_10:00": 0}},
        {"type": "hamming", "name": "keep the published plan", "reference": published,
         "weight": 0.5},
    ]

    def render(result: dict) -> str:
        after = result["best"]["assignment"]
        lines = ["shift   published  proposed", "-----   ---------  --------"]
        for s, lab in zip(shifts, labels):
            mark = "  <- changed" if after[lab] != published[lab] else ""
            lines.append(f"{s}   {'cover' if published[lab] else '  -  ':>9}  "
                         f"{'cover' if after[lab] else '  -  ':>8}{mark}")
        return "\n".join(lines)

    return {"problem": problem, "candidates": candidates, "constraints": constraints,
            "render": render, "name": "depot-shifts"}


def load_scenario(seed: int = 0) -> dict[str, Any]:
    """The workshop scenario when :mod:`flipfix.service.demo_scenario` exists, else the fallback."""
    try:
        from flipfix.service.demo_scenario import workshop_scenario
    except ImportError:
        return fallback_scenario(seed)
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
