"""Bulk inserts hand back each new row's id in the order of the rows."""

from __future__ import annotations

import datetime as dt

from sqlalchemy import delete, select

from advisory.store import bulk
from advisory.store.schema import RunRecord

T0 = dt.datetime(2026, 4, 8, 3, tzinfo=dt.UTC)


def _rows(prefix: str, n: int) -> list[dict]:
    return [{"key": f"{prefix}{k}", "kind": "evening", "night": dt.date(2026, 4, 8), "started_at": T0,
             "finished_at": None, "status": "running", "detail": {"k": k}} for k in range(n)]


def _check(session, ids: list[int], rows: list[dict]) -> None:
    found = dict(session.execute(select(RunRecord.key, RunRecord.id)).all())
    assert ids == [found[r["key"]] for r in rows]
    assert session.get(RunRecord, ids[-1]).detail == rows[-1]["detail"]  # stored as the ORM stores it


def test_ids_follow_the_rows_also_after_gaps(db):
    with db.transaction() as session:
        first = _rows("a", 5)
        ids = bulk.insert_rows(session, RunRecord, first, key=("key",))
        _check(session, ids, first)
        # a gap below the largest id, then the largest row removed: new rows still numbered in order
        session.execute(delete(RunRecord).where(RunRecord.id.in_([ids[1], ids[-1]])))
        more = _rows("b", 7)
        ids = bulk.insert_rows(session, RunRecord, more, key=("key",))
        _check(session, ids, more)


def test_ids_read_back_when_the_numbering_is_not_the_usual_one(db, monkeypatch):
    with db.transaction() as session:
        bulk.insert_rows(session, RunRecord, _rows("a", 3), key=("key",))
        # as if another writer had added a row between the look at the largest id and the insert
        monkeypatch.setattr(bulk, "_largest_id", lambda conn, table: 1)
        more = _rows("b", 4)
        assert bulk._numbered_after(session.connection(), RunRecord.__table__, 1, 4) is None
        ids = bulk.insert_rows(session, RunRecord, more, key=("key",))
        _check(session, ids, more)


def test_a_large_batch_gets_its_ids_in_order_on_either_engine(db):
    """(On PostgreSQL a batch this large goes in with one COPY, its ids taken from the sequence first.)"""
    with db.transaction() as session:
        bulk.insert_rows(session, RunRecord, _rows("a", 3), key=("key",))
        more = _rows("b", bulk.COPY_FROM_ROWS + 50)
        more[7]["detail"] = {"text": "tab\tnewline\nbackslash\\ quote\" é"}   # what COPY's text must escape
        more[8]["finished_at"] = T0 + dt.timedelta(minutes=5)
        ids = bulk.insert_rows(session, RunRecord, more, key=("key",))
        _check(session, ids, more)
        assert len(set(ids)) == len(more)
        assert session.get(RunRecord, ids[7]).detail == more[7]["detail"]
        assert session.get(RunRecord, ids[8]).finished_at == T0 + dt.timedelta(minutes=5)
        assert session.get(RunRecord, ids[9]).finished_at is None
    with db.transaction() as session:  # the ORM's own inserts go on after the ids taken
        session.add(RunRecord(key="c", kind="evening", night=dt.date(2026, 4, 8), started_at=T0))
        session.flush()
        assert session.scalar(select(RunRecord.id).where(RunRecord.key == "c")) > max(ids)
