"""Robust and diverse neighbours of the stored candidates, within an energy tolerance.

From each chosen candidate (by default the ``top`` of lowest energy), ``chains`` annealing
chains (:func:`flipfix.repair.grow.kernel.run_chain`) minimise the energy minus a reward per
free move (``mode="robust"``), minus a reward per unit of distance from the nearest stored
candidate (``"diverse"``), or both (``"both"``), never going above the energy cap:

    cap = best + tolerance                 (absolute, energy units), or
    cap = best + percent / 100 * |best|    (percent above the library's best)

Every state a chain returns is then confirmed exactly, outside the kernel: its energy by
``Problem.energies``, its free variables and free decisions by
:mod:`flipfix.repair.audit.robustness` (the audit's own definitions, at ``epsilon``), its
distance to the nearest stored candidate (and earlier accepted new state) in bits or in
decisions. It is kept when it is within the cap, differs from every stored and accepted
state, and gains what its mode asks (robust: more free moves than its origin; diverse: a
distance > 0; both: either). Each kept state carries its provenance: origin candidate,
mode, settings, seed and chain. Nothing is stored here.

Hard constraints (``constraints``: linear rows only, e.g. a knapsack's capacity) bound the
search: origins must satisfy them (the default origins are the best that do, and the cap
counts from the best that does), every move keeps them, and a free move must keep them too
(confirmed exactly by :func:`free_counts`, which then differs from the audit's profile, where
constraints are not known).

Seeded: chain c of origin o draws from stream (seed, o * chains + c) of the annealing
kernel's generator, so the answer depends on the seed alone (not on ``workers``).
``cancel`` (a ``threading.Event`` or :class:`~flipfix.repair.cancel.CancelToken`) and
``time_limit`` stop the chains after their current sweep; states finished so far are
confirmed and returned (``stopped`` says why it ended).
"""

from __future__ import annotations

import threading
import time
from dataclasses import asdict, dataclass
from typing import Any, Callable

import numpy as np

from flipfix.repair.audit.robustness import (flip_cost_matrix, free_decision_counts,
                                             free_variable_counts, hamming_to_rows, ROUNDOFF)
from flipfix.repair.cancel import as_token
from flipfix.repair.errors import InputError, nonnegative
from flipfix.repair.grow.kernel import (BITS, DECISIONS, DOMAIN_WALL, ONE_HOT, Groups,
                                        new_scratch, run_chain)
from flipfix.repair.kernels.batching import thread_pool
from flipfix.repair.kernels.bundles import Qubo, Rows, late_arrays, unsigned
from flipfix.repair.kernels.metropolis import Plan
from flipfix.repair.model.candidates import CandidateSet
from flipfix.repair.model.encodings import decision_bits, decode_indices
from flipfix.repair.model.problem import Problem
from flipfix.repair.solvers.anneal import HEAT, temperatures

__all__ = ["GrowSettings", "NewState", "GrowResult", "grow", "distances", "groups_of",
           "hard_rows", "free_counts", "warm_up", "MODES", "UNITS"]

MODES = ("robust", "diverse", "both")
UNITS = ("bits", "decisions")


