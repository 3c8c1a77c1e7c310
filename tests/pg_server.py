"""A real PostgreSQL server for the tests, started in a temporary directory.

Debian's ``postgresql`` package provides the programs (``scripts/ensure_postgres.sh``,
run by ``make test``, installs it when missing). PostgreSQL refuses to run as root, so
as root the cluster belongs to the package's unprivileged ``postgres`` user (``nobody``
when that user does not exist); otherwise to whoever runs the tests. The server listens
on 127.0.0.1 on a free port, trusts local connections, and is stopped (``pg_ctl stop -m
fast``) and deleted at the end of the session.
"""

from __future__ import annotations

import glob
import os
import pwd
import shutil
import socket
import subprocess
import tempfile
import uuid
from pathlib import Path

__all__ = ["PostgresServer", "find_bindir"]


def find_bindir() -> Path | None:
    """Directory of ``initdb`` and ``pg_ctl`` (newest Debian version first), or None."""
    found = shutil.which("initdb")
    if found:
        return Path(found).parent
    dirs = sorted(glob.glob("/usr/lib/postgresql/*/bin"),
                  key=lambda d: int(Path(d).parent.name) if Path(d).parent.name.isdigit() else 0)
    for d in reversed(dirs):
        if (Path(d) / "initdb").exists():
            return Path(d)
    return None


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class PostgresServer:
    """``start()`` a throw-away cluster; :meth:`new_database` gives a fresh database URL."""

    def __init__(self):
        self.bindir = find_bindir()
        if self.bindir is None:
            raise RuntimeError("PostgreSQL's initdb was not found: run scripts/ensure_postgres.sh "
                               "(Debian package postgresql)")
        self.port = _free_port()
        self.dir = Path(tempfile.mkdtemp(prefix="flipfix-pg-"))
        self.data = self.dir / "data"
        self.user = None
        if os.geteuid() == 0:
            for name in ("postgres", "nobody"):
                try:
                    self.user = pwd.getpwnam(name)
                    break
                except KeyError:
                    continue
            if self.user is None:
                raise RuntimeError("running as root and no unprivileged user to run PostgreSQL")
            os.chown(self.dir, self.user.pw_uid, self.user.pw_gid)
        os.chmod(self.dir, 0o755)

    def _run(self, *args: str, check: bool = True) -> subprocess.CompletedProcess:
        cmd = [str(self.bindir / args[0]), *args[1:]]
        kw = {}
        if self.user is not None:
            uid, gid = self.user.pw_uid, self.user.pw_gid

            def drop():  # in the child, before exec: the unprivileged user
                os.setgid(gid)
                os.setuid(uid)
            kw["preexec_fn"] = drop
        return subprocess.run(cmd, check=check, capture_output=True, text=True, cwd=self.dir,
                              env={**os.environ, "LC_ALL": "C"}, **kw)

    def start(self) -> "PostgresServer":
        self._run("initdb", "-D", str(self.data), "-U", "flipfix", "-A", "trust", "-E", "UTF8",
                  "--no-locale")
        opts = (f"-p {self.port} -c listen_addresses=127.0.0.1 -k {self.dir} "
                "-c max_connections=200 -c fsync=on -c synchronous_commit=on")
        out = self._run("pg_ctl", "-D", str(self.data), "-l", str(self.dir / "log"), "-o", opts,
                        "-w", "-t", "60", "start", check=False)
        if out.returncode != 0:
            log = (self.dir / "log").read_text() if (self.dir / "log").exists() else ""
            raise RuntimeError(f"pg_ctl start failed: {out.stderr}\n{log}")
        return self

    @property
    def url(self) -> str:
        return f"postgresql://flipfix@127.0.0.1:{self.port}/postgres"

    def new_database(self) -> str:
        """CREATE DATABASE with a fresh name; returns its URL."""
        import psycopg

        name = "t_" + uuid.uuid4().hex[:12]
        with psycopg.connect(self.url, autocommit=True) as conn:
            conn.execute(f'CREATE DATABASE "{name}"')
        return f"postgresql://flipfix@127.0.0.1:{self.port}/{name}"

    def stop(self) -> None:
        if self.data.exists():
            self._run("pg_ctl", "-D", str(self.data), "-m", "fast", "-w", "stop", check=False)
        shutil.rmtree(self.dir, ignore_errors=True)
