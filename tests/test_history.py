"""The timeline tables: durability across reopen, retention, withdraw, adopt's refusals;
on both store backends (PostgreSQL: a real server the fixtures start, a fresh database per
test)."""

from __future__ import annotations

import sqlite3

import numpy as np
import pytest

from flipfix.repair import Problem
from flipfix.service.errors import AlreadyExistsError, ConflictError, NotFoundError
from flipfix.service.history import TIMELINE_VERSION, History
from flipfix.service.store import Store


def _problem(n=4):
    return Problem.from_terms({f"x{i}": float(i) for i in range(n)}, [])


@pytest.fixture(params=["sqlite", "postgresql"])
def path(request, tmp_path):
    if request.param == "sqlite":
        return tmp_path / "t.sqlite3"
    return request.getfixturevalue("postgres").new_database()


@pytest.fixture
def sqlite_path(tmp_path):
    return tmp_path / "t.sqlite3"


def _open(path, **kw):
    store = Store(path)
    return store, History(store, **kw)


def _rec(h, problem="p", revision=1, **kw):
    args = dict(kind="repair", rpc="Repair", revision=revision, seconds=0.5, seed=3,
                status="feasible", request=b"req", reply=b"rep", best_cost=-2.0, flips=1,
                decisions_changed=0, feasible=True, event_ids=(1,))
    args.update(kw)
    return h.add_record(problem, **args)


def test_everything_survives_a_reopen(path):
    store, h = _open(path)
    store.create_problem("p", _problem())
    store.add_candidates("p", 1, ["a"], np.zeros((1, 4), np.int8), [{}])
    ev = h.add_event("p", "mill down", b"\x01\x02", revision=1, caller="ann")
    h.publish("p", "a", caller="ann")
    rid = _rec(h)
    store.close()
    store, h = _open(path)
    assert h.version == TIMELINE_VERSION
    rev, events = h.events("p")
    assert rev == 1 and [(e.id, e.name, e.payload, e.added_by) for e in events] == [
        (ev.id, "mill down", b"\x01\x02", "ann")]
    assert h.published("p").candidate_id == "a"
    r = h.record("p", rid)
    assert (r.request, r.reply, r.event_ids, r.best_cost, r.feasible) == (b"req", b"rep", (1,), -2.0, True)
    store.close()


def test_withdraw_keeps_the_row_and_twice_is_refused(path):
    store, h = _open(path)
    store.create_problem("p", _problem())
    ev = h.add_event("p", "e", b"", revision=1)
    w = h.withdraw_event("p", ev.id, caller="bob")
    assert not w.in_force and w.withdrawn_by == "bob"
    assert h.events("p")[1] == [] and len(h.events("p", include_withdrawn=True)[1]) == 1
    with pytest.raises(ConflictError, match="event_id: event .* was withdrawn"):
        h.withdraw_event("p", ev.id)
    with pytest.raises(NotFoundError, match="event_id"):
        h.withdraw_event("p", 999)
    with pytest.raises(ConflictError, match="moved to revision 2"):
        store.replace_problem("p", _problem())
        h.add_event("p", "late", b"", revision=1)
    store.close()


def test_retention_keeps_the_newest(path):
    store, h = _open(path, max_records=3)
    store.create_problem("p", _problem())
    store.create_problem("q", _problem())
    ids = [_rec(h) for _ in range(5)]
    other = _rec(h, problem="q")
    recs, token = h.records("p")
    assert [r.id for r in recs] == ids[:1:-1] and token == ""
    with pytest.raises(NotFoundError, match="record_id: .*retention"):
        h.record("p", ids[0])
    assert h.record("q", other).id == other  # another problem's records are its own
    page, token = h.records("p", page_size=2)
    assert [r.id for r in page] == [ids[4], ids[3]] and token
    assert [r.id for r in h.records("p", page_size=2, page_token=token)[0]] == [ids[2]]
    store.close()


def test_adopt_once_current_revision_feasible_only(path):
    store, h = _open(path)
    store.create_problem("p", _problem())
    rid = _rec(h)
    audit = _rec(h, kind="audit", rpc="StressTest")
    bad = _rec(h, feasible=False, status="infeasible")
    x = np.array([1, 0, 1, 0], np.int8)
    cid, rev, pub = h.adopt("p", rid, x=x, candidate_id="adopted-1",
                            provenance={"source": "record 1", "tags": ["adopted"]}, publish=True)
    assert (cid, rev, pub.candidate_id) == ("adopted-1", 1, "adopted-1")
    (rec,), _ = store.list_candidates("p")
    assert rec.id == "adopted-1" and list(rec.x) == [1, 0, 1, 0] and rec.tags == ("adopted",)
    with pytest.raises(AlreadyExistsError, match="record_id: record .* adopted already, as candidate 'adopted-1'"):
        h.adopt("p", rid, x=x, candidate_id="other", provenance={})
    with pytest.raises(ConflictError, match="record_id: .*audit run"):
        h.adopt("p", audit, x=x, candidate_id="z", provenance={})
    with pytest.raises(ConflictError, match="record_id: .*no feasible answer"):
        h.adopt("p", bad, x=x, candidate_id="z", provenance={})
    rid2 = _rec(h)
    with pytest.raises(AlreadyExistsError, match="candidate_id: .*'adopted-1' already"):
        h.adopt("p", rid2, x=x, candidate_id="adopted-1", provenance={})
    store.replace_problem("p", _problem())
    with pytest.raises(ConflictError, match="record_id: record .* repaired revision 1; .* at revision 2"):
        h.adopt("p", rid2, x=x, candidate_id="late", provenance={})
    assert len(store.list_candidates("p")[0]) == 1  # every refusal stored nothing
    assert h.record("p", rid2).adopted_candidate_id == ""
    store.close()


def test_published_plan_removed_is_reported_and_delete_cascades(path):
    store, h = _open(path)
    store.create_problem("p", _problem())
    store.add_candidates("p", 1, ["a"], np.zeros((1, 4), np.int8), [{}])
    with pytest.raises(NotFoundError, match="no published plan"):
        h.published("p")
    with pytest.raises(NotFoundError, match="candidate_id: .*'zz'"):
        h.publish("p", "zz")
    h.publish("p", "a")
    store.remove_candidates("p", ["a"])
    with pytest.raises(NotFoundError, match="'a', was removed"):
        h.published("p")
    h.add_event("p", "e", b"", revision=1)
    _rec(h)
    store.delete_problem("p")
    store.create_problem("p", _problem())  # the same name again starts with no timeline
    assert h.events("p", include_withdrawn=True)[1] == [] and h.records("p")[0] == []
    store.close()


def test_newer_timeline_tables_are_refused(sqlite_path):
    path = sqlite_path
    store, h = _open(path)
    store.close()
    db = sqlite3.connect(path)
    db.execute("UPDATE timeline_version SET version = ?", (TIMELINE_VERSION + 1,))
    db.commit()
    db.close()
    store = Store(path)
    with pytest.raises(RuntimeError, match="newer"):
        History(store)
    store.close()


def test_a_database_without_timeline_tables_is_migrated(sqlite_path):
    path = sqlite_path
    store = Store(path)  # written before the timeline existed
    store.create_problem("p", _problem())
    store.close()
    db = sqlite3.connect(path)
    assert not db.execute("SELECT name FROM sqlite_master WHERE name = 'events'").fetchall()
    db.close()
    store, h = _open(path)
    assert h.version == TIMELINE_VERSION and h.events("p") == (1, [])
    assert store.get_problem("p")[1] == 1  # the store's own data untouched
    store.close()
