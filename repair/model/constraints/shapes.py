"""Penalty shapes shared by the soft kinds: ``weight * shape(d)`` for a distance d."""

from __future__ import annotations

from typing import Any, Sequence

import numpy as np

from flipfix.repair.errors import InputError
from flipfix.repair.model.problem import finite

__all__ = ["SHAPES", "shape_table", "check_penalty"]

SHAPES = ("linear", "quadratic", "threshold", "table")


def check_penalty(weight: Any, shape: Any, threshold: Any) -> None:
    """The options of a shaped penalty; errors name the bare option (``weight``, ...)."""
    finite(weight, "weight")
    if weight < 0:
        raise InputError("weight", f"must be >= 0, got {weight!r}")
    if shape not in SHAPES:
        raise InputError("shape", f"must be one of {SHAPES}, got {shape!r}")
    finite(threshold, "threshold")
    if shape == "threshold" and threshold < 0:  # a negative threshold charges a distance of 0
        raise InputError("threshold", f"must be >= 0 for the threshold shape, got {float(threshold):g}")


def shape_table(shape: str, weight: float, d_max: int, *, threshold: float = 0.0,
                table: Sequence[float] | None = None, field: str = "") -> np.ndarray:
    """Penalty value for every distance 0..d_max: float64 (d_max + 1,).

    ``field`` is the constraint's field: errors name its ``.shape`` or ``.table``.

    linear: w*d; quadratic: w*d^2; threshold: w*max(0, d - threshold);
    table: w*table[d], the last entry repeated past the end of the table.
    """
    prefix = field + "." if field else ""
    d = np.arange(d_max + 1, dtype=np.float64)
    if shape == "linear":
        f = d
    elif shape == "quadratic":
        f = d * d
    elif shape == "threshold":
        f = np.maximum(0.0, d - float(threshold))
    elif shape == "table":
        if table is None or len(table) == 0:
            raise InputError(prefix + "table", "a table shape needs a non-empty list of values")
        t = np.asarray([float(v) for v in table], dtype=np.float64)
        if not np.all(np.isfinite(t)):
            raise InputError(prefix + "table", "values must be finite numbers")
        idx = np.minimum(np.arange(d_max + 1), t.size - 1)
        f = t[idx]
    else:
        raise InputError(prefix + "shape", f"must be one of {SHAPES}, got {shape!r}")
    return float(weight) * f
