"""Result objects of a repair run (plain data; no transport types)."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

__all__ = ["Solution", "AuditRow", "RepairResult", "ParetoPoint", "STATUSES", "METHODS"]

#: optimal: proved optimal by CP-SAT over the whole search space (no radius);
#: feasible: a feasible answer without a proof; infeasible: proved that no
#: assignment meets the hard constraints; no_feasible_found: none found in the budget.
STATUSES = ("optimal", "feasible", "infeasible", "no_feasible_found")
METHODS = ("portfolio", "greedy", "cpsat")


@dataclass
class Solution:
    """One repaired assignment.

    ``x`` is int8 (n,) in 0/1 form; ``assignment`` maps labels to values in the
    caller's vartype. ``cost`` = ``base_energy`` + sum of ``penalties``;
    ``objective`` = cost + flip_price * flips (what the search minimised).
    ``candidate_id`` is the library candidate nearest to the answer and ``flips`` the
    Hamming distance from it; ``repaired_from`` is the candidate whose repair produced
    the answer (the same one unless another candidate is closer).
    ``changes`` lists integer-level changes ``(decision, old, new)`` when the
    problem declares decisions; ``decisions_changed`` counts them.
    ``plan_distance`` is the Hamming distance of ``x`` from the published plan the late
    constraints name: the reference of the first Hamming-type penalty (``HammingPenalty``:
    the bits of every label in its reference; ``DecisionChangePenalty``: the bits of every
    decision in its reference, against that value's code); None when there is none.
    """

    candidate_id: str
    x: np.ndarray
    assignment: dict
    cost: float
    objective: float
    base_energy: float
    penalties: dict
    flips: int
    feasible: bool
    violation: float
    violations: dict
    method: str
    changes: list = field(default_factory=list)
    decisions_changed: int = 0
    repaired_from: str = ""
    plan_distance: int | None = None


@dataclass
class AuditRow:
    """Repair figures of one candidate."""

    candidate_id: str
    cost_before: float
    feasible_before: bool
    cost_after: float
    objective_after: float
    flips: int
    feasible: bool
    violation: float
    method: str
    seconds: float
    decisions_changed: int = 0
    #: ``[(decision, how)]`` for each decision whose bits broke its encoding before repair
    encoding_issues: list = field(default_factory=list)


@dataclass(frozen=True)
class ParetoPoint:
    """A non-dominated (cost, flips) pair and where it came from."""

    cost: float
    flips: int
    candidate_id: str
    method: str


@dataclass
class RepairResult:
    """Outcome of :func:`flipfix.repair.repair`; never raised, always returned.

    ``seconds`` is the whole call, from its entry (after the one-time kernel warm-up) to
    its return: lowering, scoring, search and building this result; ``stats["seconds"]``
    splits it by those stages ("lowering", "scoring", "search", "result").

    ``best`` is the cheapest feasible solution (ties: fewer flips), or, when
    none is feasible, the least-violating assignment found. ``audit`` has one
    row per candidate in library order. ``scaling_error`` is the largest
    absolute error made when CP-SAT coefficients were scaled to integers
    (0.0 when no scaling was needed or CP-SAT did not run); "optimal" means
    optimal for the scaled model, so within that error per coefficient.
    """

    status: str
    best: Solution
    audit: list
    seed: int
    method: str
    seconds: float
    message: str = ""
    pareto: list = field(default_factory=list)
    scaling_error: float = 0.0
    cpsat_status: str = ""
    stats: dict = field(default_factory=dict)
    #: when the hard constraints cannot all hold: a minimal set of them that conflicts
    #: (:class:`flipfix.repair.solvers.conflicts.Conflict`); None otherwise
    conflict: Any = None
    #: feasible alternatives, cheapest first, when asked for
    #: (:class:`flipfix.repair.solvers.alternatives.Alternative`)
    alternatives: list = field(default_factory=list)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready form (the CLI prints this)."""
        b = self.best

        def num(v):
            return float(v)

        return {
            "status": self.status,
            "message": self.message,
            "method": self.method,
            "seed": self.seed,
            "seconds": round(self.seconds, 6),
            "scaling_error": self.scaling_error,
            "cpsat_status": self.cpsat_status,
            "best": {
                "candidate_id": b.candidate_id,
                "repaired_from": b.repaired_from,
                "cost": num(b.cost),
                "objective": num(b.objective),
                "base_energy": num(b.base_energy),
                "penalties": {k: num(v) for k, v in b.penalties.items()},
                "flips": int(b.flips),
                "plan_distance": None if b.plan_distance is None else int(b.plan_distance),
                "feasible": bool(b.feasible),
                "violation": num(b.violation),
                "violations": {k: num(v) for k, v in b.violations.items()},
                "method": b.method,
                "assignment": {str(k) if not isinstance(k, int) else k: int(v)
                               for k, v in b.assignment.items()},
                "changes": [{"decision": d, "old": o, "new": nw} for d, o, nw in b.changes],
                "decisions_changed": int(b.decisions_changed),
            },
            "audit": [
                {
                    "candidate_id": r.candidate_id, "cost_before": num(r.cost_before),
                    "feasible_before": bool(r.feasible_before), "cost": num(r.cost_after),
                    "objective": num(r.objective_after), "flips": int(r.flips),
                    "feasible": bool(r.feasible), "violation": num(r.violation),
                    "method": r.method, "seconds": round(r.seconds, 6),
                    "decisions_changed": int(r.decisions_changed),
                    "encoding_issues": [{"decision": d, "how": h} for d, h in r.encoding_issues],
                }
                for r in self.audit
            ],
            "pareto": [{"cost": num(p.cost), "flips": int(p.flips), "candidate_id": p.candidate_id,
                        "method": p.method} for p in self.pareto],
            "conflict": None if self.conflict is None else self.conflict.to_dict(),
            "alternatives": [a.to_dict() for a in self.alternatives],
        }
