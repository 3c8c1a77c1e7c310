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
from contextlib import contextmanager
from pathlib import Path
from typing import Any, TextIO

import numpy as np

from flipfix.repair.documents import jsontext
from flipfix.repair.errors import InputError
from flipfix.service.errors import TransientError
from flipfix.service import connect

__all__ = ["register", "run", "audit", "audit_remote", "draw_figure", "format_table"]


def register(subparsers) -> argparse.ArgumentParser:
    """Add the ``audit`` subcommand to ``subparsers`` (from ``add_subparsers``)."""
    p = subparsers.add_parser(
        "audit", help="audit a candidate library: robustness, stress test, Pareto, curation",
        description="Profile every candidate (free variables and decisions, flip costs), repair "
                    "the whole library under N seeded random late constraints, and report which "
                    "candidates absorb late changes cheaply.")
    p.add_argument("problem", help="problem JSON document (with --server: a stored problem's name)")
    p.add_argument("candidates", nargs="?", default=None,
                   help="candidates JSON document (not with --server: the stored ones are used)")
    p.add_argument("--scenarios", type=int, default=20, help="number of seeded scenarios (20)")
    fam = p.add_argument_group(
        "scenario family",
        "Each scenario combines every part set here. With none of --weight, --fix-k, --cut, "
        "--unavailable, --must-change: --unavailable 1 on a problem with declared decisions "
        "(a uniform random bit reference would break every one-hot decision), else --weight 1. "
        "An unset --weight is 1 on problems without decisions and 0 on problems with them.")
    fam.add_argument("--shape", default="linear", choices=("linear", "quadratic", "threshold"),
                     help="shape of the Hamming penalty to a random reference (linear)")
    fam.add_argument("--weight", type=float, default=None,
                     help="weight of the Hamming penalty, energy units per flip; 0 disables "
                          "(unset: see above)")
    fam.add_argument("--threshold", type=float, default=0.0, help="threshold of the threshold shape")
    fam.add_argument("--fraction", type=float, default=1.0,
                     help="share of the variables the reference covers, in (0, 1] (1.0)")
    fam.add_argument("--reference", default="uniform", choices=("uniform", "perturbed"),
                     help="random reference: uniform bits or a perturbed library candidate")
    fam.add_argument("--fix-k", type=int, default=None,
                     help="random variables fixed to random values per scenario (0: off)")
    fam.add_argument("--cut", type=float, default=None,
                     help="capacity cut in percent: sum x <= (1 - p/100) * library max (0: off)")
    fam.add_argument("--unavailable", type=int, default=None, metavar="N",
                     help="decision level: N random decisions each lose one value held in the "
                          "library (0: off)")
    fam.add_argument("--must-change", type=int, default=None, metavar="K",
                     help="decision level: K decisions of a random library plan must change; "
                          "each loses that plan's value (0: off)")
    p.add_argument("--epsilon", type=float, default=0.0,
                   help="a variable is free when its single flip costs <= epsilon, a decision "
                        "when a one-step move does (0)")
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
    p.add_argument("--dask", metavar="ADDRESS|local:N", default=None,
                   help="run the stress test's scenarios on a Dask cluster: a scheduler "
                        "address (tcp://host:8786) or local:N worker processes started here")
    p.add_argument("--server", metavar="HOST:PORT", default=None,
                   help="audit a problem stored in a running flipfix service")
    p.add_argument("--quiet", action="store_true", help="no progress on stderr")
    p.add_argument("--commit", action="store_true",
                   help="with --server and --keep M: keep only the chosen candidates in the store")
    connect.add_arguments(p)
    p.set_defaults(func=run)
    return p


def _load(path: str, field: str) -> Any:
    try:
        with open(path, "rb") as fh:
            raw = fh.read()
    except OSError as exc:
        raise InputError(field, f"cannot read {path}: {exc.strerror or exc}") from None
    return jsontext.loads(raw, field=field)


