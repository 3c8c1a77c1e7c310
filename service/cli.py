"""The ``flipfix`` command.

    flipfix serve  [--port 50051] [--db flipfix.sqlite3] [--workers 1] [limits...]
    flipfix repair PROBLEM.json CANDIDATES.json CONSTRAINTS.json [--method M] [--time-limit S]
                   [--max-flips N] [--flip-price P] [--seed S] [--server HOST:PORT]
    flipfix demo
    flipfix audit ...   (when flipfix.service.audit_cli is installed)
    flipfix grow ...    (flipfix.service.grow_cli)

``repair`` runs in-process by default and prints the result JSON on stdout
(progress on stderr); ``--server`` sends the same files through the service. A
malformed file gives one line ``flipfix: FILE: FIELD: what is wrong`` and exit code 2.
"""

from __future__ import annotations

import argparse
import json
import os
import re
import signal
import sys
import threading
from pathlib import Path

from flipfix.repair.errors import InputError
from flipfix.service.progress import Progress

__all__ = ["main", "build_parser"]

EXIT_USAGE = 2  # a bad file or option (argparse uses 2 too)
EXIT_FAILURE = 1
EXIT_NOT_FEASIBLE = 3  # with --require-feasible: the answer breaks a hard constraint


class UsageError(Exception):
    """One line for stderr, exit code 2."""


# ------------------------------------------------------------------ helpers
def _load_json(path: str, what: str):
    """The JSON document in ``path`` (strict: :mod:`flipfix.repair.documents.jsontext`); for
    the problem also a dimod ConstrainedQuadraticModel file."""
    from flipfix.repair.documents import jsontext

    try:
        raw = Path(path).read_bytes()
    except OSError as err:
        raise UsageError(f"{path}: cannot read the {what} file: {err.strerror or err}") from None
    from flipfix.repair.documents import dimod_forms

    if what == "problem" and raw.startswith(dimod_forms.CQM_MAGIC):
        return dimod_forms.read_cqm_file(raw)
    try:
        return jsontext.loads(raw, field=what)
    except InputError as err:
        raise UsageError(f"{path}: {err.field}: {err.message}") from None


_OPTION_FIELDS = {"method": "--method", "time_limit": "--time-limit", "max_flips": "--max-flips",
                  "flip_price": "--flip-price", "seed": "--seed", "workers": "--workers",
                  "plan": "--plan", "plan_candidate_id": "--plan"}


def _blame(err: InputError, files: dict) -> str:
    """Which file (or option) an error's field belongs to, as ``SOURCE: FIELD: message``."""
    field = err.field
    bare = field[len("inline."):] if field.startswith("inline.") else field
    m = re.match(r"[A-Za-z_]*", bare)
    head = {"model": "problem"}.get(m.group(), m.group())
    if head in files:
        return f"{files[head]}: {field}: {err.message}"
    opt = field.split(".")[-1]
    if opt in _OPTION_FIELDS:
        return f"option {_OPTION_FIELDS[opt]}: {err.message}"
    return f"{field}: {err.message}"


def _repair_options(args) -> dict:
    return {"method": args.method, "time_limit": args.time_limit, "max_flips": args.max_flips,
            "flip_price": args.flip_price, "seed": args.seed, "workers": args.workers,
            "pareto": args.pareto, "plan": args.plan}


def cmd_repair(args) -> int:
    files = {"problem": args.problem, "candidates": args.candidates,
             "constraints": args.constraints}
    docs = {k: _load_json(v, k) for k, v in files.items()}
    show = Progress("repair", budget=args.time_limit, enabled=not args.quiet)
    try:
        if args.server:
            out = _repair_remote(args, docs, show)
        else:
            out = _repair_local(args, docs, show)
    except InputError as err:
        raise UsageError(_blame(err, files)) from None
    if out.get("conflict"):  # the hard constraints that cannot all hold, readable
        print(f"flipfix: {out['conflict']['message']}", file=sys.stderr)
    if args.output == "sampleset":  # dimod's serialised SampleSet of the answer
        json.dump(out.pop("_sampleset"), sys.stdout)
    else:
        out.pop("_sampleset", None)
        json.dump(out, sys.stdout, indent=2)
    sys.stdout.write("\n")
    if args.require_feasible and not out["best"]["feasible"]:
        broken = [k for k, v in out["best"].get("violations", {}).items() if v]
        print(f"flipfix: the answer is not feasible (status {out['status']}"
              + (f"; violated: {', '.join(broken)}" if broken else "")
              + (f"; {out['message']}" if out.get("message") else "") + ")",
              file=sys.stderr)
        return EXIT_NOT_FEASIBLE
    return 0


