"""Shared benchmark helpers: seeded models, candidate libraries, late scenarios, tables.

Every random path takes a ``seed`` (numpy ``default_rng``). Models are in 0/1 form with
integer coefficients, so CP-SAT sees them exactly (scaling error 0).
"""

from __future__ import annotations

import json
import os
import platform
import subprocess
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from flipfix.repair import Problem
from flipfix.repair.lowering.compiled import compile_constraints
from flipfix.repair.model.constraints import FixVariables, HammingPenalty, LinearConstraint
from flipfix.repair.solvers.greedy import descend_qubo, greedy_repair
from flipfix.repair.documents.instances import read_bqp, read_gset, read_qkp

__all__ = [
    "ROOT", "BENCHMARKS", "RESULTS_DIR", "Instance", "random_sparse", "load_instance",
    "build_library", "scenarios", "Scenario", "table", "machine", "write_results", "hamming",
    "median_coupling",
]

ROOT = Path(__file__).resolve().parent.parent
BENCHMARKS = ROOT.parent / "shared" / "benchmarks"
RESULTS_DIR = Path(__file__).resolve().parent / "results"


# ------------------------------------------------------------------ models
def random_sparse(n: int, *, degree: int = 10, seed: int = 0, weight: int = 100) -> Problem:
    """Seeded random sparse QUBO: n*degree/2 distinct pairs, so ~``degree`` neighbours each.

    Linear and coupling coefficients are uniform integers in [-weight, weight] (zeros redrawn
    as 1). Energy E(x) = sum h_i x_i + sum_{i<j} J_ij x_i x_j, x in {0,1}^n.
    """
    rng = np.random.default_rng(seed)
    m = n * degree // 2
    pairs: set = set()
    while len(pairs) < m:
        a = rng.integers(0, n, size=2 * (m - len(pairs)))
        b = rng.integers(0, n, size=a.size)
        for i, j in zip(a.tolist(), b.tolist()):
            if i != j:
                pairs.add((min(i, j), max(i, j)))
                if len(pairs) == m:
                    break
    pairs_l = sorted(pairs)
    J = rng.integers(-weight, weight + 1, size=len(pairs_l))
    J[J == 0] = 1
    h = rng.integers(-weight, weight + 1, size=n)
    return Problem.from_terms(list(enumerate(h.astype(float))),
                              [(i, j, float(w)) for (i, j), w in zip(pairs_l, J)],
                              labels=range(n))


@dataclass
class Instance:
    """A benchmark problem with its base hard constraints (the knapsack capacity) if any.

    ``published``: best-known value of the *original* problem in our energy (minimisation)
    form, from ../shared/benchmarks/README.md, or None.
    """

    name: str
    problem: Problem
    base: list = field(default_factory=list)
    weights: np.ndarray | None = None
    capacity: float | None = None
    published: float | None = None


# best-known values, from ../shared/benchmarks/README.md (BiqMac table; Billionnet-Soutif table)
_BQP_BEST = {"bqp100-1": -7970, "bqp100-2": -11036, "bqp50-1": -2098, "bqp250-1": -45607}
_QKP_BEST = {"jeu_100_25_1": 18558, "jeu_100_50_1": 83742, "jeu_100_25_2": 56525}
# best-known cuts, from ../shared/benchmarks/README.md (public Gset best-known lists)
_GSET_BEST = {"G11": 564, "G14": 3064, "G67": 6950}


def load_instance(name: str, *, seed: int = 0) -> Instance:
    """bqp*-k, jeu_100_*_k, Gset G<k> (files in ../shared/benchmarks) or rand<n> (seeded
    random sparse). A Gset graph is read as the QUBO whose energy is minus the cut."""
    if name.startswith("bqp"):
        p = read_bqp(_find_file("bqp", name))
        return Instance(name, p, published=_BQP_BEST.get(name))
    if name.startswith("jeu"):
        k = read_qkp(_find_file("qkp", name))
        best = _QKP_BEST.get(name)
        return Instance(name, k.problem, [k.constraint], weights=np.asarray(k.weights, float),
                        capacity=float(k.capacity), published=None if best is None else -best)
    if name.startswith("rand"):
        return Instance(name, random_sparse(int(name[4:]), seed=seed))
    if name.startswith("G") and name[1:].isdigit():
        best = _GSET_BEST.get(name)
        return Instance(name, read_gset(_find_file("gset", name)),
                        published=None if best is None else -best)
    raise ValueError(f"unknown instance {name!r}")


def _find_file(folder: str, name: str) -> Path:
    for p in (BENCHMARKS / folder).iterdir():
        if p.stem == name or p.name == name:
            return p
    raise FileNotFoundError(name)


# ----------------------------------------------------------------- library
def build_library(inst: Instance, *, size: int = 100, seed: int = 0,
                  max_rounds: int = 20) -> np.ndarray:
    """``size`` distinct local minima from seeded uniform random starts: int8 (size, n).

    Unconstrained models: steepest single-flip descent (``descend_qubo``). Knapsacks: the
    same descent subject to the capacity (``greedy_repair`` on the base constraints), so
    every candidate is a feasible local minimum of the original problem.
    """
    p = inst.problem
    rng = np.random.default_rng(seed)
    comp = compile_constraints(p, list(inst.base)) if inst.base else None
    seen: dict = {}
    for _ in range(max_rounds):
        X0 = rng.integers(0, 2, size=(2 * size, p.n), dtype=np.int8)
        if comp is None:
            X, _ = descend_qubo(p.linear, p.indptr, p.indices, p.data, X0)
        else:
            X = greedy_repair(comp, X0).X
            X = X[comp.evaluate(X).feasible]
        for x in X:
            seen.setdefault(x.tobytes(), x)
            if len(seen) == size:
                return np.vstack(list(seen.values())).astype(np.int8)
    return np.vstack(list(seen.values())).astype(np.int8)


