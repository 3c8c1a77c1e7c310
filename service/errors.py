"""Domain errors -> gRPC statuses with structured details, in one place.

=====================================  ===================  ===============
error                                  status code          reason
=====================================  ===================  ===============
:class:`QueueFullError`                RESOURCE_EXHAUSTED   QUEUE_FULL
:class:`flipfix.repair.errors.LimitError`  RESOURCE_EXHAUSTED   LIMIT_EXCEEDED
:class:`flipfix.repair.errors.InputError`  INVALID_ARGUMENT     INVALID_FIELD
:class:`NotFoundError`                 NOT_FOUND            NOT_FOUND
:class:`AlreadyExistsError`            ALREADY_EXISTS       ALREADY_EXISTS
:class:`ConflictError`                 FAILED_PRECONDITION  STATE_CONFLICT
:class:`TransientError`, a broken      UNAVAILABLE          TRANSIENT
worker pool, a locked database
anything else                          INTERNAL (logged)    INTERNAL
=====================================  ===================  ===============

Every status carries, besides its message ``"<field>: <what is wrong>"``, a
``google.rpc.Status`` in the ``grpc-status-details-bin`` trailer (packed by the
grpcio-status package) with a ``google.rpc.ErrorInfo`` (domain :data:`DOMAIN`, the
reason above, ``metadata["field"]``) and, for INVALID_ARGUMENT, a
``google.rpc.BadRequest`` with one field violation. Field paths are the request's own,
by position (:func:`positional`): the core names label-keyed entries by label
(``constraints[2].fix.values['x']``); the reply names the entry the client sent
(``constraints[2].fix.values.values[3]``). Messages are plain text (:func:`plain`).

UNAVAILABLE is kept for faults a retry can cure; clients retry it.
"""

from __future__ import annotations

import ast
import functools
import inspect
import logging
import re
import sqlite3
from concurrent.futures.process import BrokenProcessPool
from typing import Any

import grpc
from google.protobuf import any_pb2
from google.rpc import error_details_pb2, status_pb2
from grpc_status import rpc_status

from flipfix.repair.errors import InputError, LimitError

__all__ = ["NotFoundError", "AlreadyExistsError", "ConflictError", "TransientError",
           "QueueFullError", "DOMAIN", "Fault", "fault_for", "status_for", "rich_status",
           "positional", "plain", "translate_errors", "refuse", "INTERCEPTOR_REASONS"]

log = logging.getLogger("flipfix.service")

#: google.rpc.ErrorInfo.domain of every flipfix error
DOMAIN = "flipfix.v1"


class ServiceError(Exception):
    """Base of the service's own domain errors; ``field`` names what was looked up."""

    def __init__(self, field: str, message: str):
        self.field = field
        self.message = message
        super().__init__(f"{field}: {message}")

    def __reduce__(self):  # rebuilt as the same kind after a pool worker raised it
        return (type(self), (self.field, self.message))


class NotFoundError(ServiceError):
    """An unknown problem, revision or candidate."""


class AlreadyExistsError(ServiceError):
    """A problem name or candidate id that is already taken."""


class ConflictError(ServiceError):
    """The stored state is not the one the request expected (e.g. revision)."""


class TransientError(ServiceError):
    """A fault that a retry may cure."""


class QueueFullError(LimitError):
    """Every repair slot is busy."""


class Fault:
    """What a client is told about one error: status code, reason (ErrorReason without
    its prefix), the field to blame ("" when none) and a plain-language message."""

    __slots__ = ("code", "reason", "field", "message")

    def __init__(self, code: grpc.StatusCode, reason: str, field: str, message: str):
        self.code, self.reason, self.field, self.message = code, reason, field, message

    @property
    def details(self) -> str:
        """The status message: ``"<field>: <message>"`` (or the message alone)."""
        return f"{self.field}: {self.message}" if self.field else self.message


