"""What-if stress test: repair the whole library under N seeded random late constraints.

A :class:`ScenarioFamily` describes the random late constraints, alone or combined.
Bit level:

* a Hamming penalty to a random reference (uniform random bits, or a random
  library candidate with a share of its bits flipped), with a chosen shape and
  weight, over all variables or a random share of them;
* ``fix_k`` random variables fixed to random values;
* a capacity cut: ``sum_i a_i x_i <= (1 - p/100) * max over the library`` (0/1
  form; ``a`` = 1 for every variable by default, a cardinality cut).

Decision level (problems with declared decisions, :mod:`flipfix.repair.model.encodings`;
every scenario keeps each encoding valid and leaves every decision a value):

* ``unavailable_values``: that many random decisions each lose one value (drawn
  among the values some library candidate holds, so the loss touches the library);
* ``must_change``: a random library candidate (valid in every decision) is the plan
  in force and k random decisions of it must change: each loses the value that
  plan holds. That plan needs exactly k decision changes, no more.

A uniform random bit reference breaks every one-hot decision, so its repair costs
measure re-encoding rather than the late change; :func:`default_family` therefore
picks a decision-level family for a problem with declared decisions.

:func:`draw_scenarios` draws them (scenario i depends only on ``seed`` and i, so
a longer run starts with the same scenarios); :func:`stress_test` repairs the
library under each and reports per candidate how often it produced the best
repair, its mean and worst repair cost and flips, its free variables and free
decisions (:mod:`flipfix.repair.audit.robustness`), and the correlation between its
free moves (free variables plus free decisions) and its mean repair cost.
"""

from __future__ import annotations

import math
import time
from dataclasses import asdict, dataclass
from typing import Any, Callable, Iterator, Mapping, Protocol, Sequence

import numpy as np

from flipfix.repair.model.candidates import CandidateSet
from flipfix.repair.model.constraints import SHAPES, FixVariables, HammingPenalty, LinearConstraint
from flipfix.repair.errors import InputError
from flipfix.repair.model.constraints import ForbidValues
from flipfix.repair.model.encodings import decode_indices
from flipfix.repair.model.problem import Problem
from flipfix.repair.model.vartypes import BINARY, change_vartype
from flipfix.repair.audit.robustness import robustness_profile

__all__ = ["ScenarioFamily", "Scenario", "CandidateStress", "StressReport", "draw_scenarios",
           "default_family", "stress_test", "summarise", "pearson", "spearman", "REFERENCES",
           "PARTS", "ScenarioRunner", "scenario_costs"]

REFERENCES = ("uniform", "perturbed")


