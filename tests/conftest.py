"""Shared fixtures: a migrated database, the demo farm file.

The suite runs on SQLite; with ``ADVISORY_TEST_DB`` (a PostgreSQL URL, see ``make test-pg``) it runs on
that server instead, each test in a database of its own.  A test that needs one engine says so with
``@pytest.mark.sqlite_only(reason)`` or ``@pytest.mark.postgresql_only(reason)``.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest

from advisory.store.db import Database, upgrade
from tests.helpers import pg

ROOT = Path(__file__).resolve().parents[1]
DEMO_FARM = ROOT / "demo-farm"


def pytest_collection_modifyitems(config, items):
    for item in items:
        for name, engine in (("sqlite_only", "sqlite"), ("postgresql_only", "postgresql")):
            mark = item.get_closest_marker(name)
            if mark is not None and engine != pg.ENGINE:
                reason = mark.kwargs.get("reason") or (mark.args[0] if mark.args else "")
                item.add_marker(pytest.mark.skip(reason=f"{engine} only: {reason}"))


@pytest.fixture(scope="session")
def pg_server():
    """The PostgreSQL test server (:class:`tests.helpers.pg.PgServer`), or None on SQLite."""
    if pg.TEST_DB is None:
        yield None
        return
    server = pg.PgServer(pg.TEST_DB)
    yield server
    server.close()


@pytest.fixture(scope="session")
def _pg_schema_template(pg_server) -> str | None:
    """A database on the test server migrated once per session, the template of each test's."""
    if pg_server is None:
        return None
    name = pg_server.new_name("tpl")
    url = pg_server.create(name)
    upgrade(url)
    return name


@pytest.fixture
def db_url(tmp_path, pg_server, _pg_schema_template) -> str:
    """URL of a fresh database with the current schema (SQLite file, or a database on the test server)."""
    if pg_server is not None:
        url = pg_server.create(template=_pg_schema_template)
        yield url
        pg_server.drop(url)
        return
    url = f"sqlite:///{tmp_path / 'test.sqlite'}"
    upgrade(url)
    yield url


@pytest.fixture
def empty_db_url(tmp_path, pg_server) -> str:
    """URL of a database with nothing in it (a missing SQLite file, or an empty database on the server)."""
    if pg_server is not None:
        url = pg_server.create()
        yield url
        pg_server.drop(url)
        return
    import sqlite3

    path = tmp_path / "empty.sqlite"
    sqlite3.connect(path).close()  # a file with no tables
    yield f"sqlite:///{path}"


@pytest.fixture
def db(db_url) -> Database:
    d = Database(db_url)
    yield d
    d.dispose()


@pytest.fixture
def demo_farm(tmp_path) -> Path:
    """A private copy of the demo farm folder (farm file and station files)."""
    dest = tmp_path / "demo-farm"
    shutil.copytree(DEMO_FARM, dest, ignore=shutil.ignore_patterns("inbox", "__pycache__"))
    return dest


@pytest.fixture
def quiet_channels(monkeypatch, tmp_path):
    """Outbox in the test's folder; no mail server or webhook secret configured."""
    for var in ("ADVISORY_SMTP_HOST", "ADVISORY_SMTP_PASSWORD", "ADVISORY_WEBHOOK_SECRET", "ADVISORY_DB",
                "ADVISORY_SETTINGS"):
        monkeypatch.delenv(var, raising=False)
    monkeypatch.setenv("ADVISORY_HOME", str(tmp_path / "home"))
    monkeypatch.setenv("ADVISORY_OUTBOX", str(tmp_path / "outbox"))
    return tmp_path / "outbox"


@pytest.fixture
def spring_db(db, demo_farm, quiet_channels):
    """The demo farm with its spring week of readings imported."""
    from advisory.ingest.farm_file import import_farm_file
    from advisory.ingest.observations import import_file

    import_farm_file(db, demo_farm / "farm.toml")
    for code in ("QR-BENCH", "QR-CREEK"):
        import_file(db, code, demo_farm / "stations" / f"{code}-spring.csv")
    return db


@pytest.fixture
def fresh_db_url(tmp_path, pg_server, _pg_schema_template):
    """A factory of more fresh migrated databases for one test: ``fresh_db_url(name)`` -> URL."""
    made = []

    def make(name: str = "more") -> str:
        if pg_server is not None:
            url = pg_server.create(template=_pg_schema_template)
        else:
            url = f"sqlite:///{tmp_path / (name + '.sqlite')}"
            upgrade(url)
        made.append(url)
        return url

    yield make
    if pg_server is not None:
        for url in made:
            pg_server.drop(url)
