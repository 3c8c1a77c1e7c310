"""Where the store's rows live: an SQLite file (the default) or a PostgreSQL server.

:class:`flipfix.service.store.Store` writes its SQL once, with ``?`` placeholders and
SQLite's column types; a backend runs it:

* :class:`SQLiteBackend` -- one file, WAL journal, ``synchronous=FULL``; writes through
  one connection under one lock (``BEGIN IMMEDIATE``), reads on pooled read-only
  connections of their own (one snapshot each, no write lock).
* :class:`PostgresBackend` -- a ``postgresql://`` URL, a psycopg 3 connection pool.
  Every write transaction first takes one transaction-scoped advisory lock, so writes from
  any number of flipfix replicas on the same database run one at a time, exactly as on
  SQLite (a revision check and the write that follows it can never interleave with
  another replica's); commits are durable before they are acknowledged (PostgreSQL's
  default ``synchronous_commit``). Reads are ``READ ONLY REPEATABLE READ`` transactions:
  one snapshot, no lock. The DDL is translated (``BLOB`` -> ``BYTEA``, ...) and ``?``
  becomes ``%s``. A lost server connection is a
  :class:`~flipfix.service.errors.TransientError` (UNAVAILABLE: retry).

:func:`open_backend` picks one from the ``--db`` value.
"""

from __future__ import annotations

import queue
import re
import sqlite3
import threading
from contextlib import contextmanager
from pathlib import Path
from typing import Iterator

from flipfix.service.errors import TransientError

__all__ = ["open_backend", "SQLiteBackend", "PostgresBackend", "is_postgres_url"]

#: the advisory lock every PostgreSQL write transaction holds (any constant; "flipfix")
WRITE_LOCK = 0x666C6970666978


def is_postgres_url(text: str) -> bool:
    return str(text).startswith(("postgresql://", "postgres://"))


def open_backend(db: str | Path):
    """A backend for ``db``: a ``postgresql://`` URL, a file path, or ``":memory:"``."""
    return PostgresBackend(str(db)) if is_postgres_url(str(db)) else SQLiteBackend(db)


class SQLiteBackend:
    """One SQLite file (``":memory:"``: one connection, for tests)."""

    name = "sqlite"
    integrity_errors: tuple = (sqlite3.IntegrityError,)

    def __init__(self, path: str | Path):
        self.path = str(path)
        self.memory = self.path == ":memory:"
        if not self.memory:
            Path(self.path).parent.mkdir(parents=True, exist_ok=True)
        self._lock = threading.Lock()
        self._idle_readers: queue.SimpleQueue[sqlite3.Connection] = queue.SimpleQueue()
        self._readers: list[sqlite3.Connection] = []  # every read connection opened
        self._readers_lock = threading.Lock()  # not the write lock: a write may be open
        self.db = self._connect()
        self.db.execute("PRAGMA journal_mode=WAL")
        self.db.execute("PRAGMA synchronous=FULL")
        self.db.execute("PRAGMA foreign_keys=ON")

    def _connect(self) -> sqlite3.Connection:
        return sqlite3.connect(self.path, isolation_level=None, check_same_thread=False,
                               timeout=10.0)

    @staticmethod
    def ddl(stmt: str) -> list[str]:
        """Statements of one DDL statement in this dialect (SQLite: as written)."""
        return [stmt]

    def create_schema(self, ddl: str) -> None:
        # executescript commits by itself; every statement is CREATE ... IF NOT EXISTS
        self.db.executescript(ddl)

    @contextmanager
    def tx(self) -> Iterator[sqlite3.Connection]:
        """One write transaction (``BEGIN IMMEDIATE``): commit on success, else roll back."""
        with self._lock:
            self.db.execute("BEGIN IMMEDIATE")
            try:
                yield self.db
            except BaseException:
                self.db.execute("ROLLBACK")
                raise
            self.db.execute("COMMIT")

    @contextmanager
    def read(self) -> Iterator[sqlite3.Connection]:
        """A read-only transaction on an idle read connection (a new one if none is idle)."""
        if self.memory:
            with self.tx() as db:
                yield db
            return
        try:
            db = self._idle_readers.get_nowait()
        except queue.Empty:
            db = self._connect()
            db.execute("PRAGMA query_only=ON")
            with self._readers_lock:
                self._readers.append(db)
        try:
            db.execute("BEGIN")  # deferred: a snapshot from the first read, no write lock
            try:
                yield db
            finally:
                if db.in_transaction:  # nothing was written: ending the snapshot is all
                    db.execute("ROLLBACK")
        finally:
            self._idle_readers.put(db)

    def pragma(self, name: str):
        with self._lock:
            return self.db.execute(f"PRAGMA {name}").fetchone()[0]

    def close(self) -> None:
        with self._lock, self._readers_lock:
            for db in self._readers:
                db.close()
            self.db.close()


