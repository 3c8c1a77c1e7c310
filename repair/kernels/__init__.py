"""Compiled numerical kernels shared by the solvers: energies, scores, annealing sweeps, a
row's violation, batching."""

from flipfix.repair.kernels.cache import drop_stale as _drop_stale

# before any kernel of this folder loads its cached machine code: the cached callers hold
# their callees' code (kernels.rows in metropolis), which numba alone would not refresh
_drop_stale()