@dataclass(frozen=True)
class GrowSettings:
    """How to grow (every option keyword-only at :func:`grow`).

    mode: "robust", "diverse" or "both". epsilon: a move is free when it costs <= epsilon.
    tolerance / tolerance_percent: the energy cap above the library's best (exactly one;
    default 1 % when neither is given). reward_free, reward_distance: rewards per free move
    and per unit of distance (energy units; None: 0.5 times the model's median
    |single-flip change| when the mode uses them, else 0). unit: "bits" or "decisions"
    (None: decisions when the problem declares any). from_ids: the origins (default the
    ``top`` of lowest energy). chains per origin, sweeps per chain, depth in (0, 1] (the
    turning temperature, as for annealing), max_new states kept, seed, workers (threads).
    """

    mode: str = "robust"
    epsilon: float = 0.0
    tolerance: float | None = None
    tolerance_percent: float | None = None
    reward_free: float | None = None
    reward_distance: float | None = None
    unit: str | None = None
    from_ids: tuple = ()
    top: int = 3
    chains: int = 4
    sweeps: int = 200
    depth: float = 0.5
    max_new: int = 10
    seed: int = 0
    workers: int = 1

    def checked(self, problem: Problem, candidates: CandidateSet, *,
                field: str = "settings") -> "GrowSettings":
        """These settings with the defaults filled in; errors name ``field.<option>``
        (the bare option when ``field`` is empty)."""
        f = field + "." if field else ""
        if self.mode not in MODES:
            raise InputError(f + "mode", f"must be one of {MODES}, got {self.mode!r}")
        eps = nonnegative(self.epsilon, f + "epsilon")
        if self.tolerance is not None and self.tolerance_percent is not None:
            raise InputError(f + "tolerance", "give tolerance or tolerance_percent, not both")
        tol = None if self.tolerance is None else nonnegative(self.tolerance, f + "tolerance")
        pct = (None if self.tolerance_percent is None
               else nonnegative(self.tolerance_percent, f + "tolerance_percent"))
        if tol is None and pct is None:
            pct = 1.0
        rf = None if self.reward_free is None else nonnegative(self.reward_free, f + "reward_free")
        rd = (None if self.reward_distance is None
              else nonnegative(self.reward_distance, f + "reward_distance"))
        unit = self.unit
        if unit is None:
            unit = "decisions" if problem.decisions else "bits"
        if unit not in UNITS:
            raise InputError(f + "unit", f"must be one of {UNITS}, got {unit!r}")
        ids = tuple(str(i) for i in self.from_ids)
        known = set(candidates.ids)
        for pos, cid in enumerate(ids):
            if cid not in known:
                raise InputError(f"{f}from_ids[{pos}]", f"no stored candidate {cid!r}")
            if cid in ids[:pos]:
                raise InputError(f"{f}from_ids[{pos}]", f"{cid!r} is listed twice")
        for name, lo in (("top", 1), ("chains", 1), ("sweeps", 1), ("max_new", 1),
                         ("seed", 0), ("workers", 1)):
            v = getattr(self, name)
            if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < lo:
                raise InputError(f + name, f"must be an integer >= {lo}, got {v!r}")
        d = self.depth
        if isinstance(d, bool) or not isinstance(d, (int, float)) or not 0.0 < d <= 1.0:
            raise InputError(f + "depth", f"must be in (0, 1], got {d!r}")
        return GrowSettings(mode=self.mode, epsilon=eps, tolerance=tol, tolerance_percent=pct,
                            reward_free=rf, reward_distance=rd, unit=unit, from_ids=ids,
                            top=int(self.top), chains=int(self.chains), sweeps=int(self.sweeps),
                            depth=float(d), max_new=int(self.max_new), seed=int(self.seed),
                            workers=int(self.workers))

    def to_dict(self) -> dict[str, Any]:
        d = asdict(self)
        d["from_ids"] = list(self.from_ids)
        return d


@dataclass
class NewState:
    """One proposed state, confirmed exactly.

    x int8 (n,) 0/1; energy; energy_given_up: energy minus its origin's; above_best: energy
    minus the library's best; free_variables, free_decisions, free_moves (their sum) and
    free_gained (over the origin); distance: to the nearest stored candidate or earlier new
    state (in ``unit``), nearest_id; provenance: origin id, mode, chain, seed, settings.
    """

    id: str
    x: np.ndarray
    energy: float
    energy_given_up: float
    above_best: float
    free_variables: int
    free_decisions: int
    free_moves: int
    free_gained: int
    distance: int
    nearest_id: str
    origin_id: str
    mode: str
    chain: int
    seed: int

    def provenance(self, settings: "GrowSettings") -> dict[str, Any]:
        """Where it comes from, as a store provenance: source text, energy, tags."""
        tol = (f"tolerance={settings.tolerance}" if settings.tolerance is not None
               else f"tolerance_percent={settings.tolerance_percent}")
        return {"source": f"grown from {self.origin_id} ({self.mode}, seed {self.seed}, "
                          f"chain {self.chain})",
                "energy": self.energy,
                "tags": ["grown", f"mode={self.mode}", f"origin={self.origin_id}",
                         f"seed={self.seed}", f"chain={self.chain}",
                         f"epsilon={settings.epsilon}", tol,
                         f"reward_free={settings.reward_free}",
                         f"reward_distance={settings.reward_distance}",
                         f"unit={settings.unit}", f"sweeps={settings.sweeps}",
                         f"depth={settings.depth}"]}

    def to_dict(self, problem: Problem | None = None) -> dict[str, Any]:
        d = {k: v for k, v in asdict(self).items() if k != "x"}
        if problem is not None:
            vals = problem.to_caller(self.x[None, :])[0]
            d["assignment"] = {str(lab): int(v) for lab, v in zip(problem.labels, vals)}
        return d


