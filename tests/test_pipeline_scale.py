"""The pipeline's bulk paths give the same results as the plain ones; the outbox settings."""

from __future__ import annotations

import dataclasses
import datetime as dt

import numpy as np
import pandas as pd
import pytest

from advisory import assessment as asm
from advisory import settings as settings_mod
from advisory.errors import InputError
from advisory.forecast.result import LEVELS, table_prob_below
from advisory.runs import frost_assess, frost_night, save, sizes
from advisory.store import jsoncodec

NIGHT = dt.date(2026, 4, 8)      # a radiation-frost night of the demo week
NOW = dt.datetime(2026, 4, 9, 5, 0, tzinfo=dt.UTC)


def test_fast_payload_equals_to_dict(spring_db):
    res = frost_night.run_night(spring_db, NIGHT, now=NOW, deliver=False)
    odd = dataclasses.replace(res.assessments[0], details={
        "np_nan": np.float64("nan"), "nan": float("nan"), "n": np.int64(3), "pair": (1, 2.5),
        "day": dt.date(2026, 1, 2), "when": dt.datetime(2026, 1, 2, 3, tzinfo=dt.timezone(dt.timedelta(hours=2))),
        "nested": [{"x": 1.5}, None, True]})
    for a in res.assessments:
        # the payload the run stores (encoded straight from the assessment), compared as stored JSON
        # text (NaN != NaN as Python values; stored, NaN is null)
        assert jsoncodec.dumps(jsoncodec.loads(jsoncodec.encode(a))) == jsoncodec.dumps(asm.to_dict(a))
    fast, plain = jsoncodec.loads(jsoncodec.encode(odd)), jsoncodec.loads(jsoncodec.dumps(asm.to_dict(odd)))
    # an instant with another offset keeps it (the same instant; the run's own instants are UTC, below)
    assert dt.datetime.fromisoformat(fast["details"].pop("when")) == dt.datetime.fromisoformat(
        plain["details"].pop("when"))
    assert jsoncodec.dumps(fast) == jsoncodec.dumps(plain)
    infinite = dataclasses.replace(odd, details={"x": float("inf"), "y": -np.inf})
    assert jsoncodec.loads(jsoncodec.encode(infinite))["details"] == {"x": None, "y": None}  # JSON has no infinity


def _utc_written(value) -> bytes:
    """``value`` as JSON with every instant turned to UTC first (the stored form's rule)."""
    import orjson

    def fallback(x):
        if isinstance(x, dt.datetime):
            return x.astimezone(dt.UTC).isoformat()
        return jsoncodec._fallback(x)

    return orjson.dumps(value, default=fallback, option=jsoncodec._OPTIONS | orjson.OPT_PASSTHROUGH_DATETIME)


def test_the_runs_instants_are_utc_so_stored_json_writes_them_in_utc(spring_db):
    """orjson writes an instant with its own offset: every instant of a run's assessments and notices
    must be UTC already for the stored JSON to be in UTC (:mod:`advisory.store.jsoncodec`)."""
    from advisory.notices import compose, farm_summary
    from advisory.runs import heat_day

    frost = frost_night.run_night(spring_db, NIGHT, now=NOW, deliver=False).assessments
    update = frost_night.run_night(spring_db, NIGHT, now=NOW + dt.timedelta(hours=4), update=True,
                                deliver=False).assessments
    heat = heat_day.run_heat(spring_db, NIGHT, now=dt.datetime(2026, 4, 8, 16, tzinfo=dt.UTC),
                                  deliver=False).assessments
    values = [*frost, *update, *heat]
    values += [compose.compose_block(a) for a in frost + heat]
    values.append(farm_summary.compose_farm(frost))
    assert frost and update and heat
    for v in values:
        assert jsoncodec.encode(v) == _utc_written(v)


def test_cdf_equals_column_by_column_table_lookup():
    rng = np.random.default_rng(3)
    n, k = 40, len(LEVELS)
    q = np.sort(rng.normal(0, 2, (n, k)), axis=1)
    q[5, 10:20] = q[5, 10]                      # ties inside a table
    x = rng.normal(0, 4, (n, 31))
    x[:, 0] = q[:, 0] - 1                       # below the table
    x[:, 1] = q[:, -1] + 1                      # above it
    x[:, 2] = q[:, 10]                          # exactly on a level
    x[3, 4] = np.nan
    fc = type("F", (), {"quantiles_c": q})()
    got = frost_assess._cdf(fc, np.arange(n))(x)
    want = np.stack([table_prob_below(q, x[:, j]) for j in range(x.shape[1])], axis=1)
    np.testing.assert_array_equal(got, want)


