"""Durable store of problems (with revisions) and candidate libraries.

The rows live in an SQLite file (the default) or a PostgreSQL database shared by
several replicas (:mod:`flipfix.service.backends`, chosen by the ``--db`` value):

* a write is durable before it is acknowledged (SQLite: WAL, ``synchronous=FULL``;
  PostgreSQL: its commit);
* every public write is one transaction, and writes to one problem run one at a time
  (SQLite: every write, ``BEGIN IMMEDIATE``; PostgreSQL: an advisory lock per problem
  across replicas, plus the tenant's when quotas are set -- see "Write locks" in
  :mod:`flipfix.service.backends`): a request that fails validation half-way stores
  nothing, and a revision check cannot interleave with another write to that problem;
* every public read is one read-only snapshot without the write lock, so reads run
  beside each other and beside a write.
* ``schema_version`` holds the schema number; opening a newer database fails,
  an older one is migrated in one transaction (see :data:`SCHEMA_HISTORY`).

Models are stored exactly, in 0/1 form (labels in order, linear biases, upper
couplings, offset) with the caller's vartype; candidates as packed bits, one BLOB
per candidate in the label order of the revision they were made for, in the
layout of the proto's ``PackedAssignments`` row (:mod:`flipfix.service.packing`): the
server answers ListCandidates by joining the stored blobs.
"""

from __future__ import annotations

import dataclasses
import json
import re
import unicodedata
from contextlib import nullcontext
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Sequence

import numpy as np

from flipfix.repair.model.candidates import CandidateSet
from flipfix.repair.errors import InputError
from flipfix.repair.model.problem import Decision, Problem

from flipfix.service import packing
from flipfix.service.backends import open_backend
from flipfix.service.errors import AlreadyExistsError, ConflictError, NotFoundError

__all__ = ["Store", "ProblemRecord", "CandidateRecord", "SCHEMA_VERSION", "SCHEMA_HISTORY"]

SCHEMA_VERSION = 3

#: What each schema version changed (a database of an older version is migrated on open).
SCHEMA_HISTORY = {
    1: "candidates.bits TEXT: one '0'/'1' character per variable",
    2: "candidates.bits BLOB: packed bits, ceil(n / 8) bytes per candidate (numpy.packbits "
       "order, most significant bit first; the unused low bits of the last byte 0)",
    3: "problems.tenant TEXT (whose problem; '' for schema-2 data and servers without "
       "tokens) and problems.bytes INTEGER (stored model and candidate bytes, for quotas); "
       "problems.name is the tenant-qualified key (see Store._key)",
}

_SCHEMA = """
CREATE TABLE IF NOT EXISTS schema_version (version INTEGER NOT NULL);
CREATE TABLE IF NOT EXISTS problems (
    name TEXT PRIMARY KEY,
    revision INTEGER NOT NULL,
    next_candidate INTEGER NOT NULL DEFAULT 1,
    created_at TEXT NOT NULL,
    updated_at TEXT NOT NULL,
    tenant TEXT NOT NULL DEFAULT '',
    bytes INTEGER NOT NULL DEFAULT 0
);
CREATE TABLE IF NOT EXISTS revisions (
    problem TEXT NOT NULL REFERENCES problems(name) ON DELETE CASCADE,
    revision INTEGER NOT NULL,
    model TEXT NOT NULL,
    num_variables INTEGER NOT NULL,
    num_interactions INTEGER NOT NULL,
    created_at TEXT NOT NULL,
    PRIMARY KEY (problem, revision)
);
"""
#: the candidates table and its index (also run alone by the schema-1 migration)
_CANDIDATES_DDL = (
    """CREATE TABLE IF NOT EXISTS candidates (
    seq INTEGER PRIMARY KEY AUTOINCREMENT,
    problem TEXT NOT NULL REFERENCES problems(name) ON DELETE CASCADE,
    id TEXT NOT NULL,
    revision INTEGER NOT NULL,
    bits BLOB NOT NULL,
    source TEXT NOT NULL DEFAULT '',
    energy REAL,
    tags TEXT NOT NULL DEFAULT '[]',
    created_at TEXT NOT NULL,
    UNIQUE (problem, id)
)""",
    "CREATE INDEX IF NOT EXISTS candidates_by_problem ON candidates(problem, seq)",
)
_SCHEMA += "".join(stmt + ";\n" for stmt in _CANDIDATES_DDL)
#: schema 3: the tenant's problems by name (also run by the schema-2 migration)
_TENANT_INDEX = "CREATE INDEX IF NOT EXISTS problems_by_tenant ON problems(tenant, name)"
#: between a tenant and a problem name in the stored key (names and tenants cannot
#: contain control characters)
TENANT_SEPARATOR = "\x1f"
_CANDIDATE_COLUMNS = "seq, problem, id, revision, bits, source, energy, tags, created_at"


