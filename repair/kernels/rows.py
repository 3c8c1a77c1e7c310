"""The violation of one hard row, shared by the greedy and annealing kernels."""

from __future__ import annotations

import numba as nb

__all__ = ["row_viol"]


@nb.njit(_nrt=False, no_cpython_wrapper=True, no_cfunc_wrapper=True)
def row_viol(act, lo, hi, tol):
    """How far ``act`` lies outside [lo, hi], 0 within ``tol`` of it: float64. (An inner
    kernel: called from kernels only; see :mod:`flipfix.repair.solvers.greedy.jit`.)"""
    v = 0.0
    if act < lo:
        v = lo - act
    elif act > hi:
        v = act - hi
    return v if v > tol else 0.0
