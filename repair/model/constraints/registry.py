"""Every late-constraint kind, by name: the one registry of the core.

``KINDS`` maps a kind's name (the JSON ``"type"``, the proto oneof field) to its
:class:`flipfix.repair.model.constraints.kind.ConstraintKind`. The functions here
are the only dispatch on kinds: reading and writing the JSON form and lowering.
To add a kind, write its module (class, ``read_json``, ``write_json``, ``lower``,
``KIND``) and list it in ``_MODULES``; the service adds its proto form under the
same name.
"""

from __future__ import annotations

from typing import Any, Mapping

from flipfix.repair.documents.fields import check_keys, optional_name
from flipfix.repair.errors import InputError, under
from flipfix.repair.lowering.pieces import Pieces
from flipfix.repair.model.constraints import (
    allow_values, decision_change, extra, fix, forbid, forbid_values, force_value, hamming,
    linear,
)
from flipfix.repair.model.constraints.kind import ConstraintKind
from flipfix.repair.model.problem import Problem

__all__ = ["KINDS", "kind_of", "build", "read_json", "write_json", "lower"]

_MODULES = (hamming, extra, fix, linear, forbid, forbid_values, force_value, allow_values,
            decision_change)

#: kind name -> record, in the order above
KINDS: dict[str, ConstraintKind] = {m.KIND.name: m.KIND for m in _MODULES}
_BY_CLASS = {k.cls: k for k in KINDS.values()}


def kind_of(constraint: Any, field: str = "constraint") -> ConstraintKind:
    """The record of a domain constraint (by its exact class), or an InputError naming ``field``."""
    kind = _BY_CLASS.get(type(constraint))
    if kind is None:
        raise InputError(field, f"unknown constraint type {type(constraint).__name__} "
                                f"(known: {', '.join(k.cls.__name__ for k in KINDS.values())})")
    return kind


def build(kind: ConstraintKind, kwargs: dict, *, name: str | None, field: str) -> Any:
    """``kind.cls(**kwargs, name=...)`` with the class's own checks named under ``field``."""
    try:
        return kind.cls(**kwargs, name=name or kind.name)
    except InputError as err:
        raise under(err, field) from None


def read_json(obj: Any, problem: Problem, *, field: str) -> Any:
    """One constraint JSON object ``{"type": kind, "name"?: str, ...}`` -> its domain object."""
    if not isinstance(obj, Mapping):
        raise InputError(field, f"must be an object with a \"type\", got {type(obj).__name__}")
    kind = KINDS.get(obj.get("type")) if isinstance(obj.get("type"), str) else None
    if kind is None:
        raise InputError(field + ".type", f"must be one of {sorted(KINDS)}, got {obj.get('type')!r}")
    check_keys(obj, {"type", "name"} | kind.json_keys, field)
    name = optional_name(obj, field, kind.name)
    return build(kind, kind.read_json(obj, problem, field), name=name, field=field)


def write_json(constraint: Any) -> dict:
    """A domain constraint -> its JSON object (``read_json`` reads it back)."""
    kind = kind_of(constraint)
    return {"type": kind.name, "name": constraint.name, **kind.write_json(constraint)}


def lower(problem: Problem, constraint: Any, name: str, field: str) -> Pieces:
    """Check one constraint against the problem and lower it; errors name ``field.<attribute>``."""
    return kind_of(constraint, field).lower(problem, constraint, name, field)