def audit(problem, candidates, family=None, *, scenarios: int, seed: int, method: str,
          time_limit: float, epsilon: float, keep: int | None, pareto_constraints=None,
          pareto_methods=("greedy", "cpsat"), pareto_time: float = 2.0, cancel=None,
          progress=None, runner=None) -> dict:
    """Run the four parts of the audit and return their plain-data reports.

    ``runner``: where the stress test's scenarios run (None: here, one after another;
    :class:`flipfix.service.cluster.DaskRunner`: on a Dask cluster).

    ``family`` None is :func:`flipfix.repair.audit.stress.default_family` of the problem.
    """
    from flipfix.repair.audit.curation import curate
    from flipfix.repair.audit.front import cost_flip_front
    from flipfix.repair.audit.pareto import cheapest_within, fewest_flips_within
    from flipfix.repair.audit.robustness import robustness_profile
    from flipfix.repair.audit.stress import default_family, draw_scenarios, stress_test

    if family is None:
        family = default_family(problem)
    if progress is not None:
        progress({"phase": "robustness"})
    prof = robustness_profile(problem, candidates, epsilon=epsilon)
    stress = stress_test(problem, candidates, family, scenarios=scenarios, seed=seed, method=method,
                         time_limit=time_limit, epsilon=epsilon, cancel=cancel, progress=progress,
                         runner=runner)
    if pareto_constraints is None:
        sc = draw_scenarios(problem, candidates, family, count=1, seed=seed)[0]
        pareto_constraints, pareto_what = sc.constraints, f"scenario 0: {sc.description}"
    else:
        pareto_what = "given constraints"
    if progress is not None:
        progress({"phase": "pareto"})
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
    the library is the stored problem ``name`` (candidates of its current revision).
    ``progress`` gets a dict ``{"phase"}`` at each stage and the stress test's progress
    messages (:class:`flipfix.service.progress.Progress` takes both).
    """
    from flipfix.repair.audit.stress import draw_scenarios

    if progress is not None:
        progress({"phase": "robustness"})
    prof = client.robustness(name, epsilon=epsilon)
    opts = dict(scenarios=scenarios, seed=seed, method=method, time_limit=time_limit,
                epsilon=epsilon)
    cur, kept_note = None, None
    if keep is not None:
        if progress is not None:
            progress({"phase": "stress + curation"})
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
    if progress is not None:
        progress({"phase": "pareto"})
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


def _free_axis(report: dict) -> tuple[str, list]:
    """What the robustness side counts, as a label, and its value per candidate.

    Without declared decisions: free variables. With them: free moves, the free
    variables (outside decisions) plus the free decisions.
    """
    st = report["stress"]
    if report["robustness"].n_decisions > 0:
        return (f"free moves (free variables + free decisions, cost <= {st.epsilon:g})",
                [c.free_moves for c in st.candidates])
    return (f"free variables (single flip cost <= {st.epsilon:g})",
            [c.free_variables for c in st.candidates])


def format_table(report: dict) -> str:
    """The per-candidate table and the summary lines, as text."""
    st = report["stress"]
    dec = report["robustness"].n_decisions > 0
    wid = max([len("candidate")] + [len(c.candidate_id) for c in st.candidates])
    head = (f"{'candidate':<{wid}} {'energy':>10} {'free var':>8}"
            + (f" {'free dec':>8}" if dec else "")
            + f" {'mean cost':>10} {'worst cost':>10} {'mean flips':>10} {'max flips':>9}"
            f" {'wins':>5} {'fail':>5}")
    lines = [f"stress test: {st.scenarios_done}/{st.scenarios_requested} scenarios, method "
             f"{st.method}, seed {st.seed}, {st.seconds:.2f} s"
             + (f" ({st.message})" if st.message else ""),
             "scenarios: " + _family_text(st.family), head, "-" * len(head)]
    for c in st.candidates:
        lines.append(
            f"{c.candidate_id:<{wid}} {_f(c.energy)} {c.free_variables:>8d}"
            + (f" {c.free_decisions:>8d}" if dec else "")
            + f" {_f(c.mean_cost)} {_f(c.worst_cost)} {_f(c.mean_flips)}"
            f" {(str(c.worst_flips) if c.worst_flips >= 0 else '-'):>9} {c.wins:>5d} {c.failures:>5d}")
    corr = ("n/a" if st.spearman is None else
            f"Spearman {st.spearman:+.3f}, Pearson {st.pearson:+.3f} over {st.correlated} candidates")
    lines.append(f"{_free_axis(report)[0]} vs mean repair cost: {corr}"
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


def _family_text(family: dict) -> str:
    """The enabled parts of a family document (:meth:`ScenarioFamily.to_dict`), in words."""
    if not family or "hamming_weight" not in family:
        return "given scenarios"
    parts = []
    if family["hamming_weight"]:
        parts.append(f"{family['hamming_shape']} Hamming penalty w={family['hamming_weight']:g} to a "
                     f"{family['reference']} reference")
    if family.get("fix_k"):
        parts.append(f"{family['fix_k']} variables fixed")
    if family.get("capacity_cut_percent"):
        parts.append(f"capacity cut {family['capacity_cut_percent']:g}%")
    if family.get("unavailable_values"):
        parts.append(f"{family['unavailable_values']} decision value(s) unavailable")
    if family.get("must_change"):
        parts.append(f"{family['must_change']} decision(s) of a library plan must change")
    return "; ".join(parts)


#: at most this many candidate names on the left panel (the lowest mean repair costs)
NAMED_CANDIDATES = 10
#: at most this many named points on the Pareto front (both ends always)
NAMED_FRONT = 12


def _count_axis(ax, values) -> None:
    """A count axis from 0 with whole-number ticks and room after the largest value."""
    from matplotlib.ticker import MaxNLocator

    hi = max([0] + [v for v in values if math.isfinite(v)])
    ax.set_xlim(0, hi + max(0.5, 0.08 * hi))
    ax.xaxis.set_major_locator(MaxNLocator(integer=True, min_n_ticks=1))


def _spread(n: int, most: int) -> list[int]:
    """Indices of at most ``most`` of n items, evenly spread, first and last included."""
    if n <= most:
        return list(range(n))
    return sorted({round(i * (n - 1) / (most - 1)) for i in range(most)})


#: where a label goes around its point, in order of preference: (dx, dy) on a square ring
#: (max(|dx|, |dy|) = 1); the label's box lies on the side the offset points to
_DIRECTIONS = ((1, 1), (1, -1), (-1, 1), (-1, -1), (1, 0), (-1, 0), (0, 1), (0, -1),
               (1, .5), (1, -.5), (-1, .5), (-1, -.5), (.5, 1), (-.5, 1), (.5, -1), (-.5, -1))
#: distances (points) from a marker's edge to its label, tried in order
_STEPS = (1.5, 6.0, 12.0, 20.0, 30.0, 44.0, 60.0)


def _overlap(a, b) -> float:
    """Area shared by two boxes (x0, y0, x1, y1)."""
    w = min(a[2], b[2]) - max(a[0], b[0])
    h = min(a[3], b[3]) - max(a[1], b[1])
    return w * h if w > 0 and h > 0 else 0.0


def place_labels(ax, xy, texts, *, half: Any = 4.0, obstacles=(), fontsize: float = 7.0) -> list:
    """Annotate each point ``xy[i]`` (data coordinates) with ``texts[i]`` without overlaps.

    Labels are placed in input order (put the most important first). Each takes the
    first offset (:data:`_STEPS` from its marker's edge, in the :data:`_DIRECTIONS`)
    whose box stays inside the axes and overlaps neither a label placed before, nor a
    marker of ``xy`` (a square of half side ``half`` points: one number or one per
    point), nor ``obstacles`` ((x, y, half side in points): other markers), nor the
    legend; when none is free, the offset with the least overlap. A label away from
    its point gets a thin leader line. Call it once the axis limits and the layout are
    final (boxes are computed in display pixels). Returns the
    :class:`matplotlib.text.Annotation` objects in input order.
    """
    fig = ax.figure
    renderer = fig.canvas.get_renderer()
    px = fig.dpi / 72.0  # pixels per point
    pts = np.asarray(xy, dtype=float).reshape(-1, 2)
    halves = np.broadcast_to(np.asarray(half, dtype=float), (len(pts),))

    def square(x, y, h):
        dx, dy = ax.transData.transform((x, y))
        return (dx - h * px, dy - h * px, dx + h * px, dy + h * px)

    taken = [square(x, y, h) for (x, y), h in zip(pts, halves)]
    taken += [square(x, y, h) for x, y, h in obstacles]
    if ax.get_legend() is not None:
        taken.append(tuple(ax.get_legend().get_window_extent(renderer).extents))
    fx0, fy0, fx1, fy1 = ax.bbox.extents
    out = []
    for (x, y), h, text in zip(pts, halves, texts):
        ann = ax.annotate(text, (x, y), xytext=(0, 0), textcoords="offset points",
                          fontsize=fontsize, annotation_clip=False)
        ext = ann.get_window_extent(renderer)
        w, t = ext.width + 2.0, ext.height + 2.0  # a pixel of padding each side
        cx, cy = ax.transData.transform((x, y))
        best = None
        for step in _STEPS:
            rad = h + step
            for ux, uy in _DIRECTIONS:
                ox, oy = cx + ux * rad * px, cy + uy * rad * px
                x0 = ox if ux == 1 else ox - w if ux == -1 else ox - w / 2
                y0 = oy if uy == 1 else oy - t if uy == -1 else oy - t / 2
                box = (x0, y0, x0 + w, y0 + t)
                outside = (max(0.0, fx0 - box[0]) + max(0.0, box[2] - fx1)) * t \
                    + (max(0.0, fy0 - box[1]) + max(0.0, box[3] - fy1)) * w
                bad = outside + sum(_overlap(box, o) for o in taken)
                if best is None or bad < best[0]:
                    best = (bad, step, ux, uy, rad, box)
                if bad == 0.0:
                    break
            if best[0] == 0.0:
                break
        _, step, ux, uy, rad, box = best
        ann.remove()
        ann = ax.annotate(
            text, (x, y), xytext=(ux * rad, uy * rad), textcoords="offset points",
            fontsize=fontsize, annotation_clip=False,
            ha="left" if ux == 1 else "right" if ux == -1 else "center",
            va="bottom" if uy == 1 else "top" if uy == -1 else "center",
            arrowprops=(dict(arrowstyle="-", lw=0.5, color="0.45", shrinkA=0, shrinkB=h)
                        if step > _STEPS[0] else None))
        taken.append(box)
        out.append(ann)
    return out


def draw_figure(report: dict, path: str) -> Any:
    """PNG: mean (and worst) repair cost against free variables, or free moves when the
    problem declares decisions, named by candidate; the Pareto front of cost and flips,
    each point named. Returns the closed figure (for tests that inspect its artists)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    st = report["stress"]
    fig, (ax1, ax2) = plt.subplots(1, 2, figsize=(12, 5.2), dpi=120, constrained_layout=True)
    what, xs = _free_axis(report)
    mean = [c.mean_cost for c in st.candidates]
    worst = [c.worst_cost for c in st.candidates]
    wins = [c.wins for c in st.candidates]
    sizes = [30 + 170 * w / max(1, st.scenarios_done) for w in wins]
    ax1.scatter(xs, worst, marker="v", color="tab:red", alpha=0.6, label="worst repair cost",
                clip_on=False)
    ax1.scatter(xs, mean, s=sizes, color="tab:blue", alpha=0.75,
                label="mean repair cost (size: wins)", clip_on=False)
    named = sorted((k for k, c in enumerate(st.candidates) if math.isfinite(c.mean_cost)),
                   key=lambda k: (st.candidates[k].mean_cost, k))
    rule = "names: every candidate"
    if len(named) > NAMED_CANDIDATES:
        named = named[:NAMED_CANDIDATES]
        rule = f"names: the {NAMED_CANDIDATES} lowest mean costs"
    ax1.plot([], [], " ", label=rule)
    corr = "" if st.spearman is None else f" (Spearman {st.spearman:+.2f})"
    short = what.split(" (")[0]
    ax1.set_title(f"Repair cost vs {short}, {st.scenarios_done} scenarios{corr}", fontsize=10)
    ax1.set_xlabel(f"{what}, count")
    ax1.set_ylabel("repair cost (energy units of the problem)")
    _count_axis(ax1, xs)
    ax1.margins(y=0.12)
    ax1.grid(alpha=0.3)
    ax1.legend(fontsize=8, loc="best")
    front = report["pareto"]
    shown = []
    if front:
        fx = [p.flips for p in front]
        fy = [p.cost for p in front]
        ax2.step(fx, fy, where="post", color="tab:green", alpha=0.6)
        ax2.scatter(fx, fy, color="tab:green", zorder=3, label="non-dominated repairs",
                    clip_on=False)
        shown = _spread(len(front), NAMED_FRONT)
        if len(shown) < len(front):
            ax2.plot([], [], " ", label=f"names: {len(shown)} of {len(front)} points, spread")
        ax2.legend(fontsize=8, loc="best")
        _count_axis(ax2, fx)
    else:
        ax2.text(0.5, 0.5, "no feasible repair", ha="center", va="center", transform=ax2.transAxes)
        ax2.set_xlim(0, 1)
    what2 = textwrap.shorten(report["pareto_for"], width=110, placeholder=" ...")
    ax2.set_title("Pareto front of cost and flips\n" + textwrap.fill(what2, 62), fontsize=9)
    ax2.margins(y=0.12)
    ax2.set_xlabel("flips (variables changed), count")
    ax2.set_ylabel("repair cost (energy units of the problem)")
    ax2.grid(alpha=0.3)
    # fix the layout, then place the names in display space (they must not move afterwards)
    fig.canvas.draw()
    fig.set_layout_engine("none")
    place_labels(ax1, [(xs[k], mean[k]) for k in named],
                 [st.candidates[k].candidate_id for k in named],
                 half=[math.sqrt(sizes[k]) / 2 for k in named],
                 obstacles=[(x, w, 3.0) for x, w in zip(xs, worst) if math.isfinite(w)]
                 + [(x, m, math.sqrt(a) / 2) for x, m, a in zip(xs, mean, sizes)
                    if math.isfinite(m)])
    place_labels(ax2, [(front[k].flips, front[k].cost) for k in shown],
                 [f"{front[k].candidate_id} ({front[k].method})" for k in shown])
    fig.savefig(path)  # at the figure's dpi, the one the names were placed at
    plt.close(fig)
    return fig


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
    "family.capacity_cut_percent": "--cut", "family.unavailable_values": "--unavailable",
    "family.must_change": "--must-change",
    "family": "--weight/--fix-k/--cut/--unavailable/--must-change",
    "scenarios": "--scenarios", "seed": "--seed", "time_limit": "--time-limit",
    "epsilon": "--epsilon", "m": "--keep", "methods": "--pareto-methods", "method": "--method",
}


