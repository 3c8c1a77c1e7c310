"""The record of one late-constraint kind: what the core knows about it, in one place.

A kind is a frozen dataclass (the domain object a caller builds, with a ``name``
field defaulting to the kind's name) plus three functions:

* ``read_json(obj, problem, field) -> dict``: the JSON object's own fields (every
  key but ``"type"`` and ``"name"``, already checked against ``json_keys``) ->
  keyword arguments of the class, JSON types checked, labels resolved with the
  document rule (:func:`flipfix.repair.documents.fields.resolve_label`);
* ``write_json(constraint) -> dict``: the inverse (keys of ``json_keys`` only);
* ``lower(problem, constraint, name, field) -> Pieces``: check the constraint
  against the problem and lower it to 0/1 pieces
  (:mod:`flipfix.repair.lowering.pieces`); errors name ``field.<attribute>``.

The class checks its own options when built (weights, shapes, senses); ``lower``
checks everything that needs the problem (labels, values, decisions). The proto
form of each kind lives in the service (:mod:`flipfix.service.convert.constraints`),
keyed by the same ``name``, which is also the JSON ``"type"`` and the field of the
proto's ``Constraint.kind`` oneof.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable, Mapping

__all__ = ["ConstraintKind"]


@dataclass(frozen=True)
class ConstraintKind:
    """One kind of late constraint (see the module docstring for the three functions)."""

    name: str
    cls: type
    json_keys: frozenset
    read_json: Callable[[Mapping, Any, str], dict]
    write_json: Callable[[Any], dict]
    lower: Callable[[Any, Any, str, str], Any]