#: (class, code, reason), the first match wins (QueueFullError before LimitError
#: before InputError: each is a subclass of the next)
_TABLE = (
    (QueueFullError, grpc.StatusCode.RESOURCE_EXHAUSTED, "QUEUE_FULL"),
    (LimitError, grpc.StatusCode.RESOURCE_EXHAUSTED, "LIMIT_EXCEEDED"),
    (InputError, grpc.StatusCode.INVALID_ARGUMENT, "INVALID_FIELD"),
    (NotFoundError, grpc.StatusCode.NOT_FOUND, "NOT_FOUND"),
    (AlreadyExistsError, grpc.StatusCode.ALREADY_EXISTS, "ALREADY_EXISTS"),
    (ConflictError, grpc.StatusCode.FAILED_PRECONDITION, "STATE_CONFLICT"),
    (TransientError, grpc.StatusCode.UNAVAILABLE, "TRANSIENT"),
)


def fault_for(exc: BaseException, request: Any = None) -> Fault:
    """The :class:`Fault` of a domain error; field paths made positional in ``request``."""
    for cls, code, reason in _TABLE:
        if isinstance(exc, cls):
            field = getattr(exc, "field", "") or ""
            message = getattr(exc, "message", None) or str(exc)
            if request is not None and field:
                field = positional(request, field)
            return Fault(code, reason, field, plain(message))
    if isinstance(exc, BrokenProcessPool):
        return Fault(grpc.StatusCode.UNAVAILABLE, "TRANSIENT", "",
                     "repair worker pool restarting; retry")
    if isinstance(exc, sqlite3.OperationalError) and "locked" in str(exc):
        return Fault(grpc.StatusCode.UNAVAILABLE, "TRANSIENT", "", "database busy; retry")
    return Fault(grpc.StatusCode.INTERNAL, "INTERNAL", "", f"internal error: {type(exc).__name__}")


def refuse(context: grpc.ServicerContext, code: grpc.StatusCode, reason: str, field: str,
           message: str) -> None:
    """Abort a call outside :func:`translate_errors` (interceptors) with the same details."""
    context.abort_with_status(rich_status(Fault(code, reason, field, message)))


#: reasons sent by interceptors (auth), beside those of :data:`_TABLE`, TRANSIENT and INTERNAL
INTERCEPTOR_REASONS = ("UNAUTHENTICATED", "PERMISSION_DENIED")


def status_for(exc: BaseException) -> tuple[grpc.StatusCode, str]:
    """The status code and message of a domain error."""
    f = fault_for(exc)
    return f.code, f.details


def rich_status(fault: Fault) -> grpc.Status:
    """``fault`` as a grpc.Status whose trailer carries ErrorInfo (and BadRequest)."""
    info = error_details_pb2.ErrorInfo(reason=fault.reason, domain=DOMAIN)
    if fault.field:
        info.metadata["field"] = fault.field
    details = [info]
    if fault.code is grpc.StatusCode.INVALID_ARGUMENT:
        details.append(error_details_pb2.BadRequest(field_violations=[
            error_details_pb2.BadRequest.FieldViolation(field=fault.field,
                                                        description=fault.message)]))
    packed = []
    for d in details:
        a = any_pb2.Any()
        a.Pack(d)
        packed.append(a)
    return rpc_status.to_status(status_pb2.Status(code=fault.code.value[0],
                                                  message=fault.details, details=packed))


# -------------------------------------------------------------- plain messages
_NUMPY_REPR = re.compile(r"\bnp\.(?:float|int|uint|bool|str)\w*\(([^()]*)\)")
_NUMPY_BOOL = re.compile(r"\bnp\.(True|False)_")


def plain(message: str) -> str:
    """A message without numpy reprs: ``np.float64(inf)`` -> ``inf``, ``np.True_`` -> ``True``."""
    message = _NUMPY_REPR.sub(r"\1", message)
    return _NUMPY_BOOL.sub(r"\1", message)


# ---------------------------------------------------------- positional paths
_SEGMENT = re.compile(r"\.?([A-Za-z_]\w*)|\[([^\]]*)\]")


