"""``flipfix audit``: robustness, stress test, Pareto front and curation of a candidate library.

The ``flipfix`` CLI (:mod:`flipfix.service.cli`) calls :func:`register` when it builds its
parser and :func:`run` when the subcommand is ``audit``. Everything numerical is
in the core (:mod:`flipfix.repair.audit.robustness`, :mod:`flipfix.repair.audit.stress`, :mod:`flipfix.repair.audit.pareto`,
:mod:`flipfix.repair.audit.curation`); this module reads the documents, prints a table and draws
the figure (matplotlib, Agg backend, no display needed).

With ``--server HOST:PORT`` the first argument names a problem stored in a running
service and the candidates are the ones stored with it: the same four parts run
there (``ProfileRobustness``, ``StressTestStream`` or ``CurateLibrary``, ``ParetoFront``)
and the same table and figure are printed here. ``--keep M --commit`` then keeps only
the M chosen candidates in the store.

The figures are advice for the person who keeps the library: they propose which
candidates to keep; that person decides.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import textwrap
from pathlib import Path
from typing import Any, TextIO

from flipfix.repair.errors import InputError

__all__ = ["register", "run", "audit", "audit_remote", "draw_figure", "format_table"]


def register(subparsers) -> argparse.ArgumentParser:
    """Add the ``audit`` subcommand to ``subparsers`` (from ``add_subparsers``)."""
    p = subparsers.add_parser(
        "audit", help="audit a candidate library: robustness, stress test, Pareto, curation",
        description="Profile every candidate (free variables, flip costs), repair the whole "
                    "library under N seeded random late constraints, and report which candidates "
                    "absorb late changes cheaply.")
    p.add_argument("problem", help="problem JSON document (with --server: a stored problem's name)")
    p.add_argument("candidates", nargs="?", default=None,
                   help="candidates JSON document (not with --server: the stored ones are used)")
    p.add_argument("--scenarios", type=int, default=20, help="number of seeded scenarios (20)")
    p.add_argument("--shape", default="linear", choices=("linear", "quadratic", "threshold"),
                   help="shape of the Hamming penalty to a random reference (linear)")
    p.add_argument("--weight", type=float, default=1.0,
                   help="weight of the Hamming penalty, energy units per flip; 0 disables (1.0)")
    p.add_argument("--threshold", type=float, default=0.0, help="threshold of the threshold shape")
    p.add_argument("--fraction", type=float, default=1.0,
                   help="share of the variables the reference covers, in (0, 1] (1.0)")
    p.add_argument("--reference", default="uniform", choices=("uniform", "perturbed"),
                   help="random reference: uniform bits or a perturbed library candidate")
    p.add_argument("--fix-k", type=int, default=0, help="random variables fixed per scenario (0)")
    p.add_argument("--cut", type=float, default=0.0,
                   help="capacity cut in percent: sum x <= (1 - p/100) * library max (0: off)")
    p.add_argument("--epsilon", type=float, default=0.0,
                   help="a variable is free when its single flip costs <= epsilon (0)")
    p.add_argument("--method", default="greedy", choices=("greedy", "cpsat", "portfolio"),
                   help="repair method of the stress test (greedy: fast, deterministic)")
    p.add_argument("--time-limit", type=float, default=30.0,
                   help="time budget of the stress test in seconds (30)")
    p.add_argument("--pareto-methods", default="greedy,cpsat",
                   help="methods whose repairs form the Pareto front (greedy,cpsat)")
    p.add_argument("--pareto-time", type=float, default=2.0,
                   help="time budget of the Pareto repairs in seconds (2)")
    p.add_argument("--constraints", default=None,
                   help="constraints JSON for the Pareto front (default: scenario 0)")
    p.add_argument("--seed", type=int, default=0, help="seed of the scenarios and repairs (0)")
    p.add_argument("--keep", type=int, default=None, help="choose M candidates to keep")
    p.add_argument("--png", default=None, help="write the figure to this PNG file")
    p.add_argument("--json", default=None, help="write the full audit to this JSON file")
    p.add_argument("--server", metavar="HOST:PORT", default=None,
                   help="audit a problem stored in a running flipfix service")
    p.add_argument("--commit", action="store_true",
                   help="with --server and --keep M: keep only the chosen candidates in the store")
    p.set_defaults(func=run)
    return p


def _load(path: str, field: str) -> Any:
    try:
        with open(path, encoding="utf-8") as fh:
            return json.load(fh)
    except OSError as exc:
        raise InputError(field, f"cannot read {path}: {exc.strerror or exc}") from None
    except json.JSONDecodeError as exc:
        raise InputError(field, f"{path} is not valid JSON: {exc.msg} at line {exc.lineno}") from None


def audit(problem, candidates, family, *, scenarios: int, seed: int, method: str,
          time_limit: float, epsilon: float, keep: int | None, pareto_constraints=None,
          pareto_methods=("greedy", "cpsat"), pareto_time: float = 2.0, cancel=None,
          progress=None) -> dict:
    """Run the four parts of the audit and return their plain-data reports."""
    from flipfix.repair.audit.curation import curate
    from flipfix.repair.audit.front import cost_flip_front
    from flipfix.repair.audit.pareto import cheapest_within, fewest_flips_within
    from flipfix.repair.audit.robustness import robustness_profile
    from flipfix.repair.audit.stress import draw_scenarios, stress_test

    prof = robustness_profile(problem, candidates, epsilon=epsilon)
    stress = stress_test(problem, candidates, family, scenarios=scenarios, seed=seed, method=method,
                         time_limit=time_limit, epsilon=epsilon, cancel=cancel, progress=progress)
    if pareto_constraints is None:
        sc = draw_scenarios(problem, candidates, family, count=1, seed=seed)[0]
        pareto_constraints, pareto_what = sc.constraints, f"scenario 0: {sc.description}"
    else:
        pareto_what = "given constraints"
    front = cost_flip_front(problem, candidates, pareto_constraints, methods=tuple(pareto_methods),
                            time_limit=pareto_time, seed=seed, cancel=cancel)
    cur = None
    if keep is not None and stress.scenarios_done > 0:
        cur = curate(stress.cost_matrix(), keep, ids=stress.ids)
    best = front[-1].cost if front else None
    return {"robustness": prof, "stress": stress, "pareto": front, "pareto_for": pareto_what,
            "curation": cur,
            "cheapest_within_5": cheapest_within(front, 5) if front else None,
            "fewest_within_1pct": fewest_flips_within(front, 1.0) if front else None,
            "best_cost": best}


def audit_remote(client, name: str, family, *, scenarios: int, seed: int, method: str,
                 time_limit: float, epsilon: float, keep: int | None, commit: bool = False,
                 pareto_constraints=None, pareto_methods=("greedy", "cpsat"),
                 pareto_time: float = 2.0, progress=None) -> dict:
    """:func:`audit` through a running service (``client``: :class:`flipfix.service.client.FlipfixClient`);
    the library is the stored problem ``name`` (candidates of its current revision)."""
    from flipfix.repair.audit.stress import draw_scenarios

    prof = client.robustness(name, epsilon=epsilon)
    opts = dict(scenarios=scenarios, seed=seed, method=method, time_limit=time_limit,
                epsilon=epsilon)
    cur, kept_note = None, None
    if keep is not None:
        out = client.curate(name, family, keep, keep=commit, **opts)
        stress, cur = out["stress"], out["curation"]
        kept_note = out["message"] + (f"; removed: {', '.join(out['removed_ids'])}"
                                      if out["removed_ids"] else "")
    else:
        stress = client.stress_test(name, family, on_progress=progress, **opts)
    if pareto_constraints is None:  # scenario 0, drawn exactly as the server draws it
        info, problem = client.get_problem(name)
        [lib] = client.list_candidates(name, revision=info.revision)  # one revision: one run
        cands = lib.candidate_set()
        sc = draw_scenarios(problem, cands, family, count=1, seed=seed)[0]
        pareto_constraints, pareto_what = sc.constraints, f"scenario 0: {sc.description}"
    else:
        pareto_what = "given constraints"
    got = client.pareto_front(name, pareto_constraints, methods=tuple(pareto_methods),
                              time_limit=pareto_time, seed=seed, cheapest_within_flips=5,
                              fewest_flips_within_percent=1.0)
    front = got["front"]
    return {"robustness": prof, "stress": stress, "pareto": front, "pareto_for": pareto_what,
            "curation": cur, "cheapest_within_5": got["cheapest_within"],
            "fewest_within_1pct": got["fewest_flips_within"],
            "best_cost": front[-1].cost if front else None, "kept": kept_note}


def _f(v: float | None, width: int = 10) -> str:
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return "-".rjust(width)
    return f"{v:{width}.4g}"


def format_table(report: dict) -> str:
    """The per-candidate table and the summary lines, as text."""
    prof = {p.candidate_id: p for p in report["robustness"].profiles}
    st = report["stress"]
    dec = report["robustness"].n_decisions > 0
    wid = max([len("candidate")] + [len(c.candidate_id) for c in st.candidates])
    head = (f"{'candidate':<{wid}} {'energy':>10} {'free':>5}" + (f" {'fdec':>5}" if dec else "")
            + f" {'mean cost':>10} {'worst cost':>10} {'mean flips':>10} {'max flips':>9}"
            f" {'wins':>5} {'fail':>5}")
    lines = [f"stress test: {st.scenarios_done}/{st.scenarios_requested} scenarios, method "
             f"{st.method}, seed {st.seed}, {st.seconds:.2f} s"
             + (f" ({st.message})" if st.message else ""), head, "-" * len(head)]
    for c in st.candidates:
        p = prof[c.candidate_id]
        lines.append(
            f"{c.candidate_id:<{wid}} {_f(c.energy)} {c.free_variables:>5d}"
            + (f" {p.free_decisions:>5d}" if dec else "")
            + f" {_f(c.mean_cost)} {_f(c.worst_cost)} {_f(c.mean_flips)}"
            f" {(str(c.worst_flips) if c.worst_flips >= 0 else '-'):>9} {c.wins:>5d} {c.failures:>5d}")
    corr = ("n/a" if st.spearman is None else
            f"Spearman {st.spearman:+.3f}, Pearson {st.pearson:+.3f} over {st.correlated} candidates")
    lines.append(f"free variables (flip cost <= {st.epsilon:g}) vs mean repair cost: {corr}"
                 + ("  (negative: broad minima repair more cheaply)" if st.spearman is not None
                    and st.spearman < 0 else ""))
    front = report["pareto"]
    lines.append(f"Pareto front (cost, flips) for {report['pareto_for']}:")
    lines.append("  " + ", ".join(f"({p.cost:.4g}, {p.flips}) {p.candidate_id}/{p.method}"
                                  for p in front) if front else "  no feasible repair")
    a, b = report["cheapest_within_5"], report["fewest_within_1pct"]
    if a is not None:
        lines.append(f"  cheapest within 5 flips: {a.cost:.6g} with {a.flips} flips ({a.candidate_id})")
    if b is not None:
        lines.append(f"  fewest flips within 1% of the best cost: {b.flips} flips at "
                     f"{b.cost:.6g} ({b.candidate_id})")
    cur = report["curation"]
    if cur is not None:
        lines.append(f"keep {cur.m}: {', '.join(cur.kept_ids)}; mean excess over the full library "
                     f"{cur.mean_gap:.4g} (worst {cur.worst_gap:.4g}, {100 * cur.relative_gap:.2f}% "
                     f"of total |cost|), scenarios lost: {cur.uncovered}")
    if report.get("kept"):
        lines.append(f"store: {report['kept']}")
    return "\n".join(lines)



def _integer_axis(ax, locator) -> None:
    """Whole-number ticks on a count axis; a narrow range gets half a unit of room each side."""
    lo, hi = ax.get_xlim()
    if hi - lo < 4.0:
        ax.set_xlim(round(lo) - 0.5, round(hi) + 0.5)
    ax.xaxis.set_major_locator(locator(integer=True, min_n_ticks=1))


def draw_figure(report: dict, path: str) -> None:
    """PNG: mean (and worst) repair cost against free variables; the Pareto front."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.ticker import MaxNLocator

    st = report["stress"]
    fig, (ax1, ax2) = plt.subplots(1, 2, figsize=(11, 4.6), constrained_layout=True)
    xs = [c.free_variables for c in st.candidates]
    mean = [c.mean_cost for c in st.candidates]
    worst = [c.worst_cost for c in st.candidates]
    wins = [c.wins for c in st.candidates]
    sizes = [30 + 170 * w / max(1, st.scenarios_done) for w in wins]
    ax1.scatter(xs, worst, marker="v", color="tab:red", alpha=0.6, label="worst repair cost")
    ax1.scatter(xs, mean, s=sizes, color="tab:blue", alpha=0.75,
                label="mean repair cost (size: wins)")
    if len(xs) <= 25:
        for c in st.candidates:
            if math.isfinite(c.mean_cost):
                ax1.annotate(c.candidate_id, (c.free_variables, c.mean_cost), fontsize=7,
                             xytext=(4, 3), textcoords="offset points")
    corr = "" if st.spearman is None else f" (Spearman {st.spearman:+.2f})"
    ax1.set_title(f"Repair cost vs free variables, {st.scenarios_done} scenarios{corr}", fontsize=10)
    ax1.set_xlabel(f"free variables (single flip cost <= {st.epsilon:g}), count")
    _integer_axis(ax1, MaxNLocator)
    ax1.set_ylabel("repair cost (energy units of the problem)")
    ax1.margins(x=0.12, y=0.08)
    ax1.grid(alpha=0.3)
    ax1.legend(fontsize=8, loc="best")
    front = report["pareto"]
    if front:
        fx = [p.flips for p in front]
        fy = [p.cost for p in front]
        ax2.step(fx, fy, where="post", color="tab:green", alpha=0.6)
        ax2.scatter(fx, fy, color="tab:green", zorder=3, label="non-dominated repairs")
        for p in front:
            ax2.annotate(f"{p.candidate_id} ({p.method})", (p.flips, p.cost), fontsize=7,
                         xytext=(4, 3), textcoords="offset points")
        ax2.legend(fontsize=8, loc="best")
    else:
        ax2.text(0.5, 0.5, "no feasible repair", ha="center", va="center", transform=ax2.transAxes)
    what = textwrap.shorten(report["pareto_for"], width=110, placeholder=" ...")
    ax2.set_title("Pareto front of cost and flips\n" + textwrap.fill(what, 62), fontsize=9)
    ax2.margins(x=0.15, y=0.08)
    ax2.set_xlabel("flips (variables changed), count")
    _integer_axis(ax2, MaxNLocator)
    ax2.set_ylabel("repair cost (energy units of the problem)")
    ax2.grid(alpha=0.3)
    fig.savefig(path, dpi=120)
    plt.close(fig)