@dataclass(frozen=True)
class ScenarioFamily:
    """A family of random late constraints; every enabled part goes into each scenario.

    hamming_weight: weight of the Hamming penalty (0 disables it), in energy
        units per flip (linear shape) or per shape unit.
    hamming_shape, hamming_threshold: as in :class:`flipfix.repair.model.constraints.HammingPenalty`.
    hamming_fraction: share (0, 1] of the variables the reference covers.
    reference: "uniform" (random bits) or "perturbed" (a random library
        candidate with each bit flipped with probability ``perturb_rate``).
    fix_k: number of random variables fixed to random values (0 disables).
    capacity_cut_percent: p in [0, 100); 0 disables the capacity cut.
    capacity_weights: label -> weight >= 0 of the capacity row (default 1 each).
    unavailable_values: number of random decisions that each lose one value (0
        disables; decision level).
    must_change: number k of decisions of a random library plan that must change
        (0 disables; decision level). The decisions of the two decision-level parts
        are distinct, so together they need at most the problem's decision count.

    The Hamming weight defaults to 1: ``ScenarioFamily(hamming_weight=0,
    unavailable_values=1)`` is a purely decision-level family (:func:`default_family`).
    """

    hamming_weight: float = 1.0
    hamming_shape: str = "linear"
    hamming_threshold: float = 0.0
    hamming_fraction: float = 1.0
    reference: str = "uniform"
    perturb_rate: float = 0.1
    fix_k: int = 0
    capacity_cut_percent: float = 0.0
    capacity_weights: Mapping | None = None
    unavailable_values: int = 0
    must_change: int = 0

    def validate(self, problem: Problem, *, field: str = "family") -> None:
        f = field + "."
        for name in ("hamming_weight", "hamming_threshold", "hamming_fraction", "perturb_rate",
                     "capacity_cut_percent"):
            v = getattr(self, name)
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
                raise InputError(f + name, f"{v!r} is not a finite number")
        if self.hamming_weight < 0:
            raise InputError(f + "hamming_weight", f"must be >= 0, got {self.hamming_weight!r}")
        if self.hamming_shape not in SHAPES or self.hamming_shape == "table":
            raise InputError(f + "hamming_shape",
                             f"must be linear, quadratic or threshold, got {self.hamming_shape!r}")
        if not 0 < self.hamming_fraction <= 1:
            raise InputError(f + "hamming_fraction", f"must be in (0, 1], got {self.hamming_fraction!r}")
        if self.reference not in REFERENCES:
            raise InputError(f + "reference", f"must be one of {REFERENCES}, got {self.reference!r}")
        if not 0 <= self.perturb_rate <= 1:
            raise InputError(f + "perturb_rate", f"must be in [0, 1], got {self.perturb_rate!r}")
        if isinstance(self.fix_k, bool) or not isinstance(self.fix_k, (int, np.integer)) \
                or not 0 <= self.fix_k <= problem.n:
            raise InputError(f + "fix_k", f"must be an integer in [0, {problem.n}], got {self.fix_k!r}")
        if not 0 <= self.capacity_cut_percent < 100:
            raise InputError(f + "capacity_cut_percent",
                             f"must be in [0, 100), got {self.capacity_cut_percent!r}")
        if self.capacity_weights is not None:
            if not hasattr(self.capacity_weights, "items") or not self.capacity_weights:
                raise InputError(f + "capacity_weights", "must be a non-empty map label -> weight")
            for lab, w in self.capacity_weights.items():
                problem.lookup(lab, f"{f}capacity_weights[{lab!r}]")
                if isinstance(w, bool) or not isinstance(w, (int, float)) or not math.isfinite(w) \
                        or w < 0:
                    raise InputError(f"{f}capacity_weights[{lab!r}]", f"must be a number >= 0, got {w!r}")
        n_dec = len(problem.decisions)
        for name in ("unavailable_values", "must_change"):
            v = getattr(self, name)
            if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or not 0 <= v <= n_dec:
                raise InputError(f + name, f"must be an integer in [0, {n_dec}] (the problem "
                                           f"declares {n_dec} decisions), got {v!r}")
        if self.unavailable_values + self.must_change > n_dec:
            raise InputError(f + "unavailable_values",
                             f"{self.unavailable_values} unavailable + {self.must_change} must change "
                             f"exceed the problem's {n_dec} decisions (the two parts use distinct "
                             f"decisions)")
        if not any(getattr(self, name) for name in PARTS):
            raise InputError(field, "enables no late constraint (set one of "
                                         + ", ".join(PARTS) + ")")

    def to_dict(self) -> dict[str, Any]:
        d = asdict(self)
        if self.capacity_weights is not None:
            d["capacity_weights"] = {str(k): float(v) for k, v in self.capacity_weights.items()}
        return d


#: the parts of a :class:`ScenarioFamily`, each enabled by a non-zero value
PARTS = ("hamming_weight", "fix_k", "capacity_cut_percent", "unavailable_values", "must_change")


def default_family(problem: Problem) -> ScenarioFamily:
    """The family used when none is given.

    With declared decisions: one random decision value becomes unavailable per scenario
    (``hamming_weight=0, unavailable_values=1``); a uniform random bit reference would
    break every one-hot decision. Otherwise a linear Hamming penalty of weight 1 to
    uniform random bits (``ScenarioFamily()``).
    """
    if problem.decisions:
        return ScenarioFamily(hamming_weight=0.0, unavailable_values=1)
    return ScenarioFamily()


@dataclass
class Scenario:
    """One drawn what-if: its late constraints and the seed they (and the repair) use.

    ``plan`` names the library candidate a ``must_change`` scenario is built around
    (empty otherwise).
    """

    index: int
    seed: int
    constraints: list
    description: str
    plan: str = ""


def _caller_values(problem: Problem, bits: np.ndarray) -> list[int]:
    return [int(v) for v in problem.to_caller(bits.astype(np.int8))]