def run(args: argparse.Namespace, *, out: TextIO | None = None, err: TextIO | None = None) -> int:
    """Run ``flipfix audit``; 0 on success, 2 on bad input (the message names the field)."""
    out = sys.stdout if out is None else out
    err = sys.stderr if err is None else err
    from flipfix.repair.documents.forms import parse_candidates, parse_problem

    if getattr(args, "server", None):
        if getattr(args, "dask", None):
            print("flipfix audit: error: dask: --dask runs an in-process audit's stress test on "
                  "a cluster; with --server the server's own --dask decides", file=err)
            return 2
        return _run_remote(args, out, err)
    if args.candidates is None:
        print("flipfix audit: error: candidates: a candidates JSON document is needed "
              "(or --server HOST:PORT with a stored problem)", file=err)
        return 2
    from flipfix.repair.kernels.readiness import warm_up

    warm_up()  # before the stress test's clock: a first run compiles the kernels (announced)
    try:
        problem = parse_problem(_load(args.problem, "problem"))
        doc = _load(args.candidates, "candidates")
        if isinstance(doc, dict) and "candidates" in doc:
            doc = doc["candidates"]
        candidates = parse_candidates(doc, problem)
        cons = _pareto_constraints(args, problem)
        family = _family_of(args, problem)
        methods = _pareto_methods(args)
        with _cluster(getattr(args, "dask", None)) as runner, _progress(args, err) as show:
            report = audit(problem, candidates, family, scenarios=args.scenarios,
                           seed=args.seed, method=args.method, time_limit=args.time_limit,
                           epsilon=args.epsilon, keep=args.keep, pareto_constraints=cons,
                           pareto_methods=methods, pareto_time=args.pareto_time, runner=runner,
                           progress=show)
    except (InputError, TransientError) as exc:
        field = _OPTION_OF.get(exc.field, exc.field)
        print(f"flipfix audit: error: {field}: {exc.message}", file=err)
        return 2
    _emit(args, report, out)
    return 0