def test_night_groups_split_far_apart_reference_times():
    ref = pd.DatetimeIndex(["2026-04-08 09:00", "2026-04-09 03:00", "2026-04-08 10:30", "2026-04-09 05:00",
                            "2026-04-09 08:30"], tz="UTC")
    fc = type("F", (), {"reference_time": ref})()
    groups = frost_assess._night_groups(fc, np.arange(5), span_h=4.0)
    assert [g.tolist() for g in groups] == [[0, 2], [1, 3], [4]]


def test_lean_outbox_setting(spring_db, quiet_channels, monkeypatch):
    monkeypatch.setenv("ADVISORY_OUTBOX_FORMATS", "json, sms")
    monkeypatch.setenv("ADVISORY_OUTBOX_CHARTS", "never")
    res = frost_night.run_night(spring_db, NIGHT, now=NOW, sleep=lambda s: None)
    assert res.deliveries["outbox sent"] == 7
    files = [p.name for p in quiet_channels.rglob("*") if p.is_file()]

    def endings(names):  # file endings, leaving out the text messages queued per recipient (name.sms.txt)
        return {f.split(".", 1)[1] for f in names if f.split(".", 1)[1].count(".") <= 1}

    # farm summary: every format and the run sheet; blocks: JSON and the short text only
    assert endings(f for f in files if "_farm-summary_" in f) == {"txt", "md", "html", "json", "runsheet.csv"}
    assert endings(f for f in files if "_farm-summary_" not in f) == {"json", "sms.txt"}
    assert not [f for f in files if f.endswith(".png")]


def test_outbox_settings_are_checked(monkeypatch, tmp_path):
    monkeypatch.setenv("ADVISORY_HOME", str(tmp_path))
    monkeypatch.delenv("ADVISORY_SETTINGS", raising=False)
    monkeypatch.delenv("ADVISORY_OUTBOX_CHARTS", raising=False)
    monkeypatch.delenv("ADVISORY_OUTBOX_FORMATS", raising=False)
    s = settings_mod.load("sqlite://")
    assert s.outbox_formats == ("text", "markdown", "html", "json") and s.outbox_charts == "auto"
    monkeypatch.setenv("ADVISORY_OUTBOX_FORMATS", "json,pdf")
    with pytest.raises(InputError, match="pdf"):
        settings_mod.load("sqlite://")
    monkeypatch.setenv("ADVISORY_OUTBOX_FORMATS", "JSON,text,json")
    assert settings_mod.load("sqlite://").outbox_formats == ("json", "text")
    monkeypatch.setenv("ADVISORY_OUTBOX_CHARTS", "sometimes")
    with pytest.raises(InputError, match="sometimes"):
        settings_mod.load("sqlite://")
    monkeypatch.delenv("ADVISORY_OUTBOX_CHARTS")
    monkeypatch.delenv("ADVISORY_OUTBOX_FORMATS")
    (tmp_path / "settings.toml").write_text('[outbox]\nformats = ["json", "sms"]\ncharts = "email"\n')
    s = settings_mod.load("sqlite://")
    assert s.outbox_formats == ("json", "sms") and s.outbox_charts == "email"


def test_crash_before_delivery_is_delivered_by_the_next_run(spring_db, quiet_channels):
    # stored but not delivered (as if the process died between the two transactions)
    first = frost_night.run_night(spring_db, NIGHT, now=NOW, deliver=False)
    assert first.notices and not first.deliveries
    again = frost_night.run_night(spring_db, NIGHT, now=NOW, sleep=lambda s: None)
    assert again.notices == [] and again.deliveries["outbox sent"] == len(first.notices)
    assert frost_night.run_night(spring_db, NIGHT, now=NOW, sleep=lambda s: None).deliveries == {}


def test_notice_data_is_stored_once_and_joined_again(spring_db, quiet_channels, monkeypatch):
    """The run stores a block notice without its data (the forecast payload); readers get it whole."""
    from sqlalchemy import select

    from advisory.notices import render
    from advisory.store.schema import Notice

    monkeypatch.setenv("ADVISORY_OUTBOX_FORMATS", "json")
    res = frost_night.run_night(spring_db, NIGHT, now=NOW, sleep=lambda s: None)
    written = {p.name: p.read_text() for p in quiet_channels.rglob("*.json")}
    with spring_db.transaction() as s:
        rows = list(s.scalars(select(Notice).where(Notice.id.in_(res.notices))))
        blocks = [n for n in rows if n.block_id is not None]
        assert blocks and all("data" not in n.content for n in blocks)
        for n in blocks:
            assert n.full_content["data"] == n.forecast.payload and n.full_content["data"]["p50_c"] is not None
            # what the outbox got is the whole notice, as a renderer makes it from the stored row
            match = [t for t in written.values() if f'"key":"{n.key}"' in t]
            assert match == [render.render(n.full_content, "json")]
        summary = next(n for n in rows if n.block_id is None)
        assert summary.full_content is summary.content


