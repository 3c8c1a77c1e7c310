"""Readers of single JSON fields, shared by every document and every constraint kind.

Each takes the value and the dotted path of its field and returns the value
checked (or raises :class:`flipfix.repair.errors.InputError` naming the path).
JSON types are strict: a string is not a number, a bool is neither a number nor
a label.

Labels written as JSON object keys follow rule 2 of
:mod:`flipfix.repair.documents.forms` (:func:`resolve_label`): a key names the
string label when the problem has it, else the integer label of the same
canonical decimal form.
"""

from __future__ import annotations

import math
import re
from typing import Any, Hashable, Mapping

from flipfix.repair.errors import InputError
from flipfix.repair.model.problem import Problem

__all__ = ["canonical_int", "json_label", "as_mapping", "as_list", "number", "check_keys",
           "require", "optional_name", "resolve_label", "resolve_mapping"]

_CANONICAL_INT = re.compile(r"-?(0|[1-9][0-9]*)\Z")


def canonical_int(key: str) -> int | None:
    """The integer a key writes in canonical decimal form (``"3"``, ``"-2"``), else None."""
    return int(key) if _CANONICAL_INT.match(key) else None


def json_label(value: Any, field: str) -> Hashable:
    """A label written in a JSON list: str or int (bool and float are errors)."""
    if isinstance(value, bool) or not isinstance(value, (str, int)):
        raise InputError(field, f"label {value!r} must be a string or an integer")
    return value


def as_mapping(obj: Any, field: str) -> Mapping:
    if not isinstance(obj, Mapping):
        raise InputError(field, f"must be an object {{label: value}}, got {type(obj).__name__}")
    return obj


def as_list(obj: Any, field: str) -> list:
    if not isinstance(obj, (list, tuple)):
        raise InputError(field, f"must be a list, got {type(obj).__name__}")
    return list(obj)


def number(value: Any, field: str) -> float:
    """A JSON number (int or float, not bool), finite."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise InputError(field, f"{value!r} is not a number")
    v = float(value)
    if not math.isfinite(v):
        raise InputError(field, f"{value!r} is not finite")
    return v


def check_keys(obj: Mapping, allowed: set, field: str) -> None:
    for key in obj:
        if key not in allowed:
            raise InputError(f"{field}.{key}", f"unknown field (allowed: {', '.join(sorted(allowed))})")


def require(obj: Mapping, key: str, field: str) -> Any:
    """``obj[key]``, or an error naming ``field.key`` as missing."""
    if key not in obj:
        raise InputError(f"{field}.{key}", "is missing")
    return obj[key]


def optional_name(obj: Mapping, field: str, default: str) -> str:
    """The object's ``"name"`` (a non-empty string), or ``default``."""
    name = obj.get("name", default)
    if not isinstance(name, str) or not name:
        raise InputError(field + ".name", "must be a non-empty string")
    return name


def resolve_label(problem: Problem, key: Any, field: str) -> Hashable:
    """A label as written in a candidates/constraints document -> the problem's label.

    JSON integers stay integers; a string names the string label when the problem
    has it, else the integer label of the same canonical decimal form. A string
    that names no variable is an :class:`InputError` naming ``field``.
    """
    if isinstance(key, bool) or not isinstance(key, (str, int)):
        raise InputError(field, f"label {key!r} must be a string or an integer")
    if isinstance(key, int):
        return key
    if key in problem.index:
        return key
    as_int = canonical_int(key)
    if as_int is not None and as_int in problem.index:
        return as_int
    raise InputError(field, f"unknown variable {key!r}")


def resolve_mapping(problem: Problem, obj: Any, field: str) -> dict:
    """``{key: value}`` with keys resolved to the problem's labels (values untouched)."""
    out: dict = {}
    for key, value in as_mapping(obj, field).items():
        lab = resolve_label(problem, key, f"{field}[{key!r}]")
        out[lab] = value
    return out
