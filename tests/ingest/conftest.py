"""Fixtures for the observation import tests: a migrated database with stations.

The migrated database is built once per session and copied for each test
(running the migrations takes a noticeable fraction of a second).
"""

from __future__ import annotations

import hashlib
from pathlib import Path

import pytest
from sqlalchemy import text

from advisory.store.db import Database, upgrade
from advisory.store.schema import Farm, Station
from tests.helpers.pg import DbTemplate

#: Stations in the template database: code -> (zone, column map).
STATIONS = {
    "ST1": ("America/New_York", {}),
    "SOUTH": ("Australia/Hobart", {}),
    "LOGGER": ("America/Los_Angeles", {
        "TIMESTAMP": "time", "AirT_F": "air_temp_f", "RH": "rel_humidity_pct", "WS_mph": "wind_speed_mph",
        "_options": {"missing": "-6999"},
    }),
    "UTCST": ("UTC", {}),
}


@pytest.fixture(scope="session")
def obs_template(tmp_path_factory, pg_server) -> DbTemplate:
    template = DbTemplate(pg_server, tmp_path_factory.mktemp("obs-template"))
    url = template.url
    upgrade(url)
    db = Database(url)
    with db.transaction() as s:
        farm = Farm(name="Test farm", timezone="America/New_York")
        s.add(farm)
        s.flush()
        for code, (zone, cmap) in STATIONS.items():
            s.add(Station(code=code, farm_id=farm.id, name=f"station {code}", latitude=36.0, longitude=-80.0,
                          elevation_m=250.0, timezone=zone, column_map=cmap))
    db.dispose()
    return template


@pytest.fixture
def obs_db(obs_template, tmp_path) -> Database:
    """A private migrated database holding the stations of :data:`STATIONS`."""
    url = obs_template.copy(tmp_path)
    d = Database(url)
    yield d
    d.dispose()
    obs_template.drop(url)


def station_id(db: Database, code: str) -> int:
    with db.transaction() as s:
        return s.execute(text("SELECT id FROM stations WHERE code = :c"), {"c": code}).scalar_one()


def db_state(db: Database) -> str:
    """A digest of everything an import can write (observations and imports)."""
    h = hashlib.sha256()
    with db.transaction() as s:
        for table, order in (("observations", "station_id, time_utc"), ("imports", "id")):
            for row in s.execute(text(f"SELECT * FROM {table} ORDER BY {order}")):
                h.update(repr(tuple(row)).encode())
    return h.hexdigest()


def write(path: Path, content: str | bytes) -> Path:
    if isinstance(content, str):
        content = content.encode("utf-8")
    path.write_bytes(content)
    return path


@pytest.fixture
def csv_file(tmp_path):
    """Write a CSV under tmp_path: csv_file(text, name="obs.csv") -> Path."""
    counter = {"n": 0}

    def make(content: str | bytes, name: str | None = None) -> Path:
        counter["n"] += 1
        return write(tmp_path / (name or f"obs{counter['n']}.csv"), content)

    return make
