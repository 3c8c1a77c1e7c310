"""The Grow RPC: GrowRequest -> core settings, core results -> GrowReply (and back to dicts)."""

from __future__ import annotations

import math
from typing import Any

from flipfix.repair.errors import InputError, LimitError
from flipfix.repair.model.candidates import CandidateSet
from flipfix.repair.model.problem import Problem

from flipfix.service.convert.audits import DEFAULT_SCENARIOS, family_to_domain
from flipfix.service.convert.candidates import array_to_packed, packed_to_array
from flipfix.service.convert.constraints import constraints_to_domain
from flipfix.service.convert.enums import STOP_ENUM, STOP_NAMES, enum_name
from flipfix.service.convert.options import nonneg
from flipfix.service.convert.options import time_limit as optional_time_limit
from flipfix.service.generated import grow_pb2 as gpb

__all__ = ["MODE_NAMES", "MODE_ENUM", "UNIT_NAMES", "UNIT_ENUM", "MAX_CHAINS", "MAX_SWEEPS",
           "request_to_job", "result_to_reply", "reply_to_dict"]

MODE_NAMES = {gpb.GROW_MODE_UNSPECIFIED: "robust", gpb.GROW_MODE_ROBUST: "robust",
              gpb.GROW_MODE_DIVERSE: "diverse", gpb.GROW_MODE_BOTH: "both"}
MODE_ENUM = {"robust": gpb.GROW_MODE_ROBUST, "diverse": gpb.GROW_MODE_DIVERSE,
             "both": gpb.GROW_MODE_BOTH}
UNIT_NAMES = {gpb.GROW_DISTANCE_UNSPECIFIED: None, gpb.GROW_DISTANCE_BITS: "bits",
              gpb.GROW_DISTANCE_DECISIONS: "decisions"}
UNIT_ENUM = {"bits": gpb.GROW_DISTANCE_BITS, "decisions": gpb.GROW_DISTANCE_DECISIONS}
#: at most this many chains (origins x chains) and sweeps per chain in one call
MAX_CHAINS = 1024
MAX_SWEEPS = 1_000_000
#: core option -> request field, for error messages
_FIELDS = {"tolerance": "tolerance_absolute", "unit": "distance"}


def request_to_job(r: gpb.GrowRequest, problem: Problem, candidates: CandidateSet, *,
                   default_time_limit: float, max_scenarios: int | None = None
                   ) -> tuple[Any, list, dict | None, float]:
    """(checked GrowSettings, hard constraints, held-out keyword arguments or None, requested
    time limit: ``default_time_limit`` when unset; 0 or less is refused).

    Errors name the request's fields (``tolerance_absolute``, ``from_ids[2]``,
    ``heldout.family.hamming_weight``...)."""
    from flipfix.repair.grow.neighbours import GrowSettings, hard_rows

    mode = enum_name(MODE_NAMES, r.mode, "mode", gpb.GrowMode)
    if r.distance not in UNIT_NAMES:
        raise InputError("distance", f"unknown distance {r.distance}")
    which = r.WhichOneof("tolerance")
    settings = GrowSettings(
        mode=mode, epsilon=nonneg(r.epsilon, "epsilon"),
        tolerance=r.tolerance_absolute if which == "tolerance_absolute" else None,
        tolerance_percent=r.tolerance_percent if which == "tolerance_percent" else None,
        reward_free=r.reward_free if r.HasField("reward_free") else None,
        reward_distance=r.reward_distance if r.HasField("reward_distance") else None,
        unit=UNIT_NAMES[r.distance], from_ids=tuple(r.from_ids), top=int(r.top) or 3,
        chains=int(r.chains) or 4, sweeps=int(r.sweeps) or 200,
        depth=float(r.depth) if r.depth != 0 else 0.5, max_new=int(r.max_new) or 10,
        seed=int(r.seed))
    try:
        settings = settings.checked(problem, candidates, field="")
    except InputError as err:
        head, dot, rest = err.field.partition(".")
        name, bracket, tail = head.partition("[")
        raise type(err)(_FIELDS.get(name, name) + bracket + tail + dot + rest,
                        err.message) from None
    origins = len(settings.from_ids) or min(settings.top, len(candidates))
    if origins * settings.chains > MAX_CHAINS:
        raise LimitError("chains", f"{origins} origins x {settings.chains} chains exceed the "
                                   f"limit of {MAX_CHAINS} chains per call")
    if settings.sweeps > MAX_SWEEPS:
        raise LimitError("sweeps", f"{settings.sweeps} sweeps exceed the limit of {MAX_SWEEPS}")
    constraints = constraints_to_domain(r.constraints)
    hard_rows(problem, constraints)  # hard linear rows only; errors name constraints[k]
    t = optional_time_limit(r, "time_limit", "time_limit", default_time_limit)
    heldout = None
    h = r.heldout
    if h.m:
        scenarios = int(h.scenarios) or DEFAULT_SCENARIOS
        if scenarios < 2:
            raise InputError("heldout.scenarios", f"must be >= 2 (half are held out), got "
                                                  f"{scenarios}")
        if max_scenarios is not None and scenarios > max_scenarios:
            raise LimitError("heldout.scenarios", f"{scenarios} scenarios exceed the limit of "
                                                  f"{max_scenarios}")
        family = (family_to_domain(h.family, problem, field="heldout.family")
                  if r.heldout.HasField("family") else None)
        heldout = {"m": int(h.m), "family": family, "scenarios": scenarios, "seed": int(h.seed)}
    return settings, constraints, heldout, t


