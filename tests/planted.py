"""The planted model shared by the stress and audit tests (construction of our own).

Block b has a switch z_b and a group y_b of g_b variables:
    E_b = -R z_b + sum_i (-ALPHA y_bi + P z_b y_bi)
Narrow state (z=1, y=0): E = -R; every flip costs >= R (z) or P - ALPHA (y): a narrow optimum.
Broad state (z=0, y=1): E = -ALPHA g; each y flip costs only ALPHA (a broad minimum), the switch
costs -R + P g > 0. ``rigid`` extra variables with bias -5 (always 1) cost 5 to flip in both.
"""

from __future__ import annotations

import numpy as np

from flipfix.repair import Problem

R, ALPHA, P = 10.0, 0.5, 20.0


def planted(groups, *, rigid: int) -> Problem:
    lin, quad = {}, []
    for b, g in enumerate(groups):
        lin[f"z{b}"] = -R
        for i in range(g):
            lin[f"y{b}_{i}"] = -ALPHA
            quad.append((f"z{b}", f"y{b}_{i}", P))
    for j in range(rigid):
        lin[f"r{j}"] = -5.0
    return Problem.from_terms(lin, quad)


def state(p: Problem, groups, broad, *, rigid: int) -> np.ndarray:
    """The assignment with block b broad (y on) where ``broad[b]``, else narrow (z on)."""
    x = np.zeros(p.n, np.int8)
    for b, g in enumerate(groups):
        if broad[b]:
            x[[p.index[f"y{b}_{i}"] for i in range(g)]] = 1
        else:
            x[p.index[f"z{b}"]] = 1
    x[[p.index[f"r{j}"] for j in range(rigid)]] = 1
    return x