def _json_ready(report: dict) -> dict:
    def pt(p):
        return None if p is None else {"cost": p.cost, "flips": p.flips,
                                       "candidate_id": p.candidate_id, "method": p.method}

    return {
        "robustness": report["robustness"].to_dict(),
        "stress": report["stress"].to_dict(),
        "pareto_for": report["pareto_for"],
        "pareto": [pt(p) for p in report["pareto"]],
        "cheapest_within_5": pt(report["cheapest_within_5"]),
        "fewest_within_1pct": pt(report["fewest_within_1pct"]),
        "curation": None if report["curation"] is None else report["curation"].to_dict(),
    }


#: core field names -> the CLI option that sets them
_OPTION_OF = {
    "family.hamming_weight": "--weight", "family.hamming_shape": "--shape",
    "family.hamming_threshold": "--threshold", "family.hamming_fraction": "--fraction",
    "family.reference": "--reference", "family.fix_k": "--fix-k",
    "family.capacity_cut_percent": "--cut", "family": "--weight/--fix-k/--cut",
    "scenarios": "--scenarios", "seed": "--seed", "time_limit": "--time-limit",
    "epsilon": "--epsilon", "m": "--keep", "methods": "--pareto-methods", "method": "--method",
}


def run(args: argparse.Namespace, *, out: TextIO | None = None, err: TextIO | None = None) -> int:
    """Run ``flipfix audit``; 0 on success, 2 on bad input (the message names the field)."""
    out = sys.stdout if out is None else out
    err = sys.stderr if err is None else err
    from flipfix.repair.documents.forms import parse_candidates, parse_problem

    if getattr(args, "server", None):
        return _run_remote(args, out, err)
    if args.candidates is None:
        print("flipfix audit: error: candidates: a candidates JSON document is needed "
              "(or --server HOST:PORT with a stored problem)", file=err)
        return 2
    try:
        problem = parse_problem(_load(args.problem, "problem"))
        doc = _load(args.candidates, "candidates")
        if isinstance(doc, dict) and "candidates" in doc:
            doc = doc["candidates"]
        candidates = parse_candidates(doc, problem)
        cons = _pareto_constraints(args, problem)
        family = _family_of(args)
        methods = _pareto_methods(args)
        report = audit(problem, candidates, family, scenarios=args.scenarios, seed=args.seed,
                       method=args.method, time_limit=args.time_limit, epsilon=args.epsilon,
                       keep=args.keep, pareto_constraints=cons, pareto_methods=methods,
                       pareto_time=args.pareto_time)
    except InputError as exc:
        field = _OPTION_OF.get(exc.field, exc.field)
        print(f"flipfix audit: error: {field}: {exc.message}", file=err)
        return 2
    _emit(args, report, out)
    return 0