@dataclass
class GrowResult:
    """What :func:`grow` proposes: ``states`` (best first), the settings used (defaults
    filled in), the library's best energy and the cap, ``stopped`` ("done", "cancelled",
    "time_limit"), chains run, and counts of states set aside (outside the cap, repeats,
    no gain)."""

    states: list
    settings: GrowSettings
    best_energy: float
    energy_cap: float
    stopped: str
    seconds: float
    chains_run: int
    chains_total: int
    outside_cap: int = 0
    repeats: int = 0
    no_gain: int = 0
    scale: float = 1.0

    def candidate_set(self) -> CandidateSet:
        """The new states as a :class:`CandidateSet` (ids as proposed)."""
        n = self.states[0].x.size if self.states else 0
        X = np.vstack([s.x for s in self.states]) if self.states else np.zeros((0, n), np.int8)
        return CandidateSet(tuple(s.id for s in self.states), X)

    def to_dict(self, problem: Problem | None = None) -> dict[str, Any]:
        return {"settings": self.settings.to_dict(), "best_energy": self.best_energy,
                "energy_cap": self.energy_cap, "stopped": self.stopped,
                "seconds": round(self.seconds, 6), "chains_run": self.chains_run,
                "chains_total": self.chains_total, "outside_cap": self.outside_cap,
                "repeats": self.repeats, "no_gain": self.no_gain, "scale": self.scale,
                "states": [s.to_dict(problem) for s in self.states]}


# ------------------------------------------------------------------ problem arrays
def groups_of(problem: Problem) -> Groups:
    """The problem's decisions as :class:`~flipfix.repair.grow.kernel.Groups` (cached)."""
    cached = getattr(problem, "_grow_groups", None)
    if cached is not None:
        return cached
    n = problem.n
    var_group = np.full(n, -1, dtype=np.int64)
    cols, ptr, kinds, jptr, jval = [], [0], [], [0], []
    for g, d in enumerate(problem.decisions):
        c = decision_bits(problem, d)
        var_group[c] = g
        cols.append(c)
        ptr.append(ptr[-1] + c.size)
        kinds.append(ONE_HOT if d.encoding == "one_hot" else DOMAIN_WALL)
        block = np.zeros((c.size, c.size))
        where = {int(v): a for a, v in enumerate(c)}
        for a, i in enumerate(c):
            lo, hi = problem.indptr[i], problem.indptr[i + 1]
            for j, w in zip(problem.indices[lo:hi], problem.data[lo:hi]):
                b = where.get(int(j))
                if b is not None:
                    block[a, b] += w
        jval.append(block.ravel())
        jptr.append(jptr[-1] + block.size)
    out = Groups(np.flatnonzero(var_group < 0).astype(np.int64), var_group,
                 np.asarray(ptr, dtype=np.int64),
                 np.concatenate(cols).astype(np.int64) if cols else np.zeros(0, np.int64),
                 np.asarray(kinds, dtype=np.int8), np.asarray(jptr, dtype=np.int64),
                 np.concatenate(jval) if jval else np.zeros(0))
    object.__setattr__(problem, "_grow_groups", out)  # works on frozen dataclasses too
    return out


def _qubo(problem: Problem) -> Qubo:
    return Qubo(np.asarray(problem.linear, dtype=np.float64),
                np.asarray(problem.indptr, dtype=np.int64), unsigned(problem.indices),
                np.asarray(problem.data, dtype=np.float64), np.full(problem.n, -1, np.int8))


def distances(problem: Problem, X: np.ndarray, R: np.ndarray, unit: str) -> np.ndarray:
    """Distances between every row of X (K, n) and of R (L, n), int8 0/1: int64 (K, L).

    "bits": Hamming distance; "decisions": plain variables that differ plus decisions whose
    values differ (a decision not validly encoded in either row counts as different).
    """
    if unit == "bits" or not problem.decisions:
        return hamming_to_rows(X, R)
    plain = groups_of(problem).plain
    d = hamming_to_rows(X[:, plain], R[:, plain])
    vx, vr = decode_indices(problem, X), decode_indices(problem, R)
    diff = (vx[:, None, :] != vr[None, :, :]) | (vx[:, None, :] < 0) | (vr[None, :, :] < 0)
    return d + diff.sum(axis=2)


def _tol(problem: Problem) -> float:
    scale = float(np.abs(problem.linear).sum() + np.abs(problem.data).sum() / 2.0)
    return ROUNDOFF * (1.0 + scale)


