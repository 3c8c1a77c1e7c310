"""Model uploads converted in a pool worker process, not in the server's interpreter.

Converting a large label-keyed model (limits, proto -> :class:`Problem`, the stored JSON)
is seconds of pure-Python work; done in a gRPC thread it holds the interpreter lock and
health checks wait behind it. The servicer sends the model's bytes here instead
(:meth:`flipfix.service.worker.RepairPool.submit_call`) and stores what comes back. Errors
are the same InputError/LimitError, naming the same fields, as in-process.
"""

from __future__ import annotations

from flipfix.service import convert
from flipfix.service.generated import flipfix_pb2 as pb
from flipfix.service.limits import Limits
from flipfix.service.store import encode_model

__all__ = ["model_to_stored"]


def model_to_stored(raw: bytes, limits: Limits, field: str, *, cancel=None, progress=None):
    """A serialised ProblemModel -> (Problem, its stored JSON); checks ``limits`` first."""
    model = pb.ProblemModel.FromString(raw)
    limits.model(model, field)
    problem = convert.model_to_problem(model, field=field)
    return problem, encode_model(problem)
