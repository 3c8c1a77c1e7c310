"""Robustness profile of every candidate of a library (no late constraint needed).

A candidate sitting in a broad, flat basin has many variables whose single flip
costs (almost) nothing; such a candidate tends to absorb late changes cheaply.
This module measures that, vectorised over the whole library:

* free variables: variables (outside declared decisions) whose single-flip
  energy change is ``<= epsilon`` (default 0; negative changes count too);
* free decisions: integer decisions (one-hot, domain wall; see
  :mod:`flipfix.repair.model.encodings`) that can move to another value at a cost ``<= epsilon``
  (one-hot: the swap of the "on" bit with another bit, a pair flip; domain wall:
  moving the wall one step, a single flip of a wall-edge bit);
* flip-cost spectrum: the sorted single-flip costs, with the number of flips
  costing at most 1 % and 5 % of ``|energy|``;
* diversity: Hamming distance to the best (lowest-energy) candidate and to the
  nearest other candidate.

All energies are in the problem's own units (the energy of the caller's model).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from flipfix.repair.model.candidates import CandidateSet
from flipfix.repair.errors import InputError, nonnegative
from flipfix.repair.model.encodings import codewords as encoder_codewords
from flipfix.repair.model.problem import Decision, Problem

__all__ = [
    "CandidateProfile", "RobustnessReport", "robustness_profile", "free_variable_counts",
    "free_decision_counts", "decision_move_costs", "hamming_to_rows", "nearest_other",
    "codewords", "flip_cost_matrix", "ROUNDOFF", "DENSE_MAX_N",
]

#: Relative round-off allowance when comparing a flip cost to epsilon: a cost
#: counts as ``<= epsilon`` when it is within ``ROUNDOFF * (1 + scale)`` of it,
#: ``scale`` being the sum of the absolute coefficients of the problem (a bound
#: on every local field).
ROUNDOFF = 1e-9


@dataclass
class CandidateProfile:
    """Robustness figures of one candidate (plain data: floats, ints, strings).

    ``spectrum`` lists the n single-flip energy changes in increasing order.
    ``improving`` counts flips that lower the energy (the candidate is not a
    local minimum when it is > 0). ``nearest_other`` is -1 (and
    ``nearest_other_id`` empty) when the library holds a single candidate.
    """

    candidate_id: str
    energy: float
    free_variables: int
    free_decisions: int
    improving: int
    min_flip_cost: float
    within_1pct: int
    within_5pct: int
    distance_to_best: int
    nearest_other: int
    nearest_other_id: str
    spectrum: list = field(default_factory=list)

    def to_dict(self, *, spectrum: bool = True) -> dict[str, Any]:
        d = {
            "candidate_id": self.candidate_id, "energy": float(self.energy),
            "free_variables": int(self.free_variables), "free_decisions": int(self.free_decisions),
            "improving": int(self.improving), "min_flip_cost": float(self.min_flip_cost),
            "within_1pct": int(self.within_1pct), "within_5pct": int(self.within_5pct),
            "distance_to_best": int(self.distance_to_best),
            "nearest_other": int(self.nearest_other), "nearest_other_id": self.nearest_other_id,
        }
        if spectrum:
            d["spectrum"] = [float(v) for v in self.spectrum]
        return d


@dataclass
class RobustnessReport:
    """Profiles of a whole library, in library order."""

    epsilon: float
    best_id: str
    n_variables: int
    n_decisions: int
    profiles: list

    def column(self, name: str) -> list:
        """One field of every profile, in library order (e.g. ``"free_variables"``)."""
        return [getattr(p, name) for p in self.profiles]

    def to_dict(self, *, spectrum: bool = True) -> dict[str, Any]:
        return {
            "epsilon": float(self.epsilon), "best_id": self.best_id,
            "n_variables": int(self.n_variables), "n_decisions": int(self.n_decisions),
            "profiles": [p.to_dict(spectrum=spectrum) for p in self.profiles],
        }


# ----------------------------------------------------------------- helpers
def _as_X(problem: Problem, X: np.ndarray | CandidateSet, field: str) -> np.ndarray:
    if isinstance(X, CandidateSet):
        X = X.X
    X = np.asarray(X)
    if X.ndim == 1:
        X = X[None, :]
    if X.ndim != 2 or X.shape[1] != problem.n:
        raise InputError(field, f"must have shape (K, {problem.n}), got {X.shape}")
    if X.size and not np.all((X == 0) | (X == 1)):
        raise InputError(field, "must hold 0/1 values (internal form)")
    return X.astype(np.int8, copy=False)


def _tolerance(problem: Problem) -> float:
    scale = float(np.abs(problem.linear).sum() + np.abs(problem.data).sum() / 2.0)
    return ROUNDOFF * (1.0 + scale)


#: Largest n for which single-flip costs use a dense (n, n) coupling matrix.
DENSE_MAX_N = 2048


def _costs_and_energies(problem: Problem, X: np.ndarray, *,
                        block: int = 512) -> tuple[np.ndarray, np.ndarray]:
    """Single-flip costs float64 (K, n) and energies float64 (K,) of a whole library.

    Small models (n <= DENSE_MAX_N) use one dense product: local fields
    ``F = X @ J + h``, costs ``(1 - 2X) * F`` and energies
    ``offset + sum_i x_i (h_i + F_i) / 2``; larger ones call
    ``problem.flip_costs`` and ``problem.energies`` on blocks of rows.
    """
    K, n = X.shape
    if n <= DENSE_MAX_N:
        J = np.zeros((n, n))
        rows = np.repeat(np.arange(n), np.diff(problem.indptr))
        J[rows, problem.indices] = problem.data
        Xf = X.astype(np.float64)
        F = Xf @ J + problem.linear
        return (1.0 - 2.0 * Xf) * F, problem.offset + 0.5 * (Xf * (F + problem.linear)).sum(axis=1)
    costs = np.empty((K, n))
    energy = np.empty(K)
    for start in range(0, K, block):
        costs[start:start + block] = problem.flip_costs(X[start:start + block])
        energy[start:start + block] = problem.energies(X[start:start + block])
    return costs, energy


def flip_cost_matrix(problem: Problem, X: np.ndarray) -> np.ndarray:
    """``problem.flip_costs(X)`` float64 (K, n), computed for a whole library."""
    return _costs_and_energies(problem, X)[0]


def free_variable_counts(problem: Problem, X, *, epsilon: float = 0.0,
                         costs: np.ndarray | None = None) -> np.ndarray:
    """Number of variables whose single flip costs ``<= epsilon``: int64 (K,).

    Bits of declared decisions are left out: a single flip of a one-hot bit is
    never a valid move, and decision moves are counted by
    :func:`free_decision_counts`. ``X`` is int8 (K, n) 0/1 (or a
    :class:`CandidateSet`); ``costs`` may pass precomputed
    ``problem.flip_costs(X)`` float64 (K, n).
    """
    X = _as_X(problem, X, "candidates")
    eps = nonnegative(epsilon, "epsilon")
    c = flip_cost_matrix(problem, X) if costs is None else costs
    return ((c <= eps + _tolerance(problem)) & _plain_bits(problem)).sum(axis=1).astype(np.int64)


def _plain_bits(problem: Problem) -> np.ndarray:
    """bool (n,): True for variables that belong to no declared decision."""
    mask = np.ones(problem.n, dtype=bool)
    for d in problem.decisions:
        mask[[problem.index[v] for v in d.variables]] = False
    return mask


def codewords(decision: Decision) -> np.ndarray:
    """Bit patterns of a decision's values: int8 (k, m), row v encodes ``values[v]``
    (the encoder's convention: :func:`flipfix.repair.model.encodings.codewords`)."""
    return np.asarray(encoder_codewords(decision), dtype=np.int8)


def decision_move_costs(problem: Problem, X, decision: Decision, *,
                        costs: np.ndarray | None = None) -> np.ndarray:
    """Energy change of moving a decision to each of its values: float64 (K, k).

    Only the elementary moves that keep the encoding valid count (one-hot: swap
    the "on" bit with another, a pair flip; domain wall: move the wall one step,
    a single flip); every other entry, the current value, and rows whose bits
    are not a valid code word, are ``+inf``.
    """
    X = _as_X(problem, X, "candidates")
    c = flip_cost_matrix(problem, X) if costs is None else costs
    cols = np.asarray([problem.index[v] for v in decision.variables], dtype=np.int64)
    words = codewords(decision)  # (k, m)
    bits = X[:, cols]  # (K, m)
    diff = bits[:, None, :] != words[None, :, :]  # (K, k, m)
    nd = diff.sum(axis=2)  # (K, k)
    valid = (nd == 0).any(axis=1)
    out = np.full(nd.shape, np.inf)
    sub = c[:, cols]  # (K, m) single-flip costs of the decision's bits
    # a move keeps the encoding valid: one-hot swaps two bits, domain wall moves one step
    reach = 2 if decision.encoding == "one_hot" else 1
    one = valid[:, None] & (nd == 1) & (reach == 1)
    if one.any():
        out = np.where(one, (diff * sub[:, None, :]).sum(axis=2), out)
    two = valid[:, None] & (nd == 2) & (reach == 2)
    if two.any():
        # pair flip (a, b): d_a + d_b + J_ab * (1 - 2 x_a) * (1 - 2 x_b)
        m = cols.size
        Jsub = np.zeros((m, m))
        for a in range(m):
            i = cols[a]
            lo, hi = problem.indptr[i], problem.indptr[i + 1]
            nbr = problem.indices[lo:hi]
            where = {int(j): w for j, w in zip(nbr, problem.data[lo:hi])}
            for b in range(m):
                Jsub[a, b] = where.get(int(cols[b]), 0.0)
        s = 1.0 - 2.0 * bits.astype(np.float64)  # (K, m)
        single = (diff * sub[:, None, :]).sum(axis=2)
        dfl = diff.astype(np.float64) * s[:, None, :]  # (K, k, m) signed flip indicator
        pair = 0.5 * np.einsum("kva,ab,kvb->kv", dfl, Jsub, dfl)
        out = np.where(two, single + pair, out)
    return out


def free_decision_counts(problem: Problem, X, *, epsilon: float = 0.0,
                         costs: np.ndarray | None = None) -> np.ndarray:
    """Number of decisions with a valid move costing ``<= epsilon``: int64 (K,)."""
    X = _as_X(problem, X, "candidates")
    eps = nonnegative(epsilon, "epsilon")
    c = flip_cost_matrix(problem, X) if costs is None else costs
    tol = _tolerance(problem)
    count = np.zeros(X.shape[0], dtype=np.int64)
    for d in problem.decisions:
        mv = decision_move_costs(problem, X, d, costs=c)
        count += (mv <= eps + tol).any(axis=1)
    return count


def hamming_to_rows(X: np.ndarray, R: np.ndarray) -> np.ndarray:
    """Hamming distances between every row of X (K, n) and of R (L, n): int64 (K, L)."""
    # float32 products of 0/1 rows are exact while n < 2**24
    dt = np.float32 if X.shape[1] < 2**24 else np.float64
    Xf = X.astype(dt)
    Rf = R.astype(dt)
    d = (X.sum(axis=1, dtype=np.int64)[:, None] + R.sum(axis=1, dtype=np.int64)[None, :]
         - 2.0 * (Xf @ Rf.T).astype(np.float64))
    return np.rint(d).astype(np.int64)


def nearest_other(X: np.ndarray, *, block: int = 1024) -> tuple[np.ndarray, np.ndarray]:
    """Distance to, and index of, the nearest other row of X (K, n): (int64 (K,), int64 (K,)).

    Computed in blocks of rows (memory O(block * K)); ties go to the lowest
    index; both are -1 when K == 1.
    """
    K = X.shape[0]
    dist = np.full(K, -1, dtype=np.int64)
    idx = np.full(K, -1, dtype=np.int64)
    if K < 2:
        return dist, idx
    for start in range(0, K, block):
        stop = min(K, start + block)
        D = hamming_to_rows(X[start:stop], X)
        D[np.arange(stop - start), np.arange(start, stop)] = np.iinfo(np.int64).max
        j = np.argmin(D, axis=1)
        idx[start:stop] = j
        dist[start:stop] = D[np.arange(stop - start), j]
    return dist, idx


# --------------------------------------------------------------- the profile
def robustness_profile(problem: Problem, candidates: CandidateSet, *,
                       epsilon: float = 0.0, spectrum: bool = True) -> RobustnessReport:
    """Robustness figures of every candidate (see the module docstring).

    The best candidate is the one of lowest energy (ties: first in library order).
    ``spectrum=False`` leaves each profile's ``spectrum`` empty (K * n floats
    are many for a large library; the summary counts are always computed).
    """
    if not isinstance(candidates, CandidateSet):
        raise InputError("candidates", f"expected a CandidateSet, got {type(candidates).__name__}")
    eps = nonnegative(epsilon, "epsilon")
    X = _as_X(problem, candidates.X, "candidates")
    K = X.shape[0]
    costs, energy = _costs_and_energies(problem, X)  # (K, n), (K,)
    tol = _tolerance(problem)
    free = ((costs <= eps + tol) & _plain_bits(problem)).sum(axis=1)
    free_dec = free_decision_counts(problem, X, epsilon=eps, costs=costs)
    improving = (costs < -tol).sum(axis=1)
    ordered = np.sort(costs, axis=1)
    absE = np.abs(energy)[:, None]
    w1 = (costs <= 0.01 * absE + tol).sum(axis=1)
    w5 = (costs <= 0.05 * absE + tol).sum(axis=1)
    best = int(np.argmin(energy)) if K else 0
    to_best = hamming_to_rows(X, X[best:best + 1])[:, 0]
    near_d, near_i = nearest_other(X)
    min_cost = ordered[:, 0] if problem.n else np.full(K, np.inf)
    profiles = [
        CandidateProfile(
            candidate_id=candidates.ids[k], energy=float(energy[k]),
            free_variables=int(free[k]), free_decisions=int(free_dec[k]),
            improving=int(improving[k]), min_flip_cost=float(min_cost[k]),
            within_1pct=int(w1[k]), within_5pct=int(w5[k]),
            distance_to_best=int(to_best[k]), nearest_other=int(near_d[k]),
            nearest_other_id=candidates.ids[near_i[k]] if near_i[k] >= 0 else "",
            spectrum=ordered[k].tolist() if spectrum else [],
        )
        for k in range(K)
    ]
    return RobustnessReport(epsilon=eps, best_id=candidates.ids[best], n_variables=problem.n,
                            n_decisions=len(problem.decisions), profiles=profiles)
