"""Admission control: which calls the server takes on, and when.

* :class:`HeavyGate` -- at most ``capacity`` heavy calls (model uploads and reads,
  candidate uploads, the conversion part of repairs and audits) run at once, and their
  estimated memory (bytes of the request plus the stored model it reads, x
  ``memory_factor``) stays within ``memory_bytes``; calls under ``light_bytes`` pass.
  Beyond that a call waits in a first-come queue of at most ``queue`` calls; a call that
  finds the queue full, or that alone could never fit, is refused at once with a
  :class:`flipfix.service.errors.QueueFullError` (RESOURCE_EXHAUSTED) saying which limit
  and which server option raises it. Waiting is on a condition variable, woken by each
  release and bounded by the call's deadline; nothing polls.
* :class:`DrainInterceptor` -- counts the calls in flight; once the server is shutting
  down, every new call except health checks is answered UNAVAILABLE at once (a client
  retries elsewhere) instead of being queued behind the in-flight ones, and the server
  waits for the in-flight ones (at most the grace period) before it stops.

* :class:`RequestGuard` -- refuses, before decoding, a request whose bytes alone put its
  estimate over the whole memory budget, and turns undecodable bytes into INVALID_ARGUMENT.
  For the methods it is told (model uploads), a request of ``light_bytes`` or more is
  decoded without its large field (:mod:`flipfix.service.wire`): the servicer gets a
  :class:`~flipfix.service.wire.Deferred` and a worker decodes the field.

Health checks never pass through the gate, so they answer while uploads are converted.
"""

from __future__ import annotations

import collections
import contextlib
import threading
import time
from dataclasses import dataclass

import grpc

from flipfix.repair.errors import InputError
from flipfix.service import errors, wire
from flipfix.service.errors import QueueFullError, status_for

__all__ = ["AdmissionConfig", "HeavyGate", "DrainInterceptor", "RequestGuard", "HEALTH_PREFIX",
           "behaviour", "replace_behaviour"]

#: Method paths starting with this are health checks (always answered).
HEALTH_PREFIX = "/grpc.health.v1.Health/"

MIB = 1024 * 1024


@dataclass(frozen=True)
class AdmissionConfig:
    """Limits of the heavy-call gate.

    ``memory_factor``: peak server memory observed per byte of a label-keyed model upload
    was about 25x (a 57 MiB CreateProblem raised memory by 1.4 GB), so the default
    estimate is 25 x the request size.
    """

    capacity: int = 2
    queue: int = 64
    memory_bytes: int = 2048 * MIB
    memory_factor: float = 25.0
    #: calls smaller than this (request plus stored model read) pass without a place:
    #: converting them costs milliseconds, and queueing them behind uploads would not help
    light_bytes: int = 64 * 1024