def _repair_local(args, docs: dict, show: Progress) -> dict:
    from flipfix.repair.documents import dimod_forms, forms as documents
    from flipfix.repair import repair

    from flipfix.repair.kernels.readiness import warm_up

    warm_up()  # before any clock: a first run compiles the kernels (announced on stderr)
    if args.method != "greedy":  # OR-Tools loads in about a second: before the progress clock too
        from flipfix.repair.solvers import cpsat  # noqa: F401
    problem, rows = dimod_forms.read_problem(docs["problem"])
    candidates = dimod_forms.read_candidates(docs["candidates"], problem)
    constraints = rows + documents.parse_constraints(docs["constraints"], problem)
    with show:
        res = repair(problem, candidates, constraints, **_repair_options(args), progress=show)
        show({"phase": "done", "best_cost": res.best.cost if res.best.feasible else None})
    out = res.to_dict()
    if args.output == "sampleset":
        out["_sampleset"] = dimod_forms.to_sampleset(out, problem).to_serializable()
    return out


def _repair_remote(args, docs: dict, show: Progress) -> dict:
    from flipfix.service.client import FlipfixClient, FlipfixError

    # the client reads each document once, before any call; its errors name the field
    # (problem..., candidates..., constraints...), which _blame maps to the file
    budget = args.time_limit
    timeout = None if budget is None else budget * 2 + 30.0
    from flipfix.service import connect

    with FlipfixClient(args.server, timeout=timeout,
                       connection=connect.from_args(args, args.server)) as fx:
        try:
            fx.wait_ready(notice=lambda m: print(m, file=sys.stderr, flush=True))
            call = fx.repair_sampleset if args.output == "sampleset" else fx.repair
            with show:
                got = call(docs["problem"], docs["constraints"], candidates=docs["candidates"],
                           **_repair_options(args), on_progress=show.message)
                best = (got[1] if args.output == "sampleset" else got)["best"]
                show({"phase": "done", "best_cost": best["cost"] if best["feasible"] else None})
            if args.output == "sampleset":
                return {**got[1], "_sampleset": got[0].to_serializable()}
            return got
        except FlipfixError as err:
            if err.reason == "INVALID_FIELD":
                raise InputError(err.field, err.violations[0][1] if err.violations
                                 else err.details()) from None
            raise UsageError(f"server {args.server}: {err.code().name}: {err.details()}") from None
        except TimeoutError as err:
            raise UsageError(f"server {args.server}: {err}") from None


