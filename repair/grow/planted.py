"""A planted model for growing: blocks with a narrow ground state and a broad, higher state.

Block b has three core bits v_1..v_3 and ``slack`` bits z_1..z_k, with the energy (0/1
bits), c = barrier + delta / 3:

    E_b = c * sum_a v_a - barrier * sum_{a<b} v_a v_b + penalty * sum_j z_j * (3 - sum_a v_a)

* narrow state (v = 0, z = 0): energy 0, the ground state of the block; a core flip costs
  c, a slack flip 3 * penalty: no free move, and no pair of flips is cheaper than
  barrier + 2 delta / 3 (crossing needs three core flips);
* broad state (v = 1, z = 0): energy 3c - 3 barrier = ``delta``; every z_j flips at cost 0
  (k free moves; any z with v = 1 has the same energy), a core flip costs
  barrier - delta / 3.

The whole model is the sum over the blocks plus the offset ``-blocks`` (ground energy
``-blocks``, a non-zero reference for a percentage tolerance). A late Hamming penalty of
weight w < penalty on the slack bits is absorbed at no cost by a broad block and costs up to
w per slack bit in a narrow one, which single and pair moves cannot leave: a library of
broad states repairs cheaper, at ``delta`` per block above the narrow optimum. Walking a
block from narrow to broad climbs to c + (c - barrier) = barrier + 2 delta / 3 above where it
started, so an energy cap must leave that room. Invented data, for tests and benchmarks.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from flipfix.repair.errors import InputError, nonnegative
from flipfix.repair.model.problem import Problem

__all__ = ["Planted", "planted_model"]


@dataclass(frozen=True)
class Planted:
    """The model and where its blocks live: ``core`` int64 (B, 3) the columns of each
    block's v bits; ``slack`` int64 (B, k) the columns of its z bits."""

    problem: Problem
    delta: float
    barrier: float
    penalty: float
    core: np.ndarray
    slack: np.ndarray

    @property
    def blocks(self) -> int:
        return int(self.core.shape[0])

    def narrow_state(self) -> np.ndarray:
        """Every block narrow (the ground state): int8 (n,) zeros."""
        return np.zeros(self.problem.n, dtype=np.int8)

    def broad_state(self) -> np.ndarray:
        """Every block broad (v = 1, z = 0): int8 (n,)."""
        x = self.narrow_state()
        x[self.core.ravel()] = 1
        return x

    def broad_blocks(self, X: np.ndarray) -> np.ndarray:
        """bool (K, B): block b of row k is in a broad state (every v = 1), X int8 (K, n)."""
        X = np.asarray(X)
        if X.ndim == 1:
            X = X[None, :]
        return (X[:, self.core] == 1).all(axis=2)


def planted_model(*, blocks: int = 20, slack: int = 4, delta: float = 0.1,
                  barrier: float = 2.0, penalty: float = 2.0) -> Planted:
    """Build the planted model (module docstring); labels ``v{b}_{a}`` and ``z{b}_{j}``."""
    for name, v in (("blocks", blocks), ("slack", slack)):
        if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < 1:
            raise InputError(name, f"must be an integer >= 1, got {v!r}")
    delta = nonnegative(delta, "delta")
    barrier = nonnegative(barrier, "barrier")
    penalty = nonnegative(penalty, "penalty")
    if not 0 < delta < barrier:
        raise InputError("delta", f"must be > 0 and below barrier={barrier}, got {delta}")
    if penalty <= 0:
        raise InputError("penalty", f"must be > 0, got {penalty}")
    c = barrier + delta / 3.0
    linear, quad, labels = {}, [], []
    for b in range(blocks):
        core = [f"v{b}_{a}" for a in range(3)]
        for v in core:
            labels.append(v)
            linear[v] = c
        quad += [(core[0], core[1], -barrier), (core[0], core[2], -barrier),
                 (core[1], core[2], -barrier)]
        for j in range(slack):
            z = f"z{b}_{j}"
            labels.append(z)
            linear[z] = 3.0 * penalty
            quad += [(v, z, -penalty) for v in core]
    problem = Problem.from_terms(linear, quad, offset=-float(blocks), labels=labels)
    width = 3 + slack
    first = np.arange(blocks, dtype=np.int64) * width
    core_cols = first[:, None] + np.arange(3, dtype=np.int64)[None, :]
    slack_cols = first[:, None] + 3 + np.arange(slack, dtype=np.int64)[None, :]
    return Planted(problem, delta, barrier, penalty, core_cols, slack_cols)
