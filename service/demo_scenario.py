"""The workshop scenario of `make demo` (invented data, made up for this demo).

A small regional workshop plans 12 jobs over 6 time slots (Mon-Wed, morning and
afternoon). Each job runs on its own machine (4 jobs each on the lathe, the mill
and the welder); the decision per job is its slot, encoded domain wall (5 bits
for 6 slots: bit ``J05>2`` is 1 when job J05 runs after slot 2).

Objective (all quadratic in the bits, see :func:`flipfix.repair.model.encodings.pair_terms`):
two jobs on one machine in one slot (20), a job before the job it depends on
(12), two jobs needing the same fitter in one slot (8), each slot past a job's
due slot (3), plus small seeded slot preferences that break ties.

A library of candidate plans comes from a seeded search (random plans improved
by moving one job at a time to its best slot); the cheapest is the published
plan. Late event: the mill is down on Tuesday (slots 3 and 4) and the plan
should change as little as possible from the published one.

The plan is a proposal: the workshop lead reviews it and decides; local rules
on working time apply.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from flipfix.repair.model.encodings import decode, pair_terms, unary_terms
from flipfix.repair.model.problem import Decision, Problem

__all__ = ["workshop_scenario", "SLOTS", "MACHINES", "JOBS"]

SLOTS = ("Mon AM", "Mon PM", "Tue AM", "Tue PM", "Wed AM", "Wed PM")
MACHINES = ("Lathe", "Mill", "Welder")
#: job id -> (description, machine, due slot 1..6)
JOBS = {
    "J01": ("pump shaft", "Lathe", 2),
    "J02": ("axle bushings", "Lathe", 3),
    "J03": ("roller pins", "Lathe", 5),
    "J04": ("drive spindle", "Lathe", 6),
    "J05": ("gearbox cover", "Mill", 3),
    "J06": ("hinge brackets", "Mill", 2),
    "J07": ("valve plate", "Mill", 4),
    "J08": ("mould insert", "Mill", 6),
    "J09": ("trailer hitch", "Welder", 3),
    "J10": ("gate frame", "Welder", 4),
    "J11": ("pump housing", "Welder", 5),
    "J12": ("stair railing", "Welder", 6),
}
#: (first, then): ``then`` must run in a later slot than ``first``
PRECEDES = (("J06", "J10"), ("J01", "J11"), ("J05", "J11"), ("J02", "J09"))
#: pairs needing the same fitter: not in one slot
SAME_FITTER = (("J03", "J07"), ("J04", "J12"), ("J08", "J09"))
DOWN = ("Mill", (3, 4))            # the late event
W_CLASH, W_ORDER, W_FITTER, W_LATE = 20.0, 12.0, 8.0, 3.0
W_KEEP = 5.0                       # per job moved from the published plan


def _integer_model(seed: int) -> tuple[dict, dict]:
    """Unary costs {job: float64 (6,)} and pair matrices {(a, b): float64 (6, 6)}."""
    rng = np.random.default_rng(seed)
    slots = np.arange(1, 7)
    unary = {}
    for j, (_, _, due) in JOBS.items():
        prefer = np.round(rng.uniform(0.0, 1.0, size=6), 2)   # small seeded preferences
        unary[j] = W_LATE * np.maximum(0, slots - due) + prefer
    pairs: dict = {}

    def add(a: str, b: str, G: np.ndarray) -> None:
        key = (a, b) if a < b else (b, a)
        pairs[key] = pairs.get(key, 0.0) + (G if key == (a, b) else G.T)

    same = np.eye(6)
    jobs = list(JOBS)
    for x in range(len(jobs)):
        for y in range(x + 1, len(jobs)):
            if JOBS[jobs[x]][1] == JOBS[jobs[y]][1]:
                add(jobs[x], jobs[y], W_CLASH * same)
    for a, b in PRECEDES:   # violated when slot(b) <= slot(a)
        add(a, b, W_ORDER * (slots[None, :] <= slots[:, None]).astype(float))
    for a, b in SAME_FITTER:
        add(a, b, W_FITTER * same)
    return unary, pairs


def _plan_cost(plan: dict, unary: dict, pairs: dict) -> float:
    """Integer-level energy of a plan {job: slot index 0..5}."""
    e = sum(unary[j][plan[j]] for j in JOBS)
    return float(e + sum(G[plan[a], plan[b]] for (a, b), G in pairs.items()))


def _descend(plan: dict, unary: dict, pairs: dict, rng: np.random.Generator) -> dict:
    """Move one job at a time to its best slot (random job order) until no move helps."""
    plan = dict(plan)
    improved = True
    while improved:
        improved = False
        for j in rng.permutation(list(JOBS)):
            costs = unary[j].copy()
            for (a, b), G in pairs.items():
                if a == j:
                    costs += G[:, plan[b]]
                elif b == j:
                    costs += G[plan[a], :]
            best = int(np.argmin(costs))
            if costs[best] < costs[plan[j]] - 1e-12:
                plan[j] = best
                improved = True
    return plan


def workshop_scenario(seed: int = 0, *, library_size: int = 8) -> dict[str, Any]:
    """The demo as documents: ``problem``, ``candidates``, ``constraints`` (JSON-ready), and
    ``render(result_dict) -> str``, a before/after timetable of a repair result
    (:meth:`flipfix.repair.result.RepairResult.to_dict`). Deterministic for a given ``seed``.
    """
    unary, pairs = _integer_model(seed)
    decisions = [Decision(j, "domain_wall", tuple(f"{j}>{s}" for s in range(1, 6)),
                          tuple(range(1, 7))) for j in JOBS]
    by_name = {d.name: d for d in decisions}
    linear: dict = {}
    quadratic: dict = {}
    offset = 0.0
    for d in decisions:
        lin, off = unary_terms(d, unary[d.name])
        for lab, w in lin.items():
            linear[lab] = linear.get(lab, 0.0) + w
        offset += off
    for (a, b), G in pairs.items():
        lin, quad, off = pair_terms(by_name[a], by_name[b], G)
        for lab, w in lin.items():
            linear[lab] = linear.get(lab, 0.0) + w
        for key, w in quad.items():
            quadratic[key] = quadratic.get(key, 0.0) + w
        offset += off
    labels = [lab for d in decisions for lab in d.variables]
    problem_doc = {
        "vartype": "BINARY",
        "labels": labels,
        "linear": {lab: round(linear.get(lab, 0.0), 6) for lab in labels},
        "quadratic": [[u, v, round(w, 6)] for (u, v), w in quadratic.items() if w != 0.0],
        "offset": round(offset, 6),
        "decisions": [{"name": d.name, "encoding": d.encoding, "variables": list(d.variables),
                       "values": list(d.values)} for d in decisions],
    }
    problem = Problem.from_terms(
        problem_doc["linear"], problem_doc["quadratic"], offset=problem_doc["offset"],
        labels=labels, decisions=decisions)

    # candidate library: seeded random plans, each improved by single-job moves
    rng = np.random.default_rng(seed + 1)
    plans: list = []
    for _ in range(library_size * 4):
        start = {j: int(rng.integers(0, 6)) for j in JOBS}
        plan = _descend(start, unary, pairs, rng)
        if plan not in plans:
            plans.append(plan)
        if len(plans) == library_size:
            break
    plans.sort(key=lambda p: _plan_cost(p, unary, pairs))

    def bits_of(plan: dict) -> dict:
        return {f"{j}>{s}": int(plan[j] >= s) for j in JOBS for s in range(1, 6)}

    candidates_doc = []
    for k, plan in enumerate(plans):
        x = np.asarray([bits_of(plan)[lab] for lab in labels], dtype=np.int8)
        energy = float(problem.energies(x)[0])
        # the bit model equals the integer model on valid strings (checked, not assumed)
        assert abs(energy - _plan_cost(plan, unary, pairs)) < 1e-6
        candidates_doc.append({
            "id": "published" if k == 0 else f"alt-{k}",
            "assignment": bits_of(plan), "source": f"seeded search (seed {seed})",
            "energy": round(energy, 6), "tags": ["published"] if k == 0 else [],
        })
    published = {j: plans[0][j] + 1 for j in JOBS}

    machine, down = DOWN
    constraints_doc = [
        {"type": "forbid_values", "name": f"{machine.lower()} down {j}", "decision": j,
         "values": list(down)}
        for j, (_, m, _) in JOBS.items() if m == machine
    ]
    constraints_doc.append({
        "type": "decision_change", "name": "keep published plan", "reference": published,
        "weight": W_KEEP, "distance": "changed", "shape": "linear",
    })

    def render(result: dict) -> str:
        return _render(problem, published, result, machine, down)

    return {"problem": problem_doc, "candidates": candidates_doc, "constraints": constraints_doc,
            "render": render, "published": published,
            "story": (f"{len(JOBS)} jobs, {len(SLOTS)} slots, {len(MACHINES)} machines; "
                      f"late event: the {machine.lower()} is down in slots "
                      f"{', '.join(SLOTS[s - 1] for s in down)}; keep changes from the "
                      f"published plan small ({W_KEEP:g} per moved job)")}


def _table(plan: dict, moved: set, down_cells: set) -> list[str]:
    w = 16
    lines = ["".ljust(8) + "".join(s.ljust(w) for s in SLOTS)]
    for m in MACHINES:
        cells = []
        for s in range(1, 7):
            jobs = [j + ("*" if j in moved else "") for j in JOBS
                    if JOBS[j][1] == m and plan.get(j) == s]
            text = "+".join(jobs) if jobs else ("(down)" if (m, s) in down_cells else ".")
            if jobs and (m, s) in down_cells:
                text += " (down!)"
            cells.append(text.ljust(w))
        lines.append(m.ljust(8) + "".join(cells))
    return lines


def _render(problem: Problem, published: dict, result: dict, machine: str,
            down: tuple) -> str:
    best = result.get("best", {})
    assignment = best.get("assignment", {})
    x = np.asarray([int(assignment.get(lab, assignment.get(str(lab), 0))) for lab in problem.labels],
                   dtype=np.int8)
    after = decode(problem, x)[0]
    moved = {j for j in JOBS if after.get(j) != published[j]}
    down_cells = {(machine, s) for s in down}
    out = ["Published plan (before the late event):"]
    out += _table(published, set(), set())
    out += ["", f"Repaired plan (status {result.get('status')}, from candidate "
                f"{best.get('candidate_id')!r}, method {best.get('method')}):"]
    out += _table(after, moved, down_cells)
    out += [""]
    if moved:
        out.append("Changes from the published plan (* above):")
        for j in sorted(moved):
            old, new = published[j], after.get(j)
            new_txt = SLOTS[new - 1] if new is not None else "no valid slot"
            out.append(f"  {j} {JOBS[j][0]} ({JOBS[j][1]}): {SLOTS[old - 1]} -> {new_txt}")
    else:
        out.append("No job moves from the published plan.")
    out.append(f"Cost {best.get('cost', float('nan')):.2f}, bits flipped {best.get('flips')}, "
               f"jobs moved from the repaired candidate {best.get('decisions_changed')}, "
               f"feasible {best.get('feasible')}.")
    out.append("This is a proposal: the workshop lead reviews it and decides; "
               "local working-time rules apply.")
    return "\n".join(out)


