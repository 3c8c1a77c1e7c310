"""How the greedy kernels are compiled (numba), and what keeps their compilation short.

Two decorators:

* :data:`kernel` for inner kernels, called only from other kernels: no reference counting
  (they allocate nothing; their callers pass every array in and keep it alive, and the
  counting's calls cost more than the arithmetic in loops over small helpers) and no
  Python or C wrappers (nothing calls them from Python; a wrapper that unboxes a dozen
  bundles is a large function of its own to optimise and emit).
* :data:`entry` for the kernels Python calls: no reference counting either (the driver
  allocates their scratch arrays with numpy), the GIL released so that the driver's
  threads descend parts of a chunk at once, and only the Python wrapper (no C-callable
  one). A wrapper unboxes every array of every bundle: its code grows faster than the
  array count (a kernel of 90 arrays in bundles took ~2 s to compile with its wrappers,
  one of 10 arrays ~0.5 s), so the Python-facing kernels take no more arrays than they
  need.

Both cache their machine code beside the module (``__pycache__``). What numba compiles
is what it links: every kernel is compiled once on its own, then its code is linked
into each caller, optimised again there (where LLVM inlines the small ones) and emitted
once per Python-facing kernel. So:

* kernels take a few bundles (NamedTuples of arrays, :mod:`flipfix.repair.kernels.bundles`
  and this package's own), the same types at every call site: one specialisation each.
  A literal argument (``f(a, 0)``, or a variable first set to a constant and passed from
  a loop) is a type of its own to numba and compiles the callee once more: such
  arguments are written ``np.int64(0)``;
* numba's own inlining (``inline="always"``) is used only where a kernel has one call
  site in a hot loop (it copies the callee's IR into each site and types it again);
* the Python-facing kernels do the work themselves: no wrapper that allocates and calls
  a core (that wrapper's library would hold all of the core's code again).

numba keys a cached kernel by its own source file only, while these kernels call into
their sibling modules: :func:`flipfix.repair.solvers.greedy.cache.drop_stale` clears the
package's caches when any of its sources changed.
"""

from __future__ import annotations

import numba as nb

__all__ = ["kernel", "entry", "inline"]

#: Inner kernels: no reference counting, no Python/C entry wrappers.
kernel = nb.njit(_nrt=False, no_cpython_wrapper=True, no_cfunc_wrapper=True)
#: Inner kernels with one call site in a hot loop: inlined there by numba.
inline = nb.njit(cache=True, _nrt=False, inline="always")
#: Kernels called from Python: no reference counting, the GIL released.
entry = nb.njit(cache=True, _nrt=False, nogil=True, no_cfunc_wrapper=True)
