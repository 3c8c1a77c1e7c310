"""Where the store's rows live: an SQLite file (the default) or a PostgreSQL server.

:class:`flipfix.service.store.Store` writes its SQL once, with ``?`` placeholders and
SQLite's column types; a backend runs it:

* :class:`SQLiteBackend` -- one file, WAL journal, ``synchronous=FULL``; writes through
  one connection under one lock (``BEGIN IMMEDIATE``), reads on pooled read-only
  connections of their own (one snapshot each, no write lock).
* :class:`PostgresBackend` -- a ``postgresql://`` URL, a psycopg 3 connection pool.
  Write transactions take transaction-scoped advisory locks first (see "Write locks"
  below); commits are durable before they are acknowledged (PostgreSQL's default
  ``synchronous_commit``). Reads are ``READ ONLY REPEATABLE READ`` transactions: one
  snapshot, no lock. The DDL is translated (``BLOB`` -> ``BYTEA``, ...) and ``?``
  becomes ``%s``. A lost server connection is a
  :class:`~flipfix.service.errors.TransientError` (UNAVAILABLE: retry).

Write locks (PostgreSQL; across every replica on the database). Everything a write
checks before it writes -- a problem's revision (``expected_revision``), its next
candidate number, whether an id is taken, its published plan, events and records -- lives
in the rows of that one problem. So a write to one problem takes:

* ``WRITE_LOCK`` *shared* (any number at once), then
* the problem's own lock, exclusive: a key made from the tenant and the problem name
  (:func:`lock_id`); writes to one problem run one at a time, writes to different
  problems side by side. Under ``READ COMMITTED`` each statement reads what was committed
  before it, so a check made under the lock sees every earlier write to that problem;
* with quotas set, also its tenant's lock (:meth:`PostgresBackend.lock`, taken after the
  problem's lock, never before: no two writers wait on each other in a cycle): a quota
  check counts the tenant's rows of *all* its problems, so two writers of one tenant
  could both pass a check that only one of them fits; without quotas nothing is counted
  and no tenant lock is taken.

A write not tied to one problem (the schema, its version and migrations) takes
``WRITE_LOCK`` exclusive: it waits for every write under way and holds back every new one,
exactly the one-at-a-time order of earlier versions. Candidate ids need no global lock:
the server numbers them per problem (the counter is the problem's row), and the table's
primary key (problem, id) refuses a duplicate in any case. On SQLite one writer at a time
is the file's own rule (``BEGIN IMMEDIATE``); the keys are accepted and change nothing.

:func:`open_backend` picks one from the ``--db`` value.
"""

from __future__ import annotations

import hashlib
import queue
import re
import sqlite3
import threading
from contextlib import contextmanager
from pathlib import Path
from typing import Iterator

from flipfix.service.errors import TransientError

__all__ = ["open_backend", "SQLiteBackend", "PostgresBackend", "is_postgres_url", "lock_id"]

#: the advisory lock every PostgreSQL write transaction holds: shared by writes to one
#: problem, exclusive for the others (any constant; "flipfix")
WRITE_LOCK = 0x666C6970666978


def lock_id(kind: str, key: str) -> int:
    """The advisory lock (a signed 64-bit number) of ``kind`` ("problem", "tenant") ``key``:
    the first 8 bytes of its BLAKE2b hash. Two keys that collide share a lock: they only
    wait for each other, which never breaks a write."""
    digest = hashlib.blake2b(f"{kind}\0{key}".encode("utf-8"), digest_size=8).digest()
    return int.from_bytes(digest, "big", signed=True)


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
    def tx(self, key: str | None = None) -> Iterator[sqlite3.Connection]:
        """One write transaction (``BEGIN IMMEDIATE``): commit on success, else roll back.
        ``key`` (the problem written) changes nothing: SQLite has one writer at a time."""
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

    @staticmethod
    def lock(db, kind: str, key: str) -> None:
        """Nothing: the open write transaction is the only writer already."""

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
    def _transaction(self, begin: str, locks: tuple):
        OperationalError = self._psycopg.OperationalError
        try:
            with self.pool.connection() as conn:
                conn.execute(begin)
                try:
                    for fn, number in locks:
                        conn.execute(f"SELECT {fn}(%s)", (number,))
                    yield _PgConnection(conn)
                except BaseException:
                    if not conn.closed:
                        conn.execute("ROLLBACK")
                    raise
                conn.execute("COMMIT")
        except OperationalError as exc:
            raise TransientError("db", f"the PostgreSQL server connection failed: "
                                       f"{str(exc).strip()}") from None

    def tx(self, key: str | None = None):
        """One write transaction: to the problem stored as ``key`` (``WRITE_LOCK`` shared,
        then the problem's lock), or, with no key, to anything (``WRITE_LOCK`` exclusive).
        See "Write locks" in the module docstring."""
        locks = ((("pg_advisory_xact_lock", WRITE_LOCK),) if key is None else
                 (("pg_advisory_xact_lock_shared", WRITE_LOCK),
                  ("pg_advisory_xact_lock", lock_id("problem", key))))
        return self._transaction("BEGIN ISOLATION LEVEL READ COMMITTED", locks)

    @staticmethod
    def lock(db, kind: str, key: str) -> None:
        """Inside the open write transaction ``db``: take the lock of ``kind`` ``key`` too
        (until the transaction ends), after its problem's lock."""
        db.execute("SELECT pg_advisory_xact_lock(?)", (lock_id(kind, key),))

    def read(self):
        """One read-only snapshot, no lock."""
        return self._transaction("BEGIN ISOLATION LEVEL REPEATABLE READ READ ONLY", ())

    def close(self) -> None:
        self.pool.close()
