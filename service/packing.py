"""Packed assignments: K rows of n 0/1 values <-> bytes, with numpy (no per-bit Python).

The layout is the proto's ``PackedAssignments`` and the store's candidate blobs:
row k is ``ceil(n / 8)`` bytes, value j of the row in byte ``j // 8`` at bit
``7 - j % 8`` (most significant bit first: ``numpy.packbits(X, axis=1)``), the
unused low bits of a row's last byte 0. Values are the 0/1 form the core works in
(SPIN: bit 1 is +1, bit 0 is -1), columns in the problem's label order.
"""

from __future__ import annotations

import numpy as np

from flipfix.repair.errors import InputError

__all__ = ["row_bytes", "pack_rows", "unpack_rows"]


def row_bytes(n: int) -> int:
    """Bytes per packed row of ``n`` values: ``ceil(n / 8)``."""
    return (int(n) + 7) // 8


def pack_rows(X: np.ndarray) -> bytes:
    """int8/uint8/bool (K, n) of 0/1 -> ``K * ceil(n / 8)`` bytes (rows padded with 0 bits)."""
    X = np.asarray(X)
    if X.ndim == 1:
        X = X[None, :]
    if X.dtype == np.int8:
        X = X.view(np.uint8)
    return np.packbits(X, axis=1).tobytes()


def unpack_rows(bits: bytes, count: int, n: int, *, field: str = "values") -> np.ndarray:
    """``count * ceil(n / 8)`` bytes -> int8 (count, n) of 0/1, checked.

    A wrong length or a padding bit set is an :class:`InputError` on ``field + ".bits"``.
    """
    rb = row_bytes(n)
    if len(bits) != count * rb:
        raise InputError(field + ".bits", f"has {len(bits)} bytes; {count} rows of {n} variables "
                                          f"packed need {count * rb} ({count} x {rb})")
    raw = np.frombuffer(bits, dtype=np.uint8).reshape(count, rb)
    pad = 8 * rb - n
    if pad and count:
        tail = raw[:, -1] & np.uint8((1 << pad) - 1)
        if tail.any():
            k = int(np.flatnonzero(tail)[0])
            raise InputError(field + ".bits", f"row {k} has padding bits set after variable {n - 1} "
                                              f"(the last {pad} bits of each row must be 0)")
    return np.unpackbits(raw, axis=1, count=n).view(np.int8)