def _text_to_blob(text: str) -> bytes:
    """A schema-1 candidate ('0'/'1' characters) -> its packed schema-2 blob."""
    x = np.frombuffer(text.encode("ascii"), dtype=np.uint8) - ord("0")
    return packing.pack_rows(x)


def _now() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="milliseconds")


@dataclass(frozen=True)
class ProblemRecord:
    name: str
    revision: int
    num_variables: int
    num_interactions: int
    num_candidates: int
    created_at: str
    updated_at: str


@dataclass(frozen=True)
class CandidateRecord:
    """A stored candidate: ``bits`` packed (:mod:`flipfix.service.packing`) in ``labels`` order
    (its revision's); ``x`` is the same as int8 (n,) 0/1."""

    id: str
    revision: int
    labels: tuple
    vartype: str
    bits: bytes
    source: str
    energy: float | None
    tags: tuple

    @property
    def x(self) -> np.ndarray:
        return packing.unpack_rows(self.bits, 1, len(self.labels), field="bits")[0]


def encode_model(problem: Problem) -> str:
    """Exact JSON of a problem (0/1 form + caller vartype + decisions)."""
    i, j, J = problem.pairs()
    return json.dumps({
        "format": 1, "vartype": problem.vartype, "labels": list(problem.labels),
        "linear": problem.linear.tolist(),
        "pairs": [[int(a), int(b), float(w)] for a, b, w in zip(i, j, J)],
        "offset": float(problem.offset),
        "decisions": [{"name": d.name, "encoding": d.encoding, "variables": list(d.variables),
                       "values": list(d.values)} for d in problem.decisions],
    }, separators=(",", ":"))


def decode_model(text: str) -> Problem:
    doc = json.loads(text)
    labels = doc["labels"]
    pairs = np.asarray(doc["pairs"], dtype=np.float64).reshape(-1, 3)
    p = Problem.from_arrays(labels, doc["linear"], pairs[:, 0].astype(np.int64),
                            pairs[:, 1].astype(np.int64), pairs[:, 2],
                            offset=doc["offset"], vartype="BINARY")
    decisions = tuple(Decision(d["name"], d["encoding"], tuple(d["variables"]), tuple(d["values"]))
                      for d in doc.get("decisions", []))
    return dataclasses.replace(p, vartype=doc["vartype"], decisions=decisions, index=p.index)