def _segments(path: str) -> list[tuple[str, str]] | None:
    """``a.b[3].c['x']`` -> [("name", "a"), ("name", "b"), ("index", "3"), ...]; None
    when the path does not parse."""
    out, pos = [], 0
    while pos < len(path):
        m = _SEGMENT.match(path, pos)
        if m is None:
            return None
        out.append(("name", m.group(1)) if m.group(1) else ("index", m.group(2)))
        pos = m.end()
    return out


def _key_of(entry) -> str | None:
    """The repr the core gives a label-keyed entry: its label's, or its decision name's."""
    fields = getattr(entry, "DESCRIPTOR", None)
    fields = fields.fields_by_name if fields is not None else {}
    if "label" in fields:
        kind = entry.label.WhichOneof("kind")
        return None if kind is None else repr(getattr(entry.label, kind))
    if "decision" in fields:
        return repr(entry.decision)
    return None


def _find(seq, text: str) -> int | None:
    """The position of the first entry of ``seq`` whose key's repr is ``text``."""
    try:
        key = repr(ast.literal_eval(text))
    except (ValueError, SyntaxError):
        return None
    return next((k for k, e in enumerate(seq) if _key_of(e) == key), None)


def positional(request: Any, field: str) -> str:
    """``field`` with label keys replaced by positions in ``request`` as sent.

    ``constraints[2].fix.values['x']`` -> ``constraints[2].fix.values.values[3]`` (an
    Assignment's entry), ``model.linear['x']`` -> ``model.linear[0]`` (the first term of
    that label), ``...reference['shift']`` -> ``...reference[1]`` (a decision reference).
    A path that does not lead through the request is returned unchanged.
    """
    segs = _segments(field)
    if not segs or request is None:
        return field
    node, out = request, []
    for n, (kind, text) in enumerate(segs):
        if kind == "name":
            if not hasattr(node, "DESCRIPTOR") or text not in node.DESCRIPTOR.fields_by_name:
                return field
            node = getattr(node, text)
            out.append(("." if out else "") + text)
            continue
        if hasattr(node, "DESCRIPTOR"):  # a message indexed by key: an Assignment
            if "values" not in node.DESCRIPTOR.fields_by_name:
                return field
            hit = _find(node.values, text)
            if hit is None:
                return field
            node = node.values[hit]
            out.append(f".values[{hit}]")
            continue
        # a repeated field: a quoted label key, or (the core's keyed paths end at the key)
        # an integer label key at the end of the path, else a position
        hit = _find(node, text) if not text.isdigit() or n == len(segs) - 1 else None
        if hit is None and text.isdigit() and int(text) < len(node):
            hit = int(text)
        if hit is None:
            return field
        node = node[hit]
        out.append(f"[{hit}]")
    return "".join(out)


# -------------------------------------------------------------------- servicer
def _abort(context: grpc.ServicerContext, exc: BaseException, request: Any):
    fault = fault_for(exc, request)
    if fault.code is grpc.StatusCode.INTERNAL:
        log.exception("unexpected error in RPC", exc_info=exc)
    context.abort_with_status(rich_status(fault))


def _handle(context: grpc.ServicerContext, exc: BaseException, request: Any):
    if context.code() is not None:  # already aborted by the method itself
        raise exc
    _abort(context, exc, request)


def translate_errors(method):
    """Decorate a servicer method (unary or server-streaming) so domain errors become statuses."""
    if inspect.isgeneratorfunction(method):
        @functools.wraps(method)
        def stream(self, request, context):
            try:
                yield from method(self, request, context)
            except Exception as exc:  # noqa: BLE001 - mapped (INTERNAL is logged)
                _handle(context, exc, request)
        return stream

    @functools.wraps(method)
    def unary(self, request, context):
        try:
            return method(self, request, context)
        except Exception as exc:  # noqa: BLE001
            _handle(context, exc, request)
    return unary
