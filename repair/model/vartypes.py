"""The two vartypes and the one exact conversion between them.

BINARY variables take x in {0, 1}, SPIN variables s in {-1, +1}, related by
``s = 2x - 1`` (``x = (s + 1) / 2``). The core works in 0/1 form; every SPIN
input (model terms, constraint terms, values) is converted here, and answers are
converted back here. Both directions multiply by powers of two only, so the
conversion of each term is exact; only the sums into the offset and into a
variable's linear bias round as any sum does.
"""

from __future__ import annotations

from typing import Any

import numpy as np

__all__ = ["BINARY", "SPIN", "VARTYPES", "change_vartype", "to_caller", "to_bits", "value_to_bit"]

BINARY = "BINARY"
SPIN = "SPIN"
VARTYPES = (BINARY, SPIN)

#: y_source = ALPHA * y_target + BETA, per (source, target)
_AFFINE = {(SPIN, BINARY): (2.0, -1.0),   # s = 2x - 1
           (BINARY, SPIN): (0.5, 0.5)}    # x = (s + 1) / 2


def change_vartype(index, linear, u, v, quadratic, offset: float, *, source: str, target: str
                   ) -> tuple[np.ndarray, np.ndarray, np.ndarray, float]:
    """The same function written in the ``target`` vartype.

    Terms in ``source``: linear biases ``linear`` float64 (p,) on variables ``index``
    int64 (p,) (an index may repeat), couplings ``quadratic`` float64 (m,) between
    ``u`` and ``v`` int64 (m,) (u != v), and ``offset``. With ``y_source = a * y_target + b``::

        h y      = a h y' + b h
        J y_u y_v = a^2 J y'_u y'_v + a b J y'_u + a b J y'_v + b^2 J

    Returns ``(index' int64 (p + 2m,), linear' float64 (p + 2m,), quadratic' float64 (m,),
    offset')``: the linear entries are ``index`` then ``u`` then ``v`` (sum repeated
    indices, e.g. with ``np.add.at``); couplings keep their (u, v) positions.
    """
    index = np.asarray(index, dtype=np.int64)
    linear = np.asarray(linear, dtype=np.float64)
    u = np.asarray(u, dtype=np.int64)
    v = np.asarray(v, dtype=np.int64)
    quadratic = np.asarray(quadratic, dtype=np.float64)
    if source == target:
        return index, linear, quadratic, float(offset)
    a, b = _AFFINE[(source, target)]
    out_index = np.concatenate([index, u, v])
    out_linear = np.concatenate([a * linear, a * b * quadratic, a * b * quadratic])
    out_offset = float(offset) + b * float(linear.sum()) + b * b * float(quadratic.sum())
    return out_index, out_linear, a * a * quadratic, out_offset


def to_caller(X: np.ndarray, vartype: str) -> np.ndarray:
    """0/1 values -> values of ``vartype`` (int8, same shape): SPIN is ``2x - 1``."""
    X = np.asarray(X, dtype=np.int8)
    return (2 * X - 1).astype(np.int8) if vartype == SPIN else X.copy()


def to_bits(values: np.ndarray, vartype: str) -> np.ndarray:
    """Values of ``vartype`` (already checked to be in it) -> 0/1 int8: SPIN is ``(s + 1) / 2``."""
    values = np.asarray(values)
    return (values == 1).astype(np.int8) if vartype == SPIN else values.astype(np.int8)


def value_to_bit(value: Any, vartype: str) -> int:
    """One value of ``vartype`` (already checked to be in it) -> 0/1."""
    return int((int(value) + 1) // 2) if vartype == SPIN else int(value)