def draw_scenarios(problem: Problem, candidates: CandidateSet, family: ScenarioFamily, *,
                   count: int, seed: int = 0) -> list[Scenario]:
    """Draw ``count`` scenarios; scenario i uses ``SeedSequence(seed).spawn(count)[i]``."""
    family.validate(problem)
    if isinstance(count, bool) or not isinstance(count, (int, np.integer)) or count < 1:
        raise InputError("scenarios", f"must be an integer >= 1, got {count!r}")
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise InputError("seed", f"must be an integer >= 0, got {seed!r}")
    n = problem.n
    labels = problem.labels
    X = candidates.X
    values = None  # (K, D) value index per decision, -1 where a candidate breaks it
    plans = None  # rows valid in every decision: the plans a must_change scenario may use
    if family.unavailable_values or family.must_change:
        values = decode_indices(problem, X)
        plans = np.flatnonzero((values >= 0).all(axis=1))
        if family.must_change and plans.size == 0:
            raise InputError("family.must_change", "needs a library candidate whose every "
                                                   "decision is validly encoded; none is")
    cap_row = None
    if family.capacity_cut_percent > 0:
        a = np.ones(n) if family.capacity_weights is None else np.zeros(n)
        if family.capacity_weights is not None:
            for lab, w in family.capacity_weights.items():
                a[problem.index[lab]] = float(w)
        rhs = (1.0 - family.capacity_cut_percent / 100.0) * float((X.astype(np.float64) @ a).max())
        cols = np.flatnonzero(a)
        none = np.zeros(0)  # sum a x in the caller's vartype (SPIN: sum (a/2) s + sum a / 2)
        idx, coef, _, offset = change_vartype(cols, a[cols], none, none, none, 0.0,
                                              source=BINARY, target=problem.vartype)
        terms = {labels[i]: c for i, c in zip(idx.tolist(), coef.tolist())}
        cap_row = (terms, rhs - offset, rhs)
    out = []
    for i, child in enumerate(np.random.SeedSequence(int(seed)).spawn(int(count))):
        s_seed = int(child.generate_state(1, dtype=np.uint32)[0]) >> 1  # < 2**31
        rng = np.random.default_rng(child)
        cons: list = []
        parts: list = []
        if family.hamming_weight > 0:
            m = max(1, int(round(family.hamming_fraction * n)))
            idx = np.sort(rng.choice(n, size=m, replace=False)) if m < n else np.arange(n)
            if family.reference == "uniform":
                ref = rng.integers(0, 2, size=n).astype(np.int8)
                what = "random reference"
            else:
                k = int(rng.integers(0, X.shape[0]))
                ref = X[k] ^ (rng.random(n) < family.perturb_rate).astype(np.int8)
                what = f"reference near {candidates.ids[k]}"
            vals = _caller_values(problem, ref[idx])
            cons.append(HammingPenalty({labels[j]: v for j, v in zip(idx, vals)},
                                       weight=float(family.hamming_weight), shape=family.hamming_shape,
                                       threshold=float(family.hamming_threshold), name="stress_hamming"))
            parts.append(f"{family.hamming_shape} Hamming penalty w={family.hamming_weight:g} to a "
                         f"{what} on {m} variables")
        if family.fix_k > 0:
            idx = np.sort(rng.choice(n, size=int(family.fix_k), replace=False))
            vals = _caller_values(problem, rng.integers(0, 2, size=idx.size))
            cons.append(FixVariables({labels[j]: v for j, v in zip(idx, vals)}, name="stress_fix"))
            parts.append(f"{family.fix_k} variables fixed")
        if cap_row is not None:
            terms, cap_rhs, rhs = cap_row
            cons.append(LinearConstraint(dict(terms), "<=", cap_rhs, name="stress_capacity"))
            parts.append(f"capacity cut {family.capacity_cut_percent:g}% (<= {rhs:g})")
        plan = ""
        if values is not None:
            plan = _decision_parts(problem, candidates.ids, values, plans, family, rng, cons, parts)
        out.append(Scenario(index=i, seed=s_seed, constraints=cons, description="; ".join(parts),
                            plan=plan))
    return out