def hard_rows(problem: Problem, constraints) -> Rows:
    """The rows ``lo <= A x <= hi`` of hard linear ``constraints`` (with the validity rows of
    the problem's decisions) as a :class:`~flipfix.repair.kernels.bundles.Rows` bundle; no
    constraint: an empty bundle. A constraint that is not a hard linear row (a penalty, a
    fixing, a table) is an error naming ``constraints[k]``."""
    from flipfix.repair.lowering.compiled import compile_constraints

    constraints = list(constraints)
    if not constraints:
        n = problem.n
        z, zi = np.zeros(0), np.zeros(0, np.int64)
        return Rows(np.zeros(1, np.int64), zi, z, np.zeros(n + 1, np.int64), zi, z, z, z, z)
    for k, c in enumerate(constraints):
        one = compile_constraints(problem, [c], field=f"constraints[{k}]",
                                  paths=[f"constraints[{k}]"])
        soft = (one.counts or (one.fixed >= 0).any() or one.data.size != problem.data.size
                or not np.array_equal(one.h, problem.linear)
                or not np.array_equal(one.data, problem.data))
        if soft:
            raise InputError(f"constraints[{k}]", "only hard linear rows can bound growing "
                                                  f"(got a {getattr(c, 'name', type(c).__name__)}"
                                                  " that adds penalties or fixings)")
    return late_arrays(compile_constraints(problem, constraints)).rows


def _dense(R: Rows, n: int) -> np.ndarray:
    A = np.zeros((R.lo.size, n))
    rows = np.repeat(np.arange(R.lo.size), np.diff(R.a_ptr))
    np.add.at(A, (rows, R.a_col), R.a_val)
    return A


def _within(R: Rows, act: np.ndarray) -> np.ndarray:
    """bool (...,): every row within its bounds, for activities act (..., m)."""
    return ((act >= R.lo - R.rtol) & (act <= R.hi + R.rtol)).all(axis=-1)


def free_counts(problem: Problem, X: np.ndarray, eps: float, rows: Rows | None = None
                ) -> tuple[np.ndarray, np.ndarray]:
    """(free variables, free decisions) int64 (K,) of X int8 (K, n), exactly.

    Without rows (or an empty bundle): the audit's own counts
    (:func:`~flipfix.repair.audit.robustness.free_variable_counts`, ``free_decision_counts``).
    With rows, a move counts only when it also keeps every row (dense row matrix: meant for
    a few hundred rows)."""
    costs = flip_cost_matrix(problem, X)
    fv = free_variable_counts(problem, X, epsilon=eps, costs=costs)
    fd = free_decision_counts(problem, X, epsilon=eps, costs=costs)
    if rows is None or rows.lo.size == 0:
        return fv, fd
    from flipfix.repair.audit.robustness import codewords, decision_move_costs

    thr = eps + _tol(problem)
    A = _dense(rows, problem.n)  # (m, n)
    Xf = X.astype(np.float64)
    act = Xf @ A.T  # (K, m)
    s = 1.0 - 2.0 * Xf  # (K, n) sign of each flip
    plain = groups_of(problem).plain
    fv = np.zeros(X.shape[0], np.int64)
    for v in plain:
        ok = _within(rows, act + s[:, v:v + 1] * A[:, v][None, :])
        fv += (costs[:, v] <= thr) & ok
    fd = np.zeros(X.shape[0], np.int64)
    for d in problem.decisions:
        cols = decision_bits(problem, d)
        mv = decision_move_costs(problem, X, d, costs=costs)  # (K, k), inf: not a move
        words = codewords(d)
        free = np.zeros(X.shape[0], bool)
        for m in range(words.shape[0]):
            diff = (X[:, cols] != words[m][None, :]).astype(np.float64)  # (K, b)
            moved = act + (diff * s[:, cols]) @ A[:, cols].T
            free |= (mv[:, m] <= thr) & _within(rows, moved)
        fd += free
    return fv, fd


