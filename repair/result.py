"""Result objects of a repair run (plain data; no transport types)."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

__all__ = ["Solution", "AuditRow", "Audit", "RepairResult", "ParetoPoint", "STATUSES",
           "METHODS", "UNSCORED"]

#: optimal: proved optimal by CP-SAT over the whole search space (no radius);
#: feasible: a feasible answer without a proof; infeasible: proved that no
#: assignment meets the hard constraints; no_feasible_found: none found in the budget.
STATUSES = ("optimal", "feasible", "infeasible", "no_feasible_found")
METHODS = ("portfolio", "greedy", "cpsat")
#: the audit method of a candidate the budget did not reach even to score it (its costs NaN)
UNSCORED = "unscored"


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


#: Audit's columns in AuditRow's field order, and the dtype each is held in
_COLUMNS = (("cost_before", np.float64), ("feasible_before", np.bool_),
            ("cost_after", np.float64), ("objective_after", np.float64), ("flips", np.int64),
            ("feasible", np.bool_), ("violation", np.float64), ("method", object),
            ("seconds", np.float64), ("decisions_changed", np.int64))


class Audit:
    """Repair figures of every candidate, held by column (one numpy array per figure, no
    Python object per candidate): a library of 10,000 candidates costs 10 arrays.

    Columns, each of length K in library order: ``candidate_id`` (tuple of str),
    ``cost_before``, ``cost_after``, ``objective_after``, ``violation``, ``seconds``
    float64; ``feasible_before``, ``feasible`` bool; ``flips``, ``decisions_changed`` int64;
    ``method`` object (str). A candidate the budget did not reach even to score has method
    :data:`UNSCORED`, NaN costs, objective and violation, and is not feasible.
    ``encoding_issues`` maps a candidate's position to its ``[(decision, how)]``.

    Reads like a sequence of :class:`AuditRow` (``len``, iteration, ``audit[k]``; a slice
    gives an Audit), built on demand.
    """

    __slots__ = ("candidate_id", "encoding_issues") + tuple(name for name, _ in _COLUMNS)

    def __init__(self, candidate_id, *, encoding_issues=None, **columns):
        self.candidate_id = tuple(candidate_id)
        K = len(self.candidate_id)
        for name, dtype in _COLUMNS:
            col = np.asarray(columns.pop(name), dtype=dtype)
            if col.shape != (K,):
                raise ValueError(f"audit column {name} has shape {col.shape}, expected ({K},)")
            setattr(self, name, col)
        if columns:
            raise TypeError(f"unknown audit columns {sorted(columns)}")
        self.encoding_issues = dict(encoding_issues or {})

    @classmethod
    def from_rows(cls, rows) -> "Audit":
        """The columns of a sequence of :class:`AuditRow`."""
        rows = list(rows)
        cols = {name: [getattr(r, name) for r in rows] for name, _ in _COLUMNS}
        issues = {k: list(r.encoding_issues) for k, r in enumerate(rows) if r.encoding_issues}
        return cls([r.candidate_id for r in rows], encoding_issues=issues, **cols)

    def __len__(self) -> int:
        return len(self.candidate_id)

    def __getitem__(self, k):
        if isinstance(k, slice):
            pos = range(len(self))[k]
            idx = np.arange(pos.start, pos.stop, pos.step, dtype=np.int64)
            issues = {j: self.encoding_issues[i] for j, i in enumerate(pos)
                      if i in self.encoding_issues}
            return Audit([self.candidate_id[i] for i in pos], encoding_issues=issues,
                         **{name: getattr(self, name)[idx] for name, _ in _COLUMNS})
        k = range(len(self))[k]  # IndexError past the end; negative counts from it
        return AuditRow(self.candidate_id[k],
                        *(getattr(self, name)[k].item() if dtype is not object
                          else getattr(self, name)[k] for name, dtype in _COLUMNS),
                        encoding_issues=list(self.encoding_issues.get(k, [])))

    def __iter__(self):
        cols = [getattr(self, name).tolist() for name, _ in _COLUMNS]  # Python numbers at once
        issues = self.encoding_issues
        for k, values in enumerate(zip(self.candidate_id, *cols)):
            yield AuditRow(*values, encoding_issues=list(issues.get(k, [])))

    def __eq__(self, other) -> bool:
        if isinstance(other, Audit):
            other = list(other)
        return list(self) == list(other)

    def __repr__(self) -> str:
        return f"Audit({len(self)} candidates)"

    def unscored(self) -> int:
        """How many candidates the budget did not reach to score."""
        return int(np.count_nonzero(self.method == UNSCORED))

    def to_dicts(self) -> list:
        """The rows as JSON-ready dicts (NaN figures of unscored candidates as None)."""

        def floats(col):
            return [None if v != v else v for v in col.tolist()]

        cols = (self.candidate_id, floats(self.cost_before), self.feasible_before.tolist(),
                floats(self.cost_after), floats(self.objective_after), self.flips.tolist(),
                self.feasible.tolist(), floats(self.violation), self.method.tolist(),
                np.round(self.seconds, 6).tolist(), self.decisions_changed.tolist())
        issues = self.encoding_issues
        return [{"candidate_id": cid, "cost_before": c0, "feasible_before": f0, "cost": c1,
                 "objective": o1, "flips": fl, "feasible": f1, "violation": v1, "method": m,
                 "seconds": sec, "decisions_changed": dc,
                 "encoding_issues": [{"decision": d, "how": h} for d, h in issues.get(k, [])]}
                for k, (cid, c0, f0, c1, o1, fl, f1, v1, m, sec, dc) in enumerate(zip(*cols))]


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
    none is feasible, the least-violating assignment found. ``audit`` (an :class:`Audit`;
    a list of :class:`AuditRow` given here is converted) has one row per candidate in
    library order. ``scaling_error`` is the largest
    absolute error made when CP-SAT coefficients were scaled to integers
    (0.0 when no scaling was needed or CP-SAT did not run); "optimal" means
    optimal for the scaled model, so within that error per coefficient.
    """

    status: str
    best: Solution
    audit: Audit
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

    def __post_init__(self):
        if not isinstance(self.audit, Audit):
            self.audit = Audit.from_rows(self.audit)

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
            "audit": self.audit.to_dicts(),
            "pareto": [{"cost": num(p.cost), "flips": int(p.flips), "candidate_id": p.candidate_id,
                        "method": p.method} for p in self.pareto],
            "conflict": None if self.conflict is None else self.conflict.to_dict(),
            "alternatives": [a.to_dict() for a in self.alternatives],
        }