def _progress(args, err: TextIO):
    """The audit's progress on ``err`` (a bar on a terminal, lines elsewhere): the stress
    test counts scenarios; the budget is the stress test's plus the front's."""
    from flipfix.service.progress import Progress

    return Progress("audit", budget=args.time_limit + args.pareto_time, unit="scenarios",
                    enabled=not getattr(args, "quiet", False), stream=err)


@contextmanager
def _cluster(text: str | None):
    """A :class:`flipfix.service.cluster.DaskRunner` for ``--dask`` (closed after), or None."""
    if not text:
        yield None
        return
    from flipfix.service.cluster import DaskRunner, connect

    cluster = connect(text, field="dask")
    try:
        yield DaskRunner(cluster.client)
    finally:
        cluster.close()


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


#: family part -> the option that sets it
_PART_OPTIONS = {"hamming_weight": "weight", "fix_k": "fix_k", "capacity_cut_percent": "cut",
                 "unavailable_values": "unavailable", "must_change": "must_change"}


def _family_of(args, problem):
    """The scenario family of the options: the parts given, or, with none given,
    :func:`flipfix.repair.audit.stress.default_family` (an unset ``--weight`` is that
    family's Hamming weight: 1 without declared decisions, 0 with them)."""
    from dataclasses import replace

    from flipfix.repair.audit.stress import default_family

    given = {part: getattr(args, opt) for part, opt in _PART_OPTIONS.items()
             if getattr(args, opt) is not None}
    fam = default_family(problem)
    if given:
        fam = replace(fam, unavailable_values=0, must_change=0)
    return replace(fam, hamming_shape=args.shape, hamming_threshold=args.threshold,
                   hamming_fraction=args.fraction, reference=args.reference, **given)


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
    with FlipfixClient(args.server, timeout=2 * budget + 60.0,
                       connection=connect.from_args(args, args.server)) as fx:
        try:
            fx.wait_ready(notice=lambda m: print(m, file=sys.stderr, flush=True))
            _info, problem = fx.get_problem(args.problem)
            cons = _pareto_constraints(args, problem)
            family = _family_of(args, problem)
            methods = _pareto_methods(args)
            with _progress(args, err) as show:
                report = audit_remote(
                    fx, args.problem, family, scenarios=args.scenarios, seed=args.seed,
                    method=args.method, time_limit=args.time_limit, epsilon=args.epsilon,
                    keep=args.keep, commit=args.commit, pareto_constraints=cons,
                    pareto_methods=methods, pareto_time=args.pareto_time, progress=show)
        except InputError as exc:
            field = _OPTION_OF.get(exc.field, exc.field)
            print(f"flipfix audit: error: {field}: {exc.message}", file=err)
            return 2
        except grpc.RpcError as exc:
            if exc.code() in (grpc.StatusCode.INVALID_ARGUMENT, grpc.StatusCode.NOT_FOUND):
                field, _, msg = (exc.details() or "").partition(": ")
                bare = field.removeprefix("stress.")  # CurateLibrary nests the stress request
                field = {"problem": "PROBLEM", "name": "PROBLEM"}.get(bare) or _OPTION_OF.get(bare, field)
                print(f"flipfix audit: error: {field}: {msg}", file=err)
                return 2
            print(f"flipfix audit: error: server {args.server}: {exc.code().name}: "
                  f"{exc.details()}", file=err)
            return 2  # a server that refused or failed: exit code 2, as for every command
        except TimeoutError as exc:
            print(f"flipfix audit: error: server {args.server}: {exc}", file=err)
            return 2
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
