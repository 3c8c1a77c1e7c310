"""Row chunking for batch computations, so temporaries stay small for large libraries, and
the threads that run compiled kernels on row blocks at once."""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor

__all__ = ["row_slices", "thread_pool"]

#: elements of float64 temporaries per chunk (32 MB), common practice for cache-friendly batches
CHUNK_ELEMENTS = 4_000_000


def row_slices(k: int, width: int, *, elements: int = CHUNK_ELEMENTS):
    """Slices covering rows 0..k-1, each with at most ``elements // width`` rows (at least 1)."""
    step = max(1, elements // max(1, width))
    return [slice(a, min(k, a + step)) for a in range(0, k, step)]


_POOLS: dict = {}


def thread_pool(workers: int) -> ThreadPoolExecutor:
    """A process-wide pool of ``workers`` threads (the kernels release the GIL)."""
    pool = _POOLS.get(workers)
    if pool is None:
        pool = _POOLS[workers] = ThreadPoolExecutor(max_workers=workers,
                                                     thread_name_prefix="flipfix-kernels")
    return pool
