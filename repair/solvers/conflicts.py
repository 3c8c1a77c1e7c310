"""Naming the hard constraints that cannot all hold: a minimal conflicting set.

When the late hard constraints admit no assignment, a planner needs to know *which*
of them clash, not just that they do. :func:`name_conflict` builds one CP-SAT
feasibility model (no objective) with one Boolean assumption literal per named hard
constraint: each constraint's rows and fixings hold only when its literal is true. The
validity rows of the problem's declared decisions always hold (they are the model, not a
late constraint).

1. Solve with every literal assumed true. Feasible: there is no conflict. Infeasible:
   CP-SAT reports a subset of the assumptions sufficient for infeasibility (a core).
2. Deletion pass: for each member of the core in turn, solve with the others only. Still
   infeasible: the member is dropped (and the set shrinks to the new core CP-SAT reports,
   which is a subset). Feasible: the member is necessary and stays. When every such test
   ends with a proof, the set is minimal: infeasible as a whole, feasible without any one
   member. A test that runs out of time keeps its member and marks the set not minimal.

Members are reported by the position of the constraint in the caller's list and its
name (as in the cost breakdown). Indices: :func:`flipfix.repair.lowering.compiled.compile_constraints`
puts one :class:`~flipfix.repair.lowering.pieces.Pieces` per declared decision first, then
one per late constraint in order. OR-Tools is imported on the first call.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field

from flipfix.repair.cancel import as_token
from flipfix.repair.lowering.compiled import Compiled

__all__ = ["ConflictMember", "Conflict", "name_conflict"]


@dataclass(frozen=True)
class ConflictMember:
    """One hard late constraint of a conflict: ``index`` in the caller's constraint list,
    ``name`` as in the cost breakdown (unique within a request)."""

    index: int
    name: str


@dataclass
class Conflict:
    """Outcome of :func:`name_conflict`.

    ``status``: "conflict" (``members`` cannot all hold), "feasible" (the hard
    constraints can all hold: ``members`` empty), "unknown" (no proof either way within
    the time limit). ``minimal``: every deletion test ended with a proof, so dropping any
    one member makes the rest feasible. ``solves``: CP-SAT calls made; ``seconds``: time taken.
    """

    status: str
    members: tuple = ()
    minimal: bool = False
    solves: int = 0
    seconds: float = 0.0
    message: str = field(default="")

    def to_dict(self) -> dict:
        """JSON-ready form (the CLI prints this)."""
        return {"status": self.status, "minimal": self.minimal,
                "members": [{"index": m.index, "name": m.name} for m in self.members],
                "message": self.message}


def _describe(members) -> str:
    return ", ".join(f"[{m.index}] {m.name}" for m in members)


def name_conflict(compiled: Compiled, *, time_limit: float = 10.0, seed: int = 0,
                  cancel=None) -> Conflict:
    """A minimal set of the hard late constraints of ``compiled`` that cannot all hold.

    ``time_limit`` (s) covers every solve; ``cancel`` (None, a ``threading.Event`` or a
    :class:`flipfix.repair.cancel.CancelToken`) stops the current solve, and the set found
    so far is returned (not minimal). Deterministic for a given ``seed`` (one search worker:
    CP-SAT reports its core from a single-worker search).
    """
    from ortools.sat.python import cp_model  # on first use (it brings protobuf)

    from flipfix.repair.solvers.cpsat import _stopper, add_row

    t0 = time.perf_counter()
    token = as_token(cancel)
    first = len(compiled.problem.decisions)  # encoding pieces come first (compile_constraints)
    m = cp_model.CpModel()
    x = [m.new_bool_var(f"x{i}") for i in range(compiled.n)]
    lits: dict[int, ConflictMember] = {}  # literal index -> member
    for pos, p in enumerate(compiled.pieces):
        if not p.hard:
            continue
        if pos < first:  # a decision's validity: always holds
            for r in p.rows:
                add_row(m, x, r)
            continue
        a = m.new_bool_var(f"a{pos}")
        lits[a.index] = ConflictMember(pos - first, p.name)
        for r in p.rows:
            add_row(m, x, r, enforce=a)
        for i, b in p.fixed:
            m.add(x[int(i)] == int(b)).only_enforce_if(a)
    if not lits:
        return Conflict("feasible", seconds=time.perf_counter() - t0,
                        message="no hard late constraint")
    solves = 0

    def solve(assumed: list[int]) -> tuple[str, list[int]]:
        """("infeasible", core) / ("feasible", []) / ("unknown", [])."""
        nonlocal solves
        left = time_limit - (time.perf_counter() - t0)
        if left <= 0 or token.is_set():
            return "unknown", []
        m.clear_assumptions()
        m.add_assumptions([m.get_bool_var_from_proto_index(i) for i in assumed])
        solver = cp_model.CpSolver()
        solver.parameters.max_time_in_seconds = left
        solver.parameters.num_workers = 1
        solver.parameters.random_seed = int(seed)
        with token.subscribed(_stopper(solver), timeout=left + 1.0):
            code = solver.solve(m)
        solves += 1
        if code == cp_model.INFEASIBLE:
            core = [i for i in solver.sufficient_assumptions_for_infeasibility() if i in lits]
            return "infeasible", core or list(assumed)
        if code in (cp_model.OPTIMAL, cp_model.FEASIBLE):
            return "feasible", []
        return "unknown", []

    status, core = solve(sorted(lits))
    if status != "infeasible":
        return Conflict(status, solves=solves, seconds=time.perf_counter() - t0,
                        message="the hard constraints can all hold" if status == "feasible"
                        else "no proof within the time limit")
    keep = sorted(core)  # in the caller's order: deletion tries earlier constraints first
    minimal = True
    k = 0
    while k < len(keep):
        rest = keep[:k] + keep[k + 1:]
        if not rest:  # one constraint alone cannot hold: necessary by definition
            k += 1
            continue
        status, sub = solve(rest)
        if status == "infeasible":  # keep[k] is not needed; shrink to the core found too.
            # keep[:k] are necessary (the set without each was feasible, and so is every
            # subset of it), so a correct core holds them all; only later members can go
            core_set = set(sub)
            keep = keep[:k] + [i for i in keep[k + 1:] if i in core_set]
            continue
        if status == "unknown":
            minimal = False
        k += 1
    members = tuple(lits[i] for i in keep)
    return Conflict("conflict", members, minimal, solves, time.perf_counter() - t0,
                    message=("these hard constraints cannot all hold: " + _describe(members)
                             + ("" if minimal else " (not proved minimal within the time limit)")))
