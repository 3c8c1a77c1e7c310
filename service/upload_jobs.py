"""Model uploads converted in a pool worker process, not in the server's interpreter.

Converting a large label-keyed model (limits, proto -> :class:`Problem`, the stored JSON)
is seconds of pure-Python work, and even decoding its bytes holds the interpreter lock
for a tenth of a second at the largest allowed size; done in a gRPC thread, health checks
wait behind it. The servicer sends the model's bytes here instead
(:meth:`flipfix.service.worker.RepairPool.submit_call`) -- for an upload, the request's raw
bytes as received, never decoded in the server (:mod:`flipfix.service.wire`) -- and stores
what comes back. Errors are the same InputError/LimitError, naming the same fields, as
in-process; bytes that do not decode are ``request: not a valid <method> request``, as
the server's request guard says for any other request.
"""

from __future__ import annotations

from google.protobuf.message import DecodeError

from flipfix.repair.errors import InputError

from flipfix.service import convert
from flipfix.service.errors import positional
from flipfix.service.generated import flipfix_pb2 as pb
from flipfix.service.limits import Limits
from flipfix.service.store import encode_model

__all__ = ["model_to_stored"]


def model_to_stored(raw: bytes, limits: Limits, field: str, *, span: tuple | None = None,
                    what: str = "", cancel=None, progress=None):
    """A serialised ProblemModel (``raw``, or ``raw[span[0]:span[1]]``) -> (Problem, its
    stored JSON); checks ``limits`` first. ``what``: the method, for a decoding error."""
    try:
        model = pb.ProblemModel.FromString(raw if span is None
                                           else memoryview(raw)[span[0]:span[1]])
    except DecodeError:
        raise InputError("request", f"not a valid {what or 'ProblemModel'} request "
                                    "(DecodeError)") from None
    try:
        limits.model(model, field)
        problem = convert.model_to_problem(model, field=field)
    except InputError as err:  # label-keyed paths made positional here, where the model is
        if not err.field.startswith(field + "."):
            raise
        raise type(err)(f"{field}.{positional(model, err.field[len(field) + 1:])}",
                        err.message) from None
    return problem, encode_model(problem)
