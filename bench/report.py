"""Write bench/RESULTS.md from a results file: ``python -m bench.report [results/latest.json]``.

The committed copy of the tables, with the machine and the command that produced them.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

from .common import RESULTS_DIR

__all__ = ["render_markdown", "main"]

HERE = Path(__file__).resolve().parent


def render_markdown(doc: dict, *, notes: str = "") -> str:
    m = doc["machine"]
    head = [
        "# flipfix benchmark results",
        "",
        f"Command: `{doc['command']}` (from the repository root, with `.venv/bin/python`; "
        f"seed {doc['seed']}). Started {doc['started']}, took {doc.get('seconds', 0):.0f} s.",
        "",
        f"Machine: {m['nproc']} cores, {m['cpu']}; {m['platform']}; python {m['python']}, "
        f"numpy {m['numpy']}, ortools {m['ortools']}, numba {m['numba']}, grpcio {m['grpcio']}; "
        f"commit {m['commit']}" + (f" plus the working tree at {doc['started']}" if m["commit"] else ""),
        "",
    ]
    if notes:
        head += [notes.strip(), ""]
    return "\n".join(head) + "\n" + doc.get("markdown", "") + "\n"


def main(argv=None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    src = Path(argv[0]) if argv else RESULTS_DIR / "latest.json"
    notes_path = HERE / "RESULTS_NOTES.md"
    notes = notes_path.read_text() if notes_path.exists() else ""
    doc = json.loads(src.read_text())
    (HERE / "RESULTS.md").write_text(render_markdown(doc, notes=notes))
    print(f"wrote {HERE / 'RESULTS.md'} from {src}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