# ------------------------------------------------------------------ PostgreSQL
_TYPES = [(re.compile(r"INTEGER PRIMARY KEY AUTOINCREMENT"), "BIGSERIAL PRIMARY KEY"),
          (re.compile(r"\bINTEGER\b"), "BIGINT"), (re.compile(r"\bBLOB\b"), "BYTEA"),
          (re.compile(r"\bREAL\b"), "DOUBLE PRECISION"), (re.compile(r"\b[xX]''"), "''::bytea")]


def postgres_ddl(ddl: str) -> list[str]:
    """SQLite DDL -> PostgreSQL statements (column types only; the rest is standard)."""
    for pattern, repl in _TYPES:
        ddl = pattern.sub(repl, ddl)
    return [s.strip() for s in ddl.split(";") if s.strip()]


class _PgConnection:
    """A psycopg connection that takes the store's ``?`` placeholders."""

    def __init__(self, conn):
        self.conn = conn

    def execute(self, sql: str, args=()):
        return self.conn.execute(sql.replace("?", "%s"), tuple(args))

    def executemany(self, sql: str, rows) -> None:
        with self.conn.cursor() as cur:
            cur.executemany(sql.replace("?", "%s"), list(rows))


class PostgresBackend:
    """A PostgreSQL database shared by any number of flipfix replicas."""

    name = "postgresql"

    def __init__(self, url: str, *, max_connections: int = 16):
        try:
            import psycopg
            from psycopg_pool import ConnectionPool
        except ImportError:
            from flipfix.repair.errors import InputError

            raise InputError("db", "a postgresql:// store needs psycopg: "
                                   "pip install 'flipfix[postgres]'") from None
        self._psycopg = psycopg
        self.integrity_errors = (psycopg.errors.IntegrityError,)
        self.url = url
        self.pool = ConnectionPool(url, min_size=1, max_size=max_connections, open=False,
                                   kwargs={"autocommit": True}, name="flipfix-store")
        try:
            self.pool.open(wait=True, timeout=30.0)
        except Exception as exc:
            self.pool.close()
            raise TransientError("db", f"cannot reach the PostgreSQL server: {exc}") from None

    @staticmethod
    def ddl(stmt: str) -> list[str]:
        """Statements of one (SQLite-typed) DDL statement in PostgreSQL's types."""
        return postgres_ddl(stmt)

    def create_schema(self, ddl: str) -> None:
        with self.tx() as db:  # under the write lock: replicas starting at once do not race
            for stmt in postgres_ddl(ddl):
                db.execute(stmt)

    @contextmanager
    def _transaction(self, begin: str, lock: bool):
        OperationalError = self._psycopg.OperationalError
        try:
            with self.pool.connection() as conn:
                conn.execute(begin)
                try:
                    if lock:
                        conn.execute("SELECT pg_advisory_xact_lock(%s)", (WRITE_LOCK,))
                    yield _PgConnection(conn)
                except BaseException:
                    if not conn.closed:
                        conn.execute("ROLLBACK")
                    raise
                conn.execute("COMMIT")
        except OperationalError as exc:
            raise TransientError("db", f"the PostgreSQL server connection failed: "
                                       f"{str(exc).strip()}") from None

    def tx(self):
        """One write transaction, serialised across replicas by the advisory lock."""
        return self._transaction("BEGIN ISOLATION LEVEL READ COMMITTED", lock=True)

    def read(self):
        """One read-only snapshot, no lock."""
        return self._transaction("BEGIN ISOLATION LEVEL REPEATABLE READ READ ONLY", lock=False)

    def close(self) -> None:
        self.pool.close()
