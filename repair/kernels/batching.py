"""Row chunking for batch computations, so temporaries stay small for large libraries."""

from __future__ import annotations

__all__ = ["row_slices"]

#: elements of float64 temporaries per chunk (32 MB), common practice for cache-friendly batches
CHUNK_ELEMENTS = 4_000_000


def row_slices(k: int, width: int, *, elements: int = CHUNK_ELEMENTS):
    """Slices covering rows 0..k-1, each with at most ``elements // width`` rows (at least 1)."""
    step = max(1, elements // max(1, width))
    return [slice(a, min(k, a + step)) for a in range(0, k, step)]