def test_email_chart_setting_draws_charts_for_mailed_notices(spring_db, quiet_channels, monkeypatch):
    monkeypatch.setenv("ADVISORY_OUTBOX_FORMATS", "json")
    monkeypatch.setenv("ADVISORY_OUTBOX_CHARTS", "email")
    frost_night.run_night(spring_db, NIGHT, now=NOW, sleep=lambda s: None)
    blocks = [p.name for p in quiet_channels.rglob("*") if p.is_file() and "_farm-summary_" not in p.name
              and p.name.split(".", 1)[1].count(".") == 0]
    # every demo block has a recipient with an e-mail address: its chart and the page showing it are kept
    assert {f.split(".", 1)[1] for f in blocks} == {"json", "html", "png"}
    assert len(blocks) == 3 * 6


def _stored(db):
    from sqlalchemy import select

    from advisory.store.schema import Forecast, Notice

    with db.transaction() as s:
        forecasts = {(f.block_id, f.revision): (f.level, f.payload) for f in s.scalars(select(Forecast))}
        notices = {n.key: n.content for n in s.scalars(select(Notice))}
    return forecasts, notices


def _second_spring_db(url, demo_farm):
    """Another database like the ``spring_db`` fixture (same farm, readings and block ids)."""
    from advisory.ingest.farm_file import import_farm_file
    from advisory.ingest.observations import import_file
    from advisory.store.db import Database

    db = Database(url)
    import_farm_file(db, demo_farm / "farm.toml")
    for code in ("QR-BENCH", "QR-CREEK"):
        import_file(db, code, demo_farm / "stations" / f"{code}-spring.csv")
    return url, db


@pytest.mark.parametrize("update", [False, True])
def test_forked_workers_store_what_one_process_stores(spring_db, demo_farm, tmp_path, monkeypatch, update,
                                                      caplog, fresh_db_url):
    url, serial_db = _second_spring_db(fresh_db_url("serial"), demo_farm)
    later = NOW + dt.timedelta(hours=-3)
    one = dataclasses.replace(settings_mod.load(url), workers=1, outbox=tmp_path / "outbox-one")
    frost_night.run_night(serial_db, NIGHT, now=NOW, settings=one, sleep=lambda s: None)
    if update:
        frost_night.run_night(serial_db, NIGHT, now=later, update=True, settings=one, sleep=lambda s: None)

    from advisory.notices import deliver

    monkeypatch.setattr(sizes, "PARALLEL_FROM_BLOCKS", 2)  # the demo farm has six blocks
    monkeypatch.setattr(deliver, "FORK_OUTBOX_FROM", 2)
    three = dataclasses.replace(one, db_url=spring_db.url, workers=3, outbox=tmp_path / "outbox-three")
    caplog.set_level("INFO", logger="advisory.notices.deliver")
    runs = [frost_night.run_night(spring_db, NIGHT, now=NOW, settings=three, sleep=lambda s: None)]
    assert "with 3 processes" in caplog.text
    if update:
        runs.append(frost_night.run_night(spring_db, NIGHT, now=later, update=True, settings=three,
                                       sleep=lambda s: None))
    assert all("wait for workers" in r.timings for r in runs)  # the shares went to forked processes
    # the same outbox, file for file (written by three processes here, by one there)
    # (numbers may differ in the last bits: numpy sums arrays of other shapes in another order)
    files = {p.relative_to(one.outbox): p.read_bytes() for p in one.outbox.rglob("*") if p.is_file()}
    assert len(files) > 10
    got_files = {p.relative_to(three.outbox): p.read_bytes() for p in three.outbox.rglob("*") if p.is_file()}
    assert got_files.keys() == files.keys()
    for name, data in files.items():
        if name.suffix == ".json":
            _same(jsoncodec.loads(got_files[name]), jsoncodec.loads(data))
        else:
            assert got_files[name] == data, name
    want, got = _stored(serial_db), _stored(spring_db)
    serial_db.dispose()
    # block ids are the same in both databases (same farm file, same order of import)
    assert got[0].keys() == want[0].keys() and got[1].keys() == want[1].keys()
    _same(got, want)


