"""How the search kernels are compiled (numba), and what keeps their compilation short.

Three decorators (and :data:`counted_kernel`, :data:`counted_entry`: the first two with
reference counting, for kernels that allocate or assign slices):

* :data:`kernel` for inner kernels, called only from other kernels: no reference counting
  (they allocate nothing; their callers pass every array in and keep it alive, and the
  counting's calls cost more than the arithmetic in loops over small helpers) and no
  Python or C wrappers (nothing calls them from Python).
* :data:`inline` for an inner kernel with one call site in a hot loop, where a call
  (which passes every array of every bundle, some 60) would cost more than the work:
  numba copies its body into that site.
* :data:`entry` for the kernels Python calls: no reference counting either (the driver
  allocates their scratch arrays with numpy), the GIL released so that the driver's
  threads descend parts of a chunk at once, and only the Python wrapper (no C-callable
  one). The wrapper unboxes every array of every bundle and its code grows faster than
  the array count (a kernel of 90 arrays in bundles took ~2 s to compile, one of 10
  arrays ~0.5 s), so the Python-facing kernels take no more arrays than they need.

What numba compiles is what it links: every kernel is compiled once on its own, then its
code is linked into each caller, optimised again there (LLVM inlines the small ones)
and emitted once per Python-facing kernel. So:

* kernels take a few bundles (NamedTuples of arrays, :mod:`flipfix.repair.kernels.bundles`
  and the solvers' own), the same types at every call site: one specialisation each.
  A literal argument (``f(a, 0)``, or a variable first set to a constant and passed from
  a loop) is a type of its own to numba and compiles the callee once more: such
  arguments are written ``np.int64(0)``; the driver hands the kernels C-ordered,
  writeable arrays only (a read-only array is another type);
* numba's inlining (:data:`inline`) only at single hot call sites: it copies the
  callee's IR into each site and types it again, which cost more than compiling the
  callee once on its own (every helper inlined: +30 % compile time);
* the Python-facing kernels do the work themselves: no wrapper that allocates and calls
  a core (that wrapper's library would hold all of the core's code again).

Only the Python-facing kernels are cached (beside the module, in ``__pycache__``): their
machine code holds their callees'. numba keys a cached kernel by its own source file,
while these kernels call into their sibling modules:
:func:`flipfix.repair.kernels.cache.drop_stale` clears the package's caches when
any of its sources changed.
"""

from __future__ import annotations

import numba as nb

__all__ = ["kernel", "entry", "inline", "counted_kernel", "counted_entry", "copy_into"]

#: Inner kernels: no reference counting, no Python/C entry wrappers, not cached alone.
kernel = nb.njit(_nrt=False, no_cpython_wrapper=True, no_cfunc_wrapper=True)
#: Inner kernels with one call site in a hot loop: inlined there by numba.
inline = nb.njit(_nrt=False, inline="always")
#: Kernels called from Python: no reference counting, the GIL released, cached.
entry = nb.njit(cache=True, _nrt=False, nogil=True, no_cfunc_wrapper=True)
#: :data:`kernel` and :data:`entry` with reference counting, for kernels that allocate
#: (``np.empty``) or assign slices (``a[:] = b``, which may copy its source first).
counted_kernel = nb.njit(no_cpython_wrapper=True, no_cfunc_wrapper=True)
counted_entry = nb.njit(cache=True, nogil=True, no_cfunc_wrapper=True)


@kernel
def copy_into(dst, src):
    """dst[:] = src (same length), as a loop: a slice assignment compiles numba's
    shape-mismatch error path and its message formatting, seconds of every cold compile."""
    for i in range(dst.size):
        dst[i] = src[i]
