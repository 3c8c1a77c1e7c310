"""Exceptions of the repair core.

Every input problem raises :class:`InputError`, which carries the name of the
offending field so that a caller (the service, the CLI) can report it as is.
"No feasible solution" is never an exception: it is a status of the result.
"""

from __future__ import annotations

import math

__all__ = ["InputError", "LimitError", "under", "nonnegative"]


class InputError(ValueError):
    """A bad input; ``field`` names the offending field (dotted path)."""

    def __init__(self, field: str, message: str):
        self.field = field
        self.message = message
        super().__init__(f"{field}: {message}")


class LimitError(InputError):
    """The input is well formed but larger than a configured limit."""


def under(err: InputError, field: str) -> InputError:
    """``err`` with its field path placed under ``field`` (``weight`` -> ``field.weight``);
    returned as is when its path already starts there."""
    if err.field == field or err.field.startswith((field + ".", field + "[")):
        return err
    return type(err)(f"{field}.{err.field}" if err.field else field, err.message)


def nonnegative(value, field: str) -> float:
    """``value`` as a finite float >= 0 (anything ``float()`` takes); errors name ``field``."""
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise InputError(field, f"{value!r} is not a number") from None
    if not math.isfinite(v) or v < 0:
        raise InputError(field, f"must be a finite number >= 0, got {value!r}")
    return v
