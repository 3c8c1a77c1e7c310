"""Every README example meant to run does run, verbatim, and prints what the README says.

Markers (HTML comments, invisible on the rendered page), each on the line before a fenced
block:

* ``<!-- example: NAME.json -->`` (a name with a dot): the block is a file the later
  examples read; it is written, verbatim, to ``NAME.json`` in a fresh directory;
* ``<!-- example: NAME -->`` before a ``sh`` block: each line starting with ``flipfix``
  (``\\`` continuations joined) runs as the ``flipfix`` command in that directory;
  before a ``python`` block: the block runs as a script there;
* ``<!-- output: NAME -->``: the block is what example NAME prints on stdout. A JSON
  output is compared as a subset: every key shown has the value shown (numbers within
  1e-9), lists have the length shown, and keys named ``seconds`` (wall-clock time) are
  only checked to be numbers. Any other output is compared line by line, exactly.

Examples run in README order, all in one directory, so a later one may read the files of
an earlier one.
"""

from __future__ import annotations

import contextlib
import io
import json
import os
import re
import runpy
import shlex
from pathlib import Path

import pytest

from flipfix.service.cli import main

ROOT = Path(__file__).resolve().parents[1]
MARK = re.compile(r"^<!-- (example|output): ([\w.\-]+) -->\s*$")
FENCE = re.compile(r"^```(\w*)\s*$")


def _blocks(text: str) -> list[tuple[str, str, str, str]]:
    """(kind, name, language, body) of every marked fenced block, in order."""
    lines = text.splitlines()
    out = []
    for i, line in enumerate(lines):
        m = MARK.match(line)
        if not m:
            continue
        f = FENCE.match(lines[i + 1]) if i + 1 < len(lines) else None
        assert f, f"README line {i + 1}: {line.strip()} is not followed by a fenced block"
        end = next(j for j in range(i + 2, len(lines)) if lines[j].startswith("```"))
        out.append((m.group(1), m.group(2), f.group(1), "\n".join(lines[i + 2:end]) + "\n"))
    return out


BLOCKS = _blocks((ROOT / "README.md").read_text(encoding="utf-8"))


def _commands(body: str) -> list[list[str]]:
    joined = re.sub(r"\\\n\s*", " ", body)
    return [shlex.split(line)[1:] for line in joined.splitlines() if line.startswith("flipfix ")]


def _run(lang: str, body: str, where: Path) -> str:
    out = io.StringIO()
    cwd = os.getcwd()
    os.chdir(where)
    try:
        with contextlib.redirect_stdout(out):
            if lang == "python":
                script = where / "_example.py"
                script.write_text(body, encoding="utf-8")
                runpy.run_path(str(script), run_name="__main__")
            else:
                for argv in _commands(body):
                    assert main(argv) == 0, argv
    finally:
        os.chdir(cwd)
    return out.getvalue()


def _subset(shown, got, path="$"):
    if isinstance(shown, dict):
        assert isinstance(got, dict), f"{path}: printed {got!r}"
        for k, v in shown.items():
            assert k in got, f"{path}: key {k!r} not printed"
            if k == "seconds":
                assert isinstance(got[k], (int, float)), f"{path}.{k}"
            else:
                _subset(v, got[k], f"{path}.{k}")
    elif isinstance(shown, list):
        assert isinstance(got, list) and len(got) == len(shown), f"{path}: printed {got!r}"
        for i, (a, b) in enumerate(zip(shown, got)):
            _subset(a, b, f"{path}[{i}]")
    elif isinstance(shown, (int, float)) and not isinstance(shown, bool):
        assert got == pytest.approx(shown, abs=1e-9), f"{path}: printed {got!r}, README {shown!r}"
    else:
        assert got == shown, f"{path}: printed {got!r}, README {shown!r}"


def test_readme_has_runnable_examples():
    names = [name for kind, name, _, _ in BLOCKS if kind == "example" and "." not in name]
    outputs = [name for kind, name, _, _ in BLOCKS if kind == "output"]
    assert len(names) >= 3 and len(set(names)) == len(names)
    assert set(outputs) <= set(names), "an output block names no example"


def test_readme_examples_print_what_the_readme_says(tmp_path):
    printed: dict = {}
    for kind, name, lang, body in BLOCKS:
        if kind == "example" and "." in name:
            (tmp_path / name).write_text(body, encoding="utf-8")
        elif kind == "example":
            printed[name] = _run(lang, body, tmp_path)
        else:
            got = printed[name]
            try:
                shown = json.loads(body)
            except ValueError:
                assert got.splitlines() == body.rstrip("\n").splitlines(), name
            else:
                _subset(shown, json.loads(got))