def _pareto_constraints(args, problem):
    """The --constraints document (a list, or {"constraints": [...]}) parsed, or None."""
    from flipfix.repair.documents.forms import parse_constraints

    if not args.constraints:
        return None
    cdoc = _load(args.constraints, "constraints")
    if isinstance(cdoc, dict) and "constraints" in cdoc:
        cdoc = cdoc["constraints"]
    return parse_constraints(cdoc, problem)


def _pareto_methods(args) -> tuple:
    return tuple(m.strip() for m in args.pareto_methods.split(",") if m.strip())


def _family_of(args):
    from flipfix.repair.audit.stress import ScenarioFamily

    return ScenarioFamily(
        hamming_weight=args.weight, hamming_shape=args.shape, hamming_threshold=args.threshold,
        hamming_fraction=args.fraction, reference=args.reference, fix_k=args.fix_k,
        capacity_cut_percent=args.cut)


def _run_remote(args: argparse.Namespace, out: TextIO, err: TextIO) -> int:
    import grpc

    from flipfix.service.client import FlipfixClient

    if args.candidates is not None:
        print("flipfix audit: error: candidates: with --server the stored candidates are "
              "audited; give only the problem's name", file=err)
        return 2
    if args.commit and args.keep is None:
        print("flipfix audit: error: --commit: needs --keep M", file=err)
        return 2
    budget = args.time_limit + args.pareto_time
    with FlipfixClient(args.server, timeout=2 * budget + 60.0) as fx:
        try:
            cons = None
            if args.constraints:
                _info, problem = fx.get_problem(args.problem)
                cons = _pareto_constraints(args, problem)
            family = _family_of(args)
            methods = _pareto_methods(args)
            report = audit_remote(
                fx, args.problem, family, scenarios=args.scenarios, seed=args.seed,
                method=args.method, time_limit=args.time_limit, epsilon=args.epsilon,
                keep=args.keep, commit=args.commit, pareto_constraints=cons,
                pareto_methods=methods, pareto_time=args.pareto_time)
        except InputError as exc:
            field = _OPTION_OF.get(exc.field, exc.field)
            print(f"flipfix audit: error: {field}: {exc.message}", file=err)
            return 2
        except grpc.RpcError as exc:
            if exc.code() in (grpc.StatusCode.INVALID_ARGUMENT, grpc.StatusCode.NOT_FOUND):
                field, _, msg = (exc.details() or "").partition(": ")
                bare = field.removeprefix("stress.")  # CurateLibrary nests the stress request
                field = {"problem": "PROBLEM"}.get(bare) or _OPTION_OF.get(bare, field)
                print(f"flipfix audit: error: {field}: {msg}", file=err)
                return 2
            print(f"flipfix audit: error: server {args.server}: {exc.code().name}: "
                  f"{exc.details()}", file=err)
            return 1
    _emit(args, report, out)
    return 0


def _emit(args: argparse.Namespace, report: dict, out: TextIO) -> None:
    print(format_table(report), file=out)
    if args.png:
        draw_figure(report, args.png)
        print(f"figure written to {args.png}", file=out)
    if args.json:
        Path(args.json).write_text(json.dumps(_json_ready(report), indent=2), encoding="utf-8")
        print(f"audit written to {args.json}", file=out)


def main(argv: list[str] | None = None) -> int:
    """Stand-alone entry (``python -m flipfix.service.audit_cli ...``) until flipfix.service.cli dispatches."""
    parser = argparse.ArgumentParser(prog="flipfix")
    register(parser.add_subparsers(dest="command", required=True))
    return run(parser.parse_args(argv))


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