def median_coupling(p: Problem) -> float:
    """Median |J_ij| over the model's couplings (1.0 for a model without any)."""
    return float(np.median(np.abs(p.data))) if p.data.size else 1.0


def hamming(X: np.ndarray, x: np.ndarray) -> np.ndarray:
    """Hamming distance of x (n,) to every row of X (K, n): int64 (K,)."""
    return (np.asarray(X) != np.asarray(x)[None, :]).sum(axis=1)


# --------------------------------------------------------------- scenarios
@dataclass
class Scenario:
    """A late scenario: the full constraint list (base constraints included)."""

    name: str
    constraints: list
    note: str


def _field_scale(p: Problem) -> float:
    """Median over variables of (|h_i| + sum_j |J_ij|) / 2: a typical flip's energy swing."""
    absJ = np.add.reduceat(np.abs(p.data), p.indptr[:-1]) if p.data.size else np.zeros(p.n)
    absJ[np.diff(p.indptr) == 0] = 0.0
    return float(max(1.0, np.median((np.abs(p.linear) + absJ) / 2.0)))


def scenarios(inst: Instance, library: np.ndarray, *, seed: int = 0) -> dict:
    """The late scenarios (a), (b lin), (b thr), (c), (d) for this instance and library."""
    p = inst.problem
    n = p.n
    rng = np.random.default_rng(seed + 7919)
    base_comp = compile_constraints(p, list(inst.base))
    ev = base_comp.evaluate(library)
    cost = np.where(ev.feasible, ev.cost, np.inf)
    best = library[int(np.argmin(cost))]
    pick = rng.choice(n, size=min(10, n), replace=False)
    fix = FixVariables({int(i): int(1 - best[i]) for i in pick}, name="forced")
    ref_bits = rng.integers(0, 2, size=n)
    ref = {i: int(ref_bits[i]) for i in range(n)}
    scale = _field_scale(p)
    d_best = int((best != ref_bits).sum())
    lin = HammingPenalty(ref, weight=round(0.2 * scale, 1), shape="linear", name="near_ref")
    thr = HammingPenalty(ref, weight=round(2.0 * scale, 1), shape="threshold",
                         threshold=int(0.9 * d_best), name="near_ref_thr")
    if inst.weights is not None:
        cut = LinearConstraint({i: float(w) for i, w in enumerate(inst.weights)}, "<=",
                               float(int(0.8 * inst.capacity)), name="capacity_cut")
        c_list = [cut]
        c_note = f"capacity {inst.capacity:g} -> {int(0.8 * inst.capacity)}"
    else:
        k = int(0.9 * int(best.sum()))
        c_list = list(inst.base) + [LinearConstraint({i: 1.0 for i in range(n)}, "<=", float(k),
                                                     name="cardinality_cut")]
        c_note = f"sum x <= {k} (best has {int(best.sum())})"
    base = list(inst.base)
    return {
        "a": Scenario("a", base + [fix], "10 vars forced opposite to best"),
        "b_lin": Scenario("b_lin", base + [lin], f"Hamming linear w={lin.weight}"),
        "b_thr": Scenario("b_thr", base + [thr],
                          f"Hamming threshold d0={thr.threshold:g} w={thr.weight}"),
        "c": Scenario("c", c_list, c_note),
        "d": Scenario("d", base + [fix, lin], "(a)+(b lin)"),
    }


# ------------------------------------------------------------------ output
def _fmt(v) -> str:
    if isinstance(v, float):
        if v != v:
            return "nan"
        if abs(v) >= 1e5 or (v and abs(v) < 1e-3):
            return f"{v:.3g}"
        return f"{v:.4g}" if abs(v) < 100 else f"{v:.1f}"
    return str(v)


def table(rows: list, columns: list, *, title: str = "") -> str:
    """A GitHub-markdown table of dict rows (``columns`` picks and orders the keys)."""
    out = [f"### {title}", ""] if title else []
    cells = [[_fmt(r.get(c, "")) for c in columns] for r in rows]
    out.append("| " + " | ".join(columns) + " |")
    out.append("|" + "|".join("---" for _ in columns) + "|")
    out.extend("| " + " | ".join(c) + " |" for c in cells)
    return "\n".join(out)


def machine() -> dict:
    """nproc, CPU model, python / numpy / ortools / numba / grpcio versions."""
    import numba
    import ortools

    cpu = "unknown"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    try:
        import grpc

        grpc_v = grpc.__version__
    except ImportError:
        grpc_v = "missing"
    try:
        commit = subprocess.run(["git", "-C", str(ROOT), "rev-parse", "--short", "HEAD"],
                                capture_output=True, text=True, timeout=5).stdout.strip()
    except (OSError, subprocess.SubprocessError):
        commit = ""
    return {"nproc": os.cpu_count(), "cpu": cpu, "python": platform.python_version(),
            "numpy": np.__version__, "ortools": ortools.__version__, "numba": numba.__version__,
            "grpcio": grpc_v, "platform": platform.platform(), "commit": commit}


def write_results(doc: dict, name: str = "latest.json") -> Path:
    RESULTS_DIR.mkdir(parents=True, exist_ok=True)
    path = RESULTS_DIR / name
    tmp = path.with_suffix(".tmp")
    tmp.write_text(json.dumps(doc, indent=1, default=float))
    tmp.replace(path)
    return path


def now() -> float:
    return time.perf_counter()
