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
