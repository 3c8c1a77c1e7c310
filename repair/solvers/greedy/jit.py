"""The greedy kernels' decorators: those of :mod:`flipfix.repair.kernels.jit` (where their
conventions are explained), named here for the package's modules."""

from __future__ import annotations

from flipfix.repair.kernels.jit import entry, inline, kernel

__all__ = ["kernel", "entry", "inline"]