class Store:
    """Problems and candidates in an SQLite file (``":memory:"`` for tests only) or a
    PostgreSQL database (``postgresql://user@host:port/db``).

    Thread-safe; each public method is one transaction.
    """

    def __init__(self, path: str | Path, *, quotas=None):
        """``quotas``: a :class:`flipfix.service.tenancy.Quotas` checked on every write
        (None: none)."""
        self.path = str(path)
        self.quotas = quotas
        self._backend = open_backend(path)
        self._backend.create_schema(_SCHEMA)
        try:
            with self._tx() as db:
                row = db.execute("SELECT version FROM schema_version").fetchone()
                if row is None:
                    db.execute("INSERT INTO schema_version VALUES (?)", (SCHEMA_VERSION,))
                elif row[0] > SCHEMA_VERSION:
                    raise RuntimeError(f"{self.where}: schema version {row[0]} is newer than "
                                       f"this flipfix ({SCHEMA_VERSION})")
                elif row[0] < SCHEMA_VERSION:
                    self._migrate(db, row[0])
                db.execute(_TENANT_INDEX)
        except BaseException:
            self._backend.close()
            raise

    @classmethod
    def reader(cls, path: str | Path) -> "Store":
        """The store at ``path`` for reads only, as another process keeps it (a pool
        worker preparing a call): no schema creation, migration or quota; its writes
        would still be serialised as every store's are."""
        self = cls.__new__(cls)
        self.path = str(path)
        self.quotas = None
        self._backend = open_backend(path)
        return self

    @property
    def where(self) -> str:
        """The database, for messages and logs (a URL without its password)."""
        return re.sub(r"//([^:/@]+):[^@/]*@", r"//\1:***@", self.path)

    def ddl(self, stmt: str) -> list[str]:
        """One DDL statement written for SQLite, in this store's dialect (for modules that
        keep tables beside the store's, :mod:`flipfix.service.history`)."""
        return self._backend.ddl(stmt)

    @property
    def integrity_errors(self) -> tuple:
        """The backend's exception types for a broken key or reference."""
        return self._backend.integrity_errors

    @property
    def backend(self) -> str:
        """``"sqlite"`` or ``"postgresql"``."""
        return self._backend.name

    @staticmethod
    def _migrate(db, version: int) -> None:
        """Bring a database of ``version`` to :data:`SCHEMA_VERSION` (inside the open
        transaction: a failure leaves the old database as it was)."""
        if version == 1:  # bits TEXT '0101...' -> packed BLOB; the table is rebuilt
            db.execute("ALTER TABLE candidates RENAME TO candidates_v1")
            db.execute("DROP INDEX IF EXISTS candidates_by_problem")
            for stmt in _CANDIDATES_DDL:  # db.execute: executescript would commit
                db.execute(stmt)
            cur = db.execute(f"SELECT {_CANDIDATE_COLUMNS} FROM candidates_v1 ORDER BY seq")
            while True:
                rows = cur.fetchmany(1000)
                if not rows:
                    break
                db.executemany(
                    f"INSERT INTO candidates ({_CANDIDATE_COLUMNS}) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
                    [(r[0], r[1], r[2], r[3], _text_to_blob(r[4])) + tuple(r[5:]) for r in rows])
            db.execute("DROP TABLE candidates_v1")
            version = 2
        if version == 2:  # tenants and stored bytes; schema-2 problems belong to tenant ''
            db.execute("ALTER TABLE problems ADD COLUMN tenant TEXT NOT NULL DEFAULT ''")
            db.execute("ALTER TABLE problems ADD COLUMN bytes INTEGER NOT NULL DEFAULT 0")
            db.execute("UPDATE problems SET bytes = "
                       "(SELECT COALESCE(SUM(LENGTH(model)), 0) FROM revisions r "
                       " WHERE r.problem = problems.name) + "
                       "(SELECT COALESCE(SUM(LENGTH(bits)), 0) FROM candidates c "
                       " WHERE c.problem = problems.name)")
            version = 3
        db.execute("UPDATE schema_version SET version = ?", (version,))

    # ---------------------------------------------------------------- plumbing
    def _tx(self, key: str | None = None):
        """One write transaction (all or nothing) to the problem stored as ``key`` (None:
        to anything; it then waits for every other write), see "Write locks" in
        :mod:`flipfix.service.backends`."""
        return self._backend.tx(key)

    def _read(self):
        """One read-only snapshot."""
        return self._backend.read()

    def close(self) -> None:
        self._backend.close()

    @property
    def journal_mode(self) -> str:
        """SQLite's journal mode (``wal``)."""
        return self._backend.pragma("journal_mode")

    @property
    def synchronous(self) -> int:
        """SQLite's synchronous level (2: FULL)."""
        return int(self._backend.pragma("synchronous"))

    @property
    def schema_version(self) -> int:
        with self._read() as db:
            return int(db.execute("SELECT version FROM schema_version").fetchone()[0])

    @staticmethod
    def _key(tenant: str, name: str) -> str:
        """The stored key of ``tenant``'s problem ``name`` (the name itself for tenant '')."""
        return f"{tenant}{TENANT_SEPARATOR}{name}" if tenant else name

    @staticmethod
    def _info(db, key: str, name: str, field: str = "name") -> ProblemRecord:
        row = db.execute(
            "SELECT p.revision, r.num_variables, r.num_interactions, "
            "(SELECT COUNT(*) FROM candidates c WHERE c.problem = p.name), p.created_at, "
            "p.updated_at FROM problems p JOIN revisions r ON r.problem = p.name AND "
            "r.revision = p.revision WHERE p.name = ?", (key,)).fetchone()
        if row is None:
            raise NotFoundError(field, f"no problem named {name!r}")
        return ProblemRecord(name, *row)

    @staticmethod
    def _exists(db, key: str, name: str, field: str) -> None:
        if not db.execute("SELECT 1 FROM problems WHERE name = ?", (key,)).fetchone():
            raise NotFoundError(field, f"no problem named {name!r}")

    def model_bytes(self, name: str, *, tenant: str = "") -> int:
        """Bytes of the problem's stored current model (0 when there is no such problem):
        what reading it costs, known before it is read."""
        with self._read() as db:
            row = db.execute("SELECT LENGTH(r.model) FROM problems p JOIN revisions r ON "
                             "r.problem = p.name AND r.revision = p.revision WHERE p.name = ?",
                             (self._key(tenant, name),)).fetchone()
        return int(row[0]) if row else 0

    def stored_bytes(self, name: str, *, tenant: str = "") -> int:
        """Bytes the problem holds in the store (every model revision and candidate; 0
        when there is no such problem): one row's counter, nothing else is read."""
        with self._read() as db:
            row = db.execute("SELECT bytes FROM problems WHERE name = ?",
                             (self._key(tenant, name),)).fetchone()
        return int(row[0]) if row else 0

    def usage(self, *, tenant: str = "") -> dict:
        """The tenant's stored problems, candidates and bytes."""
        with self._read() as db:
            return self._usage(db, tenant)

    @staticmethod
    def _usage(db, tenant: str) -> dict:
        problems, size = db.execute("SELECT COUNT(*), COALESCE(SUM(bytes), 0) FROM problems "
                                    "WHERE tenant = ?", (tenant,)).fetchone()
        cands = db.execute("SELECT COUNT(*) FROM candidates WHERE problem IN "
                           "(SELECT name FROM problems WHERE tenant = ?)", (tenant,)).fetchone()[0]
        return {"problems": int(problems), "candidates": int(cands), "bytes": int(size)}

    def _charge(self, db, tenant: str, *, problems: int = 0,
                candidates: int = 0, size: int = 0) -> None:
        """Refuse (QuotaError, inside the write transaction: nothing is stored) a write that
        would take ``tenant`` over a quota."""
        if self.quotas is None or not self.quotas.any:
            return
        self._backend.lock(db, "tenant", tenant)  # the count below covers all its problems
        self.quotas.check(tenant, self._usage(db, tenant), problems=problems,
                          candidates=candidates, size=size)

    @staticmethod
    def current_revision(db, name: str, field: str = "problem") -> int:
        """The current revision of problem ``name`` inside an open transaction ``db``: the
        one lookup of a problem by its key for modules that keep tables beside the store's
        (:mod:`flipfix.service.history`); NotFoundError naming ``field`` when there is none."""
        row = db.execute("SELECT revision FROM problems WHERE name = ?", (name,)).fetchone()
        if row is None:
            raise NotFoundError(field, f"no problem named {name!r}")
        return int(row[0])

    @staticmethod
    def _check_name(name: str) -> None:
        if not isinstance(name, str) or not name.strip():
            raise InputError("name", "must be a non-empty string")
        if len(name) > 200:
            raise InputError("name", "must be at most 200 characters")
        bad = next((ch for ch in name if unicodedata.category(ch) in ("Cc", "Cf", "Cs")), None)
        if bad is not None:
            raise InputError("name", f"must not contain control characters (found {bad!r})")

    # ---------------------------------------------------------------- problems
    def create_problem(self, name: str, problem: Problem, *, tenant: str = "",
                       encoded: str | None = None) -> ProblemRecord:
        """Store a new problem; ``encoded``: its :func:`encode_model` text when already made."""
        self._check_name(name)
        model = encoded if encoded is not None else encode_model(problem)
        key = self._key(tenant, name)
        with self._tx(key) as db:
            if db.execute("SELECT 1 FROM problems WHERE name = ?", (key,)).fetchone():
                raise AlreadyExistsError("name", f"a problem named {name!r} exists")
            self._charge(db, tenant, problems=1, size=len(model))
            now = _now()
            # assigned candidate ids count from c0 (as every other path numbers them)
            db.execute("INSERT INTO problems (name, revision, next_candidate, created_at, "
                       "updated_at, tenant, bytes) VALUES (?, 1, 0, ?, ?, ?, ?)",
                       (key, now, now, tenant, len(model)))
            db.execute("INSERT INTO revisions VALUES (?, 1, ?, ?, ?, ?)",
                       (key, model, problem.n, problem.num_interactions, now))
            return self._info(db, key, name)

    def replace_problem(self, name: str, problem: Problem, *, expected_revision: int = 0,
                        tenant: str = "", encoded: str | None = None) -> ProblemRecord:
        model = encoded if encoded is not None else encode_model(problem)
        key = self._key(tenant, name)
        with self._tx(key) as db:
            row = db.execute("SELECT revision FROM problems WHERE name = ?", (key,)).fetchone()
            if row is None:
                raise NotFoundError("name", f"no problem named {name!r}")
            if expected_revision and row[0] != expected_revision:
                raise ConflictError("expected_revision",
                                    f"problem {name!r} is at revision {row[0]}, not {expected_revision}")
            self._charge(db, tenant, size=len(model))
            rev, now = row[0] + 1, _now()
            db.execute("UPDATE problems SET revision = ?, updated_at = ?, bytes = bytes + ? "
                       "WHERE name = ?", (rev, now, len(model), key))
            db.execute("INSERT INTO revisions VALUES (?, ?, ?, ?, ?, ?)",
                       (key, rev, model, problem.n, problem.num_interactions, now))
            return self._info(db, key, name)

    def get_problem(self, name: str, revision: int = 0, *, tenant: str = ""
                    ) -> tuple[ProblemRecord, int, Problem]:
        """(info, revision of the model, model); revision 0 is the current one."""
        key = self._key(tenant, name)
        with self._read() as db:
            info = self._info(db, key, name)
            rev = revision or info.revision
            row = db.execute("SELECT model FROM revisions WHERE problem = ? AND revision = ?",
                             (key, rev)).fetchone()
            if row is None:
                raise NotFoundError("revision", f"problem {name!r} has no revision {rev}")
        return info, rev, decode_model(row[0])

    def list_problems(self, *, page_size: int = 100, page_token: str = "", tenant: str = ""
                      ) -> tuple[list[ProblemRecord], str]:
        """The tenant's problems by name, a page at a time (the token: the last name)."""
        page_size = max(1, min(int(page_size or 100), 1000))
        with self._read() as db:
            keys = [r[0] for r in db.execute(
                "SELECT name FROM problems WHERE tenant = ? AND name > ? ORDER BY name LIMIT ?",
                (tenant, self._key(tenant, page_token) if page_token else "", page_size + 1))]
            more = len(keys) > page_size
            keys = keys[:page_size]
            cut = len(self._key(tenant, ""))
            infos = [self._info(db, k, k[cut:]) for k in keys]
        return infos, (infos[-1].name if more else "")

    def delete_problem(self, name: str, *, tenant: str = "") -> int:
        """Delete a problem, its revisions and candidates; returns the candidates deleted."""
        key = self._key(tenant, name)
        with self._tx(key) as db:
            self._exists(db, key, name, "name")
            n = db.execute("SELECT COUNT(*) FROM candidates WHERE problem = ?", (key,)).fetchone()[0]
            db.execute("DELETE FROM candidates WHERE problem = ?", (key,))
            db.execute("DELETE FROM revisions WHERE problem = ?", (key,))
            db.execute("DELETE FROM problems WHERE name = ?", (key,))
            return int(n)

    # -------------------------------------------------------------- candidates
    def add_candidates(self, name: str, revision: int, ids: Sequence[str],
                       X: np.ndarray, provenance: Sequence[dict], *, field: str = "candidates",
                       tenant: str = "", db=None) -> list[str]:
        """Add K candidates made for ``revision`` (X int8 (K, n), 0/1 in that revision's order).

        Empty ids are assigned ``c<N>``, N counting from 0 per problem (never reused). All or
        nothing: a taken id stores none. ``db``: an open write transaction of this store to join
        (e.g. an adoption's), else one of its own.
        """
        X = np.asarray(X, dtype=np.int8)
        rb = packing.row_bytes(X.shape[1])
        blob = packing.pack_rows(X)
        key = self._key(tenant, name)
        with self._tx(key) if db is None else nullcontext(db) as db:
            row = db.execute("SELECT revision, next_candidate FROM problems WHERE name = ?",
                             (key,)).fetchone()
            if row is None:
                raise NotFoundError("problem", f"no problem named {name!r}")
            if row[0] != revision:
                raise ConflictError("problem", f"problem {name!r} moved to revision {row[0]}")
            self._charge(db, tenant, candidates=len(ids), size=len(blob))
            counter = row[1]
            out, now = [], _now()
            for k, (cid, prov) in enumerate(zip(ids, provenance)):
                if not cid:
                    while True:
                        cid = f"c{counter}"
                        counter += 1
                        if not db.execute("SELECT 1 FROM candidates WHERE problem = ? AND id = ?",
                                          (key, cid)).fetchone() and cid not in out:
                            break
                try:
                    db.execute(
                        "INSERT INTO candidates (problem, id, revision, bits, source, energy, tags, "
                        "created_at) VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
                        (key, cid, revision, blob[k * rb:(k + 1) * rb],
                         prov.get("source", ""), prov.get("energy"),
                         json.dumps(list(prov.get("tags", ()))), now))
                except self._backend.integrity_errors:
                    raise AlreadyExistsError(f"{field}.ids[{k}]",
                                             f"candidate {cid!r} already exists") from None
                out.append(cid)
            db.execute("UPDATE problems SET next_candidate = ?, updated_at = ?, bytes = bytes + ? "
                       "WHERE name = ?", (counter, now, len(blob), key))
            return out

    def _labels_of(self, db, name: str, revision: int, cache: dict) -> tuple:
        if revision not in cache:
            row = db.execute("SELECT model FROM revisions WHERE problem = ? AND revision = ?",
                             (name, revision)).fetchone()
            doc = json.loads(row[0])
            cache[revision] = (tuple(doc["labels"]), doc["vartype"])
        return cache[revision]

    def _record(self, db, name, row, cache) -> CandidateRecord:
        _seq, cid, rev, bits, source, energy, tags = row
        labels, vartype = self._labels_of(db, name, rev, cache)
        return CandidateRecord(cid, rev, labels, vartype, bytes(bits), source, energy,
                               tuple(json.loads(tags)))

    def list_candidates(self, name: str, *, page_size: int = 100, page_token: str = "",
                        revision: int = 0, tenant: str = "") -> tuple[list[CandidateRecord], str]:
        page_size = max(1, min(int(page_size or 100), 1000))
        try:
            after = int(page_token) if page_token else 0
        except ValueError:
            raise InputError("page_token", f"{page_token!r} is not a token from this server") from None
        key = self._key(tenant, name)
        with self._read() as db:
            self._exists(db, key, name, "problem")
            q = ("SELECT seq, id, revision, bits, source, energy, tags FROM candidates "
                 "WHERE problem = ? AND seq > ?")
            args: list = [key, after]
            if revision:
                q += " AND revision = ?"
                args.append(revision)
            rows = db.execute(q + " ORDER BY seq LIMIT ?", args + [page_size + 1]).fetchall()
            more = len(rows) > page_size
            rows = rows[:page_size]
            cache: dict = {}
            recs = [self._record(db, key, r, cache) for r in rows]
        return recs, (str(rows[-1][0]) if more else "")

    def remove_candidates(self, name: str, ids: Sequence[str], *, tenant: str = "") -> int:
        key = self._key(tenant, name)
        with self._tx(key) as db:
            self._exists(db, key, name, "problem")
            for k, cid in enumerate(ids):
                if not db.execute("SELECT 1 FROM candidates WHERE problem = ? AND id = ?",
                                  (key, cid)).fetchone():
                    raise NotFoundError(f"ids[{k}]", f"problem {name!r} has no candidate {cid!r}")
            return self._delete_candidates(db, key, ids)

    @staticmethod
    def _delete_candidates(db, key: str, ids: Sequence[str]) -> int:
        """Delete the listed candidates of the problem stored as ``key``; its stored bytes
        go down by theirs. Returns how many were deleted."""
        n = size = 0
        for cid in dict.fromkeys(ids):
            row = db.execute("SELECT LENGTH(bits) FROM candidates WHERE problem = ? AND id = ?",
                             (key, cid)).fetchone()
            if row is None:
                continue
            db.execute("DELETE FROM candidates WHERE problem = ? AND id = ?", (key, cid))
            n, size = n + 1, size + int(row[0])
        # CASE, not MAX(a, b): the two-argument MAX is SQLite's own
        db.execute("UPDATE problems SET bytes = CASE WHEN bytes > ? THEN bytes - ? ELSE 0 END "
                   "WHERE name = ?", (size, size, key))
        return n

    def keep_only(self, name: str, keep_ids: Sequence[str], drop_ids: Sequence[str], *,
                  revision: int, tenant: str = "") -> list[str]:
        """Remove ``drop_ids`` (curation), in one transaction; returns the ids removed.

        The problem must still be at ``revision`` and every id of ``keep_ids`` and
        ``drop_ids`` must still exist (else :class:`ConflictError`, nothing removed):
        the choice was made on exactly that library.
        """
        key = self._key(tenant, name)
        with self._tx(key) as db:
            row = db.execute("SELECT revision FROM problems WHERE name = ?", (key,)).fetchone()
            if row is None:
                raise NotFoundError("problem", f"no problem named {name!r}")
            if row[0] != revision:
                raise ConflictError("problem", f"problem {name!r} moved to revision {row[0]} "
                                               f"during the audit of revision {revision}")
            for cid in list(keep_ids) + list(drop_ids):
                if not db.execute("SELECT 1 FROM candidates WHERE problem = ? AND id = ?",
                                  (key, cid)).fetchone():
                    raise ConflictError("problem", f"candidate {cid!r} was removed during the audit")
            out = list(dict.fromkeys(drop_ids))
            self._delete_candidates(db, key, out)
            if out:
                db.execute("UPDATE problems SET updated_at = ? WHERE name = ?", (_now(), key))
            return out

    # ------------------------------------------------------------------ repair
    def library(self, name: str, *, ids: Sequence[str] = (), all_revisions: bool = False,
                max_candidates: int | None = None, tenant: str = ""
                ) -> tuple[int, Problem, CandidateSet]:
        """(current revision, its model, the candidates to repair).

        Default: the candidates made for the current revision. ``ids`` picks
        candidates by id (any revision); ``all_revisions`` takes every candidate.
        Candidates of an older revision must assign exactly the current labels.
        """
        key = self._key(tenant, name)
        with self._read() as db:
            row = db.execute("SELECT revision FROM problems WHERE name = ?", (key,)).fetchone()
            if row is None:
                raise NotFoundError("problem", f"no problem named {name!r}")
            rev = row[0]
            model = db.execute("SELECT model FROM revisions WHERE problem = ? AND revision = ?",
                               (key, rev)).fetchone()[0]
            q = "SELECT id, revision, bits FROM candidates WHERE problem = ?"
            if ids:
                rows = []
                for k, cid in enumerate(ids):
                    r = db.execute(q + " AND id = ?", (key, cid)).fetchone()
                    if r is None:
                        raise NotFoundError(f"candidate_ids[{k}]",
                                            f"problem {name!r} has no candidate {cid!r}")
                    rows.append(r)
            elif all_revisions:
                rows = db.execute(q + " ORDER BY seq", (key,)).fetchall()
            else:
                rows = db.execute(q + " AND revision = ? ORDER BY seq", (key, rev)).fetchall()
            revisions = list(dict.fromkeys(r[1] for r in rows))  # in order of first use
            cache: dict = {}
            labels_of = {v: self._labels_of(db, key, v, cache)[0] for v in revisions if v != rev}
        problem = decode_model(model)
        labels_of[rev] = problem.labels
        if not rows:
            raise InputError("problem", f"problem {name!r} has no candidates for revision {rev}")
        if max_candidates is not None and len(rows) > max_candidates:
            from flipfix.repair.errors import LimitError
            raise LimitError("candidates", f"{len(rows)} candidates exceed the limit of {max_candidates}")
        X = np.empty((len(rows), problem.n), dtype=np.int8)
        for v in revisions:  # one unpack per revision, in the current label order
            ks = [k for k, r in enumerate(rows) if r[1] == v]
            labels = labels_of[v]
            if labels != problem.labels and set(labels) != set(problem.labels):
                k = ks[0]
                raise InputError(f"candidate_ids[{k}]" if ids else "all_revisions",
                                 f"candidate {rows[k][0]!r} (revision {v}) does not assign "
                                 f"the variables of revision {rev}")
            block = packing.unpack_rows(b"".join(rows[k][2] for k in ks), len(ks), len(labels),
                                        field="bits")
            if labels != problem.labels:
                pos = {lab: i for i, lab in enumerate(labels)}
                block = block[:, [pos[lab] for lab in problem.labels]]
            X[ks] = block
        return rev, problem, CandidateSet(tuple(r[0] for r in rows), X)
