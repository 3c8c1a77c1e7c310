"""A small roster with one-hot decisions, shared by the audit tests (construction of our own).

Nurse i takes one of SHIFTS; ``pref[i, s]`` (integers 0..3, seeded) is what shift s costs
nurse i, and two nurses on the same working shift cost CROWD. Integer costs leave ties, so
some one-step decision moves cost exactly 0 (free decisions at epsilon 0). The library is
the ``k`` cheapest valid plans, found by enumerating every plan (4^5 = 1024).
"""

from __future__ import annotations

import itertools

import numpy as np

from flipfix.repair import Problem
from flipfix.repair.model.encodings import pair_terms, unary_terms
from flipfix.repair.model.problem import Decision

SHIFTS = ("early", "late", "night", "off")
CROWD = 2.0


def roster(nurses: int = 5, seed: int = 1) -> tuple[Problem, np.ndarray]:
    """(problem, pref float64 (nurses, len(SHIFTS)))."""
    rng = np.random.default_rng(seed)
    pref = rng.integers(0, 4, size=(nurses, len(SHIFTS))).astype(np.float64)
    decs = [Decision(f"n{i}", "one_hot", tuple(f"n{i}_{s}" for s in SHIFTS), SHIFTS)
            for i in range(nurses)]
    lin: dict = {}
    quad: dict = {}
    for d, row in zip(decs, pref):
        lin.update(unary_terms(d, row)[0])
    crowd = CROWD * np.diag([1.0, 1.0, 1.0, 0.0])  # "off" is never crowded
    for a, b in itertools.combinations(decs, 2):
        _, q, _ = pair_terms(a, b, crowd)
        quad.update(q)
    labels = [v for d in decs for v in d.variables]
    p = Problem.from_terms(lin, [(u, v, w) for (u, v), w in quad.items()], labels=labels,
                           decisions=decs)
    return p, pref


def roster_energy(plan, pref) -> float:
    """Energy of a plan (value index per nurse), written out from the construction."""
    e = sum(pref[i, s] for i, s in enumerate(plan))
    return e + CROWD * sum(1 for a, b in itertools.combinations(plan, 2) if a == b and a < 3)


def plan_bits(plan, shifts: int = len(SHIFTS)) -> np.ndarray:
    """One-hot bits of a plan, in the problem's label order: int8 (nurses * shifts,)."""
    x = np.zeros(len(plan) * shifts, dtype=np.int8)
    x[[i * shifts + s for i, s in enumerate(plan)]] = 1
    return x


def cheapest_plans(pref, k: int) -> list[tuple]:
    """The k cheapest plans (ties: lexicographic), by enumeration."""
    plans = itertools.product(range(len(SHIFTS)), repeat=pref.shape[0])
    return sorted(plans, key=lambda q: (roster_energy(q, pref), q))[:k]


def free_decisions(plan, pref, eps: float = 0.0) -> int:
    """Decisions of ``plan`` with a move to another value costing <= eps (one-hot: every
    other value is one step away, a pair swap), counted by enumeration of roster_energy."""
    e0 = roster_energy(plan, pref)
    return sum(any(roster_energy(plan[:i] + (s,) + plan[i + 1:], pref) - e0 <= eps
                   for s in range(len(SHIFTS)) if s != plan[i]) for i in range(len(plan)))
