"""Greedy repair: batched steepest descent by single flips and pair moves.

For every candidate, independently and deterministically:

1. pin the fixed variables;
2. restore feasibility with the least cost: while a hard row is violated, take
   the flip (or, when no single flip helps, the pair of flips) with the lowest
   objective change per unit of violation removed (single flips from two tournament
   trees over the violated rows' members, re-keyed where a flip changes something);
3. descend: take the feasible single flip with the most negative objective
   change; when none improves, try pair moves (one variable up, one down, both in
   a row that blocks some single flip) so tight and equality rows can still move;
   stop at a local minimum.

The objective is the compiled QUBO plus the non-linear count penalties plus
``flip_price`` times the Hamming distance from the candidate. ``max_flips``
caps that distance (a hard radius).

Cost per flip is O(degree log n) at worst, independent of n in practice: local fields,
count-penalty term states and row activities are updated only where the flipped
variable appears, and the best flip comes from tournament trees rather than a scan. On
a pure QUBO one tree holds the improving flips (a small heap when a start has few). With
late rows and count penalties, variables are grouped by how a flip moves the long
("wide") structures, one tree per group keyed by the rest of the change, and a step
compares one top per group; with too many groups the kernel scans the free variables
instead.

Modules, one concept each: ``jit`` (how the kernels compile), ``heap`` and ``tournament`` (the selection structures), ``state`` (a
candidate's state and a flip's effect), ``start`` (start-up fields), ``qubo`` (the
pure-QUBO path), ``restore`` (feasibility restore), ``pairs`` (pair moves), ``groups``
(grouped tournament trees), ``layout`` (the general path's arrays per problem),
``general`` (the general path), ``driver`` (chunks, threads, budget; a timer sets the
kernels' stop flag at the deadline).
"""

from __future__ import annotations

from pathlib import Path

from flipfix.repair.kernels import jit as _jit, rows as _rows
from flipfix.repair.kernels.cache import drop_stale

# the package's cached kernels hold the code of its modules and of kernels.rows, compiled
# with the decorators of kernels.jit
drop_stale(Path(__file__).resolve().parent, also=(_rows.__file__, _jit.__file__))

from flipfix.repair.kernels.bundles import objective_tol  # noqa: E402
from flipfix.repair.solvers.greedy.driver import (GreedyOutput,  # noqa: E402
                                                  clamp_fixings, greedy_repair, warm_up)
from flipfix.repair.solvers.greedy.layout import (MAX_GROUP_SHARE, MAX_WIDE,  # noqa: E402
                                                  MIN_GROUPS, WIDE, general_arrays)
from flipfix.repair.solvers.greedy.qubo import SMALL_START, descend_qubo  # noqa: E402
from flipfix.repair.solvers.greedy.start import consensus  # noqa: E402

__all__ = ["GreedyOutput", "clamp_fixings", "greedy_repair", "descend_qubo", "objective_tol", "warm_up",
           "consensus", "general_arrays", "WIDE", "MAX_WIDE", "MAX_GROUP_SHARE", "MIN_GROUPS",
           "SMALL_START"]
