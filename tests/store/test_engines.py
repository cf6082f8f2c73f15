"""Types, time zones and JSON behave the same on both engines (run on whichever the suite uses)."""

from __future__ import annotations

import datetime as dt
import math
import uuid
from zoneinfo import ZoneInfo

import numpy as np
import pytest
from sqlalchemy import select, text

from advisory.ingest import observations
from advisory.store.schema import Farm, Forecast, Observation, Station
from tests.helpers import pg


def _farm(s, **kw) -> Farm:
    farm = Farm(name=kw.pop("name", "Round Trip Farm"), timezone="Pacific/Auckland", **kw)
    s.add(farm)
    s.flush()
    return farm


def test_aware_times_come_back_as_the_same_instant_in_utc(db):
    local = dt.datetime(2026, 4, 5, 5, 30, tzinfo=ZoneInfo("Pacific/Auckland"))   # the morning after fall-back
    with db.transaction() as s:
        farm = _farm(s, created_at=local)
        farm_id = farm.id
    with db.transaction() as s:
        got = s.scalar(select(Farm.created_at).where(Farm.id == farm_id))
        stored = s.execute(text("SELECT created_at FROM farms")).scalar()
    assert got == local and got.tzinfo == dt.UTC
    assert got.isoformat() == local.astimezone(dt.UTC).isoformat()
    # stored as the naive UTC wall time on both engines
    assert str(stored).startswith(local.astimezone(dt.UTC).replace(tzinfo=None).isoformat(sep=" ")[:16])


def test_naive_times_are_refused(db):
    from sqlalchemy.exc import StatementError

    with pytest.raises(StatementError, match="naive datetime"), db.transaction() as s:
        _farm(s, created_at=dt.datetime(2026, 4, 5, 2, 30))


def test_epoch_seconds_after_2038_and_before_1970(db):
    with db.transaction() as s:
        farm = _farm(s)
        st = Station(code="RT1", farm_id=farm.id, name="rt", latitude=-41.0, longitude=174.0, elevation_m=10.0,
                     timezone="Pacific/Auckland")
        s.add(st)
        s.flush()
        times = [dt.datetime(2040, 1, 1, tzinfo=dt.UTC), dt.datetime(1969, 12, 31, 23, 0, tzinfo=dt.UTC),
                 dt.datetime(2026, 4, 5, 14, 0, 1, tzinfo=dt.UTC)]
        for t in times:
            s.add(Observation(station_id=st.id, time_utc=t, air_temp_c=1.5))
        sid = st.id
    with db.transaction() as s:
        got = s.scalars(select(Observation.time_utc).where(Observation.station_id == sid)
                        .order_by(Observation.time_utc)).all()
    assert got == sorted(times) and all(t.tzinfo == dt.UTC for t in got)


def test_json_round_trip(db):
    settings = {"thresholds": {"protect_c": -1.5, "ready_c": 0.5}, "names": ["Côte rôtie", "桃"], "n": 3,
                "flag": True, "none": None, "nested": [[1, 2.25], {"a": []}], "big": 2 ** 53}
    with db.transaction() as s:
        farm = _farm(s, settings=settings)
        farm_id = farm.id
    with db.transaction() as s:
        assert s.scalar(select(Farm.settings).where(Farm.id == farm_id)) == settings


def test_json_through_the_codec_nan_and_instants(db):
    """Stored JSON goes through advisory.store.jsoncodec on both engines: NaN as null, instants in UTC."""
    instant = dt.datetime(2026, 4, 8, 23, 15, tzinfo=dt.UTC)
    with db.transaction() as s:
        farm = _farm(s)
        st = Station(code="RT2", farm_id=farm.id, name="rt", latitude=1.0, longitude=2.0, elevation_m=3.0,
                     timezone="UTC")
        s.add(st)
        s.flush()
        from advisory.store.schema import Block

        b = Block(farm_id=farm.id, station_id=st.id, name="B", latitude=1.0, longitude=2.0, elevation_m=3.0,
                  area_ha=1.0, crop="apple", stage="bloom", stage_date=dt.date(2026, 4, 1))
        s.add(b)
        s.flush()
        f = Forecast(block_id=b.id, night=dt.date(2026, 4, 8), status="ok",
                     payload={"low": math.nan, "at": instant, "inf": math.inf, "x": 1.0})
        s.add(f)
        s.flush()
        fid = f.id
    with db.transaction() as s:
        payload = s.scalar(select(Forecast.payload).where(Forecast.id == fid))
    assert dict(payload) == {"low": None, "at": "2026-04-08T23:15:00Z", "inf": None, "x": 1.0} or \
        dict(payload) == {"low": None, "at": "2026-04-08T23:15:00+00:00", "inf": None, "x": 1.0}


def test_dates_and_booleans(db):
    with db.transaction() as s:
        farm = _farm(s)
        st = Station(code="RT3", farm_id=farm.id, name="rt", latitude=1.0, longitude=2.0, elevation_m=3.0,
                     timezone="UTC")
        s.add(st)
        s.flush()
        from advisory.store.schema import Block

        s.add(Block(farm_id=farm.id, station_id=st.id, name="B", latitude=1.0, longitude=2.0, elevation_m=3.0,
                    area_ha=1.0, crop="apple", stage="bloom", stage_date=dt.date(2026, 2, 28), active=False))
    with db.transaction() as s:
        from advisory.store.schema import Block

        b = s.scalar(select(Block))
        assert b.stage_date == dt.date(2026, 2, 28) and b.active is False


