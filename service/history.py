"""The timeline of a stored problem: events in force, the published plan, run records.

Tables beside the store's, in the same database (SQLite file or PostgreSQL) and with the
same durability: every public write here is one transaction of the store's own
helpers (``Store._tx``: the one write connection under its lock; ``Store._read``: a
pooled read-only snapshot), so a write is on disk before it is acknowledged and a failed
one leaves nothing behind. Problems are found through the store's key lookup
(:meth:`flipfix.service.store.Store.current_revision`); every table here refers to
``problems(name)`` with ``ON DELETE CASCADE``, so deleting a problem deletes its timeline.

Payloads are opaque bytes here (the serialized proto messages of the timeline's RPCs:
an event's constraint, a run's request and reply); :mod:`flipfix.service.timeline`
converts. Schema: :data:`TIMELINE_VERSION` in ``timeline_version``; opening a database
written by a newer flipfix fails, an older or new one is brought up to date in one
transaction by :func:`migrate`.

Tables:

* ``events``: one row per event; withdrawn events keep their row (``withdrawn_at``).
* ``published``: at most one row per problem, the published candidate's id.
* ``records``: one row per recorded run (summary columns plus request/reply bytes); at
  most ``max_records`` per problem, the oldest deleted first.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from typing import Sequence

import numpy as np

from flipfix.repair.errors import InputError
from flipfix.service.errors import AlreadyExistsError, ConflictError, NotFoundError
from flipfix.service.store import Store, _now

__all__ = ["History", "EventRow", "RecordRow", "PublishedRow", "TIMELINE_VERSION", "migrate"]

TIMELINE_VERSION = 1

#: What each version of the timeline tables changed.
TIMELINE_HISTORY = {1: "events, published, records"}

_DDL = (
    "CREATE TABLE IF NOT EXISTS timeline_version (version INTEGER NOT NULL)",
    """CREATE TABLE IF NOT EXISTS events (
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    problem TEXT NOT NULL REFERENCES problems(name) ON DELETE CASCADE,
    name TEXT NOT NULL,
    payload BLOB NOT NULL,
    revision INTEGER NOT NULL,
    added_at TEXT NOT NULL,
    added_by TEXT NOT NULL DEFAULT '',
    withdrawn_at TEXT NOT NULL DEFAULT '',
    withdrawn_by TEXT NOT NULL DEFAULT ''
)""",
    "CREATE INDEX IF NOT EXISTS events_by_problem ON events(problem, id)",
    """CREATE TABLE IF NOT EXISTS published (
    problem TEXT PRIMARY KEY REFERENCES problems(name) ON DELETE CASCADE,
    candidate_id TEXT NOT NULL,
    revision INTEGER NOT NULL,
    published_at TEXT NOT NULL,
    published_by TEXT NOT NULL DEFAULT ''
)""",
    """CREATE TABLE IF NOT EXISTS records (
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    problem TEXT NOT NULL REFERENCES problems(name) ON DELETE CASCADE,
    kind TEXT NOT NULL,
    rpc TEXT NOT NULL,
    revision INTEGER NOT NULL,
    recorded_at TEXT NOT NULL,
    caller TEXT NOT NULL DEFAULT '',
    seconds REAL NOT NULL,
    seed INTEGER NOT NULL,
    status TEXT NOT NULL,
    best_cost REAL,
    flips INTEGER NOT NULL DEFAULT 0,
    decisions_changed INTEGER NOT NULL DEFAULT 0,
    feasible INTEGER NOT NULL DEFAULT 0,
    event_ids TEXT NOT NULL DEFAULT '[]',
    events BLOB NOT NULL DEFAULT x'',
    request BLOB NOT NULL,
    reply BLOB NOT NULL,
    adopted_candidate_id TEXT NOT NULL DEFAULT '',
    published TEXT NOT NULL DEFAULT ''
)""",
    "CREATE INDEX IF NOT EXISTS records_by_problem ON records(problem, id)",
)

KINDS = ("repair", "audit")


@dataclass(frozen=True)
class EventRow:
    """A stored event: ``payload`` is the serialized constraint."""

    id: int
    problem: str
    name: str
    payload: bytes
    revision: int
    added_at: str
    added_by: str
    withdrawn_at: str
    withdrawn_by: str

    @property
    def in_force(self) -> bool:
        return not self.withdrawn_at


@dataclass(frozen=True)
class PublishedRow:
    problem: str
    candidate_id: str
    revision: int
    published_at: str
    published_by: str


@dataclass(frozen=True)
class RecordRow:
    """A recorded run. ``event_ids``: the events applied; ``events``: their serialized
    list as they were (opaque); ``request``/``reply``: the run's serialized messages."""

    id: int
    problem: str
    kind: str
    rpc: str
    revision: int
    recorded_at: str
    caller: str
    seconds: float
    seed: int
    status: str
    best_cost: float | None
    flips: int
    decisions_changed: int
    feasible: bool
    event_ids: tuple
    events: bytes
    request: bytes
    reply: bytes
    adopted_candidate_id: str
    published: str = ""