class HeavyGate:
    """At most ``capacity`` heavy calls at once within ``memory_bytes``; a bounded FIFO
    queue of waiting calls (see the module doc)."""

    def __init__(self, config: AdmissionConfig = AdmissionConfig()):
        if config.capacity < 1:
            raise ValueError("capacity must be >= 1")
        self.config = config
        self._cond = threading.Condition()
        self._running = 0
        self._reserved = 0
        self._waiting: collections.deque = collections.deque()
        self.admitted = 0
        self.refused = 0

    def estimate(self, request_bytes: int) -> int:
        """Estimated peak memory (bytes) of a call whose request has ``request_bytes``."""
        return int(request_bytes * self.config.memory_factor)

    @property
    def running(self) -> int:
        with self._cond:
            return self._running

    @property
    def waiting(self) -> int:
        with self._cond:
            return len(self._waiting)

    def _fits(self, need: int) -> bool:
        return (self._running < self.config.capacity
                and (self._running == 0 or self._reserved + need <= self.config.memory_bytes))

    @contextlib.contextmanager
    def admit(self, request_bytes: int, what: str, *, timeout: float | None = None):
        """Hold a place for one heavy call (``what`` names it in errors) while in the block.

        ``timeout``: seconds it may wait for a place (None: no limit; the call's deadline).
        """
        cfg = self.config
        if request_bytes < cfg.light_bytes:
            yield
            return
        need = self.estimate(request_bytes)
        if need > cfg.memory_bytes:
            with self._cond:
                self.refused += 1
            raise QueueFullError(
                "request", f"{what}: estimated memory {need / MIB:.0f} MiB ({request_bytes / MIB:.1f}"
                           f" MiB of request x {cfg.memory_factor:g}) exceeds the server's limit "
                           f"of {cfg.memory_bytes / MIB:.0f} MiB per call (serve --memory-mb)")
        ticket = object()
        with self._cond:
            if not self._waiting and self._fits(need):
                self._enter(need)
            else:
                if len(self._waiting) >= cfg.queue:
                    self.refused += 1
                    raise QueueFullError(
                        "server", f"{what}: {self._running} heavy calls running and {cfg.queue} "
                                  f"waiting, the most this server takes (serve --heavy-calls, "
                                  "--queue); retry later")
                self._waiting.append(ticket)
                deadline = None if timeout is None else time.monotonic() + timeout
                try:
                    while not (self._waiting[0] is ticket and self._fits(need)):
                        left = None if deadline is None else deadline - time.monotonic()
                        if left is not None and left <= 0:
                            self.refused += 1
                            raise QueueFullError(
                                "server", f"{what}: waited {timeout:.1f} s for one of "
                                          f"{cfg.capacity} heavy-call places; retry later")
                        self._cond.wait(left)
                finally:
                    self._waiting.remove(ticket)
                    self._cond.notify_all()  # the next in line may fit now
                self._enter(need)
        try:
            yield
        finally:
            with self._cond:
                self._running -= 1
                self._reserved -= need
                self._cond.notify_all()

    def _enter(self, need: int) -> None:
        self._running += 1
        self._reserved += need
        self.admitted += 1


def _unavailable(message: str):
    def refuse(request, context):
        errors.refuse(context, grpc.StatusCode.UNAVAILABLE, "TRANSIENT", "", message)
    return refuse


class DrainInterceptor(grpc.ServerInterceptor):
    """Counts the calls in flight; once ``draining`` is set, answers every new call but
    health checks UNAVAILABLE at once. :meth:`wait_idle` waits (on a condition, woken by
    each call's end) until no call is in flight."""

    def __init__(self, draining: threading.Event):
        self.draining = draining
        self._cond = threading.Condition()
        self._in_flight = 0

    @property
    def in_flight(self) -> int:
        with self._cond:
            return self._in_flight

    def wait_idle(self, timeout: float) -> bool:
        """True when no call (health aside) is in flight, waiting up to ``timeout`` s."""
        with self._cond:
            return self._cond.wait_for(lambda: self._in_flight == 0, timeout)

    def _enter(self) -> None:
        with self._cond:
            self._in_flight += 1

    def _leave(self) -> None:
        with self._cond:
            self._in_flight -= 1
            self._cond.notify_all()

    def intercept_service(self, continuation, handler_call_details):
        handler = continuation(handler_call_details)
        if handler is None or handler_call_details.method.startswith(HEALTH_PREFIX):
            return handler
        if self.draining.is_set():
            refuse = _unavailable("server: shutting down; retry on another server")
            if handler.response_streaming:
                def refuse_stream(request, context):
                    refuse(request, context)
                    yield  # pragma: no cover - abort raises
                return replace_behaviour(handler, refuse_stream)
            return replace_behaviour(handler, refuse)
        inner = behaviour(handler)
        if handler.response_streaming:
            def counted_stream(request, context):
                self._enter()
                try:
                    yield from inner(request, context)
                finally:
                    self._leave()
            return replace_behaviour(handler, counted_stream)

        def counted(request, context):
            self._enter()
            try:
                return inner(request, context)
            finally:
                self._leave()
        return replace_behaviour(handler, counted)


class _Refused:
    """What the guarded deserialiser returns instead of a request it will not decode."""

    __slots__ = ("error",)

    def __init__(self, error: Exception):
        self.error = error