def _opt(msg, name: str, v: float) -> None:
    if v is not None and math.isfinite(v):
        setattr(msg, name, float(v))


def result_to_reply(res, cmp, *, time_limit: float, revision: int, kept: bool = False,
                    added=(), message: str = "") -> gpb.GrowReply:
    """A :class:`~flipfix.repair.grow.neighbours.GrowResult` (and comparison) as a reply."""
    s = res.settings
    reply = gpb.GrowReply(
        best_energy=res.best_energy, energy_cap=res.energy_cap, stop_reason=STOP_ENUM[res.stopped],
        seconds=res.seconds, time_limit=time_limit, chains_run=res.chains_run,
        chains_total=res.chains_total, outside_cap=res.outside_cap, repeats=res.repeats,
        no_gain=res.no_gain, reward_free=s.reward_free, reward_distance=s.reward_distance,
        distance=UNIT_ENUM[s.unit], kept=kept, added_ids=list(added), message=message,
        revision=revision, scale=res.scale)
    for st in res.states:
        reply.states.append(gpb.GrownState(
            id=st.id, values=array_to_packed(st.x[None, :]), energy=st.energy,
            energy_given_up=st.energy_given_up, above_best=st.above_best,
            free_variables=st.free_variables, free_decisions=st.free_decisions,
            free_moves=st.free_moves, free_gained=st.free_gained, distance=st.distance,
            nearest_id=st.nearest_id, origin_id=st.origin_id, mode=MODE_ENUM[st.mode],
            chain=st.chain, seed=st.seed))
    if cmp is not None:
        h = reply.heldout
        for name in ("m", "m_original", "scenarios", "train", "heldout", "original_infeasible",
                     "grown_infeasible", "wins", "ties", "losses"):
            setattr(h, name, getattr(cmp, name))
        h.stop_reason = STOP_ENUM[cmp.stopped]
        h.original_kept.extend(cmp.original_kept)
        h.grown_kept.extend(cmp.grown_kept)
        for name in ("original_mean", "original_worst", "grown_mean", "grown_worst"):
            _opt(h, name, getattr(cmp, name))
    return reply


def reply_to_dict(reply: gpb.GrowReply, problem: Problem) -> dict[str, Any]:
    """The reply as plain data (each state's assignment keyed by label, caller's vartype)."""
    states = []
    for k, st in enumerate(reply.states):
        x = packed_to_array(st.values, problem.n, field=f"states[{k}].values")[0]
        vals = problem.to_caller(x[None, :])[0]
        states.append({
            "id": st.id, "energy": st.energy, "energy_given_up": st.energy_given_up,
            "above_best": st.above_best, "free_variables": st.free_variables,
            "free_decisions": st.free_decisions, "free_moves": st.free_moves,
            "free_gained": st.free_gained, "distance": st.distance, "nearest_id": st.nearest_id,
            "origin_id": st.origin_id, "mode": MODE_NAMES[st.mode], "chain": st.chain,
            "seed": st.seed,
            "assignment": {str(lab): int(v) for lab, v in zip(problem.labels, vals)}})
    out = {"best_energy": reply.best_energy, "energy_cap": reply.energy_cap,
           "stopped": STOP_NAMES.get(reply.stop_reason, ""), "seconds": reply.seconds,
           "time_limit": reply.time_limit,
           "chains_run": reply.chains_run, "chains_total": reply.chains_total,
           "outside_cap": reply.outside_cap, "repeats": reply.repeats, "no_gain": reply.no_gain,
           "reward_free": reply.reward_free, "reward_distance": reply.reward_distance,
           "unit": {v: k for k, v in UNIT_ENUM.items()}.get(reply.distance),
           "kept": reply.kept, "added_ids": list(reply.added_ids), "message": reply.message,
           "revision": reply.revision, "scale": reply.scale, "states": states}
    if reply.HasField("heldout"):
        h = reply.heldout
        d = {name: getattr(h, name) for name in (
            "m", "m_original", "scenarios", "train", "heldout", "original_infeasible",
            "grown_infeasible", "wins", "ties", "losses")}
        d["stopped"] = STOP_NAMES.get(h.stop_reason, "")
        d["original_kept"], d["grown_kept"] = list(h.original_kept), list(h.grown_kept)
        for name in ("original_mean", "original_worst", "grown_mean", "grown_worst"):
            d[name] = getattr(h, name) if h.HasField(name) else None
        out["heldout"] = d
    return out