_EVENT_COLUMNS = ("id, problem, name, payload, revision, added_at, added_by, withdrawn_at, "
                  "withdrawn_by")
_SUMMARY_COLUMNS = ("id, problem, kind, rpc, revision, recorded_at, caller, seconds, seed, "
                    "status, best_cost, flips, decisions_changed, feasible, event_ids")
_RECORD_COLUMNS = _SUMMARY_COLUMNS + ", events, request, reply, adopted_candidate_id, published"


def migrate(db, translate=lambda stmt: [stmt]) -> None:
    """Create or bring the timeline tables to :data:`TIMELINE_VERSION`, inside the open
    write transaction ``db`` (a failure leaves the database as it was). ``translate``: the
    store backend's DDL dialect (:meth:`flipfix.service.store.Store.ddl`)."""
    for stmt in _DDL:
        for part in translate(stmt):
            db.execute(part)
    row = db.execute("SELECT version FROM timeline_version").fetchone()
    if row is None:
        db.execute("INSERT INTO timeline_version VALUES (?)", (TIMELINE_VERSION,))
    elif row[0] > TIMELINE_VERSION:
        raise RuntimeError(f"timeline tables of version {row[0]} are newer than this flipfix "
                           f"({TIMELINE_VERSION})")
    # versions below TIMELINE_VERSION: none yet (each future step goes here, in order)


def _event(row) -> EventRow:
    return EventRow(*row)


def _record(row, full: bool) -> RecordRow:
    head = list(row[:15])
    head[13] = bool(head[13])
    head[14] = tuple(json.loads(head[14]))
    tail = [bytes(row[15]), bytes(row[16]), bytes(row[17]), row[18], row[19]] if full else [
        b"", b"", b"", row[15], row[16]]
    return RecordRow(*head, *tail)


_migrate = migrate  # the name is the keyword of History's constructor


