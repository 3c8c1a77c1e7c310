"""Naming the hard constraints that cannot all hold: a minimal conflicting set.

When the late hard constraints admit no assignment, a planner needs to know *which*
of them clash, not just that they do. :func:`name_conflict` builds one CP-SAT
feasibility model (no objective) with one Boolean assumption literal per named hard
constraint: each constraint's rows and fixings hold only when its literal is true. The
validity rows of the problem's declared decisions always hold (they are the model, not a
late constraint).

1. Solve with every constraint on (each literal fixed true in a copy of the model, so
   presolve removes the enforcement and the rows keep their full strength). Feasible:
   there is no conflict.
2. A first core: solve with the literals as assumptions; CP-SAT reports a subset
   sufficient for infeasibility. Assumptions weaken the linear relaxation (a counting
   argument over 20 capacity rows proved at once with plain rows stayed unproved for
   60 s with assumptions, n = 250), so this try is short (at most 0.5 s); without a core
   every hard constraint is the start.
3. A start larger than 16 is narrowed by divide and conquer (split in halves, keep what
   a proof needs; about 2 k log2(m / k) solves for k of m), which is minimal by itself when
   every test ends with a proof.
4. Otherwise (or after a test without a proof) the deletion pass: for each member in turn, solve with the others only (literals fixed as
   in 1). Still infeasible: the member goes. Feasible: it is necessary and stays. When
   every test ends with a proof, the set is minimal: infeasible as a whole, feasible
   without any one member. A test that runs out of time keeps its member and marks the
   set not minimal.

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


#: seconds at most for the first core from assumptions
ASSUMPTION_SECONDS = 0.5
#: a first core larger than this is narrowed by divide and conquer before the deletion pass
DELETION_AT_MOST = 16


def _deletion(keep: list, infeasible) -> list:
    """Deletion pass: drop each member in turn when the rest is still infeasible."""
    k = 0
    while k < len(keep):
        rest = keep[:k] + keep[k + 1:]
        if rest and infeasible(rest):
            keep = rest  # keep[k] is not needed
        else:
            k += 1  # necessary (or not proved otherwise within the time limit)
    return keep


def _quickxplain(background: list, candidates: list, changed: bool, infeasible) -> list:
    """A small subset D of ``candidates`` with ``background + D`` infeasible, by divide
    and conquer (splitting the candidates in halves): about k log(m / k) tests for a
    conflict of k among m, where the deletion pass alone takes m."""
    if changed and infeasible(background):
        return []
    if len(candidates) == 1:
        return list(candidates)
    half = len(candidates) // 2
    c1, c2 = candidates[:half], candidates[half:]
    d2 = _quickxplain(background + c1, c2, True, infeasible)
    d1 = _quickxplain(background + d2, c1, bool(d2), infeasible)
    return d1 + d2


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
        for i, b in zip(p.fix_idx.tolist(), p.fix_bits.tolist()):
            m.add(x[i] == b).only_enforce_if(a)
    if not lits:
        return Conflict("feasible", seconds=time.perf_counter() - t0,
                        message="no hard late constraint")
    every = sorted(lits)  # literal indices in the caller's order
    solves = 0

    def solve(on: list[int], *, assume: bool = False) -> tuple[str, list[int]]:
        """Solve with the constraints ``on`` (literal indices) and no other:
        ("infeasible", core) / ("feasible", []) / ("unknown", []). ``assume``: as
        assumptions (the core is CP-SAT's sufficient assumptions), else the literals are
        fixed (on: true, the rest: false) in a copy, so presolve drops the enforcement and
        the constraints keep their full strength (assumptions can hide a counting argument
        that the plain rows prove at once)."""
        nonlocal solves
        left = time_limit - (time.perf_counter() - t0)
        if left <= 0 or token.is_set():
            return "unknown", []
        if assume:
            mm = m
            mm.clear_assumptions()
            mm.add_assumptions([m.get_bool_var_from_proto_index(i) for i in on])
            left = min(left, ASSUMPTION_SECONDS)
        else:
            mm = m.clone()
            mm.clear_assumptions()
            chosen = set(on)
            for i in every:
                mm.add(mm.get_bool_var_from_proto_index(i) == int(i in chosen))
        solver = cp_model.CpSolver()
        solver.parameters.max_time_in_seconds = left
        solver.parameters.num_workers = 1
        solver.parameters.random_seed = int(seed)
        with token.subscribed(_stopper(solver), timeout=left + 1.0):
            code = solver.solve(mm)
        solves += 1
        if code == cp_model.INFEASIBLE:
            core = ([i for i in solver.sufficient_assumptions_for_infeasibility() if i in lits]
                    if assume else [])
            return "infeasible", core or list(on)
        if code in (cp_model.OPTIMAL, cp_model.FEASIBLE):
            return "feasible", []
        return "unknown", []

    status, _ = solve(every)
    if status != "infeasible":
        return Conflict(status, solves=solves, seconds=time.perf_counter() - t0,
                        message="the hard constraints can all hold" if status == "feasible"
                        else "no proof within the time limit")
    # a first core from CP-SAT's assumptions (quick on small models), else every constraint
    status, core = solve(every, assume=True)
    keep = sorted(core) if status == "infeasible" else every
    unsure = [False]

    def infeasible(on: list[int]) -> bool:
        st, _ = solve(on)
        unsure[0] |= st == "unknown"
        return st == "infeasible"

    start = keep
    if len(keep) > DELETION_AT_MOST:  # minimal already when every test was proved
        keep = sorted(_quickxplain([], keep, False, infeasible))
    if len(start) <= DELETION_AT_MOST or unsure[0]:
        keep = _deletion(keep, infeasible)
    minimal = not unsure[0]
    if not minimal and not infeasible(keep):  # a test without a proof: keep what was proved
        keep = start
    members = tuple(lits[i] for i in keep)
    return Conflict("conflict", members, minimal, solves, time.perf_counter() - t0,
                    message=("these hard constraints cannot all hold: " + _describe(members)
                             + ("" if minimal else " (not proved minimal within the time limit)")))