def _decision_parts(problem: Problem, ids, values: np.ndarray, plans: np.ndarray,
                    family: ScenarioFamily, rng: np.random.Generator, cons: list,
                    parts: list) -> str:
    """Append one scenario's decision-level constraints and descriptions; return the plan id.

    ``values`` int64 (K, D) is the library's value index per decision (-1: broken),
    ``plans`` the rows valid in every decision. Each part forbids one value of each
    chosen decision; the decisions of the two parts are distinct.
    """
    decisions = problem.decisions
    order = rng.permutation(len(decisions))
    plan = ""
    if family.must_change:
        r = int(rng.choice(plans))
        plan = str(ids[r])
        chosen = order[:family.must_change]
        names = []
        for c in chosen:
            d = decisions[c]
            v = d.values[values[r, c]]
            cons.append(ForbidValues(d.name, [v], name="stress_must_change"))
            names.append(f"{d.name}!={v!r}")
        parts.append(f"{family.must_change} decisions of {plan} must change ({', '.join(names)})")
    if family.unavailable_values:
        chosen = order[family.must_change:family.must_change + family.unavailable_values]
        names = []
        for c in chosen:
            d = decisions[c]
            held = np.unique(values[:, c][values[:, c] >= 0])
            m = int(rng.choice(held)) if held.size else int(rng.integers(len(d.values)))
            cons.append(ForbidValues(d.name, [d.values[m]], name="stress_unavailable"))
            names.append(f"{d.name}={d.values[m]!r}")
        parts.append(f"unavailable: {', '.join(names)}")
    return plan


# ----------------------------------------------------------- statistics
def _ranks(v: np.ndarray) -> np.ndarray:
    """Ranks 1..n with ties given their average rank: float64 (n,)."""
    order = np.argsort(v, kind="mergesort")
    sv = v[order]
    ranks = np.empty(v.size)
    start = 0
    while start < v.size:
        stop = start
        while stop + 1 < v.size and sv[stop + 1] == sv[start]:
            stop += 1
        ranks[order[start:stop + 1]] = 0.5 * (start + stop) + 1.0
        start = stop + 1
    return ranks


def pearson(x: Sequence[float], y: Sequence[float]) -> float | None:
    """Pearson correlation; None with fewer than 3 pairs or a constant sample."""
    a = np.asarray(x, dtype=np.float64)
    b = np.asarray(y, dtype=np.float64)
    if a.size != b.size:
        raise InputError("y", f"has {b.size} values for {a.size} in x")
    if a.size < 3:
        return None
    a = a - a.mean()
    b = b - b.mean()
    den = math.sqrt(float(a @ a) * float(b @ b))
    if den == 0.0:
        return None
    return float(np.clip(float(a @ b) / den, -1.0, 1.0))


def spearman(x: Sequence[float], y: Sequence[float]) -> float | None:
    """Spearman rank correlation (Pearson of average ranks); None as :func:`pearson`."""
    a = np.asarray(x, dtype=np.float64)
    b = np.asarray(y, dtype=np.float64)
    if a.size != b.size:
        raise InputError("y", f"has {b.size} values for {a.size} in x")
    return pearson(_ranks(a), _ranks(b))


# --------------------------------------------------------------- report
@dataclass
class CandidateStress:
    """Stress figures of one candidate over the completed scenarios.

    Costs are late-problem costs (energy + soft penalties) of the repaired
    assignment, in energy units; ``mean_regret`` is the mean excess over the
    scenario's best repair. Means and worsts cover the scenarios where this
    candidate's repair was feasible (``failures`` counts the others) and are
    NaN when there is none. ``free_variables`` counts the variables outside
    declared decisions whose single flip costs ``<= epsilon``, ``free_decisions``
    the decisions with a one-step move costing ``<= epsilon``
    (:mod:`flipfix.repair.audit.robustness`); their sum, :attr:`free_moves`, is the
    robustness side of the correlation.
    """

    candidate_id: str
    energy: float
    free_variables: int
    wins: int
    win_rate: float
    mean_cost: float
    worst_cost: float
    mean_regret: float
    mean_flips: float
    worst_flips: int
    failures: int
    free_decisions: int = 0

    @property
    def free_moves(self) -> int:
        """Free variables plus free decisions."""
        return self.free_variables + self.free_decisions


def _num(v: float) -> float | None:
    return float(v) if v is not None and math.isfinite(v) else None


