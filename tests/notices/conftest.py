"""Fixtures for the notice tests: settings with a private outbox, a stored notice with recipients."""

from __future__ import annotations

import dataclasses
import shutil
import socket

import pytest
from sqlalchemy import select

from advisory.ingest.farm_file import import_farm_file
from advisory.notices.compose import compose_block
from advisory.settings import Settings, SmtpSettings
from advisory.store.db import Database, upgrade
from advisory.store.schema import Block, Farm, Notice
from tests.conftest import DEMO_FARM
from tests.helpers.pg import DbTemplate
from tests.notices import samples

SECRET = "test-webhook-secret-4f1c"
PASSWORD = "pw-never-in-logs-93kq"


def free_port() -> int:
    """A TCP port on 127.0.0.1 that nothing listens on (right now)."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.fixture
def settings(tmp_path) -> Settings:
    """Settings with an outbox in tmp_path, no SMTP host, a webhook secret."""
    return Settings(db_url="sqlite://", data_home=tmp_path, outbox=tmp_path / "outbox",
                    smtp=SmtpSettings(host=None, port=25, starttls=False, sender="frost@quillback.example"),
                    webhook_secret=SECRET)


def with_smtp(settings: Settings, port: int, **kw) -> Settings:
    smtp = dataclasses.replace(settings.smtp, host="127.0.0.1", port=port, **kw)
    return dataclasses.replace(settings, smtp=smtp)


@pytest.fixture(scope="session")
def _farm_template(tmp_path_factory, pg_server) -> DbTemplate:
    """One migrated database with the demo farm, made once per session (migrations take most of a second)."""
    folder = tmp_path_factory.mktemp("notices-farm")
    farm_dir = folder / "demo-farm"
    shutil.copytree(DEMO_FARM, farm_dir, ignore=shutil.ignore_patterns("inbox", "__pycache__"))
    template = DbTemplate(pg_server, folder)
    upgrade(template.url)
    d = Database(template.url)
    import_farm_file(d, farm_dir / "farm.toml")
    d.dispose()
    return template


@pytest.fixture
def farm_db_url(_farm_template, tmp_path) -> str:
    """URL of a private copy of the demo-farm database (the same as `db` + `import_farm_file`, faster)."""
    url = _farm_template.copy(tmp_path)
    yield url
    _farm_template.drop(url)


@pytest.fixture
def farm_db(farm_db_url):
    """The demo farm in a fresh database."""
    d = Database(farm_db_url)
    yield d
    d.dispose()


def store_notice(session, assessment=None, *, block_name="Creek Bing", **kw) -> tuple[Notice, Block]:
    """Compose a notice for a demo block and store it (flushed, with an id)."""
    block = session.scalar(select(Block).where(Block.name == block_name))
    farm = session.scalar(select(Farm).where(Farm.id == block.farm_id))
    a = assessment or samples.frost_assessment(block_id=block.id, block=block.name, farm=farm.name, **kw)
    n = compose_block(a)
    row = Notice(key=n.key, farm_id=farm.id, block_id=block.id, kind=n.kind, night=a.night,
                 revision=n.revision, is_update=n.is_update, level=n.level, subject=n.subject,
                 content=n.to_dict())
    session.add(row)
    session.flush()
    return row, block
