"""Late constraints, as the caller states them (labels and caller-vartype values).

Soft (added to the objective):
    :class:`HammingPenalty`  weight * shape(d), d = Hamming distance to a reference
    :class:`ExtraTerms`      an additional linear / quadratic model
Hard (must hold in the reply):
    :class:`FixVariables`    pin variables to values
    :class:`LinearConstraint` sum a_i x_i (<=, ==, >=) rhs, in the caller's vartype
    :class:`ForbidAssignment` these variables may not all take these values at once

Integer-level constraints over declared decisions live in :mod:`flipfix.repair.model.encodings`;
they lower to the same compiled pieces (see :mod:`flipfix.repair.lowering.compiled`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Hashable, Mapping, Sequence

import numpy as np

from flipfix.repair.errors import InputError
from flipfix.repair.model.problem import finite as _number

__all__ = [
    "HammingPenalty", "ExtraTerms", "FixVariables", "LinearConstraint", "ForbidAssignment",
    "SHAPES", "SENSES", "shape_table",
]

SHAPES = ("linear", "quadratic", "threshold", "table")
SENSES = ("<=", "==", ">=")


def shape_table(shape: str, weight: float, d_max: int, *, threshold: float = 0.0,
                table: Sequence[float] | None = None, field_name: str = "shape") -> np.ndarray:
    """Penalty value for every distance 0..d_max: float64 (d_max + 1,).

    linear: w*d; quadratic: w*d^2; threshold: w*max(0, d - threshold);
    table: w*table[d], the last entry repeated past the end of the table.
    """
    d = np.arange(d_max + 1, dtype=np.float64)
    if shape == "linear":
        f = d
    elif shape == "quadratic":
        f = d * d
    elif shape == "threshold":
        f = np.maximum(0.0, d - float(threshold))
    elif shape == "table":
        if table is None or len(table) == 0:
            raise InputError(field_name + ".table", "a table shape needs a non-empty list of values")
        t = np.asarray([float(v) for v in table], dtype=np.float64)
        if not np.all(np.isfinite(t)):
            raise InputError(field_name + ".table", "values must be finite numbers")
        idx = np.minimum(np.arange(d_max + 1), t.size - 1)
        f = t[idx]
    else:
        raise InputError(field_name, f"must be one of {SHAPES}, got {shape!r}")
    return float(weight) * f


@dataclass(frozen=True)
class HammingPenalty:
    """Soft: ``weight * shape(d)`` with d the number of ``variables`` differing from ``reference``.

    ``reference`` maps labels to caller-vartype values; ``variables`` (default:
    every label in ``reference``) selects the subset that counts. ``shape`` is
    linear, quadratic, threshold (with ``threshold`` d0) or table (``table[d]``).
    """

    reference: Mapping[Hashable, int]
    weight: float = 1.0
    shape: str = "linear"
    threshold: float = 0.0
    table: Sequence[float] | None = None
    variables: Sequence[Hashable] | None = None
    name: str = "hamming"

    def __post_init__(self):
        _number(self.weight, "weight")
        if self.weight < 0:
            raise InputError("weight", f"must be >= 0, got {self.weight!r}")
        if self.shape not in SHAPES:
            raise InputError("shape", f"must be one of {SHAPES}, got {self.shape!r}")
        _number(self.threshold, "threshold")


@dataclass(frozen=True)
class ExtraTerms:
    """Soft: extra linear and quadratic terms in the caller's vartype, added to the objective."""

    linear: Mapping[Hashable, float] = field(default_factory=dict)
    quadratic: Sequence[tuple] = ()
    offset: float = 0.0
    name: str = "extra"


@dataclass(frozen=True)
class FixVariables:
    """Hard: each listed variable takes the given caller-vartype value."""

    values: Mapping[Hashable, int]
    name: str = "fix"


@dataclass(frozen=True)
class LinearConstraint:
    """Hard: ``sum terms[label] * v_label  sense  rhs`` with v in the caller's vartype."""

    terms: Mapping[Hashable, float]
    sense: str
    rhs: float
    name: str = "linear"

    def __post_init__(self):
        if self.sense not in SENSES:
            raise InputError("sense", f"must be one of {SENSES}, got {self.sense!r}")
        _number(self.rhs, "rhs")


@dataclass(frozen=True)
class ForbidAssignment:
    """Hard: the listed variables may not all take the listed values at once."""

    assignment: Mapping[Hashable, int]
    name: str = "forbid"