@dataclass
class StressReport:
    """Outcome of :func:`stress_test` (plain lists; matrices are scenario x candidate)."""

    family: dict
    method: str
    seed: int
    epsilon: float
    scenarios_requested: int
    scenarios_done: int
    stopped: str  # "done" | "time_limit" | "cancelled"
    seconds: float
    candidates: list  # [CandidateStress], library order
    scenario_seeds: list
    scenario_descriptions: list
    scenario_best: list  # best feasible repair cost per scenario (NaN: none feasible)
    winners: list  # [[candidate ids]] per scenario
    cost: list  # (S, K) repair cost
    flips: list  # (S, K) flips
    feasible: list  # (S, K) bool
    pearson: float | None = None
    spearman: float | None = None
    correlated: int = 0  # candidates in the correlation (finite mean cost)
    message: str = ""

    @property
    def ids(self) -> list:
        return [c.candidate_id for c in self.candidates]

    def cost_matrix(self) -> np.ndarray:
        """float64 (S, K) repair costs, +inf where the repair was infeasible."""
        c = np.asarray(self.cost, dtype=np.float64).reshape(len(self.cost), len(self.candidates))
        f = np.asarray(self.feasible, dtype=bool).reshape(c.shape)
        return np.where(f, c, np.inf)

    def to_dict(self) -> dict[str, Any]:
        return {
            "family": self.family, "method": self.method, "seed": self.seed,
            "epsilon": self.epsilon, "scenarios_requested": self.scenarios_requested,
            "scenarios_done": self.scenarios_done, "stopped": self.stopped,
            "seconds": round(self.seconds, 6), "message": self.message,
            "pearson": self.pearson, "spearman": self.spearman, "correlated": self.correlated,
            "correlation_of": "free_variables + free_decisions with mean_cost",
            "candidates": [{k: (_num(v) if isinstance(v, float) else v)
                            for k, v in asdict(c).items()} for c in self.candidates],
            "scenarios": [
                {"seed": s, "description": d, "best_cost": _num(b), "winners": w}
                for s, d, b, w in zip(self.scenario_seeds, self.scenario_descriptions,
                                      self.scenario_best, self.winners)
            ],
            "cost": [[_num(v) for v in row] for row in self.cost],
            "flips": self.flips, "feasible": self.feasible,
        }


def summarise(ids: Sequence[str], energy: Sequence[float], free: Sequence[int],
              cost: np.ndarray, flips: np.ndarray, feasible: np.ndarray, *,
              free_decisions: Sequence[int] | None = None,
              rel_tol: float = 1e-9) -> tuple[list, list, list]:
    """Per-candidate figures from scenario x candidate matrices.

    ``free`` and ``free_decisions`` (default 0 each) are the free variables and
    free decisions per candidate, int (K,).

    ``cost`` float64 (S, K), ``flips`` int64 (S, K), ``feasible`` bool (S, K).
    In each scenario the best repair is the lowest feasible cost (within
    ``rel_tol * (1 + |best|)``) and, among those, the fewest flips; every
    candidate reaching it gets a win (ties share). Returns
    (``[CandidateStress]``, best cost per scenario, winner indices per scenario).
    """
    S, K = cost.shape
    c = np.where(feasible, cost, np.inf)
    best = c.min(axis=1) if K else np.full(S, np.inf)
    tol = rel_tol * (1.0 + np.abs(np.where(np.isfinite(best), best, 0.0)))
    near = feasible & (c <= (best + tol)[:, None])
    fl = np.where(near, flips, np.iinfo(np.int64).max)
    win = near & (fl == fl.min(axis=1, keepdims=True)) if K else near
    winners = [np.flatnonzero(win[s]).tolist() for s in range(S)]
    rows = []
    for k in range(K):
        ok = feasible[:, k]
        nk = int(ok.sum())
        ck = cost[ok, k]
        fk = flips[ok, k]
        rows.append(CandidateStress(
            candidate_id=str(ids[k]), energy=float(energy[k]), free_variables=int(free[k]),
            free_decisions=int(free_decisions[k]) if free_decisions is not None else 0,
            wins=int(win[:, k].sum()), win_rate=float(win[:, k].sum() / S) if S else math.nan,
            mean_cost=float(ck.mean()) if nk else math.nan,
            worst_cost=float(ck.max()) if nk else math.nan,
            mean_regret=float((ck - best[ok]).mean()) if nk else math.nan,
            mean_flips=float(fk.mean()) if nk else math.nan,
            worst_flips=int(fk.max()) if nk else -1,
            failures=int(S - nk),
        ))
    return rows, best.tolist(), winners


