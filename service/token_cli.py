"""``flipfix token``: make a bearer token for a tenant and role.

    flipfix token --file tokens.jsonl --tenant planning-north --role planner [--name NOTE]

Appends ``{"sha256", "tenant", "role", "name"}`` to the token file (created with mode
0600; the whole file is rewritten to a temporary file and renamed over, so a reader never
sees half a line) and prints the token once on stdout: the file keeps only its hash.
A running server reads the new line on SIGHUP.
"""

from __future__ import annotations

import json
import os
import secrets
import sys
import tempfile
from pathlib import Path

from flipfix.repair.errors import InputError

__all__ = ["register", "make_token"]


def make_token(path: str, *, tenant: str, role: str, name: str = "") -> str:
    """A new token for ``tenant`` with ``role``, its hash appended to ``path``."""
    from flipfix.service.auth import ROLES, parse_token_file, token_digest

    if role not in ROLES:
        raise InputError("--role", f"must be one of {ROLES}, got {role!r}")
    if not tenant.strip():
        raise InputError("--tenant", "must be a non-empty name")
    target = Path(path)
    old = target.read_text(encoding="utf-8") if target.exists() else ""
    parse_token_file(old, str(target))  # refuse to add to a file that does not read
    token = secrets.token_urlsafe(32)
    line = {"sha256": token_digest(token), "tenant": tenant, "role": role}
    if name:
        line["name"] = name
    text = old + ("" if not old or old.endswith("\n") else "\n") + json.dumps(line) + "\n"
    fd, tmp = tempfile.mkstemp(dir=target.parent or ".", prefix=".tokens-")
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        os.chmod(tmp, 0o600)
        os.replace(tmp, target)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return token


def _run(args) -> int:
    token = make_token(args.file, tenant=args.tenant, role=args.role, name=args.name)
    print(token)
    print(f"flipfix: token for tenant {args.tenant!r} ({args.role}) added to {args.file}; "
          "it is shown only now", file=sys.stderr)
    return 0


def register(sub) -> None:
    t = sub.add_parser("token", help="make a bearer token (its hash goes to the token file)")
    t.add_argument("--file", required=True, metavar="FILE", help="the server's token file")
    t.add_argument("--tenant", required=True, help="whose problems the token sees")
    t.add_argument("--role", required=True, choices=("reader", "planner", "admin"))
    t.add_argument("--name", default="", help="a note for the operator (who holds it)")
    t.set_defaults(func=_run)
