"""Bearer tokens, tenants and roles: who may call what.

The token file has one JSON object per line, storing only a token's SHA-256::

    {"sha256": "<64 hex digits>", "tenant": "planning-north", "role": "planner", "name": "ops laptop"}

``name`` is optional (a note for the operator). ``flipfix token`` makes a token, appends
its line and prints the token once (:mod:`flipfix.service.token_cli`). The server reads
the file at start and again on SIGHUP (:meth:`TokenFile.reload`; a file that no longer
reads keeps the previous tokens and logs why).

Every call but health checks must carry ``authorization: Bearer <token>``:
UNAUTHENTICATED without a known token, PERMISSION_DENIED when the token's role is below
the method's (:data:`METHOD_ROLES`; a method not listed there needs ``admin``, so a new
service is closed until its methods are listed). The caller's :class:`Principal` is
available to the servicer through :func:`current` while the call runs.

Roles, each including the one before: ``reader`` (look at problems, candidates and
cheap profiles), ``planner`` (change problems and candidates, run repairs and audits),
``admin`` (everything, including methods not listed).
"""

from __future__ import annotations

import contextlib
import contextvars
import hashlib
import json
import logging
import threading
from dataclasses import dataclass
from pathlib import Path

import grpc

from flipfix.repair.errors import InputError

from flipfix.service import errors
from flipfix.service.admission import HEALTH_PREFIX, behaviour, replace_behaviour

__all__ = ["ROLES", "METHOD_ROLES", "Principal", "TokenFile", "AuthInterceptor", "current",
           "acting_as", "token_digest", "ANONYMOUS"]

log = logging.getLogger("flipfix.auth")

#: Roles from least to most allowed.
ROLES = ("reader", "planner", "admin")

_F = "/flipfix.v1.Flipfix/"
_T = "/flipfix.v1.Timeline/"
_G = "/flipfix.v1.Grow/"
_REFLECTION = "/grpc.reflection.v1alpha.ServerReflection/ServerReflectionInfo"
_REFLECTION_V1 = "/grpc.reflection.v1.ServerReflection/ServerReflectionInfo"

#: The least role each method needs (full gRPC method paths). Methods not listed need
#: ``admin``: add a service's methods here when it is added.
METHOD_ROLES: dict[str, str] = {
    **{_F + m: "reader" for m in ("GetProblem", "ListProblems", "ListCandidates",
                                  "ProfileRobustness")},
    **{_F + m: "planner" for m in ("CreateProblem", "ReplaceProblem", "DeleteProblem",
                                   "AddCandidates", "RemoveCandidates", "Repair", "RepairStream",
                                   "StressTest", "StressTestStream", "ParetoFront",
                                   "CurateLibrary")},
    _REFLECTION: "reader",
    _REFLECTION_V1: "reader",
    **{_T + m: "reader" for m in ("ListEvents", "GetPublishedPlan", "ListRecords", "GetRecord")},
    **{_T + m: "planner" for m in ("AddEvent", "WithdrawEvent", "SetPublishedPlan", "Adopt")},
    **{_G + m: "planner" for m in ("Propose", "ProposeStream")},
}


@dataclass(frozen=True)
class Principal:
    """Who is calling: the tenant whose data the call sees, and the role."""

    tenant: str
    role: str

    def may(self, role: str) -> bool:
        return ROLES.index(self.role) >= ROLES.index(role)


#: The caller when the server runs without tokens (one tenant, the empty name).
ANONYMOUS = Principal(tenant="", role="admin")

_current: contextvars.ContextVar[Principal] = contextvars.ContextVar("flipfix_principal",
                                                                     default=ANONYMOUS)


def current() -> Principal:
    """The caller of the call running in this thread (:data:`ANONYMOUS` without tokens)."""
    return _current.get()


@contextlib.contextmanager
def acting_as(principal: Principal):
    """Run the block as ``principal`` (a pool worker preparing a call for its caller)."""
    token = _current.set(principal)
    try:
        yield
    finally:
        _current.reset(token)


def token_digest(token: str) -> str:
    """The hex SHA-256 of a token, as the token file stores it."""
    return hashlib.sha256(token.encode("utf-8")).hexdigest()