class ScenarioRunner(Protocol):
    """Runs the scenario repairs of one stress test somewhere else (other processes,
    other machines): the core's only view of a cluster.

    ``parallel`` is how many scenarios run at once. :meth:`map` calls
    ``fn(*shared, item, time_limit=seconds_each, cancel=<token>, **options)`` once per
    item and yields the results in item order; once ``deadline`` (a
    ``time.perf_counter()`` instant) passes or ``cancel`` is set, it stops the running
    calls (their cancel token is set) and yields None for every item not completed. It
    is a generator: the caller closes it when done, which stops whatever still runs.
    """

    parallel: int

    def map(self, fn: Callable, shared: tuple, items: Sequence, *, seconds_each: float,
            deadline: float, cancel, options: Mapping[str, Any]) -> Iterator[Any]: ...


def scenario_costs(problem: Problem, candidates: CandidateSet, scenario: Scenario, *,
                   time_limit: float, cancel=None, method: str = "greedy",
                   options: Mapping[str, Any] | None = None
                   ) -> tuple[np.ndarray, np.ndarray, np.ndarray] | None:
    """Repair the library under one scenario (with the scenario's seed).

    Returns (cost float64 (K,), flips int64 (K,), feasible bool (K,)) in library order,
    or None when ``cancel`` was set (the repair may have stopped early).
    """
    from flipfix.repair.api import repair

    res = repair(problem, candidates, scenario.constraints, method=method,
                 time_limit=time_limit, seed=scenario.seed, cancel=cancel, **dict(options or {}))
    if cancel is not None and cancel.is_set():
        return None
    pos = {cid: k for k, cid in enumerate(candidates.ids)}
    K = len(pos)
    c = np.full(K, np.inf)
    f = np.zeros(K, dtype=np.int64)
    ok = np.zeros(K, dtype=bool)
    for row in res.audit:
        k = pos[row.candidate_id]
        c[k], f[k], ok[k] = float(row.cost_after), int(row.flips), bool(row.feasible)
    return c, f, ok


def _serial(problem: Problem, candidates: CandidateSet, drawn: Sequence[Scenario], *,
            method: str, opts: Mapping[str, Any], deadline: float, cancel) -> Iterator[Any]:
    """The scenarios one after another here, each with an even share of the time left;
    None once the time is spent or ``cancel`` is set."""
    for s, sc in enumerate(drawn):
        left = deadline - time.perf_counter()
        if left <= 0 or (cancel is not None and cancel.is_set()):
            yield None
            return
        yield scenario_costs(problem, candidates, sc, time_limit=left / (len(drawn) - s),
                             cancel=cancel, method=method, options=opts)


