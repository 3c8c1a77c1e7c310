"""How a client reaches a server: the channel (plain or TLS, mutual TLS with a client
certificate) and the bearer token sent with every call.

The command line takes the same options everywhere a ``--server`` is taken
(:func:`add_arguments`): ``--ca FILE`` (PEM roots to trust; turns TLS on), ``--cert FILE``
and ``--key FILE`` (the client's certificate for mutual TLS), ``--token-file FILE`` (a
file whose first line is the token); without ``--token-file`` the token is read from
``$FLIPFIX_TOKEN`` when set.
"""

from __future__ import annotations

import argparse
import collections
import os
from dataclasses import dataclass
from pathlib import Path

import grpc

from flipfix.repair.errors import InputError

__all__ = ["Connection", "open_channel", "add_arguments", "from_args", "TOKEN_ENV"]

#: The environment variable holding a bearer token when no token file is given.
TOKEN_ENV = "FLIPFIX_TOKEN"


@dataclass(frozen=True)
class Connection:
    """Where and how to connect. ``ca``/``cert``/``key`` are PEM file paths; TLS is on when
    any is given (``ca`` None then means the system's roots)."""

    target: str
    ca: str | None = None
    cert: str | None = None
    key: str | None = None
    token: str | None = None

    @property
    def tls(self) -> bool:
        return bool(self.ca or self.cert or self.key)


def _read(path: str, field: str) -> bytes:
    try:
        return Path(path).read_bytes()
    except OSError as err:
        raise InputError(field, f"cannot read {path}: {err.strerror or err}") from None


class _Bearer(grpc.UnaryUnaryClientInterceptor, grpc.UnaryStreamClientInterceptor):
    """Adds ``authorization: Bearer <token>`` to every call's metadata."""

    def __init__(self, token: str):
        self._entry = ("authorization", f"Bearer {token}")

    def _with_token(self, details):
        metadata = list(details.metadata or []) + [self._entry]
        return _Details(details.method, details.timeout, metadata, details.credentials,
                        getattr(details, "wait_for_ready", None),
                        getattr(details, "compression", None))

    def intercept_unary_unary(self, continuation, details, request):
        return continuation(self._with_token(details), request)

    def intercept_unary_stream(self, continuation, details, request):
        return continuation(self._with_token(details), request)


class _Details(collections.namedtuple("_Details", ("method", "timeout", "metadata", "credentials",
                                                   "wait_for_ready", "compression")),
               grpc.ClientCallDetails):
    """A call's details with the token added."""


def open_channel(conn: Connection, *, options: list | tuple = ()) -> grpc.Channel:
    """A channel to ``conn.target``: TLS when ``conn.tls`` (mutual with ``cert``/``key``),
    every call carrying ``conn.token`` when set."""
    options = list(options)
    if conn.tls:
        if bool(conn.cert) != bool(conn.key):
            raise InputError("--cert" if conn.key else "--key",
                             "a client certificate needs both --cert and --key")
        creds = grpc.ssl_channel_credentials(
            root_certificates=_read(conn.ca, "--ca") if conn.ca else None,
            private_key=_read(conn.key, "--key") if conn.key else None,
            certificate_chain=_read(conn.cert, "--cert") if conn.cert else None)
        channel = grpc.secure_channel(conn.target, creds, options=options)
    else:
        channel = grpc.insecure_channel(conn.target, options=options)
    if conn.token:
        channel = grpc.intercept_channel(channel, _Bearer(conn.token))
    return channel


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """The connection options beside a ``--server`` option."""
    g = parser.add_argument_group("connection (with --server)")
    g.add_argument("--ca", metavar="FILE", help="PEM certificates to trust (turns TLS on)")
    g.add_argument("--cert", metavar="FILE", help="client certificate (PEM) for mutual TLS")
    g.add_argument("--key", metavar="FILE", help="the client certificate's private key (PEM)")
    g.add_argument("--token-file", metavar="FILE",
                   help=f"file holding the bearer token (default: ${TOKEN_ENV} when set)")


def read_token(path: str | None) -> str | None:
    """The token in ``path`` (first line), else ``$FLIPFIX_TOKEN``, else None."""
    if path:
        text = _read(path, "--token-file").decode("utf-8", "replace").strip()
        token = text.splitlines()[0].strip() if text else ""
        if not token:
            raise InputError("--token-file", f"{path} holds no token")
        return token
    return os.environ.get(TOKEN_ENV) or None


def from_args(args: argparse.Namespace, target: str) -> Connection:
    """The :class:`Connection` the command-line options describe."""
    return Connection(target=target, ca=getattr(args, "ca", None),
                      cert=getattr(args, "cert", None), key=getattr(args, "key", None),
                      token=read_token(getattr(args, "token_file", None)))