def cmd_serve(args) -> int:
    import logging

    from flipfix.service.server import ServerConfig, create_server

    logging.basicConfig(level=logging.INFO, format="%(asctime)s %(name)s %(message)s")
    config = ServerConfig(
        db_path=args.db, workers=args.workers, queue_size=args.queue,
        max_message_bytes=int(args.max_message_mb * 1024 * 1024),
        max_variables=args.max_variables, max_candidates=args.max_candidates,
        max_constraints=args.max_constraints, default_time_limit=args.default_time_limit,
        max_couplings=args.max_couplings, heavy_calls=args.heavy_calls,
        heavy_queue=args.queue, memory_mb=args.memory_mb, tls_cert=args.tls_cert,
        tls_key=args.tls_key, tls_client_ca=args.tls_client_ca,
        allow_insecure_public_bind=args.allow_insecure_public_bind,
        reflection=not args.no_reflection, token_file=args.token_file,
        quota_problems=args.quota_problems, quota_candidates=args.quota_candidates,
        quota_mb=args.quota_mb, dask=args.dask or "", max_records=args.max_records)
    try:
        srv = create_server(f"{args.host}:{args.port}", config)
    except OSError as err:
        raise UsageError(str(err)) from None
    except InputError as err:
        raise UsageError(f"{err.field}: {err.message}") from None

    def stop(signum, _frame):
        srv.begin_shutdown()  # new calls get UNAVAILABLE from here on
        print(f"flipfix: signal {signum}: shutting down (grace {args.grace}s)", file=sys.stderr,
              flush=True)
        threading.Thread(target=srv.shutdown, args=(args.grace,), daemon=True).start()

    def reload(_signum, _frame):
        threading.Thread(target=srv.reload_tokens, daemon=True).start()

    # the handlers are in place before the line that tells a supervisor (or a test) that
    # the server is up, so a signal sent on seeing it is never taken by the default action
    signal.signal(signal.SIGTERM, stop)
    signal.signal(signal.SIGINT, stop)
    signal.signal(signal.SIGHUP, reload)
    print(f"flipfix: serving on {args.host}:{srv.port} (db {srv.store.where}, "
          f"{args.workers} worker(s)); health NOT_SERVING until the search kernels are loaded",
          file=sys.stderr, flush=True)
    srv.pool.when_ready(lambda: print("flipfix: ready (health SERVING)", file=sys.stderr,
                                      flush=True))

    srv.wait_for_termination()  # an event; signal handlers run while it waits
    print("flipfix: stopped", file=sys.stderr, flush=True)
    # the store is closed and the workers have ended: skip the interpreter's teardown
    # (about 0.5 s of joining library threads) so the process ends within the grace period
    logging.shutdown()
    sys.stdout.flush()
    os._exit(0)


def cmd_demo(args) -> int:
    from flipfix.service.demo import run_demo

    return run_demo(seed=args.seed, time_limit=args.time_limit)


# ------------------------------------------------------------------- parser
def _positive_float(text: str) -> float:
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
    if not v > 0:
        raise argparse.ArgumentTypeError(f"must be > 0, got {text}")
    return v


class _Parser(argparse.ArgumentParser):
    """argparse with one-line errors (``flipfix repair: argument --time-limit: ...``, exit 2)
    instead of the usage block; ``--help`` still shows the usage."""

    def error(self, message: str):
        self.exit(EXIT_USAGE, f"{self.prog}: {message}\n")


