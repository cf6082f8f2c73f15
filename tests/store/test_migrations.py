"""Migrations produce exactly the ORM's schema; downgrade then upgrade works; version check."""

from __future__ import annotations

import pytest
from alembic.autogenerate import compare_metadata
from alembic.migration import MigrationContext
from sqlalchemy import inspect, text

from advisory.errors import SchemaVersionError
from advisory.store import db as store
from advisory.store.schema import Base


def _diff(engine):
    with engine.connect() as conn:
        ctx = MigrationContext.configure(conn, opts={"compare_type": True})
        return compare_metadata(ctx, Base.metadata)


def test_upgrade_of_empty_database_gives_the_orm_schema(empty_db_url):
    url = empty_db_url
    store.upgrade(url)
    engine = store.make_engine(url)
    assert _diff(engine) == []
    assert set(inspect(engine).get_table_names()) >= set(Base.metadata.tables)


def test_downgrade_then_upgrade(empty_db_url):
    url = empty_db_url
    store.upgrade(url)
    store.downgrade(url, "base")
    engine = store.make_engine(url)
    assert set(inspect(engine).get_table_names()) <= {"alembic_version"}
    store.upgrade(url)
    assert _diff(engine) == []
    assert store.current_revision(engine) == store.head_revision()


@pytest.mark.sqlite_only(reason="SQLite's pragmas")
def test_sqlite_pragmas(tmp_path):
    url = f"sqlite:///{tmp_path / 'm.sqlite'}"
    store.upgrade(url)
    engine = store.make_engine(url)
    with engine.connect() as conn:
        assert conn.execute(text("PRAGMA foreign_keys")).scalar() == 1
        assert conn.execute(text("PRAGMA journal_mode")).scalar() == "wal"


def test_refuses_empty_database(empty_db_url):
    url = empty_db_url
    with pytest.raises(SchemaVersionError, match="advisory db upgrade"):
        store.Database(url)


def test_refuses_older_schema(db_url):
    url = db_url
    engine = store.make_engine(url)
    with engine.begin() as conn:
        # Pretend the database stopped at the (known) base revision of the chain.
        first = store.head_revision()
        conn.execute(text("UPDATE alembic_version SET version_num = :v"), {"v": first})
    store.Database(url)  # current: fine
    with engine.begin() as conn:
        conn.execute(text("UPDATE alembic_version SET version_num = 'ffffffffffff'"))
    with pytest.raises(SchemaVersionError, match="newer schema"):
        store.Database(url)


def test_refuses_known_older_revision(db_url, monkeypatch):
    url = db_url
    # The code now expects a later head than the database has.
    monkeypatch.setattr(store, "head_revision", lambda: "9999")
    with pytest.raises(SchemaVersionError, match="older schema.*advisory db upgrade"):
        store.Database(url)