class RequestGuard(grpc.ServerInterceptor):
    """Looks at each request's bytes before they are decoded: a request whose estimated
    memory (its bytes x the gate's factor) exceeds the gate's whole budget is refused
    RESOURCE_EXHAUSTED without being decoded, and bytes that are not a valid message are
    INVALID_ARGUMENT (``request: ...``) rather than the library's INTERNAL. Streaming
    requests and health checks pass untouched.

    ``deferred``: method path -> (field name, field number) of a length-delimited field
    left undecoded in requests of ``light_bytes`` or more (see the module doc);
    ``raw_replies``: method paths whose servicer may return the reply already serialized
    (``bytes``, built in a worker): sent as they are."""

    def __init__(self, gate: HeavyGate, deferred: dict | None = None,
                 raw_replies=frozenset()):
        self.gate = gate
        self.deferred = dict(deferred or {})
        self.raw_replies = frozenset(raw_replies)

    def intercept_service(self, continuation, handler_call_details):
        handler = continuation(handler_call_details)
        method = handler_call_details.method
        if (handler is None or handler.request_streaming or handler.request_deserializer is None
                or method.startswith(HEALTH_PREFIX)):
            return handler
        decode, inner, gate = handler.request_deserializer, behaviour(handler), self.gate
        what = method.rsplit("/", 1)[-1]
        deferred = self.deferred.get(method)

        def guarded_decode(raw: bytes):
            need, cfg = gate.estimate(len(raw)), gate.config
            if len(raw) >= cfg.light_bytes and need > cfg.memory_bytes:
                return _Refused(QueueFullError(
                    "request", f"{what}: estimated memory {need / MIB:.0f} MiB "
                               f"({len(raw) / MIB:.1f} MiB of request x {cfg.memory_factor:g}) "
                               f"exceeds the server's limit of {cfg.memory_bytes / MIB:.0f} MiB "
                               "per call (serve --memory-mb); not decoded"))
            try:
                if deferred is not None and len(raw) >= cfg.light_bytes:
                    parts = wire.split(raw, deferred[1])
                    if parts is not None:
                        return wire.Deferred(decode(parts[0]), deferred[0], raw, parts[1])
                return decode(raw)
            except Exception as err:  # noqa: BLE001 - any decoding failure is the caller's
                return _Refused(InputError("request", f"not a valid {what} request "
                                                      f"({type(err).__name__})"))

        def refuse_or_run(request, context):
            if isinstance(request, _Refused):
                code, details = status_for(request.error)
                context.abort(code, details)
            return inner(request, context)

        if handler.response_streaming:
            def refuse_or_stream(request, context):
                if isinstance(request, _Refused):
                    code, details = status_for(request.error)
                    context.abort(code, details)
                yield from inner(request, context)
            return replace_behaviour(handler, refuse_or_stream, decode=guarded_decode)
        encode = None
        if method in self.raw_replies:
            serialize = handler.response_serializer

            def encode(reply):
                return reply if isinstance(reply, bytes) else serialize(reply)
        return replace_behaviour(handler, refuse_or_run, decode=guarded_decode, encode=encode)


def behaviour(handler):
    """The function a method handler runs (whatever its kind)."""
    return (handler.unary_unary or handler.unary_stream or handler.stream_unary
            or handler.stream_stream)


def replace_behaviour(handler, fn, *, decode=None, encode=None):
    """``handler`` with its behaviour replaced by ``fn`` (same serialisers and kind; the
    request deserialiser too unless ``decode`` is given, the response serialiser unless
    ``encode`` is)."""
    decode = decode or handler.request_deserializer
    encode = encode or handler.response_serializer
    if handler.request_streaming and handler.response_streaming:
        return grpc.stream_stream_rpc_method_handler(
            fn, request_deserializer=decode,
            response_serializer=encode)
    if handler.request_streaming:
        return grpc.stream_unary_rpc_method_handler(
            fn, request_deserializer=decode,
            response_serializer=encode)
    if handler.response_streaming:
        return grpc.unary_stream_rpc_method_handler(
            fn, request_deserializer=decode,
            response_serializer=encode)
    return grpc.unary_unary_rpc_method_handler(
        fn, request_deserializer=decode,
        response_serializer=encode)
