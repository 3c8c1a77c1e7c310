"""Readers for the public benchmark formats kept in ``shared/benchmarks``.

* Beasley OR-Library BQP (BiqMac sparse form): ``n m`` then ``i j w`` (1-based, i <= j);
  minimise sum_i w_ii x_i + sum_{i<j} 2 w_ij x_i x_j.
* Billionnet-Soutif quadratic knapsack: name, n, linear profits, upper triangle of
  pair profits, a blank line, constraint type 0 (<=), capacity, weights;
  maximise profit subject to sum w_i x_i <= C. Read here as a minimisation
  (energy = -profit) plus the capacity as a separate constraint.
* Gset Max-Cut: ``n m`` then ``i j w``; read as the QUBO whose minimum is minus the cut.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from flipfix.repair.model.constraints import LinearConstraint
from flipfix.repair.errors import InputError
from flipfix.repair.model.problem import Problem

__all__ = ["read_bqp", "read_qkp", "read_gset", "Knapsack"]


def _triples(path) -> tuple[int, list]:
    """``n m`` then ``i j w`` lines (1-based) -> (n, [(i, j, w)] 0-based)."""
    rows = Path(path).read_text().split("\n")
    n = int(rows[0].split()[0])
    out = []
    for line in rows[1:]:
        parts = line.split()
        if len(parts) >= 3:
            out.append((int(parts[0]) - 1, int(parts[1]) - 1, float(parts[2])))
    return n, out


def read_bqp(path) -> Problem:
    """Beasley BQP instance -> Problem with labels 0..n-1 (energy = the instance's objective)."""
    n, triples = _triples(path)
    lin = np.zeros(n)
    quad = []
    for i, j, w in triples:
        if i == j:
            lin[i] += w
        else:
            quad.append((i, j, 2.0 * w))
    return Problem.from_terms(list(enumerate(lin)), quad, labels=range(n))


@dataclass
class Knapsack:
    """A quadratic knapsack: ``problem`` has energy = -profit; ``capacity`` is the hard part."""

    name: str
    problem: Problem
    weights: np.ndarray
    capacity: float

    @property
    def constraint(self) -> LinearConstraint:
        return LinearConstraint({i: float(w) for i, w in enumerate(self.weights)}, "<=",
                                float(self.capacity), name="capacity")

    def profit(self, X: np.ndarray) -> np.ndarray:
        return -self.problem.energies(X)


def read_qkp(path) -> Knapsack:
    """Billionnet-Soutif instance -> Knapsack (minimisation form)."""
    text = Path(path).read_text()
    head, _, tail = text.partition("Comments")
    tokens = head.split()
    name, n = tokens[0], int(tokens[1])
    vals = [float(t) for t in tokens[2:]]
    lin = np.asarray(vals[:n])
    pos = n
    quad = []
    for i in range(n - 1):
        for j in range(i + 1, n):
            p = vals[pos]
            pos += 1
            if p:
                quad.append((i, j, -p))
    ctype = int(vals[pos])
    if ctype != 0:
        raise InputError(str(path), f"constraint type {ctype} is not 0 (<=)")
    capacity = vals[pos + 1]
    weights = np.asarray(vals[pos + 2: pos + 2 + n])
    if weights.size != n:
        raise InputError(str(path), f"expected {n} weights, got {weights.size}")
    prob = Problem.from_terms(list(enumerate(-lin)), quad, labels=range(n))
    return Knapsack(name, prob, weights, capacity)


def read_gset(path) -> Problem:
    """Gset graph -> QUBO with E(x) = -cut(x): sum over edges w (2 x_i x_j - x_i - x_j)."""
    n, triples = _triples(path)
    lin = np.zeros(n)
    quad = []
    for i, j, w in triples:
        lin[i] -= w
        lin[j] -= w
        quad.append((i, j, 2.0 * w))
    return Problem.from_terms(list(enumerate(lin)), quad, labels=range(n))