@pytest.mark.parametrize("writer_fails, workers", [(False, 2), (True, 2), (False, 3)])
def test_outbox_files_written_ahead_are_the_ones_delivery_writes(spring_db, demo_farm, tmp_path, monkeypatch,
                                                                  caplog, writer_fails, workers, fresh_db_url):
    """A large run's outbox files, written ahead by a forked copy while the run stores, are published
    only by the delivery and are the files one process writes; a stopped run's leftovers are removed."""
    import os
    import time

    from advisory.notices import outbox_files

    url, serial_db = _second_spring_db(fresh_db_url("serial"), demo_farm)
    one = dataclasses.replace(settings_mod.load(url), workers=1, outbox=tmp_path / "outbox-one")
    frost_night.run_night(serial_db, NIGHT, now=NOW, settings=one, sleep=lambda s: None)
    serial_db.dispose()

    two = dataclasses.replace(one, db_url=spring_db.url, workers=workers, outbox=tmp_path / "outbox-two")
    night_dir = two.outbox / NIGHT.isoformat()
    night_dir.mkdir(parents=True)
    stale, fresh = night_dir / ".x.json.0badc0ffee00.staged", night_dir / ".y.json.0ddba11fee00.staged"
    for p in (stale, fresh):
        p.write_text("{}")
    os.utime(stale, (time.time() - 2 * outbox_files.STALE_STAGED_S,) * 2)
    monkeypatch.setattr(sizes, "STAGE_OUTBOX_FROM", 2)  # the demo farm has six blocks
    monkeypatch.setattr(sizes, "PARALLEL_FROM_BLOCKS", 2)  # and its workers hand their files over
    if writer_fails:
        def broken(*args, **kw):
            raise OSError("disk full")
        monkeypatch.setattr(outbox_files, "stage_outbox", broken)
    caplog.set_level("WARNING", logger="advisory.runs.staging")
    res = frost_night.run_night(spring_db, NIGHT, now=NOW, settings=two, sleep=lambda s: None)
    assert ("outbox files written ahead" in res.timings) is not writer_fails
    assert "wait for workers" in res.timings
    assert ("disk full" in caplog.text) is writer_fails

    files = {p.relative_to(one.outbox): p.read_bytes() for p in one.outbox.rglob("*") if p.is_file()}
    got = {p.relative_to(two.outbox): p.read_bytes() for p in two.outbox.rglob("*") if p.is_file()}
    assert any(n.suffix == ".png" for n in files) and any(n.name.endswith(".runsheet.csv") for n in files)
    # a stopped run's staged file is gone, another run's recent one is left alone, nothing else is left
    assert not stale.exists() and fresh.exists() or writer_fails
    got.pop(fresh.relative_to(two.outbox), None)
    got.pop(stale.relative_to(two.outbox), None)
    assert got.keys() == files.keys()
    for name, data in files.items():
        if name.suffix == ".json":
            _same(jsoncodec.loads(got[name]), jsoncodec.loads(data))
        elif name.suffix != ".png":  # (the chart's PNG carries its drawing software's metadata)
            assert got[name] == data, name


def test_a_run_that_fails_after_writing_ahead_publishes_nothing(spring_db, quiet_channels, monkeypatch):
    """Files written ahead stay hidden until the notices are stored; a failed store leaves none behind."""
    from advisory.store import bulk
    from advisory.store.schema import Forecast, Notice

    monkeypatch.setattr(sizes, "STAGE_OUTBOX_FROM", 2)
    real = bulk.insert_rows

    def failing(session, model, rows, key=None):
        if model is Notice:
            raise RuntimeError("database went away")
        return real(session, model, rows, key)

    monkeypatch.setattr(bulk, "insert_rows", failing)
    with pytest.raises(RuntimeError, match="went away"):
        frost_night.run_night(spring_db, NIGHT, now=NOW, sleep=lambda s: None)
    assert [p for p in quiet_channels.rglob("*") if p.is_file()] == []   # nothing published, nothing left
    with spring_db.transaction() as s:
        assert s.query(Forecast).count() == 0 and s.query(Notice).count() == 0
    monkeypatch.setattr(bulk, "insert_rows", real)
    res = frost_night.run_night(spring_db, NIGHT, now=NOW, sleep=lambda s: None)   # the next run does it all
    assert res.deliveries["outbox sent"] == len(res.notices) == 7


def _same(a, b, where=""):
    """Equal, floats to 1e-9 relative."""
    if isinstance(a, float) and isinstance(b, float):
        assert a == pytest.approx(b, rel=1e-9, abs=1e-12), where
    elif isinstance(a, dict) and isinstance(b, dict):
        assert a.keys() == b.keys(), where
        for k in a:
            _same(a[k], b[k], f"{where}/{k}")
    elif isinstance(a, list | tuple) and isinstance(b, list | tuple):
        assert len(a) == len(b), where
        for i, (x, y) in enumerate(zip(a, b, strict=True)):
            _same(x, y, f"{where}[{i}]")
    else:
        assert a == b, where


