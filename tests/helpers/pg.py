"""The PostgreSQL server of a test run (``ADVISORY_TEST_DB``): throw-away databases made from templates.

``ADVISORY_TEST_DB`` is the URL of a database on that server that the tests may use to create and
drop others (``.ci/pg-cluster start`` prints one).  Each test gets its own database, copied from a
template migrated once per session (``CREATE DATABASE ... TEMPLATE``), and dropped afterwards.
"""

from __future__ import annotations

import os
import uuid

from sqlalchemy import create_engine, text
from sqlalchemy.engine import make_url

#: The server's URL, or None when the suite runs on SQLite only.
TEST_DB = os.environ.get("ADVISORY_TEST_DB") or None

#: The engine the suite runs on: "postgresql" or "sqlite".
ENGINE = make_url(TEST_DB).get_backend_name() if TEST_DB else "sqlite"


class PgServer:
    """Creates and drops databases on the test server."""

    def __init__(self, admin_url: str):
        self.admin_url = make_url(admin_url)
        self._admin = create_engine(self.admin_url, isolation_level="AUTOCOMMIT", pool_size=1)
        with self._admin.connect() as conn:
            version = conn.execute(text("SHOW server_version_num")).scalar_one()
        # Copying the template's files is the quick way for a small database (15 logs every page instead).
        self._strategy = " STRATEGY FILE_COPY" if int(version) >= 150000 else ""
        self._run = uuid.uuid4().hex[:8]
        self._made: set[str] = set()

    def url(self, name: str) -> str:
        return self.admin_url.set(database=name).render_as_string(hide_password=False)

    def new_name(self, prefix: str = "t") -> str:
        return f"{prefix}_{self._run}_{uuid.uuid4().hex[:10]}"

    def create(self, name: str | None = None, template: str | None = None) -> str:
        """A new database (empty, or a copy of ``template``); its URL."""
        name = name or self.new_name()
        tpl = f' TEMPLATE "{template}"{self._strategy}' if template else ""
        with self._admin.connect() as conn:
            conn.execute(text(f'CREATE DATABASE "{name}"{tpl}'))
        self._made.add(name)
        return self.url(name)

    def drop(self, url_or_name: str) -> None:
        name = make_url(url_or_name).database if "://" in url_or_name else url_or_name
        with self._admin.connect() as conn:
            conn.execute(text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
        self._made.discard(name)

    def close(self) -> None:
        for name in list(self._made):
            self.drop(name)
        self._admin.dispose()


class DbTemplate:
    """A database built once (``url``), then copied for each test: a SQLite file, or a server's database.

    Build it through ``url``, dispose every engine on it, then call :meth:`copy` for each test.
    """

    def __init__(self, server: PgServer | None, folder):
        from pathlib import Path

        self.server = server
        if server is None:
            self.path = Path(folder) / "template.sqlite"
            self.url = f"sqlite:///{self.path}"
        else:
            self.name = server.new_name("tpl")
            self.url = server.create(self.name)

    def copy(self, folder) -> str:
        """The URL of a new copy (in ``folder`` for SQLite)."""
        import sqlite3
        from pathlib import Path

        if self.server is not None:
            return self.server.create(template=self.name)
        dest = Path(folder) / "copy.sqlite"
        n = 1
        while dest.exists():
            n += 1
            dest = Path(folder) / f"copy{n}.sqlite"
        with sqlite3.connect(self.path) as src, sqlite3.connect(dest) as dst:
            src.backup(dst)
        src.close()
        dst.close()
        return f"sqlite:///{dest}"

    def drop(self, url: str) -> None:
        """Remove a copy (a server's database; a SQLite file goes with its folder)."""
        if self.server is not None:
            self.server.drop(url)
