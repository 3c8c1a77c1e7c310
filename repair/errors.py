"""Exceptions of the repair core.

Every input problem raises :class:`InputError`, which carries the name of the
offending field so that a caller (the service, the CLI) can report it as is.
"No feasible solution" is never an exception: it is a status of the result.
"""

from __future__ import annotations

__all__ = ["InputError", "LimitError"]


class InputError(ValueError):
    """A bad input; ``field`` names the offending field (dotted path)."""

    def __init__(self, field: str, message: str):
        self.field = field
        self.message = message
        super().__init__(f"{field}: {message}")


class LimitError(InputError):
    """The input is well formed but larger than a configured limit."""