def test_table_quantiles_invert_the_table_cdf():
    rng = np.random.default_rng(5)
    n, k = 30, len(LEVELS)
    q = np.sort(rng.normal(0, 2, (n, k)), axis=1)
    q[4, 20:30] = q[4, 20]  # a flat stretch (a jump of the CDF)
    fc = type("F", (), {"quantiles_c": q})()
    probs = (np.arange(200) + 0.5) / 200
    x = frost_assess._table_quantiles(fc, np.arange(n))(probs)
    assert x.shape == (n, 200) and np.all(np.diff(x, axis=1) >= 0)
    p = frost_assess._cdf(fc, np.arange(n))(x)
    ok = np.ones_like(p, bool)
    ok[4] = (probs < LEVELS[20] - 1e-9) | (probs > LEVELS[29] + 1e-9)  # inside the jump the CDF steps past
    np.testing.assert_allclose(p[ok], np.broadcast_to(probs, p.shape)[ok], atol=1e-9)


def _raw_rows(url, table):
    import sqlite3

    con = sqlite3.connect(url.removeprefix("sqlite:///"))
    try:
        return con.execute(f"SELECT * FROM {table} ORDER BY id").fetchall()
    finally:
        con.close()


@pytest.mark.sqlite_only(reason="checks SQLite's driver-level insert path against the ORM's, reading the file")
def test_driver_level_inserts_store_what_the_orm_stores(spring_db, demo_farm, tmp_path, monkeypatch,
                                                        fresh_db_url):
    url, orm_db = _second_spring_db(fresh_db_url("orm"), demo_farm)
    with monkeypatch.context() as m:
        m.setattr(save, "_ROW_KEYS", {})  # no key to find the ids by: the ORM's bulk insert
        frost_night.run_night(orm_db, NIGHT, now=NOW, deliver=False)
    looked_up = []
    from advisory.store import bulk

    real = bulk._numbered_after
    monkeypatch.setattr(bulk, "_numbered_after", lambda c, t, b, n: looked_up.append(t.name) or real(c, t, b, n))
    frost_night.run_night(spring_db, NIGHT, now=NOW, deliver=False)
    assert looked_up == ["forecasts", "notices"]  # the driver-level path was taken
    orm_db.dispose()
    for table in ("forecasts", "notices"):
        fast, orm = _raw_rows(spring_db.url, table), _raw_rows(url, table)
        assert len(fast) == len(orm) > 5
        for a, b in zip(fast, orm, strict=True):  # same ids, same stored text and numbers
            assert a == b


def test_a_worker_that_stops_has_its_share_done_by_the_run(spring_db, demo_farm, tmp_path, monkeypatch, caplog,
                                                           fresh_db_url):
    """A worker process that dies mid-run: its share is assessed by the run's own process, once."""
    import os

    url, serial_db = _second_spring_db(fresh_db_url("serial"), demo_farm)
    one = dataclasses.replace(settings_mod.load(url), workers=1, outbox=tmp_path / "outbox-one")
    frost_night.run_night(serial_db, NIGHT, now=NOW, settings=one, sleep=lambda s: None)
    want = _stored(serial_db)
    serial_db.dispose()

    home = os.getpid()
    real = frost_night._assess_share

    def dies(*args, **kw):
        if os.getpid() != home:
            os._exit(3)  # without a word
        return real(*args, **kw)

    monkeypatch.setattr(frost_night, "_assess_share", dies)
    monkeypatch.setattr(sizes, "PARALLEL_FROM_BLOCKS", 2)
    monkeypatch.setattr(sizes, "STAGE_OUTBOX_FROM", 2)
    two = dataclasses.replace(one, db_url=spring_db.url, workers=2, outbox=tmp_path / "outbox-two")
    caplog.set_level("WARNING", logger="advisory.forking")
    res = frost_night.run_night(spring_db, NIGHT, now=NOW, settings=two, sleep=lambda s: None)
    assert "a worker process stopped" in caplog.text
    assert len(res.assessments) == len({a.block_id for a in res.assessments}) == 6
    _same(_stored(spring_db), want)
    files = {p.relative_to(one.outbox) for p in one.outbox.rglob("*") if p.is_file()}
    assert {p.relative_to(two.outbox) for p in two.outbox.rglob("*") if p.is_file()} == files
