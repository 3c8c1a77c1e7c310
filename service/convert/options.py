"""Repair options: RepairOptions <-> keyword arguments of :func:`flipfix.repair.repair`."""

from __future__ import annotations

import math

from flipfix.repair.api import check_options
from flipfix.repair.errors import InputError

from flipfix.service.convert.enums import METHOD_ENUM, METHOD_NAMES, enum_name
from flipfix.service.generated import flipfix_pb2 as pb

__all__ = ["options_to_kwargs", "kwargs_to_options", "nonneg", "time_limit", "check_time_limit",
           "method_number", "DEFAULT_TIME_LIMIT", "MAX_WIRE_FLIPS"]

#: the server's default search budget (s) of a Repair and a ParetoFront call, as the proto states
DEFAULT_TIME_LIMIT = 5.0
#: The largest max_flips accepted on the wire (the int32 range: larger uint32 values are
#: almost always a negative int32 that the client sent unchecked).
MAX_WIRE_FLIPS = 2**31 - 1


def nonneg(v: float, field: str) -> float:
    """A finite number >= 0, or an InputError naming ``field``."""
    if not math.isfinite(v) or v < 0:
        raise InputError(field, f"must be a finite number >= 0, got {v:g}")
    return float(v)


def check_time_limit(seconds: float, field: str) -> float:
    """A time limit the caller set: a finite number of seconds > 0, or an InputError
    naming ``field`` (0 is refused rather than read as "the default": leave it unset)."""
    if not (math.isfinite(seconds) and seconds > 0):
        raise InputError(field, f"must be a number of seconds > 0, got {seconds:g} "
                                "(leave it unset for the server's default)")
    return float(seconds)


def time_limit(msg, name: str, field: str, default: float) -> float:
    """The optional time-limit field ``name`` of ``msg``: checked when set, else ``default``."""
    return check_time_limit(getattr(msg, name), field) if msg.HasField(name) else float(default)


def options_to_kwargs(o: pb.RepairOptions, *, default_time_limit: float = DEFAULT_TIME_LIMIT,
                      field: str = "options") -> dict:
    """RepairOptions -> keyword arguments of :func:`flipfix.repair.repair` (time limit uncapped)."""
    method = enum_name(METHOD_NAMES, o.method, field + ".method", pb.Method)
    budget = time_limit(o, "time_limit", field + ".time_limit", default_time_limit)
    nonneg(o.flip_price, field + ".flip_price")
    if o.HasField("max_flips") and o.max_flips > MAX_WIRE_FLIPS:
        # a negative number sent by a client as int32 arrives as a uint32 near 2^32
        raise InputError(field + ".max_flips", f"must be a whole number in [0, {MAX_WIRE_FLIPS}], "
                                               f"got {o.max_flips} (a negative value sent as "
                                               "uint32 arrives as 2^32 minus it)")
    kwargs = {
        "method": method,
        "time_limit": budget,
        "max_flips": int(o.max_flips) if o.HasField("max_flips") else None,
        "flip_price": float(o.flip_price),
        "seed": int(o.seed),
        "workers": max(1, int(o.workers)),
        "pareto": bool(o.pareto),
        **_alternatives(o, field),
    }
    try:
        check_options(**{k: kwargs[k] for k in ("method", "time_limit", "max_flips",
                                                "flip_price", "seed", "workers")})
    except InputError as err:
        raise InputError(f"{field}.{err.field}", err.message) from None
    return kwargs


def _alternatives(o: pb.RepairOptions, field: str) -> dict:
    """The alternatives options (fields 50-52) as :func:`flipfix.repair.repair` takes them."""
    from flipfix.repair.solvers.alternatives import MAX_ALTERNATIVES

    if o.alternatives > MAX_ALTERNATIVES:
        raise InputError(field + ".alternatives", f"must be at most {MAX_ALTERNATIVES}, got "
                                                  f"{o.alternatives}")
    if not o.alternatives:
        return {}
    return {"alternatives": int(o.alternatives),
            "alternative_distance": max(1, int(o.alternative_distance)),
            "alternatives_by": "decisions" if o.alternatives_by_decisions else "flips"}


def method_number(method: str, field: str = "method") -> int:
    """A core method name (``"portfolio"``, ``"greedy"``, ``"cpsat"``) -> Method number."""
    if method not in METHOD_ENUM:
        raise InputError(field, f"must be one of {', '.join(sorted(METHOD_ENUM))}, got "
                                f"{str(method)[:40]}")
    return METHOD_ENUM[method]


def kwargs_to_options(*, method: str = "portfolio", time_limit: float | None = None,
                      max_flips: int | None = None, flip_price: float = 0.0, seed: int = 0,
                      workers: int = 1, audit_limit: int | None = None, pareto: bool = False,
                      alternatives: int = 0, alternative_distance: int = 0,
                      alternatives_by_decisions: bool = False) -> pb.RepairOptions:
    """Keyword arguments (as :func:`flipfix.repair.repair` takes them) -> RepairOptions;
    ``time_limit=None`` leaves it unset (the server's default), 0 is refused here."""
    o = pb.RepairOptions(method=method_number(method, "options.method"),
                         flip_price=float(flip_price), seed=int(seed), workers=int(workers),
                         pareto=bool(pareto), alternatives=int(alternatives),
                         alternative_distance=int(alternative_distance),
                         alternatives_by_decisions=bool(alternatives_by_decisions))
    if time_limit is not None:
        o.time_limit = check_time_limit(float(time_limit), "options.time_limit")
    if max_flips is not None:
        o.max_flips = int(max_flips)
    if audit_limit is not None:
        o.audit_limit = int(audit_limit)
    return o