def test_observation_import_takes_the_engines_fast_path(db, tmp_path, monkeypatch):
    """On PostgreSQL new readings go in by COPY (each missing value as NULL); on SQLite by INSERTs."""
    copies = []
    real = observations._copy_rows
    monkeypatch.setattr(observations, "_copy_rows", lambda *a: copies.append(len(a[4])) or real(*a))
    with db.transaction() as s:
        farm = _farm(s)
        s.add(Station(code="RT4", farm_id=farm.id, name="rt", latitude=36.0, longitude=-80.0, elevation_m=250.0,
                      timezone="UTC"))
    rows = ["time,air_temp_c,dew_point_c,wind_speed_ms"]
    ks = range(1, 301)
    for k in ks:
        t = dt.datetime(2026, 4, 1, tzinfo=dt.UTC) + dt.timedelta(minutes=10 * k)
        air = f"{5 + 3 * math.sin(k / 20):.2f}" if k % 7 else ""
        dew = f"{1 + math.cos(k / 30):.2f}" if k % 11 else ""
        rows.append(f"{t.isoformat()},{air},{dew},{'' if k % 5 == 0 else 1.5}")
    path = tmp_path / "rt4.csv"
    path.write_text("\n".join(rows) + "\n")
    summary = observations.import_file(db, "RT4", path)
    assert summary.rows_added == 300
    assert copies == ([300] if pg.ENGINE == "postgresql" else [])
    with db.transaction() as s:
        sid = s.scalar(select(Station.id).where(Station.code == "RT4"))
    frame = observations.load_observations(db, sid, dt.datetime(2026, 3, 1, tzinfo=dt.UTC),
                                           dt.datetime(2026, 5, 1, tzinfo=dt.UTC), qc_passed_only=False,
                                           include_qc=True)
    assert len(frame) == 300
    assert int(np.isnan(frame["air_temp_c"]).sum()) == len([k for k in ks if k % 7 == 0])
    assert int(np.isnan(frame["dew_point_c"]).sum()) == len([k for k in ks if k % 11 == 0])
    assert int(np.isnan(frame["wind_speed_ms"]).sum()) == 60
    assert frame["air_temp_c"].iloc[0] == pytest.approx(5 + 3 * math.sin(1 / 20), abs=0.006)
    assert observations.import_file(db, "RT4", path).rows_added == 0         # the same file adds nothing


def _station_file(tmp_path, code: str, n: int = 50):
    rows = ["time,air_temp_c,rel_humidity_pct"]
    for k in range(n):
        t = dt.datetime(2026, 4, 1, tzinfo=dt.UTC) + dt.timedelta(minutes=10 * k)
        rows.append(f"{t.isoformat()},{4 + k % 9 * 0.3:.1f},{80 - k % 5}")
    path = tmp_path / f"{code}.csv"
    path.write_text("\n".join(rows) + "\n")
    return path


@pytest.mark.postgresql_only(reason="the server's per-row foreign key checks and who may switch them off")
def test_copy_checks_references_once_then_as_usual(db, tmp_path, pg_server, db_url, monkeypatch):
    """The COPY's per-row reference checks are off for the COPY alone (a superuser here); a role without
    the privilege imports the same rows with the server checking each one."""
    from sqlalchemy import create_engine
    from sqlalchemy.engine import make_url

    from advisory.store.db import Database

    switched = []
    real = observations._check_references_once
    monkeypatch.setattr(observations, "_check_references_once", lambda *a: switched.append(real(*a)) or switched[-1])
    with db.transaction() as s:
        farm = _farm(s)
        for code in ("RT5", "RT6"):
            s.add(Station(code=code, farm_id=farm.id, name="rt", latitude=36.0, longitude=-80.0,
                          elevation_m=250.0, timezone="UTC"))
    with db.transaction() as s:
        observations.import_file(s, "RT5", _station_file(tmp_path, "RT5"))
        assert s.execute(text("SHOW session_replication_role")).scalar() == "origin"
        with pytest.raises(Exception, match="foreign key"), s.begin_nested():   # checked again afterwards
            s.execute(text("INSERT INTO observations (station_id, time_utc, air_temp_qc, dew_point_qc, "
                           "rel_humidity_qc, wind_speed_qc, cloud_cover_qc, upper_air_temp_qc) "
                           "VALUES (999999, 1, 0, 0, 0, 0, 0, 0)"))
    role = "importer_" + uuid.uuid4().hex[:8]
    admin = create_engine(db_url, isolation_level="AUTOCOMMIT")
    try:
        with admin.connect() as conn:
            conn.execute(text(f"CREATE ROLE {role} LOGIN"))
            conn.execute(text(f"GRANT ALL ON ALL TABLES IN SCHEMA public TO {role}"))
            conn.execute(text(f"GRANT ALL ON ALL SEQUENCES IN SCHEMA public TO {role}"))
        plain = Database(make_url(db_url).set(username=role).render_as_string(hide_password=False))
        try:
            summary = observations.import_file(plain, "RT6", _station_file(tmp_path, "RT6"))
        finally:
            plain.dispose()
        assert summary.rows_added == 50
        assert switched == [True, False]   # the test server's superuser may switch the checks off; the role not
        with db.transaction() as s:
            assert s.execute(text("SELECT COUNT(*) FROM observations o JOIN stations s ON s.id = o.station_id "
                                  "JOIN imports i ON i.id = o.import_id")).scalar() == 100
    finally:
        with admin.connect() as conn:
            conn.execute(text(f"DROP OWNED BY {role}"))
            conn.execute(text(f"DROP ROLE {role}"))
        admin.dispose()
