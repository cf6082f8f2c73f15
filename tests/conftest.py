"""Shared fixtures: a migrated database, the demo farm file."""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest

from advisory.store.db import Database, upgrade

ROOT = Path(__file__).resolve().parents[1]
DEMO_FARM = ROOT / "demo-farm"


@pytest.fixture
def db_url(tmp_path) -> str:
    """URL of a fresh SQLite database with the current schema."""
    url = f"sqlite:///{tmp_path / 'test.sqlite'}"
    upgrade(url)
    return url


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
