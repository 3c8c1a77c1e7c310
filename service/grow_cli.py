"""``flipfix grow``: propose robust and diverse candidates near the stored ones.

    flipfix grow PROBLEM.json CANDIDATES.json [--mode robust|diverse|both] [--heldout M] ...
    flipfix grow NAME --server HOST:PORT [--keep] ...

In-process by default (the core's :func:`flipfix.repair.grow.neighbours.grow` and, with
``--heldout M``, :func:`flipfix.repair.grow.heldout.compare_heldout`); with ``--server`` the
stored library of problem NAME is grown through the Grow service, and ``--keep`` adds the
proposals to the store in one transaction. Prints a table (or ``--json FILE`` for
everything, assignments included); progress goes to stderr. Bad input: one line naming the
field or option, exit code 2; a server that refused or failed: one line naming the server
and the status, exit code 2 too.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import time
from pathlib import Path
from typing import Any, TextIO

from flipfix.repair.errors import InputError

__all__ = ["register", "run", "format_report"]

#: seconds for the search and the comparison when --time-limit is not given (in-process;
#: the same as the server's default for Grow)
DEFAULT_TIME_LIMIT = 30.0

CAUTION = ("The tool proposes; a responsible person decides which candidates the library "
           "keeps (local rules apply where plans affect people).")

#: core field -> the option that sets it
_OPTION_OF = {"mode": "--mode", "epsilon": "--epsilon", "tolerance": "--tolerance",
              "tolerance_absolute": "--tolerance", "tolerance_percent": "--tolerance-percent",
              "reward_free": "--reward-free", "reward_distance": "--reward-distance",
              "unit": "--distance", "distance": "--distance", "top": "--top",
              "chains": "--chains", "sweeps": "--sweeps", "depth": "--depth",
              "max_new": "--max-new", "seed": "--seed", "time_limit": "--time-limit",
              "m": "--heldout", "heldout.scenarios": "--scenarios", "scenarios": "--scenarios"}


def register(subparsers) -> argparse.ArgumentParser:
    """Add the ``grow`` subcommand to ``subparsers``."""
    p = subparsers.add_parser(
        "grow", help="propose robust and diverse candidates near the stored ones",
        description="Anneal from the best stored candidates towards states with more free "
                    "moves (robust) or far from every stored candidate (diverse), within an "
                    "energy tolerance of the best; optionally compare the original and grown "
                    "libraries on held-out stress scenarios. " + CAUTION)
    p.add_argument("problem", help="problem JSON document (with --server: a stored problem's name)")
    p.add_argument("candidates", nargs="?", default=None,
                   help="candidates JSON document (not with --server)")
    p.add_argument("--mode", default="robust", choices=("robust", "diverse", "both"))
    p.add_argument("--epsilon", type=float, default=0.0,
                   help="a move is free when it costs <= epsilon (0)")
    tol = p.add_mutually_exclusive_group()
    tol.add_argument("--tolerance", type=float, default=None,
                     help="energy cap above the library's best, in energy units")
    tol.add_argument("--tolerance-percent", type=float, default=None,
                     help="energy cap above the best in percent of |best| (default 1)")
    p.add_argument("--reward-free", type=float, default=None, help="reward per free move")
    p.add_argument("--reward-distance", type=float, default=None,
                   help="reward per unit of distance from the nearest stored candidate")
    p.add_argument("--distance", default=None, choices=("bits", "decisions"),
                   help="distance unit (default: decisions when the problem declares any)")
    p.add_argument("--from", dest="from_ids", action="append", default=[], metavar="ID",
                   help="grow from this candidate (repeatable; default: the --top best)")
    p.add_argument("--top", type=int, default=3, help="origins when --from is not given (3)")
    p.add_argument("--chains", type=int, default=4, help="annealing chains per origin (4)")
    p.add_argument("--sweeps", type=int, default=200, help="sweeps per chain (200)")
    p.add_argument("--depth", type=float, default=0.5, help="turning temperature in (0, 1] (0.5)")
    p.add_argument("--max-new", type=int, default=10, help="most states proposed (10)")
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--time-limit", type=float, default=None,
                   help=f"seconds for the search and the comparison, > 0 (default "
                        f"{DEFAULT_TIME_LIMIT:g}; with --server: the server's default)")
    p.add_argument("--heldout", type=int, default=0, metavar="M",
                   help="compare original and grown libraries curated to M on held-out scenarios")
    p.add_argument("--constraints", default=None, metavar="FILE",
                   help="constraints JSON: hard linear rows every proposal keeps (and every "
                        "held-out scenario)")
    p.add_argument("--scenarios", type=int, default=20, help="scenarios of the comparison (20)")
    p.add_argument("--scenario-seed", type=int, default=0)
    p.add_argument("--json", default=None, help="write everything to this JSON file")
    p.add_argument("--server", metavar="HOST:PORT", default=None)
    p.add_argument("--keep", action="store_true",
                   help="with --server: add the proposed states to the store")
    p.add_argument("--quiet", action="store_true", help="no progress on stderr")
    p.set_defaults(func=run)
    return p


def _settings(args):
    from flipfix.repair.grow.neighbours import GrowSettings

    return GrowSettings(mode=args.mode, epsilon=args.epsilon, tolerance=args.tolerance,
                        tolerance_percent=args.tolerance_percent, reward_free=args.reward_free,
                        reward_distance=args.reward_distance, unit=args.distance,
                        from_ids=tuple(args.from_ids), top=args.top, chains=args.chains,
                        sweeps=args.sweeps, depth=args.depth, max_new=args.max_new,
                        seed=args.seed)


def _budget(args) -> float:
    """--time-limit checked (> 0, finite), or the default when it is not given."""
    from flipfix.service.convert.options import check_time_limit

    if args.time_limit is None:
        return DEFAULT_TIME_LIMIT
    return check_time_limit(float(args.time_limit), "time_limit")


def _progress(enabled: bool, err: TextIO):
    t0 = time.monotonic()

    def show(done, total, phase):
        if enabled:
            print(f"flipfix grow: {time.monotonic() - t0:6.1f}s  {phase}: {done}/{total}",
                  file=err, flush=True)
    return show


def _local(args, err: TextIO) -> dict:
    from flipfix.repair.documents.forms import parse_candidates, parse_problem
    from flipfix.service.grow_jobs import grow_job

    problem = parse_problem(_load(args.problem, "problem"))
    doc = _load(args.candidates, "candidates")
    if isinstance(doc, dict) and "candidates" in doc:
        doc = doc["candidates"]
    cands = parse_candidates(doc, problem)
    cons = _constraints(args, problem)
    show = _progress(not args.quiet, err)

    def prog(d):
        show(d["done"], d["total"], d["phase"])

    heldout = ({"m": args.heldout, "family": None, "scenarios": args.scenarios,
                "seed": args.scenario_seed} if args.heldout else None)
    res, cmp, note = grow_job(problem, cands, _settings(args), time_limit=_budget(args),
                              constraints=cons, heldout=heldout, progress=prog)
    out = res.to_dict(problem)
    if cmp is not None:
        out["heldout"] = cmp.to_dict()
    if note:
        out["heldout_message"] = note
    return out


def _constraints(args, problem) -> list:
    """The --constraints document (a list, or {"constraints": [...]}) parsed; [] without it."""
    from flipfix.repair.documents.forms import parse_constraints

    if not args.constraints:
        return []
    doc = _load(args.constraints, "constraints")
    if isinstance(doc, dict) and "constraints" in doc:
        doc = doc["constraints"]
    return parse_constraints(doc, problem)


def _remote(args, err: TextIO) -> dict:
    from flipfix.service.client import FlipfixClient
    from flipfix.service import convert
    from flipfix.service.convert import grow as convert_grow
    from flipfix.service.convert.constraints import constraint_to_proto
    from flipfix.service.generated import grow_pb2 as gpb
    from flipfix.service.generated import grow_pb2_grpc as gpb_grpc

    s = _settings(args)
    req = gpb.GrowRequest(
        problem=args.problem, from_ids=list(s.from_ids), mode=convert_grow.MODE_ENUM[s.mode],
        epsilon=s.epsilon, distance=convert_grow.UNIT_ENUM.get(s.unit, 0), top=s.top,
        chains=s.chains, sweeps=s.sweeps, depth=s.depth, max_new=s.max_new, seed=s.seed,
        keep=args.keep)
    if args.time_limit is not None:  # unset: the server's default (0 would be refused)
        req.time_limit = _budget(args)
    if s.tolerance is not None:
        req.tolerance_absolute = s.tolerance
    if s.tolerance_percent is not None:
        req.tolerance_percent = s.tolerance_percent
    if s.reward_free is not None:
        req.reward_free = s.reward_free
    if s.reward_distance is not None:
        req.reward_distance = s.reward_distance
    if args.heldout:
        req.heldout.m = args.heldout
        req.heldout.scenarios = args.scenarios
        req.heldout.seed = args.scenario_seed
    show = _progress(not args.quiet, err)
    wait = 2 * _budget(args) + 60.0
    with FlipfixClient(args.server, timeout=wait) as fx:
        _info, problem = fx.get_problem(args.problem)
        req.constraints.extend(constraint_to_proto(c) for c in _constraints(args, problem))
        reply = None
        for event in gpb_grpc.GrowStub(fx.channel).ProposeStream(
                req, timeout=wait):
            if event.HasField("progress"):
                show(event.progress.done, event.progress.total,
                     convert.PHASE_NAMES.get(event.progress.current_phase, ""))
            else:
                reply = event.result
    return convert_grow.reply_to_dict(reply, problem)


def _load(path: str, field: str) -> Any:
    try:
        with open(path, encoding="utf-8") as fh:
            return json.load(fh)
    except OSError as exc:
        raise InputError(field, f"cannot read {path}: {exc.strerror or exc}") from None
    except json.JSONDecodeError as exc:
        raise InputError(field, f"{path} is not valid JSON: {exc.msg} at line {exc.lineno}") from None


def _f(v, width: int = 10) -> str:
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return "-".rjust(width)
    return f"{v:{width}.6g}"


def format_report(report: dict) -> str:
    """The proposals and the comparison as text."""
    lines = [f"best energy {report['best_energy']:.6g}, cap {report['energy_cap']:.6g}; "
             f"{report['chains_run']}/{report['chains_total']} chains, stopped: "
             f"{report['stopped']}; set aside: {report['outside_cap']} above the cap, "
             f"{report['repeats']} repeats, {report['no_gain']} without gain"]
    states = report["states"]
    if states:
        lines.append(f"{'id':<32} {'energy':>10} {'given up':>10} {'free':>5} {'gained':>6} "
                     f"{'dist':>5}  nearest")
        for s in states:
            lines.append(f"{s['id']:<32} {_f(s['energy'])} {_f(s['energy_given_up'])} "
                         f"{s['free_moves']:>5} {s['free_gained']:>+6} {s['distance']:>5}  "
                         f"{s['nearest_id']}")
    else:
        lines.append("no state proposed")
    h = report.get("heldout")
    if h:
        lines.append(f"held-out comparison ({h['heldout']} of {h['scenarios']} scenarios; "
                     f"curated to M={h['m']}, original to {h['m_original']}):")
        lines.append(f"  original  mean {_f(h['original_mean'])}  worst {_f(h['original_worst'])}"
                     f"  infeasible {h['original_infeasible']}")
        lines.append(f"  grown     mean {_f(h['grown_mean'])}  worst {_f(h['grown_worst'])}"
                     f"  infeasible {h['grown_infeasible']}")
        lines.append(f"  grown wins {h['wins']}, ties {h['ties']}, losses {h['losses']}")
    for key in ("heldout_message", "message"):
        if report.get(key):
            lines.append(report[key])
    lines.append(CAUTION)
    return "\n".join(lines)


def run(args: argparse.Namespace, *, out: TextIO | None = None, err: TextIO | None = None) -> int:
    """Run ``flipfix grow``; 0 on success, 2 on bad input (the message names the field) or a
    server that refused or failed (the message names the server and the status)."""
    out = sys.stdout if out is None else out
    err = sys.stderr if err is None else err
    if args.server is None and args.candidates is None:
        print("flipfix grow: error: candidates: a candidates JSON document is needed "
              "(or --server HOST:PORT with a stored problem)", file=err)
        return 2
    if args.server is not None and args.candidates is not None:
        print("flipfix grow: error: candidates: with --server the stored candidates are "
              "grown; give only the problem's name", file=err)
        return 2
    if args.keep and args.server is None:
        print("flipfix grow: error: --keep: needs --server (nothing is stored in-process)",
              file=err)
        return 2
    try:
        report = _remote(args, err) if args.server else _local(args, err)
    except InputError as exc:
        field = exc.field.removeprefix("settings.")
        print(f"flipfix grow: error: {_OPTION_OF.get(field, exc.field)}: {exc.message}",
              file=err)
        return 2
    except Exception as exc:  # grpc errors: the status and its field
        import grpc

        if not isinstance(exc, grpc.RpcError):
            raise
        code = exc.code()
        field, _, msg = (exc.details() or "").partition(": ")
        if code in (grpc.StatusCode.INVALID_ARGUMENT, grpc.StatusCode.NOT_FOUND):
            print(f"flipfix grow: error: {_OPTION_OF.get(field, field)}: {msg}", file=err)
            return 2
        print(f"flipfix grow: error: server {args.server}: {code.name}: {exc.details()}",
              file=err)
        return 2  # a server that refused or failed: exit code 2, as for every command
    print(format_report(report), file=out)
    if args.json:
        Path(args.json).write_text(json.dumps(report, indent=2), encoding="utf-8")
        print(f"written to {args.json}", file=out)
    return 0
