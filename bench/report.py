"""Write bench/RESULTS.md from results files: ``python -m bench.report [FILE ...]``.

The committed copy of the tables, with the machine and the command that produced them.
With several files (e.g. a full run, then ``--only service`` re-run), later files replace
the sections they contain; every command is listed.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

from bench import SECTIONS_ORDER
from bench.common import RESULTS_DIR

__all__ = ["render_markdown", "main"]

HERE = Path(__file__).resolve().parent


def merge(docs: list) -> dict:
    """One document from several runs: sections of later runs win; commands are listed."""
    out = dict(docs[0])
    out["sections"] = dict(docs[0]["sections"])
    out["runs"] = [{"command": d["command"], "started": d["started"],
                    "seconds": d.get("seconds", 0.0), "sections": list(d["sections"]),
                    "commit": d.get("machine", {}).get("commit")}
                   for d in docs]
    for d in docs[1:]:
        out["sections"].update(d["sections"])
    return out


def render_markdown(doc: dict, *, notes: str = "") -> str:
    from bench import run as runner

    m = doc["machine"]
    runs = doc.get("runs") or [{"command": doc["command"], "started": doc["started"],
                                "seconds": doc.get("seconds", 0.0),
                                "sections": list(doc["sections"])}]
    head = ["# flipfix benchmark results", ""]
    for r in runs:
        at = f", commit {r['commit']} plus the working tree" if r.get("commit") else ""
        head.append(f"- `{r['command']}` (sections: {', '.join(r['sections'])}), started "
                    f"{r['started']}, {r['seconds']:.0f} s{at}")
    head += [
        "",
        f"Run from the repository root with `.venv/bin/python` (`make bench` runs the first "
        f"command); seed {doc['seed']}.",
        "",
        f"Machine: {m['nproc']} cores, {m['cpu']}; {m['platform']}; python {m['python']}, "
        f"numpy {m['numpy']}, ortools {m['ortools']}, numba {m['numba']}, grpcio {m['grpcio']}"
        + ("" if len(runs) > 1 or not m["commit"]
           else f"; commit {m['commit']} plus the working tree at {doc['started']}"),
        "",
    ]
    body = [runner.SECTIONS[name].render(doc["sections"][name])
            for name in SECTIONS_ORDER if name in doc["sections"]]
    tail = ["", notes.strip()] if notes else []
    return "\n".join(head) + "\n" + "\n\n".join(body) + "\n" + "\n".join(tail) + "\n"


def main(argv=None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    srcs = [Path(a) for a in argv] or [RESULTS_DIR / "latest.json"]
    notes_path = HERE / "RESULTS_NOTES.md"
    notes = notes_path.read_text() if notes_path.exists() else ""
    doc = merge([json.loads(s.read_text()) for s in srcs])
    (HERE / "RESULTS.md").write_text(render_markdown(doc, notes=notes))
    print(f"wrote {HERE / 'RESULTS.md'} from {', '.join(map(str, srcs))}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
