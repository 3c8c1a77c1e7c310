"""Strict JSON text -> Python values, for documents that come from outside.

:func:`loads` accepts standard JSON (RFC 8259) and refuses, with an
:class:`flipfix.repair.errors.InputError` naming the place in the document:

* nesting deeper than ``max_depth`` arrays/objects (the standard library would
  recurse until ``RecursionError``); checked on the text before it is decoded;
* a key given twice in one object (the standard library keeps the last one silently);
* integers longer than ``max_digits`` digits (the standard library raises a bare
  ``ValueError`` past 4300 digits; no document of this project needs more than 64-bit
  integers);
* the non-standard constants ``NaN``, ``Infinity`` and ``-Infinity``.

Places are written like the documents' own fields: ``problem.linear['x3']``,
``constraints[2].weight`` (``field`` is the document's name).
"""

from __future__ import annotations

import json
import re
from typing import Any

import numpy as np

from flipfix.repair.errors import InputError

__all__ = ["loads", "MAX_DEPTH", "MAX_DIGITS"]

#: Arrays/objects nested deeper than this are refused (documents need 4).
MAX_DEPTH = 64
#: Integers with more digits than this are refused (2^63 has 19).
MAX_DIGITS = 20

_STRING = re.compile(rb'"(?:[^"\\]|\\.)*"', re.DOTALL)


class _Bad:
    """A value the hooks could not accept; reported with its place after decoding."""

    __slots__ = ("message",)

    def __init__(self, message: str):
        self.message = message


class _Object(dict):
    """A decoded object that had a key twice (``duplicate`` is that key)."""

    duplicate: str | None = None


def _depth(raw: bytes) -> tuple[int, int]:
    """(deepest nesting, byte offset where it is first reached), strings ignored."""
    bare = _STRING.sub(b'""', raw)
    arr = np.frombuffer(bare, dtype=np.uint8)
    step = (np.isin(arr, (ord("["), ord("{"))).astype(np.int64)
            - np.isin(arr, (ord("]"), ord("}"))).astype(np.int64))
    if step.size == 0:
        return 0, 0
    level = np.cumsum(step)
    k = int(np.argmax(level))
    return int(level[k]), k


def _place(field: str, key: Any) -> str:
    if isinstance(key, int):
        return f"{field}[{key}]"
    if re.fullmatch(r"[A-Za-z_][A-Za-z0-9_]*", key):
        return f"{field}.{key}"
    return f"{field}[{key!r}]"


def _find(value: Any, field: str) -> None:
    """Raise an InputError at the first refused value or duplicated key (depth-first)."""
    stack = [(value, field)]
    while stack:
        v, f = stack.pop()
        if isinstance(v, _Bad):
            raise InputError(f, v.message)
        if isinstance(v, _Object):
            if v.duplicate is not None:
                raise InputError(_place(f, v.duplicate), "key given twice in one object")
            stack.extend((item, _place(f, k)) for k, item in reversed(list(v.items())))
        elif isinstance(v, list):
            stack.extend((item, _place(f, k)) for k, item in reversed(list(enumerate(v))))


def loads(text: str | bytes, *, field: str, max_depth: int = MAX_DEPTH,
          max_digits: int = MAX_DIGITS) -> Any:
    """Decode strict JSON ``text``; errors are InputErrors under ``field`` (see module doc).

    Malformed JSON is an InputError at ``field`` naming the line and column.
    """
    raw = text.encode("utf-8") if isinstance(text, str) else bytes(text)
    depth, at = _depth(raw)
    if depth > max_depth:
        line = raw.count(b"\n", 0, at) + 1
        raise InputError(field, f"nested {depth} levels deep (line {line}); at most "
                                f"{max_depth} are accepted")
    flagged = []

    def pairs(items):
        obj = _Object()
        for k, v in items:
            if k in obj and obj.duplicate is None:
                obj.duplicate = k
                flagged.append(True)
            obj[k] = v
        return obj

    def integer(s: str):
        if len(s.lstrip("-")) > max_digits:
            flagged.append(True)
            return _Bad(f"integer with {len(s.lstrip('-'))} digits; at most {max_digits} "
                        "are accepted")
        return int(s)

    def constant(s: str):
        flagged.append(True)
        return _Bad(f"{s} is not a JSON number")

    try:
        value = json.loads(raw.decode("utf-8") if isinstance(text, bytes) else text,
                           object_pairs_hook=pairs, parse_int=integer, parse_constant=constant)
    except json.JSONDecodeError as err:
        raise InputError(field, f"not valid JSON (line {err.lineno}, column {err.colno}): "
                                f"{err.msg}") from None
    except UnicodeDecodeError as err:
        raise InputError(field, f"not UTF-8 text (byte {err.start})") from None
    except RecursionError:  # pragma: no cover - the depth check comes first
        raise InputError(field, "nested too deeply") from None
    if flagged:
        _find(value, field)
    return value
