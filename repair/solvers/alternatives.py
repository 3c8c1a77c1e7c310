"""Alternatives: a few good feasible answers that differ meaningfully, cheapest first.

A planner shown one answer cannot weigh it; shown three that differ, each with its cost,
they can choose. :func:`pick_alternatives` returns up to ``k`` feasible assignments,
pairwise at least ``distance`` apart, by objective (cost + flip price per flip from the
answer's source candidate):

* distance in bits (Hamming), or with ``by_decisions`` in decisions whose value differs
  (the problem must declare decisions; codes are compared as decoded values);
* first from what the repair already found (every feasible attempt, best first: a
  greedy pick of the cheapest one far enough from those picked);
* then, while fewer than ``k`` and time is left, from CP-SAT: the late model plus, for
  each answer picked, "at least ``distance`` away from it" (bits:
  ``sum_i |x_i - a_i| >= d``; decisions: an indicator per decision that may be 1 only
  when one of its bits differs, their sum >= d), minimising the same objective; an
  infeasible model means no further answer that far away exists.

Each alternative names its source candidate: the library candidate nearest to it (ties:
the one whose repair produced it), with the flips and decisions changed from it.
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np

from flipfix.repair.errors import InputError
from flipfix.repair.lowering.compiled import Compiled

__all__ = ["Alternative", "pick_alternatives", "check_alternatives", "MAX_ALTERNATIVES"]

MAX_ALTERNATIVES = 20


@dataclass
class Alternative:
    """One feasible answer: ``x`` int8 (n,) 0/1; ``source`` its nearest library candidate
    (index), ``flips`` the Hamming distance from it, ``decisions_changed`` the decisions
    whose value differs from it; ``distance_to_previous`` the distance (bits or decisions,
    as asked) to the nearest cheaper alternative (0 for the first); ``method`` where it
    came from ("repair" or "cpsat")."""

    x: np.ndarray
    cost: float
    objective: float
    source: int
    flips: int
    decisions_changed: int
    distance_to_previous: int
    method: str
    candidate_id: str = ""  # the source's id (filled by the caller that knows the ids)
    assignment: dict | None = None  # {label: value} in the caller's vartype (likewise)

    def to_dict(self) -> dict:
        """JSON-ready form (inside the repair result's)."""
        out = {"candidate_id": self.candidate_id, "cost": float(self.cost),
               "objective": float(self.objective), "flips": int(self.flips),
               "decisions_changed": int(self.decisions_changed),
               "distance_to_previous": int(self.distance_to_previous), "method": self.method}
        if self.assignment is not None:
            out["assignment"] = {str(k) if not isinstance(k, int) else k: int(v)
                                 for k, v in self.assignment.items()}
        return out


def check_alternatives(*, alternatives, alternative_distance, alternatives_by) -> None:
    """Validate the options; errors name the option."""
    if isinstance(alternatives, bool) or not isinstance(alternatives, int) or not (
            0 <= alternatives <= MAX_ALTERNATIVES):
        raise InputError("alternatives", f"must be a whole number from 0 to {MAX_ALTERNATIVES}, "
                                         f"got {alternatives!r}")
    if isinstance(alternative_distance, bool) or not isinstance(alternative_distance, int) or \
            alternative_distance < 1:
        raise InputError("alternative_distance", f"must be a whole number >= 1, got "
                                                 f"{alternative_distance!r}")
    if alternatives_by not in ("flips", "decisions"):
        raise InputError("alternatives_by", f"must be 'flips' or 'decisions', got "
                                            f"{alternatives_by!r}")


class _Distance:
    """Distances between assignments, in bits or in decisions."""

    def __init__(self, compiled: Compiled, by_decisions: bool):
        self.problem = compiled.problem
        self.by_decisions = by_decisions

    def codes(self, X: np.ndarray) -> np.ndarray:
        """What the distance compares: the bits, or decoded decision values (int64 (K, D))."""
        if not self.by_decisions:
            return np.asarray(X, dtype=np.int8)
        from flipfix.repair.model.encodings import decode_indices

        return decode_indices(self.problem, np.asarray(X, dtype=np.int8))

    def between(self, a: np.ndarray, B: np.ndarray) -> np.ndarray:
        """Distance of row-codes ``B`` (K, m) from code ``a`` (m,): int64 (K,)."""
        return (B != a[None, :]).sum(axis=1).astype(np.int64)


def pick_alternatives(compiled: Compiled, X0: np.ndarray, pool: np.ndarray, *, k: int,
                      distance: int = 1, by_decisions: bool = False, flip_price: float = 0.0,
                      max_flips: int | None = None, origins: np.ndarray | None = None,
                      time_limit: float = 1.0, seed: int = 0, workers: int = 1,
                      cancel=None) -> list[Alternative]:
    """Up to ``k`` feasible answers pairwise at least ``distance`` apart, cheapest first.

    ``X0`` int8 (K, n): the library; ``pool`` int8 (P, n): answers already found (any
    order; infeasible ones are skipped), ``origins`` int64 (P,) the candidate each came from
    (ties of the nearest candidate go to it). ``max_flips``: an answer farther than that
    from its source is not taken. ``time_limit`` (s) bounds the CP-SAT part.
    """
    t0 = time.perf_counter()
    if by_decisions and not compiled.problem.decisions:
        raise InputError("alternatives_by", "the problem declares no decisions")
    if k <= 0:
        return []
    dist = _Distance(compiled, by_decisions)
    X0 = np.asarray(X0, dtype=np.int8)
    pool = np.asarray(pool, dtype=np.int8).reshape(-1, compiled.n)
    if origins is None:
        origins = np.full(pool.shape[0], -1, dtype=np.int64)
    picked: list[Alternative] = []
    codes: list[np.ndarray] = []

    def consider(x: np.ndarray, origin: int, method: str) -> bool:
        alt = _score(compiled, X0, x, origin, flip_price, method)
        if alt is None or (max_flips is not None and alt.flips > max_flips):
            return False
        c = dist.codes(x[None, :])[0]
        if codes:
            d = dist.between(c, np.vstack(codes))
            if d.min() < distance:
                return False
            alt.distance_to_previous = int(d.min())
        picked.append(alt)
        codes.append(c)
        return True

    if pool.shape[0]:  # by objective from the candidate each came from; scored lazily
        _uniq, first = np.unique(pool, axis=0, return_index=True)
        first = np.sort(first)
        ev = compiled.evaluate(pool[first])
        own = np.where(origins[first] >= 0, origins[first], 0)
        flips = (pool[first] != X0[own]).sum(axis=1)
        key = ev.cost + flip_price * flips
        for j in np.lexsort((flips, key)).tolist():
            if len(picked) >= k:
                break
            if ev.feasible[j]:
                consider(pool[first[j]], int(origins[first[j]]), "repair")
    if len(picked) < k and (cancel is None or not cancel.is_set()):
        _fill(compiled, X0, picked, consider, k=k, distance=distance, by_decisions=by_decisions,
              flip_price=flip_price, deadline=t0 + time_limit, seed=seed, workers=workers,
              cancel=cancel)
    picked.sort(key=lambda a: (a.objective, a.flips))
    _distances(picked, [dist.codes(a.x[None, :])[0] for a in picked], dist)
    return picked[:k]


def _distances(picked, codes, dist) -> None:
    """``distance_to_previous`` in the final (cheapest first) order."""
    for j, a in enumerate(picked):
        a.distance_to_previous = 0 if j == 0 else int(dist.between(codes[j], np.vstack(codes[:j])).min())


def _score(compiled: Compiled, X0, x, origin: int, flip_price: float, method: str):
    """An :class:`Alternative` of feasible ``x`` (None when infeasible)."""
    ev = compiled.evaluate(x[None, :])
    if not bool(ev.feasible[0]):
        return None
    d = (X0 != x[None, :]).sum(axis=1)
    src = origin if 0 <= origin < X0.shape[0] and d[origin] == d.min() else int(np.argmin(d))
    changed = 0
    if compiled.problem.decisions:
        from flipfix.repair.model.encodings import decode_indices

        M = decode_indices(compiled.problem, np.vstack([X0[src], x]))
        changed = int(((M[0] != M[1]) | (M[0] < 0)).sum())
    cost = float(ev.cost[0])
    return Alternative(x.copy(), cost, cost + flip_price * int(d[src]), src, int(d[src]),
                       changed, 0, method)


def _fill(compiled, X0, picked, consider, *, k, distance, by_decisions, flip_price, deadline,
          seed, workers, cancel) -> None:
    """More alternatives from CP-SAT, each at least ``distance`` from every one picked."""
    from ortools.sat.python import cp_model

    from flipfix.repair.model.encodings import decision_bits
    from flipfix.repair.solvers.cpsat import LateModel

    if time.perf_counter() >= deadline:
        return
    model = LateModel(compiled)
    center = X0[picked[0].source] if picked else None
    bits = [decision_bits(compiled.problem, d) for d in compiled.problem.decisions]
    tries = 0
    while len(picked) < k and tries < 2 * k:
        tries += 1
        left = deadline - time.perf_counter()
        if left <= 0.01 or (cancel is not None and cancel.is_set()):
            return
        m = model.model.clone()
        xs = [m.get_bool_var_from_proto_index(v.index) for v in model.x]
        weighted = cp_model.LinearExpr.weighted_sum
        for a in picked:  # |x_i - a_i| = (1 - 2 a_i) x_i + a_i
            ax = np.asarray(a.x, dtype=np.int64)
            if not by_decisions:  # Hamming distance from a: sum_i |x_i - a_i| >= d
                m.add(weighted(xs, (1 - 2 * ax).tolist()) >= int(distance - ax.sum()))
                continue
            changed = []
            for idx in bits:  # c_j = 1 only when a bit of decision j differs from a
                c = m.new_bool_var("")
                sub = ax[idx]
                m.add(weighted([xs[i] for i in idx.tolist()] + [c],
                               (1 - 2 * sub).tolist() + [-1]) >= -int(sub.sum()))
                changed.append(c)
            m.add(cp_model.LinearExpr.sum(changed) >= distance)
        idx, coef, const_units, _err, _s = model._objective_terms(center, flip_price)
        m.minimize(weighted([m.get_int_var_from_proto_index(int(i)) for i in idx],
                            coef.tolist()) + const_units)
        _solver, status, x = model._run(m, t0=time.perf_counter(), time_limit=left,
                                        workers=workers, seed=seed + tries, cancel=cancel)
        if x is None:  # infeasible: nothing further that far away; unknown: out of time
            return
        if not consider(np.asarray(x, dtype=np.int8), -1, "cpsat"):
            return  # the solver's answer broke a check (max_flips): stop rather than loop