def build_parser() -> argparse.ArgumentParser:
    ap = _Parser(prog="flipfix", description="Repair a library of QUBO/Ising "
                                 "solutions when a late constraint arrives.")
    sub = ap.add_subparsers(dest="command", required=True)

    s = sub.add_parser("serve", help="run the gRPC service")
    s.add_argument("--host", default="127.0.0.1")
    s.add_argument("--port", type=int, default=50051, help="0 picks a free port")
    s.add_argument("--db", default="flipfix.sqlite3",
                   help="an SQLite database file, or a postgresql:// URL shared by replicas")
    s.add_argument("--workers", type=int, default=2, help="repair processes")
    s.add_argument("--queue", type=int, default=64,
                   help="repairs that may wait for a worker, and heavy calls for the gate")
    s.add_argument("--heavy-calls", type=int, default=2,
                   help="uploads/conversions run at once (the rest wait in the queue)")
    s.add_argument("--memory-mb", type=float, default=2048.0,
                   help="estimated memory all heavy calls together may use (25 x request bytes)")
    s.add_argument("--max-couplings", type=int, default=2_000_000)
    s.add_argument("--tls-cert", metavar="FILE", help="server certificate chain (PEM)")
    s.add_argument("--tls-key", metavar="FILE", help="server private key (PEM)")
    s.add_argument("--tls-client-ca", metavar="FILE",
                   help="require client certificates signed by these CAs (mutual TLS)")
    s.add_argument("--allow-insecure-public-bind", action="store_true",
                   help="serve a non-loopback --host without TLS and tokens (unsafe)")
    s.add_argument("--no-reflection", action="store_true", help="do not serve gRPC reflection")
    s.add_argument("--quota-problems", type=int, default=None, help="per tenant (unlimited)")
    s.add_argument("--quota-candidates", type=int, default=None, help="per tenant (unlimited)")
    s.add_argument("--quota-mb", type=float, default=None,
                   help="stored MiB per tenant: models and packed candidates (unlimited)")
    s.add_argument("--token-file", metavar="FILE",
                   help="JSON-lines token hashes with tenant and role (SIGHUP reloads it); "
                        "every call but health then needs a bearer token")
    s.add_argument("--max-message-mb", type=float, default=64.0)
    s.add_argument("--max-variables", type=int, default=100_000)
    s.add_argument("--max-candidates", type=int, default=10_000)
    s.add_argument("--max-constraints", type=int, default=1_000)
    s.add_argument("--default-time-limit", type=_positive_float, default=5.0)
    s.add_argument("--max-records", type=int, default=1000, metavar="N",
                   help="run records kept per problem (the oldest go first)")
    s.add_argument("--grace", type=float, default=10.0, help="seconds in-flight calls get on SIGTERM")
    s.add_argument("--dask", metavar="ADDRESS|local:N", default=None,
                   help="run stress tests on a Dask cluster: a scheduler address "
                        "(tcp://host:8786) or local:N worker processes started here")
    s.set_defaults(func=cmd_serve)

    r = sub.add_parser("repair", help="repair the candidates of PROBLEM under CONSTRAINTS")
    r.add_argument("problem", metavar="PROBLEM.json")
    r.add_argument("candidates", metavar="CANDIDATES.json")
    r.add_argument("constraints", metavar="CONSTRAINTS.json")
    r.add_argument("--method", choices=("portfolio", "greedy", "cpsat"), default="portfolio")
    r.add_argument("--time-limit", type=_positive_float, default=5.0, metavar="SECONDS")
    r.add_argument("--max-flips", type=int, default=None, metavar="N")
    r.add_argument("--flip-price", type=float, default=0.0, metavar="P")
    r.add_argument("--seed", type=int, default=0)
    r.add_argument("--workers", type=int, default=1, help="search threads: CP-SAT workers and greedy batches")
    r.add_argument("--pareto", action="store_true", help="also report the (cost, flips) front")
    r.add_argument("--plan", metavar="CANDIDATE_ID", default=None,
                   help="the plan in force (a candidate id): plan_distance counts from it and, "
                        "at equal cost, the answer nearest to it is reported")
    r.add_argument("--server", metavar="HOST:PORT", help="repair through a running service")
    r.add_argument("--quiet", action="store_true", help="no progress on stderr")
    r.add_argument("--output", choices=("result", "sampleset"), default="result",
                   help="stdout: the result JSON (result), or the answer as dimod's serialised "
                        "SampleSet JSON (sampleset)")
    r.add_argument("--require-feasible", action="store_true",
                   help=f"exit with code {EXIT_NOT_FEASIBLE} when the answer is not feasible "
                        "(the result JSON is printed all the same)")
    from flipfix.service import connect

    connect.add_arguments(r)
    r.set_defaults(func=cmd_repair)

    d = sub.add_parser("demo", help="start a server, load a library, repair a late event")
    d.add_argument("--seed", type=int, default=0)
    d.add_argument("--time-limit", type=_positive_float, default=3.0)
    d.set_defaults(func=cmd_demo)

    from flipfix.service import audit_cli, token_cli  # commands in their own modules

    token_cli.register(sub)
    audit_cli.register(sub)
    from flipfix.service import grow_cli  # flipfix grow, in its own module

    grow_cli.register(sub)
    from flipfix.service import timeline_cli  # events, records, adoption: their own module

    timeline_cli.register(sub)
    for name, p in sub.choices.items():
        if p.get_default("func") is None and name not in ("serve", "repair", "demo", "token"):
            p.set_defaults(func=audit_cli.run)
    return ap


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    try:
        return int(args.func(args) or 0)
    except UsageError as err:
        print(f"flipfix: {err}", file=sys.stderr)
        return EXIT_USAGE
    except InputError as err:
        print(f"flipfix: {err.field}: {err.message}", file=sys.stderr)
        return EXIT_USAGE
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":
    sys.exit(main())
