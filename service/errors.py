"""Domain errors -> gRPC status codes, in one place.

=====================================  ===================
error                                  status code
=====================================  ===================
:class:`flipfix.repair.errors.LimitError`      RESOURCE_EXHAUSTED (a configured limit; the queue is full)
:class:`flipfix.repair.errors.InputError`      INVALID_ARGUMENT, message ``"<field>: <what is wrong>"``
:class:`NotFoundError`                 NOT_FOUND (unknown problem, revision or candidate)
:class:`AlreadyExistsError`            ALREADY_EXISTS (problem name or candidate id taken)
:class:`ConflictError`                 FAILED_PRECONDITION (expected revision differs)
:class:`TransientError`                UNAVAILABLE (worker pool restarting, database busy: retry)
anything else                          INTERNAL (logged)
=====================================  ===================

UNAVAILABLE is kept for faults a retry can cure; clients retry it.
"""

from __future__ import annotations

import functools
import inspect
import logging
import sqlite3
from concurrent.futures.process import BrokenProcessPool

import grpc

from flipfix.repair.errors import InputError, LimitError

__all__ = ["NotFoundError", "AlreadyExistsError", "ConflictError", "TransientError",
           "QueueFullError", "status_for", "translate_errors"]

log = logging.getLogger("flipfix.service")


class ServiceError(Exception):
    """Base of the service's own domain errors; ``field`` names what was looked up."""

    def __init__(self, field: str, message: str):
        self.field = field
        self.message = message
        super().__init__(f"{field}: {message}")


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


def status_for(exc: BaseException) -> tuple[grpc.StatusCode, str]:
    """The status code and details for a domain error."""
    if isinstance(exc, LimitError):
        return grpc.StatusCode.RESOURCE_EXHAUSTED, str(exc)
    if isinstance(exc, InputError):
        return grpc.StatusCode.INVALID_ARGUMENT, f"{exc.field}: {exc.message}"
    if isinstance(exc, NotFoundError):
        return grpc.StatusCode.NOT_FOUND, str(exc)
    if isinstance(exc, AlreadyExistsError):
        return grpc.StatusCode.ALREADY_EXISTS, str(exc)
    if isinstance(exc, ConflictError):
        return grpc.StatusCode.FAILED_PRECONDITION, str(exc)
    if isinstance(exc, TransientError):
        return grpc.StatusCode.UNAVAILABLE, str(exc)
    if isinstance(exc, BrokenProcessPool):
        return grpc.StatusCode.UNAVAILABLE, "repair worker pool restarting; retry"
    if isinstance(exc, sqlite3.OperationalError) and "locked" in str(exc):
        return grpc.StatusCode.UNAVAILABLE, "database busy; retry"
    return grpc.StatusCode.INTERNAL, f"internal error: {type(exc).__name__}"


def _abort(context: grpc.ServicerContext, exc: BaseException):
    code, details = status_for(exc)
    if code is grpc.StatusCode.INTERNAL:
        log.exception("unexpected error in RPC", exc_info=exc)
    context.abort(code, details)


def _handle(context: grpc.ServicerContext, exc: BaseException):
    if context.code() is not None:  # already aborted by the method itself
        raise exc
    _abort(context, exc)


def translate_errors(method):
    """Decorate a servicer method (unary or server-streaming) so domain errors become statuses."""
    if inspect.isgeneratorfunction(method):
        @functools.wraps(method)
        def stream(self, request, context):
            try:
                yield from method(self, request, context)
            except Exception as exc:  # noqa: BLE001 - mapped (INTERNAL is logged)
                _handle(context, exc)
        return stream

    @functools.wraps(method)
    def unary(self, request, context):
        try:
            return method(self, request, context)
        except Exception as exc:  # noqa: BLE001
            _handle(context, exc)
    return unary
