"""``flipfix timeline ...``: events, the published plan, repairs, records and adoption
of a problem stored in a running service (``--server HOST:PORT``, default 127.0.0.1:50051).

    flipfix timeline publish  ward c1
    flipfix timeline add-event ward event.json        # one constraint JSON object (its name)
    flipfix timeline events   ward [--all]
    flipfix timeline withdraw ward 3
    flipfix timeline repair   ward [CONSTRAINTS.json] --events --from-published --stay-close 2
    flipfix timeline records  ward [--limit 20]
    flipfix timeline record   ward 7
    flipfix timeline adopt    ward 7 [--id monday-v2] [--publish]

Every command prints JSON on stdout. A repair whose hard constraints cannot all hold also
prints the conflicting set on stderr (index, name and the event it came from). Errors:
one line on stderr naming the field (or the server and the status when the server failed),
exit code 2.
"""

from __future__ import annotations

import argparse
import json
import sys
from typing import TextIO

__all__ = ["register", "run"]


def register(subparsers) -> argparse.ArgumentParser:
    """Add the ``timeline`` command (and its sub-commands) to ``subparsers``."""
    from flipfix.service.cli import _positive_float as _positive

    p = subparsers.add_parser("timeline", help="events, published plan, records and adoption "
                                               "of a stored problem (needs a running service)")
    p.add_argument("--server", metavar="HOST:PORT", default="127.0.0.1:50051")
    sub = p.add_subparsers(dest="timeline_command", required=True)

    def cmd(name: str, help_: str) -> argparse.ArgumentParser:
        c = sub.add_parser(name, help=help_)
        c.add_argument("problem", metavar="PROBLEM", help="a stored problem's name")
        return c

    c = cmd("add-event", "add a late event (one constraint JSON object)")
    c.add_argument("constraint", metavar="EVENT.json")
    c = cmd("events", "list the events in force")
    c.add_argument("--all", action="store_true", help="also the withdrawn ones")
    c = cmd("withdraw", "withdraw an event in force")
    c.add_argument("event_id", type=int, metavar="EVENT_ID")
    c = cmd("publish", "make a stored candidate the published plan")
    c.add_argument("candidate_id", metavar="CANDIDATE_ID")
    cmd("published", "show the published plan")
    c = cmd("repair", "repair the stored library (recorded)")
    c.add_argument("constraints", nargs="?", metavar="CONSTRAINTS.json",
                   help="constraints sent with the request, besides the events")
    c.add_argument("--events", action="store_true", help="apply the events in force")
    c.add_argument("--from-published", action="store_true",
                   help="repair the published plan (not the whole library)")
    c.add_argument("--stay-close", type=_positive, default=None, metavar="WEIGHT",
                   help="penalty per bit changed from the published plan")
    c.add_argument("--by-decisions", action="store_true",
                   help="with --stay-close: per decision changed instead of per bit")
    c.add_argument("--method", choices=("portfolio", "greedy", "cpsat"), default="portfolio")
    c.add_argument("--time-limit", type=_positive, default=5.0, metavar="SECONDS")
    c.add_argument("--seed", type=int, default=0)
    c.add_argument("--alternatives", type=int, default=0, metavar="K",
                   help="also return up to K feasible answers that differ")
    c.add_argument("--distance", type=int, default=1, metavar="D",
                   help="alternatives at least D bits (or decisions) apart")
    c.add_argument("--no-record", action="store_true", help="do not record this repair")
    c.add_argument("--plan", metavar="CANDIDATE_ID", default=None,
                   help="the plan in force, if not the published plan")
    c = cmd("records", "list the records, newest first")
    c.add_argument("--limit", type=int, default=None, metavar="N")
    c = cmd("record", "show one record in full")
    c.add_argument("record_id", type=int, metavar="RECORD_ID")
    c = cmd("adopt", "store a recorded answer as a new candidate")
    c.add_argument("record_id", type=int, metavar="RECORD_ID")
    c.add_argument("--id", default="", metavar="CANDIDATE_ID", help="default: adopted-RECORD_ID")
    c.add_argument("--publish", action="store_true", help="also make it the published plan")
    p.set_defaults(func=run)
    return p


def _read(path: str):
    from flipfix.service.cli import UsageError, _load_json

    try:
        return _load_json(path, "JSON")
    except UsageError as err:
        raise ValueError(str(err)) from None


def _call(tl, args):
    from flipfix.service.timeline_client import as_dict

    cmd, name = args.timeline_command, args.problem
    if cmd == "add-event":
        return tl.add_event(name, _read(args.constraint))
    if cmd == "events":
        return tl.list_events(name, include_withdrawn=args.all)
    if cmd == "withdraw":
        return tl.withdraw_event(name, args.event_id)
    if cmd == "publish":
        return tl.set_published_plan(name, args.candidate_id)
    if cmd == "published":
        return tl.published_plan(name)
    if cmd == "records":
        return tl.list_records(name, limit=args.limit)
    if cmd == "record":
        return as_dict(tl.get_record(name, args.record_id))
    if cmd == "adopt":
        return tl.adopt(name, args.record_id, candidate_id=args.id, publish=args.publish)
    cons = _read(args.constraints) if args.constraints else []
    return tl.repair(name, cons if isinstance(cons, list) else [cons], use_events=args.events,
                     from_published_plan=args.from_published, stay_close=args.stay_close or 0.0,
                     by_decisions=args.by_decisions, skip_record=args.no_record,
                     method=args.method, time_limit=args.time_limit, seed=args.seed,
                     alternatives=args.alternatives, alternative_distance=args.distance,
                     plan=args.plan, timeout=args.time_limit * 2 + 30.0)


def conflict_lines(conflict: dict) -> list[str]:
    """Readable lines of a repair's conflict: one per member."""
    lines = ["flipfix: the hard constraints cannot all hold"
             + ("" if conflict.get("minimal") else " (set not proved minimal)") + ":"]
    for m in conflict["members"]:
        origin = f"event {m['event_id']}" if m.get("event_id") else "request"
        lines.append(f"  [{m['index']}] {m['name']} ({origin})")
    return lines


def run(args: argparse.Namespace, *, out: TextIO | None = None, err: TextIO | None = None) -> int:
    import grpc

    from flipfix.repair.errors import InputError
    from flipfix.service.timeline_client import TimelineClient

    out = out or sys.stdout
    err = err or sys.stderr
    try:
        with TimelineClient(args.server, timeout=60.0) as tl:
            result = _call(tl, args)
    except (InputError, ValueError) as exc:
        print(f"flipfix timeline: error: {exc}", file=err)
        return 2
    except grpc.RpcError as exc:
        code = exc.code()
        bad = (grpc.StatusCode.INVALID_ARGUMENT, grpc.StatusCode.NOT_FOUND,
               grpc.StatusCode.ALREADY_EXISTS, grpc.StatusCode.FAILED_PRECONDITION)
        print(f"flipfix timeline: error: {code.name}: {exc.details()}"
              + ("" if code in bad else f" (server {args.server})"), file=err)
        return 2  # a refused request or a failed server alike, as for every command
    if isinstance(result, dict) and result.get("conflict"):
        print("\n".join(conflict_lines(result["conflict"])), file=err)
    json.dump(result, out, indent=2)
    out.write("\n")
    return 0
