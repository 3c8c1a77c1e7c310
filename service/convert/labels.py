"""Labels, label-keyed assignments and decision values: proto <-> Python."""

from __future__ import annotations

from typing import Any, Hashable, Mapping

import numpy as np

from flipfix.repair.errors import InputError

from flipfix.service.generated import flipfix_pb2 as pb

__all__ = ["label_to_py", "py_to_label", "assignment_to_dict", "dict_to_assignment",
           "value_to_py", "py_to_value"]


def label_to_py(label: pb.Label, field: str) -> Hashable:
    kind = label.WhichOneof("kind")
    if kind == "str":
        return label.str
    if kind == "int":
        return int(label.int)
    raise InputError(field, "label is empty (set str or int)")


def py_to_label(label: Any) -> pb.Label:
    if isinstance(label, (int, np.integer)) and not isinstance(label, bool):
        return pb.Label(int=int(label))
    return pb.Label(str=str(label))


def assignment_to_dict(a: pb.Assignment, field: str) -> dict:
    """Assignment -> ``{label: value}`` (values as sent; the core checks them)."""
    out: dict = {}
    for k, item in enumerate(a.values):
        lab = label_to_py(item.label, f"{field}.values[{k}].label")
        if lab in out:
            raise InputError(f"{field}.values[{k}]", f"variable {lab!r} given twice")
        out[lab] = int(item.value)
    return out


def dict_to_assignment(mapping: Mapping) -> pb.Assignment:
    return pb.Assignment(values=[pb.VariableValue(label=py_to_label(k), value=int(v))
                                 for k, v in mapping.items()])


def value_to_py(v: pb.DecisionValue, field: str) -> Any:
    """DecisionValue -> str | int | float (a value of an integer decision)."""
    kind = v.WhichOneof("kind")
    if kind is None:
        raise InputError(field, "no value set (str, int or num)")
    return getattr(v, kind)


def py_to_value(v: Any) -> pb.DecisionValue:
    if isinstance(v, str):
        return pb.DecisionValue(str=v)
    if isinstance(v, (int, np.integer)) and not isinstance(v, bool):
        return pb.DecisionValue(int=int(v))
    return pb.DecisionValue(num=float(v))
