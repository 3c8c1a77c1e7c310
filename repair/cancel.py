"""Cancellation: a token that solvers check, wait on, or subscribe to (no polling).

A :class:`CancelToken` holds a ``threading.Event``. Code between steps checks
:meth:`CancelToken.is_set`; code that blocks inside a foreign call (CP-SAT's ``solve``)
registers a callback with :meth:`CancelToken.subscribed` (for CP-SAT, the solver's
``stop_search``), which runs once, in the thread that sets the token, so the search stops
at once. A callback registered after the token was set runs at registration: an early
cancel is never lost.

:func:`as_token` takes what callers pass as ``cancel=``: None, a token, or a plain
``threading.Event`` (library users keep passing their own Event). A plain Event does not
announce its ``set()``, so while a token that follows one has subscribers, one thread per
subscription blocks in the Event's ``wait`` (no polling) for at most the subscription's
``timeout``.
"""

from __future__ import annotations

import itertools
import threading
from contextlib import contextmanager
from typing import Callable, Iterator

from flipfix.repair.errors import InputError

__all__ = ["CancelToken", "as_token"]


class CancelToken:
    """A cancel request: an Event, plus callbacks run once when it is set.

    ``event``: follow a caller's ``threading.Event`` (set by the caller, or by
    :meth:`set`); None: a fresh one.
    """

    def __init__(self, event: threading.Event | None = None):
        self._event = threading.Event() if event is None else event
        self._follows = event is not None  # the caller may set it without telling us
        self._lock = threading.Lock()
        self._callbacks: dict[int, Callable[[], None]] = {}
        self._keys = itertools.count()

    def set(self) -> None:
        """Request the stop: the Event is set, then every subscribed callback runs once."""
        self._event.set()
        self._fire()

    def is_set(self) -> bool:
        return self._event.is_set()

    def wait(self, timeout: float | None = None) -> bool:
        """Block until set or ``timeout`` seconds pass; True when set."""
        return self._event.wait(timeout)

    def _fire(self) -> None:
        with self._lock:
            callbacks = list(self._callbacks.values())
            self._callbacks.clear()
        for callback in callbacks:
            callback()

    @contextmanager
    def subscribed(self, callback: Callable[[], None], *, timeout: float | None = None
                   ) -> Iterator["CancelToken"]:
        """Run ``callback()`` once if the token is set while the block runs.

        Already set: ``callback()`` runs now, before the block. ``timeout`` (s) bounds how
        long a token that follows a caller's plain Event keeps a thread waiting on it for
        this subscription (None: until it is set); a token's own :meth:`set` needs no thread.
        """
        key = next(self._keys)
        with self._lock:  # set() sets the Event before it takes the lock: no set is missed
            already = self._event.is_set()
            if not already:
                self._callbacks[key] = callback
        if already:
            callback()
        elif self._follows:
            threading.Thread(target=self._follow, args=(timeout,), daemon=True,
                             name="flipfix-cancel-follow").start()
        try:
            yield self
        finally:
            with self._lock:
                self._callbacks.pop(key, None)

    def _follow(self, timeout: float | None) -> None:
        if self._event.wait(timeout):
            self._fire()


def as_token(cancel) -> CancelToken:
    """The :class:`CancelToken` for a ``cancel=`` argument: None (never cancelled), a
    token (itself) or a ``threading.Event`` (a token following it)."""
    if cancel is None:
        return CancelToken()
    if isinstance(cancel, CancelToken):
        return cancel
    if isinstance(cancel, threading.Event):
        return CancelToken(cancel)
    raise InputError("cancel", f"expected a threading.Event or a CancelToken, got "
                               f"{type(cancel).__name__}")