class History:
    """Events, published plan and records of the problems of ``store``.

    ``max_records``: records kept per problem (the oldest are deleted first when a new
    one is written); None keeps every record.
    """

    def __init__(self, store: Store, *, max_records: int | None = 1000, migrate: bool = True):
        if max_records is not None and (not isinstance(max_records, int) or max_records < 1):
            raise InputError("max_records", f"must be an integer >= 1, got {max_records!r}")
        self.store = store
        self.max_records = max_records
        if migrate:  # False: only reads, of tables the server process keeps up to date
            with store._tx() as db:
                _migrate(db, store.ddl)

    @property
    def version(self) -> int:
        with self.store._read() as db:
            return int(db.execute("SELECT version FROM timeline_version").fetchone()[0])

    # ----------------------------------------------------------------- events
    def add_event(self, problem: str, name: str, payload: bytes, *, revision: int,
                  caller: str = "") -> EventRow:
        """Store an event checked against ``revision``; ConflictError when the problem
        has moved on meanwhile (the check no longer holds)."""
        with self.store._tx(problem) as db:
            rev = Store.current_revision(db, problem)
            if rev != revision:
                raise ConflictError("constraint", f"problem {problem!r} moved to revision {rev} "
                                                  f"while the event was checked against {revision}")
            new_id = db.execute("INSERT INTO events (problem, name, payload, revision, added_at, "
                                "added_by) VALUES (?, ?, ?, ?, ?, ?) RETURNING id",
                                (problem, name, payload, rev, _now(), caller)).fetchone()[0]
            return _event(db.execute(f"SELECT {_EVENT_COLUMNS} FROM events WHERE id = ?",
                                     (new_id,)).fetchone())

    def withdraw_event(self, problem: str, event_id: int, *, caller: str = "") -> EventRow:
        with self.store._tx(problem) as db:
            Store.current_revision(db, problem)
            row = db.execute(f"SELECT {_EVENT_COLUMNS} FROM events WHERE id = ? AND problem = ?",
                             (event_id, problem)).fetchone()
            if row is None:
                raise NotFoundError("event_id", f"problem {problem!r} has no event {event_id}")
            if row[7]:
                raise ConflictError("event_id", f"event {event_id} was withdrawn at {row[7]}")
            db.execute("UPDATE events SET withdrawn_at = ?, withdrawn_by = ? WHERE id = ?",
                       (_now(), caller, event_id))
            return _event(db.execute(f"SELECT {_EVENT_COLUMNS} FROM events WHERE id = ?",
                                     (event_id,)).fetchone())

    def events(self, problem: str, *, include_withdrawn: bool = False
               ) -> tuple[int, list[EventRow]]:
        """(current revision, the problem's events in order of addition)."""
        with self.store._read() as db:
            rev = Store.current_revision(db, problem)
            q = f"SELECT {_EVENT_COLUMNS} FROM events WHERE problem = ?"
            if not include_withdrawn:
                q += " AND withdrawn_at = ''"
            return rev, [_event(r) for r in db.execute(q + " ORDER BY id", (problem,))]

    # -------------------------------------------------------- published plan
    def publish(self, problem: str, candidate_id: str, *, caller: str = "",
                db=None) -> PublishedRow:
        """Make a stored candidate the published plan (``db``: join an open transaction)."""
        if not isinstance(candidate_id, str) or not candidate_id:
            raise InputError("candidate_id", "must name a stored candidate")
        if db is None:
            with self.store._tx(problem) as db:
                return self.publish(problem, candidate_id, caller=caller, db=db)
        Store.current_revision(db, problem)
        row = db.execute("SELECT revision FROM candidates WHERE problem = ? AND id = ?",
                         (problem, candidate_id)).fetchone()
        if row is None:
            raise NotFoundError("candidate_id", f"problem {problem!r} has no candidate "
                                                f"{candidate_id!r}")
        out = PublishedRow(problem, candidate_id, int(row[0]), _now(), caller)
        db.execute("INSERT INTO published VALUES (?, ?, ?, ?, ?) ON CONFLICT (problem) DO UPDATE "
                   "SET candidate_id = excluded.candidate_id, revision = excluded.revision, "
                   "published_at = excluded.published_at, published_by = excluded.published_by",
                   (out.problem, out.candidate_id, out.revision, out.published_at,
                    out.published_by))
        return out

    def published(self, problem: str) -> PublishedRow:
        """The published plan; NotFoundError when none is set or its candidate was removed."""
        with self.store._read() as db:
            Store.current_revision(db, problem)
            row = db.execute("SELECT * FROM published WHERE problem = ?", (problem,)).fetchone()
            if row is None:
                raise NotFoundError("problem", f"problem {problem!r} has no published plan")
            if not db.execute("SELECT 1 FROM candidates WHERE problem = ? AND id = ?",
                              (problem, row[1])).fetchone():
                raise NotFoundError("problem", f"the published plan of {problem!r}, candidate "
                                               f"{row[1]!r}, was removed from the library")
            return PublishedRow(*row)

    # ---------------------------------------------------------------- records
    def add_record(self, problem: str, *, kind: str, rpc: str, revision: int, seconds: float,
                   seed: int, status: str, request: bytes, reply: bytes,
                   best_cost: float | None = None, flips: int = 0, decisions_changed: int = 0,
                   feasible: bool = False, event_ids: Sequence[int] = (), events: bytes = b"",
                   caller: str = "", published: str = "") -> int:
        """Store one run's record; returns its id. Keeps at most ``max_records`` per problem."""
        if kind not in KINDS:
            raise InputError("kind", f"must be one of {KINDS}, got {kind!r}")
        with self.store._tx(problem) as db:
            Store.current_revision(db, problem)
            record_id = db.execute(
                "INSERT INTO records (problem, kind, rpc, revision, recorded_at, caller, seconds, "
                "seed, status, best_cost, flips, decisions_changed, feasible, event_ids, events, "
                "request, reply, published) VALUES "
                "(?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?) RETURNING id",
                (problem, kind, rpc, int(revision), _now(), caller, float(seconds), int(seed),
                 status, None if best_cost is None or not np.isfinite(best_cost)
                 else float(best_cost), int(flips), int(decisions_changed), int(bool(feasible)),
                 json.dumps([int(e) for e in event_ids]), events, request, reply,
                 published)).fetchone()[0]
            if self.max_records is not None:
                db.execute("DELETE FROM records WHERE problem = ? AND id NOT IN (SELECT id FROM "
                           "records WHERE problem = ? ORDER BY id DESC LIMIT ?)",
                           (problem, problem, self.max_records))
            return int(record_id)

    def records(self, problem: str, *, page_size: int = 100, page_token: str = ""
                ) -> tuple[list[RecordRow], str]:
        """Summaries (no payloads), newest first, and the next page's token ("" at the end)."""
        page_size = max(1, min(int(page_size or 100), 1000))
        try:
            before = int(page_token) if page_token else 2 ** 62
        except ValueError:
            raise InputError("page_token", f"{page_token!r} is not a token from this server") from None
        with self.store._read() as db:
            Store.current_revision(db, problem)
            rows = db.execute(f"SELECT {_SUMMARY_COLUMNS}, adopted_candidate_id, published "
                              "FROM records "
                              "WHERE problem = ? AND id < ? ORDER BY id DESC LIMIT ?",
                              (problem, before, page_size + 1)).fetchall()
        more = len(rows) > page_size
        rows = rows[:page_size]
        return [_record(r, False) for r in rows], (str(rows[-1][0]) if more else "")

    def record(self, problem: str, record_id: int) -> RecordRow:
        with self.store._read() as db:
            Store.current_revision(db, problem)
            return self._record_in(db, problem, record_id)

    @staticmethod
    def _record_in(db, problem: str, record_id: int) -> RecordRow:
        row = db.execute(f"SELECT {_RECORD_COLUMNS} FROM records WHERE problem = ? AND id = ?",
                         (problem, int(record_id))).fetchone()
        if row is None:
            raise NotFoundError("record_id", f"problem {problem!r} has no record {record_id} "
                                             "(never made, or past the retention limit)")
        return _record(row, True)

    def adopt(self, problem: str, record_id: int, *, x: np.ndarray, candidate_id: str,
              provenance: dict, publish: bool = False, caller: str = "",
              expected: RecordRow | None = None) -> tuple[str, int, PublishedRow | None]:
        """Store the answer ``x`` (int8 (n,) 0/1, the record's revision's label order) of a
        repair record as candidate ``candidate_id``, mark the record adopted, and with
        ``publish`` make it the published plan: one transaction.

        AlreadyExistsError (``record_id``) when the record was adopted before, or
        (``candidate_id``) when the id is taken; ConflictError (``record_id``) when the
        record is not a feasible repair of the current revision. Returns (candidate id,
        revision, published row or None).
        """
        with self.store._tx(problem) as db:
            rev = Store.current_revision(db, problem)
            rec = self._record_in(db, problem, record_id)
            if rec.adopted_candidate_id:
                raise AlreadyExistsError("record_id", f"record {record_id} was adopted already, "
                                                      f"as candidate {rec.adopted_candidate_id!r}")
            if rec.kind != "repair":
                raise ConflictError("record_id", f"record {record_id} is an audit run "
                                                 f"({rec.rpc}); only a repair's answer can be adopted")
            if rec.revision != rev:
                raise ConflictError("record_id", f"record {record_id} repaired revision "
                                                 f"{rec.revision}; problem {problem!r} is at "
                                                 f"revision {rev}: repair again")
            if not rec.feasible:
                raise ConflictError("record_id", f"record {record_id} has no feasible answer "
                                                 f"(status {rec.status})")
            if db.execute("SELECT 1 FROM candidates WHERE problem = ? AND id = ?",
                          (problem, candidate_id)).fetchone():
                raise AlreadyExistsError("candidate_id", f"problem {problem!r} has a candidate "
                                                         f"{candidate_id!r} already")
            if expected is not None and expected.reply != rec.reply:
                raise ConflictError("record_id", f"record {record_id} changed during the adoption")
            (cid,) = self.store.add_candidates(problem, rev, [candidate_id],
                                               np.asarray(x, dtype=np.int8)[None, :],
                                               [provenance], field="candidate_id", db=db)
            db.execute("UPDATE records SET adopted_candidate_id = ? WHERE id = ?",
                       (cid, int(record_id)))
            pub = self.publish(problem, cid, caller=caller, db=db) if publish else None
            return cid, rev, pub
