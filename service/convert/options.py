"""Repair options: RepairOptions <-> keyword arguments of :func:`flipfix.repair.repair`."""

from __future__ import annotations

import math

from flipfix.repair.api import check_options
from flipfix.repair.errors import InputError

from flipfix.service.convert.enums import METHOD_ENUM, METHOD_NAMES, METHOD_TEXT, enum_name
from flipfix.service.generated import flipfix_pb2 as pb

__all__ = ["options_to_kwargs", "kwargs_to_options", "nonneg", "MAX_WIRE_FLIPS"]

#: The largest max_flips accepted on the wire (the int32 range: larger uint32 values are
#: almost always a negative int32 that the client sent unchecked).
MAX_WIRE_FLIPS = 2**31 - 1


def nonneg(v: float, field: str) -> float:
    """A finite number >= 0, or an InputError naming ``field``."""
    if not math.isfinite(v) or v < 0:
        raise InputError(field, f"must be a finite number >= 0, got {v!r}")
    return float(v)


def options_to_kwargs(o: pb.RepairOptions, *, default_time_limit: float = 5.0,
                      field: str = "options") -> dict:
    """RepairOptions -> keyword arguments of :func:`flipfix.repair.repair` (time limit uncapped)."""
    method = enum_name(METHOD_NAMES, o.method, field + ".method", METHOD_TEXT)
    if not math.isfinite(o.time_limit) or o.time_limit < 0:
        raise InputError(field + ".time_limit", f"must be >= 0 seconds, got {o.time_limit!r}")
    if not math.isfinite(o.flip_price) or o.flip_price < 0:
        raise InputError(field + ".flip_price", f"must be >= 0, got {o.flip_price!r}")
    if o.HasField("max_flips") and o.max_flips > MAX_WIRE_FLIPS:
        # a negative number sent by a client as int32 arrives as a uint32 near 2^32
        raise InputError(field + ".max_flips", f"must be a whole number in [0, {MAX_WIRE_FLIPS}], "
                                               f"got {o.max_flips} (a negative value sent as "
                                               "uint32 arrives as 2^32 minus it)")
    kwargs = {
        "method": method,
        "time_limit": float(o.time_limit) if o.time_limit > 0 else float(default_time_limit),
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


def kwargs_to_options(*, method: str = "portfolio", time_limit: float = 0.0,
                      max_flips: int | None = None, flip_price: float = 0.0, seed: int = 0,
                      workers: int = 1, audit_limit: int | None = None, pareto: bool = False,
                      alternatives: int = 0, alternative_distance: int = 0,
                      alternatives_by_decisions: bool = False) -> pb.RepairOptions:
    if method not in METHOD_ENUM:
        raise InputError("method", f"must be one of {sorted(METHOD_ENUM)}, got {method!r}")
    o = pb.RepairOptions(method=METHOD_ENUM[method], time_limit=float(time_limit or 0.0),
                         flip_price=float(flip_price), seed=int(seed), workers=int(workers),
                         pareto=bool(pareto), alternatives=int(alternatives),
                         alternative_distance=int(alternative_distance),
                         alternatives_by_decisions=bool(alternatives_by_decisions))
    if max_flips is not None:
        o.max_flips = int(max_flips)
    if audit_limit is not None:
        o.audit_limit = int(audit_limit)
    return o