def stress_test(problem: Problem, candidates: CandidateSet,
                family: ScenarioFamily | Sequence[Scenario] | None = None, *, scenarios: int = 20,
                seed: int = 0, method: str = "greedy", time_limit: float = 30.0,
                epsilon: float = 0.0, cancel=None,
                progress: Callable[[dict], None] | None = None,
                repair_options: Mapping[str, Any] | None = None,
                runner: "ScenarioRunner | None" = None) -> StressReport:
    """Repair the whole library under each scenario and summarise.

    ``family`` is a :class:`ScenarioFamily` (``scenarios`` are drawn with
    ``seed``), a list of :class:`Scenario`, or None for :func:`default_family`. ``time_limit`` (seconds) covers the
    whole run; each scenario gets an even share of what is left, and no new
    scenario starts once it is spent. ``cancel`` (a ``threading.Event``) stops
    the run after the current scenario (and is passed to the repair).
    ``progress(dict(done, total, best_cost, phase="stress"))`` is called after
    each scenario from the calling thread. ``epsilon`` is the free-variable and free-decision
    threshold of the robustness profile.

    ``runner`` spreads the scenarios over other processes or machines
    (:class:`ScenarioRunner`, e.g. a Dask cluster): each scenario then gets
    ``time_limit * runner.parallel / S`` seconds, results arrive in scenario order, and
    the answers equal the serial ones whenever no scenario's repair is cut short by its
    time (each scenario is repaired with its own seed, whoever runs it). None: one
    scenario after another in this process, each with an even share of what is left.
    """
    t0 = time.perf_counter()
    if not isinstance(candidates, CandidateSet):
        raise InputError("candidates", f"expected a CandidateSet, got {type(candidates).__name__}")
    if isinstance(time_limit, bool) or not isinstance(time_limit, (int, float)) \
            or not math.isfinite(time_limit) or time_limit <= 0:
        raise InputError("time_limit", f"must be a number of seconds > 0, got {time_limit!r}")
    if family is None:
        family = default_family(problem)
    if isinstance(family, ScenarioFamily):
        drawn = draw_scenarios(problem, candidates, family, count=scenarios, seed=seed)
        family_doc = family.to_dict()
    else:
        drawn = list(family)
        if not drawn or not all(isinstance(s, Scenario) for s in drawn):
            raise InputError("family", "must be a ScenarioFamily or a non-empty list of Scenario")
        family_doc = {"scenarios": "given"}
    profile = robustness_profile(problem, candidates, epsilon=epsilon, spectrum=False)
    ids = list(candidates.ids)
    energy = profile.column("energy")
    free_var = profile.column("free_variables")  # outside declared decisions
    free_dec = profile.column("free_decisions")
    K = len(ids)
    cost_rows, flip_rows, feas_rows, seeds, descs = [], [], [], [], []
    opts = dict(repair_options or {})
    if runner is None:
        outcomes = _serial(problem, candidates, drawn, method=method, opts=opts,
                           deadline=t0 + time_limit, cancel=cancel)
    else:
        outcomes = runner.map(scenario_costs, (problem, candidates), drawn,
                              seconds_each=time_limit * runner.parallel / len(drawn),
                              deadline=t0 + time_limit, cancel=cancel,
                              options={"method": method, "options": opts})
    stopped = "done"
    try:
        for s, (sc, out) in enumerate(zip(drawn, outcomes)):
            if out is None:  # the runner stopped before this scenario completed
                stopped = "cancelled" if cancel is not None and cancel.is_set() else "time_limit"
                break
            c, f, ok = out
            cost_rows.append(c)
            flip_rows.append(f)
            feas_rows.append(ok)
            seeds.append(int(sc.seed))
            descs.append(sc.description)
            if progress is not None:
                fin = c[ok]
                progress({"done": s + 1, "total": len(drawn),
                          "best_cost": float(fin.min()) if fin.size else None, "phase": "stress"})
    finally:
        outcomes.close()  # stops what a runner still has running
    S = len(cost_rows)
    cost = np.vstack(cost_rows) if S else np.zeros((0, K))
    flips = np.vstack(flip_rows) if S else np.zeros((0, K), dtype=np.int64)
    feas = np.vstack(feas_rows) if S else np.zeros((0, K), dtype=bool)
    rows, best, winners = summarise(ids, energy, free_var, cost, flips, feas,
                                    free_decisions=free_dec)
    means = np.asarray([r.mean_cost for r in rows], dtype=np.float64)
    fin = np.isfinite(means)
    fv = np.asarray([r.free_moves for r in rows], dtype=np.float64)  # robustness = free moves
    msg = ""
    if stopped == "time_limit":
        msg = f"time limit reached after {S} of {len(drawn)} scenarios"
    elif stopped == "cancelled":
        msg = f"cancelled after {S} of {len(drawn)} scenarios"
    return StressReport(
        family=family_doc, method=method, seed=int(seed), epsilon=float(epsilon),
        scenarios_requested=len(drawn), scenarios_done=S, stopped=stopped,
        seconds=time.perf_counter() - t0, candidates=rows, scenario_seeds=seeds,
        scenario_descriptions=descs, scenario_best=best,
        winners=[[ids[k] for k in w] for w in winners],
        cost=[[float(v) for v in row] for row in cost], flips=flips.tolist(),
        feasible=feas.tolist(), pearson=pearson(fv[fin], means[fin]),
        spearman=spearman(fv[fin], means[fin]), correlated=int(fin.sum()), message=msg,
    )