# ---------------------------------------------------------------------- the search
def grow(problem: Problem, candidates: CandidateSet, *, settings: GrowSettings | None = None,
         constraints=(), time_limit: float | None = None, cancel=None,
         progress: Callable[[dict], None] | None = None) -> GrowResult:
    """Propose robust and/or diverse neighbours of the stored candidates (module docstring).

    ``constraints``: hard linear constraints (:class:`~flipfix.repair.model.constraints.LinearConstraint`)
    every origin and proposed state satisfies.

    ``progress(dict(done, total, best_cost=None, phase="grow"))`` is called from the calling
    thread after each origin's chains.
    """
    t0 = time.perf_counter()
    if not isinstance(candidates, CandidateSet) or len(candidates) == 0:
        raise InputError("candidates", "must be a non-empty CandidateSet")
    s = (settings or GrowSettings()).checked(problem, candidates)
    if time_limit is not None:
        time_limit = nonnegative(time_limit, "time_limit")
    token = as_token(cancel)
    X = np.ascontiguousarray(candidates.X, dtype=np.int8)
    R = hard_rows(problem, constraints)
    feasible = (_within(R, X.astype(np.float64) @ _dense(R, problem.n).T) if R.lo.size
                else np.ones(X.shape[0], bool))
    if not feasible.any():
        raise InputError("constraints", "no stored candidate satisfies them: nothing to grow from")
    energy = problem.energies(X)
    best = float(energy[feasible].min())
    cap = (best + s.tolerance if s.tolerance is not None
           else best + s.tolerance_percent / 100.0 * abs(best))
    rtol = _tol(problem)
    fv, fd = free_counts(problem, X, s.epsilon, R)
    for pos, cid in enumerate(s.from_ids):
        if not feasible[candidates.ids.index(cid)]:
            raise InputError(f"settings.from_ids[{pos}]", f"{cid!r} breaks the constraints")
    order = [int(k) for k in np.argsort(energy, kind="stable") if feasible[k]]
    origins = ([candidates.ids.index(c) for c in s.from_ids] if s.from_ids else order[:s.top])
    costs = np.abs(flip_cost_matrix(problem, X[origins]))
    nz = costs[costs > rtol]
    scale = float(np.median(nz)) if nz.size else 1.0
    robust, diverse = s.mode in ("robust", "both"), s.mode in ("diverse", "both")
    rf = (0.5 * scale if robust else 0.0) if s.reward_free is None else s.reward_free
    rd = (0.5 * scale if diverse else 0.0) if s.reward_distance is None else s.reward_distance
    s = GrowSettings(**{**asdict(s), "reward_free": rf, "reward_distance": rd})
    unit = DECISIONS if s.unit == "decisions" and problem.decisions else BITS
    tq, tt = temperatures(s.depth, scale)
    plan = Plan(s.sweeps, int(round(HEAT * s.sweeps)), tq, tt, 0.0, problem.n,
                np.uint64(s.seed & (2 ** 64 - 1)), False, scale)
    Q, Gr = _qubo(problem), groups_of(problem)
    stop = np.zeros(1, dtype=np.uint8)
    reason = {"why": "done"}

    def halt(why: str):
        def fire():
            reason.setdefault("first", why)
            stop[0] = 1
        return fire

    timer = None
    if time_limit is not None:
        timer = threading.Timer(max(0.0, time_limit - (time.perf_counter() - t0)),
                                halt("time_limit"))
        timer.daemon = True
        timer.start()
    ref_ids = list(candidates.ids)
    kept: list[NewState] = []
    counts = {"outside_cap": 0, "repeats": 0, "no_gain": 0}
    chains_run = 0
    total = len(origins) * s.chains
    try:
        with token.subscribed(halt("cancelled")):
            for o_pos, k in enumerate(origins):
                if stop[0]:
                    break
                ref = np.vstack([X] + [st.x[None, :] for st in kept])
                states, _ = _chains(Q, Gr, R, plan, s, unit, problem, ref, X[k], energy[k],
                                    cap, rtol, o_pos, stop)
                chains_run += s.chains
                _confirm(problem, s, R, states, k, candidates.ids[k], energy[k],
                         int(fv[k] + fd[k]), best, cap, rtol, X, ref_ids, kept, counts, o_pos)
                if progress is not None:
                    progress({"done": chains_run, "total": total, "best_cost": None,
                              "phase": "grow"})
    finally:
        if timer is not None:
            timer.cancel()
    why = reason.get("first", "done") if stop[0] else "done"
    kept.sort(key=_rank(s.mode))
    return GrowResult(states=kept[:s.max_new], settings=s, best_energy=best, energy_cap=cap,
                      stopped=why, seconds=time.perf_counter() - t0, chains_run=chains_run,
                      chains_total=total, scale=scale, **counts)


def _rank(mode: str):
    if mode == "robust":
        return lambda st: (-st.free_gained, st.energy, st.id)
    if mode == "diverse":
        return lambda st: (-st.distance, st.energy, st.id)
    return lambda st: (-st.free_gained, -st.distance, st.energy, st.id)


