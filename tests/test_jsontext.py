"""Strict JSON for documents from outside (flipfix.repair.documents.jsontext).

The standard library's behaviour it guards against was checked on CPython 3.11:
``json.loads("[" * 100000 + "]" * 100000)`` raises RecursionError, a 5000-digit integer
raises ValueError (the 4300-digit conversion limit), duplicate keys keep the last value.
"""

from __future__ import annotations

import json

import pytest

from flipfix.repair.documents import jsontext
from flipfix.repair.errors import InputError


def _err(text, field="doc", **kw) -> InputError:
    with pytest.raises(InputError) as e:
        jsontext.loads(text, field=field, **kw)
    return e.value


def test_standard_documents_decode_as_the_standard_library_does():
    for text in ['{"a": [1, 2.5, "x", null, true], "b": {"c": -3}}', "[]", "0", '"s"',
                 '{"k\\"[": "]]]{{{"}', '[' * 64 + ']' * 64, '{"n": 12345678901234567890}']:
        assert jsontext.loads(text, field="doc") == json.loads(text)


def test_the_standard_library_fails_on_what_is_refused():
    with pytest.raises(RecursionError):
        json.loads("[" * 100_000 + "]" * 100_000)
    with pytest.raises(ValueError):
        json.loads("9" * 5000)
    assert json.loads('{"a": 1, "a": 2}') == {"a": 2}


def test_depth_is_refused_before_decoding():
    e = _err("[" * 100_000 + "]" * 100_000, field="problem")
    assert e.field == "problem" and "100000 levels" in e.message
    assert "65 levels" in _err("[" * 65 + "]" * 65).message
    # brackets inside strings do not count
    assert jsontext.loads('["' + "[" * 1000 + '"]', field="d") == ["[" * 1000]


def test_duplicate_keys_name_their_place():
    e = _err('{"linear": {"a": 1, "b": 2, "a": 3}}', field="problem")
    assert (e.field, e.message) == ("problem.linear.a", "key given twice in one object")
    e = _err('[{"id": 1}, {"id": 2, "id": 3}]', field="candidates")
    assert e.field == "candidates[1].id"
    assert _err('{"x y": 1, "x y": 2}').field == "doc['x y']"


def test_huge_integers_and_constants_name_their_place():
    e = _err('{"linear": {"a": ' + "9" * 5000 + "}}", field="problem")
    assert e.field == "problem.linear.a" and "5000 digits" in e.message
    assert _err('[1, -' + "1" * 21 + "]").field == "doc[1]"
    assert _err('{"a": [NaN]}').field == "doc.a[0]"
    assert "Infinity" in _err('{"a": -Infinity}').message


def test_malformed_text_names_line_and_column():
    e = _err('{\n "a": }', field="constraints")
    assert e.field == "constraints" and "line 2" in e.message
    assert "UTF-8" in _err(b"\xff\xfe").message
