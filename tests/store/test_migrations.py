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


def test_upgrade_of_empty_database_gives_the_orm_schema(tmp_path):
    url = f"sqlite:///{tmp_path / 'm.sqlite'}"
    store.upgrade(url)
    engine = store.make_engine(url)
    assert _diff(engine) == []
    assert set(inspect(engine).get_table_names()) >= set(Base.metadata.tables)


def test_downgrade_then_upgrade(tmp_path):
    url = f"sqlite:///{tmp_path / 'm.sqlite'}"
    store.upgrade(url)
    store.downgrade(url, "base")
    engine = store.make_engine(url)
    assert set(inspect(engine).get_table_names()) <= {"alembic_version"}
    store.upgrade(url)
    assert _diff(engine) == []
    assert store.current_revision(engine) == store.head_revision()


def test_sqlite_pragmas(tmp_path):
    url = f"sqlite:///{tmp_path / 'm.sqlite'}"
    store.upgrade(url)
    engine = store.make_engine(url)
    with engine.connect() as conn:
        assert conn.execute(text("PRAGMA foreign_keys")).scalar() == 1
        assert conn.execute(text("PRAGMA journal_mode")).scalar() == "wal"


def test_refuses_empty_database(tmp_path):
    url = f"sqlite:///{tmp_path / 'empty.sqlite'}"
    with pytest.raises(SchemaVersionError, match="advisory db upgrade"):
        store.Database(url)


def test_refuses_older_schema(tmp_path):
    url = f"sqlite:///{tmp_path / 'old.sqlite'}"
    store.upgrade(url)
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


def test_refuses_known_older_revision(tmp_path, monkeypatch):
    url = f"sqlite:///{tmp_path / 'old.sqlite'}"
    store.upgrade(url)
    # The code now expects a later head than the database has.
    monkeypatch.setattr(store, "head_revision", lambda: "9999")
    with pytest.raises(SchemaVersionError, match="older schema.*advisory db upgrade"):
        store.Database(url)