def _chains(Q, Gr, R, plan, s, unit, problem, ref, x0, e0, cap, rtol, o_pos, stop):
    """Run one origin's chains (threads when ``s.workers`` > 1): (states int8 (C, n),
    kernel figures float64 (C, 5))."""
    n = problem.n
    Lv = np.ascontiguousarray(decode_indices(problem, ref) if problem.decisions
                              else np.zeros((ref.shape[0], 0), np.int64))
    gval0 = np.ascontiguousarray(decode_indices(problem, x0[None, :])[0] if problem.decisions
                                 else np.zeros(0, np.int64))
    x0 = np.ascontiguousarray(x0)
    params = np.array([s.reward_free, s.reward_distance, s.epsilon + rtol, cap - e0, rtol])
    out_x = np.zeros((s.chains, n), np.int8)
    out = np.zeros((s.chains, 5))

    def one(c):
        sc = new_scratch(n, gval0.size, ref.shape[0], R.lo.size)
        run_chain(Q, Gr, R, plan, params, unit, ref, Lv, x0, gval0, np.int64(o_pos * s.chains + c),
                  stop, sc, out_x[c], out[c])

    if s.workers == 1 or s.chains == 1:
        for c in range(s.chains):
            one(c)
    else:
        for job in [thread_pool(min(s.workers, s.chains)).submit(one, c)
                    for c in range(s.chains)]:
            job.result()
    return out_x, out


def _confirm(problem, s, R, states, k, origin_id, e0, free0, best, cap, rtol, ref, ref_ids,
             kept, counts, o_pos):
    """Exact figures of each chain's state; accepted ones join ``kept`` (the stored rows
    ``ref`` and ``kept`` are the reference for distances and repeats)."""
    E = problem.energies(states)
    fv, fd = free_counts(problem, states, s.epsilon, R)
    ok = (_within(R, states.astype(np.float64) @ _dense(R, problem.n).T) if R.lo.size
          else np.ones(states.shape[0], bool))
    for c in range(states.shape[0]):
        x = states[c]
        if E[c] > cap + rtol or not ok[c]:
            counts["outside_cap"] += 1
            continue
        R = np.vstack([ref] + [st.x[None, :] for st in kept])
        d = distances(problem, x[None, :], R, s.unit)[0]
        if (hamming_to_rows(x[None, :], R)[0] == 0).any():
            counts["repeats"] += 1
            continue
        j = int(np.argmin(d))
        gained = int(fv[c] + fd[c]) - free0
        want = {"robust": gained > 0, "diverse": d[j] > 0,
                "both": gained > 0 or d[j] > 0}[s.mode]
        if not want:
            counts["no_gain"] += 1
            continue
        near = ref_ids[j] if j < len(ref_ids) else kept[j - len(ref_ids)].id
        kept.append(NewState(
            id=f"{origin_id}~{s.mode}-s{s.seed}-c{o_pos * s.chains + c}", x=x.copy(),
            energy=float(E[c]), energy_given_up=float(E[c] - e0), above_best=float(E[c] - best),
            free_variables=int(fv[c]), free_decisions=int(fd[c]),
            free_moves=int(fv[c] + fd[c]), free_gained=gained, distance=int(d[j]),
            nearest_id=near, origin_id=origin_id, mode=s.mode, chain=o_pos * s.chains + c,
            seed=s.seed))
    return kept



_WARM = False


def warm_up() -> None:
    """Compile (or load from numba's on-disk cache) the chain kernel on a tiny model with a
    one-hot and a domain-wall decision, in both distance units; once per process."""
    global _WARM
    if _WARM:
        return
    from flipfix.repair.model.problem import Decision

    p = Problem.from_terms({"a": 1.0, "b": -1.0, "c": 0.5, "d": 0.0, "e": 0.2, "f": -0.3},
                           [("a", "b", 1.0), ("c", "d", -1.0), ("e", "f", 0.5)],
                           decisions=[Decision("o", "one_hot", ("a", "b", "c"), (0, 1, 2)),
                                      Decision("w", "domain_wall", ("d", "e"), (0, 1, 2))])
    lib = CandidateSet(("w0",), np.array([[1, 0, 0, 1, 0, 0]], dtype=np.int8))
    for unit in UNITS:
        grow(p, lib, settings=GrowSettings(mode="both", unit=unit, chains=1, sweeps=2))
    _WARM = True