def parse_token_file(text: str, path: str) -> dict[str, Principal]:
    """The token file's lines -> {sha256: Principal}; errors name ``path:line``."""
    out: dict[str, Principal] = {}
    for k, line in enumerate(text.splitlines(), start=1):
        if not line.strip():
            continue
        where = f"{path}:{k}"
        try:
            obj = json.loads(line)
        except json.JSONDecodeError as err:
            raise InputError(where, f"not a JSON object: {err.msg}") from None
        if not isinstance(obj, dict):
            raise InputError(where, "must be a JSON object")
        digest, tenant, role = obj.get("sha256"), obj.get("tenant"), obj.get("role")
        if not (isinstance(digest, str) and len(digest) == 64
                and all(c in "0123456789abcdef" for c in digest)):
            raise InputError(where + ".sha256", "must be 64 lower-case hex digits")
        if not isinstance(tenant, str) or not tenant.strip():
            raise InputError(where + ".tenant", "must be a non-empty string")
        if role not in ROLES:
            raise InputError(where + ".role", f"must be one of {ROLES}, got {role!r}")
        if digest in out:
            raise InputError(where + ".sha256", "the same token is listed twice")
        out[digest] = Principal(tenant=tenant, role=role)
    return out


class TokenFile:
    """The tokens of one file; :meth:`reload` reads it again (keeps the old ones on error)."""

    def __init__(self, path: str):
        self.path = str(path)
        self._lock = threading.Lock()
        self._tokens = self._read()

    def _read(self) -> dict[str, Principal]:
        try:
            text = Path(self.path).read_text(encoding="utf-8")
        except OSError as err:
            raise InputError("--token-file", f"cannot read {self.path}: "
                                             f"{err.strerror or err}") from None
        return parse_token_file(text, self.path)

    def reload(self) -> bool:
        """Read the file again; False (and a log line) when it does not read."""
        try:
            tokens = self._read()
        except InputError as err:
            log.error("token file not reloaded, the previous tokens stay: %s: %s",
                      err.field, err.message)
            return False
        with self._lock:
            self._tokens = tokens
        log.info("token file %s reloaded: %d tokens", self.path, len(tokens))
        return True

    def __len__(self) -> int:
        with self._lock:
            return len(self._tokens)

    def lookup(self, token: str) -> Principal | None:
        digest = token_digest(token)
        with self._lock:
            return self._tokens.get(digest)


def _bearer(metadata) -> str | None:
    for key, value in metadata or ():
        if key == "authorization" and isinstance(value, str) and value.startswith("Bearer "):
            return value[len("Bearer "):].strip()
    return None


def _refusal(code: grpc.StatusCode, message: str):
    """A handler that refuses the call with ``code`` and the ErrorInfo reason of its name
    (``message`` starts with ``"authorization: "``, the field to blame)."""
    field, _, text = message.partition(": ")

    def refuse(request_or_iterator, context):
        errors.refuse(context, code, code.name, field, text)
    return refuse


class AuthInterceptor(grpc.ServerInterceptor):
    """Checks each call's bearer token and role (see the module doc); health is open."""

    def __init__(self, tokens: TokenFile):
        self.tokens = tokens

    def intercept_service(self, continuation, handler_call_details):
        handler = continuation(handler_call_details)
        method = handler_call_details.method
        if handler is None or method.startswith(HEALTH_PREFIX):
            return handler
        token = _bearer(handler_call_details.invocation_metadata)
        who = self.tokens.lookup(token) if token else None
        if who is None:
            return replace_behaviour(handler, _refusal(
                grpc.StatusCode.UNAUTHENTICATED,
                "authorization: send 'authorization: Bearer <token>' with a token the server "
                "knows" if token is None else "authorization: unknown token"))
        need = METHOD_ROLES.get(method, "admin")
        if not who.may(need):
            return replace_behaviour(handler, _refusal(
                grpc.StatusCode.PERMISSION_DENIED,
                f"authorization: {method.rsplit('/', 1)[-1]} needs the role {need!r}; this "
                f"token has {who.role!r}"))
        return replace_behaviour(handler, _as(who, handler))


def _as(who: Principal, handler):
    """The handler's behaviour, run with :func:`current` returning ``who``."""
    inner = behaviour(handler)
    if handler.response_streaming:
        def stream(request, context):
            reset = _current.set(who)
            try:
                yield from inner(request, context)
            finally:
                _reset(reset)
        return stream

    def unary(request, context):
        reset = _current.set(who)
        try:
            return inner(request, context)
        finally:
            _reset(reset)
    return unary


def _reset(token) -> None:
    try:
        _current.reset(token)
    except ValueError:  # a stream resumed in another context: nothing of ours to undo there
        pass
