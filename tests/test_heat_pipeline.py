"""The morning heat run: the demo's summer week end to end, the estimate paths, odd places and days."""

from __future__ import annotations

import datetime as dt
import types

import numpy as np
import pandas as pd
import pytest
from sqlalchemy import func, select

from advisory import assessment as asm
from advisory import demo_heat
from advisory.forecast import dayshape, daytime
from advisory.ingest import outlook_import
from advisory.ingest.farm_file import import_farm_file
from advisory.ingest.observations import import_file, load_observations_many
from advisory.notices import compose, notice_data
from advisory.risk import heat as risk_heat
from advisory.runs import blocks, heat_assess, heat_day, heat_morning, heat_refit, planned
from advisory.store.schema import Block, Calibration, Delivery, Forecast, Notice, Outlook, RunRecord, Station

ESTIMATE_DAY = dt.date(2026, 7, 17)      # the demo outlook leaves this day out on purpose
OUTLOOK_DAY = dt.date(2026, 7, 16)


def _count(db, model, *where):
    with db.transaction() as s:
        return s.scalar(select(func.count()).select_from(model).where(*where))


def _clock(day: dt.date, hour: int = 9) -> dt.datetime:
    """A run clock after the demo's morning reading (local summer time is UTC-7)."""
    return dt.datetime.combine(day, dt.time(hour + 7), dt.UTC)


@pytest.fixture
def no_charts(monkeypatch):
    """Skip drawing PNG charts (slow); one test below draws a real one."""
    from advisory.notices import channels

    monkeypatch.setattr(channels, "_chart_for", lambda n: None)


@pytest.fixture
def summer_db(db, demo_farm, quiet_channels):
    """The demo farm with its summer readings and the invented outlook imported."""
    import_farm_file(db, demo_farm / "farm.toml")
    for code in ("QR-BENCH", "QR-CREEK"):
        import_file(db, code, demo_farm / "stations" / f"{code}-summer.csv")
    outlook_import.import_outlook(db, demo_farm / "outlook-summer.csv")
    return db


def _blocks(db, names=None):
    s = db.transaction().__enter__()
    return s, blocks._load_blocks(s, None, names=names)


# --------------------------------------------------------------------------- the demo week

def test_demo_heat_week_end_to_end_and_idempotent(db, demo_farm, quiet_channels, no_charts):
    import_farm_file(db, demo_farm / "farm.toml")
    paths = types.SimpleNamespace(outbox=quiet_channels, farm_dir=demo_farm)
    lines = []
    text = demo_heat.demo_heat(paths, db, echo=lines.append)
    assert any("outlook-summer.csv" in x and "12 added" in x for x in lines)
    day_lines = {ln.split(":")[0].strip(): ln for ln in text.splitlines() if ln.startswith("  ") and ": highs" in ln}
    assert list(day_lines) == [f"{d:%a %d %b}" for d in demo_heat.DEMO_HEAT_DAYS]
    for d, ln in zip(demo_heat.DEMO_HEAT_DAYS, day_lines.values(), strict=True):
        assert ("ESTIMATED, no outlook" in ln) is (d == ESTIMATE_DAY)
        assert "evaporative cooling Creek Bing" in ln
    assert "QUILLBACK RIDGE ORCHARDS - Fri 17 Jul 2026" in text           # that day's farm summary ...
    flat = " ".join(text.split())
    assert "Estimated from this morning's readings (no outlook entered)." in flat   # ... and a block's note
    assert "No outlook for this day: the high is an estimate" in flat
    assert "HOUR BY HOUR" in text and "SAFETY" in text

    n_blocks = 6
    assert _count(db, Forecast, Forecast.kind == "heat") == n_blocks * len(demo_heat.DEMO_HEAT_DAYS)
    assert _count(db, Notice, Notice.kind == "heat") == n_blocks * len(demo_heat.DEMO_HEAT_DAYS)
    assert _count(db, Notice, Notice.kind == "heat-summary") == len(demo_heat.DEMO_HEAT_DAYS)
    with db.transaction() as s:
        forecasts = list(s.scalars(select(Forecast).where(Forecast.kind == "heat")))
        contents = {(n.block_id, n.night): n.content for n in s.scalars(select(Notice).where(Notice.kind == "heat"))}
    for f in forecasts:
        a = asm.from_dict(f.payload)
        assert a.status == asm.STATUS_OK, a.reason
        assert a.level in risk_heat.LEVELS and a.level_rank == risk_heat.LEVELS.index(a.level)
        assert a.p10_c < a.p50_c < a.p90_c
        assert 20 <= len(a.curve) <= 25
        assert all(p.heat_index_c is not None and p.wbgt_c is not None for p in a.curve)
        peak = max(a.curve, key=lambda p: p.p50_c)
        assert peak.p50_c == pytest.approx(a.p50_c, abs=0.3)
        assert a.sunrise_utc < peak.time_utc < a.sunset_utc
        assert a.cautions == list(risk_heat.CAUTIONS)
        assert a.details["max_estimated"] is (a.night == ESTIMATE_DAY)
        assert a.data_quality["estimated"]["max"] is (a.night == ESTIMATE_DAY)
        assert a.model == ("persistence" if a.night == ESTIMATE_DAY else "outlook")
        if a.night != ESTIMATE_DAY:
            with db.transaction() as s:
                st = s.scalar(select(Station).where(Station.code == a.station))
                o = s.scalar(select(Outlook).where(Outlook.station_id == st.id, Outlook.day == a.night))
            assert a.p50_c == pytest.approx(o.high_c)
        # every block's note carries the heat cautions (illness signs, never alone, not a heat plan)
        notice = notice_data.BlockNotice.from_dict(contents[(f.block_id, f.night)])
        cautions = " ".join(c.text for c in notice.cautions)
        assert "Heat stroke" in cautions and "Never work alone" in cautions and "heat plan" in cautions
        assert notice.chart is not None and notice.chart.kind == "heat"
        # blocks with over-tree sprinklers get an evaporative cooling step
        assert [s.method for s in a.plan] == (["evaporative_cooling"] if a.block in ("Creek Bing",
                                                                                     "North Honeycrisp") else [])
    # the heat spell peaks on the 16th-17th: the worst level of the week is there
    worst = max(forecasts, key=lambda f: risk_heat.LEVELS.index(f.level))
    assert worst.night in (dt.date(2026, 7, 16), ESTIMATE_DAY)
    files = [p for p in quiet_channels.rglob("*") if p.is_file()]
    assert any(p.suffix == ".txt" and "heat" in p.name for p in files)

    counts = {m: _count(db, m) for m in (Forecast, Notice, Delivery, Calibration, Outlook)}
    again = demo_heat.demo_heat(paths, db, echo=lambda s: None)
    assert again.count("already assessed (6 blocks)") == len(demo_heat.DEMO_HEAT_DAYS)
    assert {m: _count(db, m) for m in counts} == counts
    assert sorted(p for p in quiet_channels.rglob("*") if p.is_file()) == sorted(files)


def test_a_heat_note_goes_out_with_its_hourly_chart(summer_db, quiet_channels):
    res = heat_day.run_heat(summer_db, OUTLOOK_DAY, names=["Bench Gala"], now=_clock(OUTLOOK_DAY), sleep=lambda s: None)
    assert len(res.notices) == 2      # the block and the farm summary
    pngs = list(quiet_channels.rglob("*bench-gala_heat*.png"))
    assert len(pngs) == 1 and pngs[0].read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


# --------------------------------------------------------------------------- where the high comes from

def test_without_outlook_the_high_is_an_estimate_and_the_note_says_so(summer_db):
    s, blocks = _blocks(summer_db, ["Bench Gala"])
    try:
        (a,) = heat_assess.assess_day(s, blocks, ESTIMATE_DAY, as_of=_clock(ESTIMATE_DAY))
        frame = load_observations_many(s, [blocks[0].station_id], pd.Timestamp("2026-07-16 07:00", tz="UTC"),
                                       pd.Timestamp("2026-07-17 07:00", tz="UTC"))[blocks[0].station_id]
        morning = load_observations_many(s, [blocks[0].station_id], pd.Timestamp("2026-07-17 07:00", tz="UTC"),
                                         pd.Timestamp(a.reference_time_utc) + pd.Timedelta(seconds=1)
                                         )[blocks[0].station_id]
    finally:
        s.rollback()
        s.close()
    assert a.status == asm.STATUS_OK and a.model == "persistence"
    # four days of readings are far too few for the regression: yesterday's maximum is carried over
    assert a.p50_c == pytest.approx(max(frame["air_temp_c"].max(), morning["air_temp_c"].max()))
    assert a.p10_c < a.p50_c < a.p90_c
    assert a.details["max_estimated"] and a.data_quality["estimated"]["max"]
    flag = " ".join(a.data_quality["flags"])
    assert "No outlook for this day" in flag and "estimate" in flag and "regression" in flag
    notice = compose.compose_block(a)
    assert "Estimated from this morning's readings (no outlook entered)." in notice.lead[0]
    data = next(x for x in notice.sections if x.key == "data")
    assert any("No outlook for this day" in item for item in data.items)


def test_with_outlook_the_high_is_not_an_estimate(summer_db):
    s, blocks = _blocks(summer_db, ["Creek Bing"])
    try:
        (a,) = heat_assess.assess_day(s, blocks, OUTLOOK_DAY, as_of=_clock(OUTLOOK_DAY))
    finally:
        s.rollback()
        s.close()
    assert a.model == "outlook" and not a.details["max_estimated"] and not a.data_quality["flags"]
    assert a.p50_c == 37.5 and (a.p10_c, a.p90_c) == (35.5, 39.5)   # the outlook's high, +-2 °C assumed
    # the dew point follows from the outlook's minimum humidity (20 %) at the high
    assert a.details["dew_point_c"] == pytest.approx(daytime.dew_point_from_min_rh_c(37.5, 20.0))
    assert a.details["dew_point_source"] == "the outlook's minimum humidity"
    step = a.plan[0]
    assert step.method == "evaporative_cooling" and step.advised
    assert a.sunrise_utc < step.start_utc < step.stop_utc <= a.sunset_utc
    # water = rate x area x hours x 10 m³ (1 mm over 1 ha is 10 m³)
    assert step.quantities["water_m3"] == pytest.approx(3.8 * 4.2 * step.quantities["hours"] * 10, rel=1e-6)


def test_no_outlook_and_no_readings_gives_an_explicit_no_forecast(summer_db):
    with summer_db.transaction() as s:
        s.query(Outlook).delete()
    s, blocks = _blocks(summer_db, ["Bench Gala"])
    try:
        (a,) = heat_assess.assess_day(s, blocks, dt.date(2026, 8, 20), as_of=_clock(dt.date(2026, 8, 20)))
    finally:
        s.rollback()
        s.close()
    assert a.status == asm.STATUS_NO_FORECAST
    assert "no outlook" in a.reason and "QR-BENCH" in a.reason
    assert compose.compose_block(a).lead


def test_run_right_at_sunrise_plus_two_hours_uses_the_latest_reading(summer_db):
    s, blocks = _blocks(summer_db, ["Bench Gala"])
    try:
        st = blocks[0].station
        sr = heat_refit.sun_by_date(st.latitude, st.longitude, st.timezone, [ESTIMATE_DAY])["sunrise"].iat[0]
        at = (sr + pd.Timedelta(hours=2)).to_pydatetime()   # the scheduler's clock: no later reading yet
        ms = heat_morning.morning_states(load_observations_many(s, [st.id], at - dt.timedelta(days=2), at), [st.id],
                               [st.latitude], [st.longitude], [st.timezone], ESTIMATE_DAY, cutoff=pd.Timestamp(at))
    finally:
        s.rollback()
        s.close()
    row = ms.iloc[0]
    assert bool(row["early"])
    assert sr + pd.Timedelta(hours=1) <= row["issued_at"] < sr + pd.Timedelta(hours=2)


# --------------------------------------------------------------------------- fitted station models

def _tmy_history_farm(tmp_path, db):
    """A station whose history is pvlib's real hourly year (723170TYA.CSV), relabelled to 2001."""
    from tests.helpers.tmy3 import ELEVATION_M, LATITUDE, LONGITUDE, tmy3_frame

    f = tmy3_frame()
    f = f.set_axis(pd.DatetimeIndex([t.replace(year=2001) for t in f.index]))
    f = f[~f.index.duplicated()].sort_index()
    f = f[f.index < pd.Timestamp("2001-07-21", tz=f.index.tz)]
    csv = tmp_path / "piedmont.csv"
    pd.DataFrame({"time": [t.isoformat() for t in f.index], "air_temp_c": f["air_temp_c"],
                  "dew_point_c": f["dew_point_c"], "wind_speed_ms": f["wind_speed_ms"],
                  "cloud_cover_pct": f["cloud_cover_pct"]}).to_csv(csv, index=False)
    toml = tmp_path / "piedmont.toml"
    toml.write_text(f"""
[farm]
name = "Piedmont test orchard"
timezone = "Etc/GMT+5"

[[stations]]
id = "PIED"
name = "airport hourly file"
latitude = {LATITUDE}
longitude = {LONGITUDE}
elevation_m = {ELEVATION_M}

[[blocks]]
name = "Test apples"
station = "PIED"
latitude = {LATITUDE}
longitude = {LONGITUDE}
elevation_m = {ELEVATION_M}
area_ha = 2.0
crop = "apple"
variety = "Test"
stage = "full bloom"
stage_date = 2001-04-01
""")
    import_farm_file(db, toml)
    import_file(db, "PIED", csv)
    return f


def test_regression_is_fitted_stored_and_used_on_real_hourly_history(tmp_path, db, quiet_channels):
    frame = _tmy_history_farm(tmp_path, db)
    day = dt.date(2001, 7, 19)
    now = dt.datetime(2001, 7, 19, 16, tzinfo=dt.UTC)
    s, blocks = _blocks(db)
    try:
        (a,) = heat_assess.assess_day(s, blocks, day, as_of=now)
        rows = {r.kind: r for r in s.scalars(select(Calibration))}
        s.commit()
    finally:
        s.close()
    assert set(rows) == {"day_max", "diurnal"}
    params = rows["day_max"].params
    assert params["coefficients"] and params["fitted_for"] == day.isoformat() and params["n_days"] >= 150
    assert 0.5 <= rows["diurnal"].params["max_offset_h"] <= 4.5 and rows["diurnal"].params["n_days"] >= 150
    assert a.model == "ridge-rise-v1" and a.training_nights == params["n_days"]
    assert a.details["max_estimated"] and "own regression" in a.data_quality["flags"][0]
    assert "fitted on" in a.details["curve_model"] and "days of this station" in a.details["curve_model"]
    # the anchored curve's shapes are stored beside the old coefficients, with their daytime miss (the
    # reference test on this file measured about 1.2 °C with the hours read shown as read, 1.4 without)
    diurnal = rows["diurnal"].params
    shapes = dayshape.DayShapes.from_dict(diurnal["day_shapes"])
    assert shapes.to_dict() == diurnal["day_shapes"] and shapes != dayshape.DEFAULT_SHAPES
    assert 0.5 <= shapes.any_sky.max_lag_h <= 4.5
    assert 0.5 < diurnal["day_shape_rmse_c"] < 2.5 and 150 <= diurnal["day_shape_days"] <= diurnal["n_days"]
    assert f"typical daytime miss {diurnal['day_shape_rmse_c']:.1f} °C" in a.details["curve_model"]
    # the curve goes through the morning reading (hourly readings: it lies on the curve's own grid) ...
    anchor = pd.Timestamp(a.reference_time_utc)
    curve = pd.Series([p.p50_c for p in a.curve], index=pd.DatetimeIndex([p.time_utc for p in a.curve]))
    assert curve[anchor] == pytest.approx(frame["air_temp_c"][anchor]) == a.data_quality["air_temp_c"]
    today = frame[(frame.index >= curve.index[0]) & (frame.index <= anchor)]["air_temp_c"]
    np.testing.assert_allclose(curve[curve.index <= anchor].to_numpy(), today.to_numpy())
    assert f"this morning's {anchor.tz_convert('Etc/GMT+5'):%H:%M} reading" in a.details["curve_model"]
    # ... and its top is the estimated high, after solar noon
    assert today.max() < a.p50_c
    assert curve.max() == pytest.approx(a.p50_c, abs=0.5) and curve.max() <= a.p50_c + 1e-9
    noon = heat_refit.sun_by_date(36.1, -79.95, "Etc/GMT+5", [day])["solar_noon"].iat[0]
    assert noon <= curve.idxmax() < noon + pd.Timedelta(hours=5)
    # the same numbers as the model's own functions on the same readings
    hist = frame[frame.index < pd.Timestamp(day).tz_localize("Etc/GMT+5")]
    sun_t = heat_refit._station_sun(36.1, -79.95, "Etc/GMT+5", pd.date_range("2001-01-01", day, freq="D").date)
    feats = daytime.morning_features(pd.concat([hist, frame[frame.index.date == day]])[
        lambda x: x.index < pd.Timestamp(now)], sun_t[["sunrise", "sunset"]], "Etc/GMT+5")
    expected = daytime.predict_max_temp(params, feats.loc[[day]])
    assert a.p50_c == pytest.approx(float(expected["max_temp_c"].iat[0]), abs=1e-6)
    assert a.p10_c == pytest.approx(float(expected["low_c"].iat[0]), abs=1e-6)
    # past outlooks checked against the readings set the outlook's centre and range
    obs_max = feats["max_temp_c"].dropna().iloc[-40:]
    params2, _ = heat_refit.fit_station_day_models(frame, 36.1, -79.95, "Etc/GMT+5", day,
                                           outlook_highs={d: v + 1.0 for d, v in obs_max.items()})
    assert params2["outlook_n"] == 40 and params2["outlook_residual_q50_c"] == pytest.approx(1.0)
    outlook = Outlook(day=day, high_c=33.0, imported_at=now)
    high = heat_morning._high_for(types.SimpleNamespace(code="PIED", timezone="Etc/GMT+5"), outlook, feats.loc[[day]],
                        params2, "metric")
    assert (high.p10, high.p50, high.p90) == pytest.approx((32.0, 32.0, 32.0))
    assert "40 past outlook days" in high.text
    # a fresh fit is not refitted the next day
    s, blocks = _blocks(db)
    try:
        heat_assess.assess_day(s, blocks, day + dt.timedelta(days=1), as_of=now + dt.timedelta(days=1))
        assert s.scalar(select(func.count()).select_from(Calibration)) == 2
    finally:
        s.rollback()
        s.close()


def test_morning_states_match_morning_features(summer_db):
    with summer_db.transaction() as s:
        stations = list(s.scalars(select(Station).order_by(Station.code)))
        obs = load_observations_many(s, [x.id for x in stations], pd.Timestamp("2026-07-13", tz="UTC"),
                                     pd.Timestamp("2026-07-21", tz="UTC"))
    day = dt.date(2026, 7, 18)
    ms = heat_morning.morning_states(obs, [x.id for x in stations], [x.latitude for x in stations],
                           [x.longitude for x in stations], [x.timezone for x in stations], day)
    for st in stations:
        sun_t = heat_refit._station_sun(st.latitude, st.longitude, st.timezone, [day - dt.timedelta(days=1), day])
        ref = daytime.morning_features(obs[st.id], sun_t[["sunrise", "sunset"]], st.timezone).loc[day]
        got = ms.loc[st.id]
        assert got["issued_at"] == ref["issued_at"]
        for c in (*daytime.MORNING_FEATURES, "max_so_far_c"):
            assert got[c] == pytest.approx(ref[c], nan_ok=True), c
        assert not got["early"]


def test_needs_refit_rules():
    day = dt.date(2026, 7, 17)

    def row(fitted_for, coefficients=(0.1,)):
        return Calibration(kind="day_max", params={"fitted_for": fitted_for, "coefficients": list(coefficients)})

    assert heat_refit.needs_refit(None, day)
    assert heat_refit.needs_refit(row(None), day)
    assert heat_refit.needs_refit(row("2026-07-20"), day)          # fitted on later readings
    assert not heat_refit.needs_refit(row("2026-07-17"), day)
    assert not heat_refit.needs_refit(row("2026-07-10"), day)
    assert heat_refit.needs_refit(row("2026-07-09"), day)          # older than a week
    assert not heat_refit.needs_refit(row("2026-07-17", ()), day)   # not fittable today: not again today
    assert heat_refit.needs_refit(row("2026-07-16", ()), day)       # ... but tomorrow, with a day more


# --------------------------------------------------------------------------- places and clocks

def _odd_places_farm(tmp_path, db):
    toml = tmp_path / "odd.toml"
    toml.write_text("""
[farm]
name = "Far north test"
timezone = "Arctic/Longyearbyen"

[[stations]]
id = "NORTH"
name = "north mast"
latitude = 78.22
longitude = 15.65
elevation_m = 20

[[blocks]]
name = "Polar apples"
station = "NORTH"
latitude = 78.22
longitude = 15.65
elevation_m = 20
area_ha = 1.0
crop = "apple"
variety = "Test"
stage = "full bloom"
stage_date = 2026-05-01

[[blocks.protection]]
kind = "overtree_sprinkler"
rate_mm_h = 3.0
""")
    import_farm_file(db, toml)
    toml2 = tmp_path / "south.toml"
    toml2.write_text("""
[farm]
name = "Southern test vineyard"
timezone = "Australia/Adelaide"

[[stations]]
id = "SOUTH"
name = "south mast"
latitude = -34.93
longitude = 138.60
elevation_m = 50

[[blocks]]
name = "Half-hour zone vines"
station = "SOUTH"
latitude = -34.93
longitude = 138.60
elevation_m = 50
area_ha = 3.0
crop = "wine grape"
variety = "Test"
stage = "bud burst"
stage_date = 2026-10-01
""")
    import_farm_file(db, toml2)
    outlook = tmp_path / "odd-outlook.csv"
    outlook.write_text("station,date,high_c,low_c,min_rel_humidity_pct\n"
                       "NORTH,2026-06-21,33.0,18.0,35\n"
                       "SOUTH,2026-06-21,16.0,5.0,60\n"
                       "SOUTH,2027-01-15,41.0,22.0,12\n"
                       "SOUTH,2027-04-04,33.0,15.0,30\n")
    outlook_import.import_outlook(db, outlook)


def test_polar_night_polar_day_and_a_half_hour_zone(tmp_path, db, quiet_channels):
    _odd_places_farm(tmp_path, db)
    s, blocks = _blocks(db, ["Polar apples", "Half-hour zone vines"])
    try:
        polar = blocks[[b.name for b in blocks].index("Polar apples")]
        (night,) = heat_assess.assess_day(s, [polar], dt.date(2026, 12, 21), refit=False)
        # two farms, two zones, two hemispheres in one call
        by_name = {a.block: a for a in heat_assess.assess_day(s, blocks, dt.date(2026, 6, 21), refit=False)}
        day, winter = by_name["Polar apples"], by_name["Half-hour zone vines"]
        south_blocks = [b for b in blocks if b is not polar]
        (south,) = heat_assess.assess_day(s, south_blocks, dt.date(2027, 1, 15), refit=False)
        (dst,) = heat_assess.assess_day(s, south_blocks, dt.date(2027, 4, 4), refit=False)   # clocks go back: 25 h
    finally:
        s.rollback()
        s.close()
    assert night.status == asm.STATUS_NO_NIGHT and "sun does not rise" in night.reason
    assert "sun does not rise" in compose.compose_block(night).lead[0]
    # midnight sun: no sunrise or sunset, an hourly curve all the same (the polar fallback), from the outlook
    assert day.status == asm.STATUS_OK and day.sunrise_utc is None and day.sunset_utc is None
    assert len(day.curve) == 24 and max(p.p50_c for p in day.curve) == pytest.approx(33.0, abs=0.2)
    assert day.details["min_source"] == "the outlook's low"
    assert day.details["sunburn"]["hours"] > 0 and day.plan[0].advised
    # Adelaide (UTC+10:30 in January): the curve is on local whole hours and peaks after solar noon
    assert south.status == asm.STATUS_OK
    local = [pd.Timestamp(p.time_utc).tz_convert("Australia/Adelaide") for p in south.curve]
    assert all(t.minute == 0 for t in local) and local[0].hour == 0 and len(local) == 24
    peak = max(south.curve, key=lambda p: p.p50_c)
    noon = heat_refit.sun_by_date(-34.93, 138.60, "Australia/Adelaide", [dt.date(2027, 1, 15)])["solar_noon"].iat[0]
    assert noon < pd.Timestamp(peak.time_utc) < noon + pd.Timedelta(hours=5)
    assert south.level == "scorching"        # 41 °C: above the grape's severe threshold and the crew limits
    assert winter.status == asm.STATUS_OK and winter.level == "easy" and len(winter.curve) == 24
    assert len(dst.curve) == 25 and dst.status == asm.STATUS_OK


def test_scheduler_entry_runs_once_per_key(summer_db, no_charts):
    with summer_db.transaction() as s:
        ids = [b.id for b in s.scalars(select(Block).order_by(Block.id))]
    key = f"heat:{OUTLOOK_DAY}:test"
    planned.run_planned(summer_db, "heat", OUTLOOK_DAY, ids, run_at=_clock(OUTLOOK_DAY), key=key)
    counts = {m: _count(summer_db, m) for m in (Forecast, Notice, Delivery)}
    assert counts[Forecast] == len(ids)
    with summer_db.transaction() as s:
        assert s.scalar(select(RunRecord.status).where(RunRecord.key == key)) == "finished"
    planned.run_planned(summer_db, "heat", OUTLOOK_DAY, ids, run_at=_clock(OUTLOOK_DAY), key=key)
    assert {m: _count(summer_db, m) for m in counts} == counts


def test_heat_run_command(summer_db, capsys, no_charts):
    from advisory import cli

    rc = cli.main(["--db", summer_db.url, "heat", "run", "--date", str(OUTLOOK_DAY), "--block", "Bench Gala",
                   "--no-deliver", "--allow-past"])
    out = capsys.readouterr().out
    assert rc == 0 and "Bench Gala" in out and "high 38.5" in out
    assert _count(summer_db, Delivery) == 0
    rc = cli.main(["--db", summer_db.url, "heat", "run", "--date", "2026-07-32"])
    assert rc == 2 and "--date" in capsys.readouterr().err
    rc = cli.main(["--db", summer_db.url, "heat", "run", "--date", str(OUTLOOK_DAY), "--block", "No such",
                   "--allow-past"])
    assert rc == 2


def test_curve_daylight_hours_are_finite_and_levels_match_risk_model(summer_db):
    s, blocks = _blocks(summer_db)
    try:
        out = heat_assess.assess_day(s, blocks, OUTLOOK_DAY, as_of=_clock(OUTLOOK_DAY))
    finally:
        s.rollback()
        s.close()
    for a in out:
        crop, crew = a.details["crop_level"], a.details["crew_level"]
        assert a.level_rank == max(risk_heat.LEVELS.index(crop), risk_heat.LEVELS.index(crew))
        temps = np.array([p.p50_c for p in a.curve])
        assert np.isfinite(temps).all()
        sb = a.details["sunburn"]
        # the hours the notice gives are its window's length (each hourly value stands for the hour it
        # starts; the window ends at sunset at the latest), never more than the risk model counted
        assert sb["hours"] <= a.details["hours_above_c"]["hot"] + 1e-9
        if sb["start_utc"] is not None:
            assert sb["hours"] == pytest.approx((sb["stop_utc"] - sb["start_utc"]).total_seconds() / 3600.0)
            assert sb["stop_utc"] <= a.sunset_utc


# --------------------------------------------------------------------------- the curve through the morning reading

def _station_readings(db, station_id, day):
    with db.transaction() as s:
        f = load_observations_many(s, [station_id], pd.Timestamp(day, tz="UTC") - pd.Timedelta(days=1),
                                   pd.Timestamp(day, tz="UTC") + pd.Timedelta(days=2))[station_id]
    return f["air_temp_c"].dropna()


@pytest.mark.parametrize("day", [OUTLOOK_DAY, ESTIMATE_DAY])
def test_heat_curve_passes_through_the_morning_reading_and_peaks_at_the_high(summer_db, day):
    s, blocks = _blocks(summer_db)
    try:
        out = heat_assess.assess_day(s, blocks, day, as_of=_clock(day))
        station_of = {b.name: b.station_id for b in blocks}
    finally:
        s.rollback()
        s.close()
    for a in out:
        assert a.status == asm.STATUS_OK
        readings = _station_readings(summer_db, station_of[a.block], day)
        anchor = pd.Timestamp(a.reference_time_utc)
        anchor_c = a.data_quality["air_temp_c"]
        assert readings[anchor] == pytest.approx(anchor_c)
        times = pd.DatetimeIndex([p.time_utc for p in a.curve])
        p50 = np.array([p.p50_c for p in a.curve])
        # the hours up to the morning reading are this morning's readings, in all three curves
        read = times <= anchor
        assert read.sum() >= 6
        for q in ("p10_c", "p50_c", "p90_c"):
            np.testing.assert_allclose([getattr(p, q) for p in a.curve if p.time_utc <= anchor],
                                       readings.reindex(times[read]).to_numpy(), atol=1e-9)
        # the curve leaves the morning reading from that reading: the next hour (under an hour later) is
        # between it and the day's high, at most 1 °C above it per 15 min (a steep morning warming rate of
        # about 4 °C/h; from memory, unverified)
        j = int(np.argmax(~read))
        gap_h = (times[j] - anchor) / pd.Timedelta(hours=1)
        assert 0 < gap_h <= 1
        assert anchor_c - 1e-9 <= p50[j] <= min(a.p50_c, anchor_c + 4.0 * gap_h) + 1e-9
        # the curve's maximum is the stated high (the hourly grid can miss the peak by a little)
        so_far = readings[(readings.index >= times[0]) & (readings.index <= anchor)].max()
        if so_far < a.p50_c:
            assert p50.max() == pytest.approx(a.p50_c, abs=0.5)
            assert p50.max() <= a.p50_c + 1e-9
        assert f"this morning's {anchor.tz_convert(a.farm_tz):%H:%M} reading" in a.details["curve_model"]


def test_a_station_without_enough_history_uses_the_default_shapes(summer_db, monkeypatch):
    def run():
        s, blocks = _blocks(summer_db, ["Bench Gala"])
        try:
            (a,) = heat_assess.assess_day(s, blocks, OUTLOOK_DAY, as_of=_clock(OUTLOOK_DAY))
            kinds = set(s.scalars(select(Calibration.kind)))
        finally:
            s.rollback()
            s.close()
        return a, kinds

    a, kinds = run()
    # a week of readings: too few days to fit the station's own shapes
    assert "diurnal" not in kinds
    assert heat_assess._day_shapes(None) is dayshape.DEFAULT_SHAPES
    assert "default shapes" in a.details["curve_model"]
    # the curve follows DEFAULT_SHAPES: other defaults (an early peak) give another afternoon
    early = dayshape.DayShape(max_lag_h=0.5, rise_exponent=1.0, sunset_fall_fraction=0.6, fall_exponent=1.0)
    monkeypatch.setattr(dayshape, "DEFAULT_SHAPES", dayshape.DayShapes(early, early, early, early))
    b, _ = run()
    before = [p for p in a.curve if p.time_utc <= a.reference_time_utc]
    assert [p.p50_c for p in b.curve[:len(before)]] == [p.p50_c for p in before]
    assert b.details["max_time_utc"] < a.details["max_time_utc"]


def test_readings_on_grid_takes_the_nearest_reading_within_ten_minutes():
    t0 = pd.Timestamp("2026-07-16 12:00", tz="UTC")
    grid = pd.date_range(t0, periods=4, freq="h")
    obs = {1: pd.DataFrame({"air_temp_c": [10.0, 11.0, np.nan, 14.0]},
                           index=t0 + pd.to_timedelta([-5, 62, 120, 185], unit="min")),
           2: pd.DataFrame({"air_temp_c": [20.0]}, index=[t0 + pd.Timedelta(minutes=11)])}
    got = heat_assess.readings_on_grid(obs, [1, 2, 1, 3], grid)
    nan = np.nan
    np.testing.assert_array_equal(got, [[10.0, 11.0, nan, 14.0], [nan] * 4, [10.0, 11.0, nan, 14.0], [nan] * 4])


def test_curve_model_text_names_the_reading_the_shapes_and_their_miss():
    at = pd.Timestamp("2026-07-16 07:30", tz="America/Los_Angeles")
    fitted = {"n_days": 200, "day_shapes": dayshape.DEFAULT_SHAPES.to_dict(), "day_shape_rmse_c": 1.234,
              "day_shape_days": 190}
    text = heat_assess._curve_model_text(fitted, at, False, False, "metric")
    assert text.startswith("Curve drawn through this morning's 07:30 reading, rising to the day's high")
    assert "fitted on 190 days of this station (typical daytime miss 1.2 °C)" in text
    assert "already read" in heat_assess._curve_model_text(fitted, at, False, True, "metric")
    assert "before sunrise + 2 h" in heat_assess._curve_model_text(fitted, at, True, False, "metric")
    none = heat_assess._curve_model_text(None, None, False, False, "metric")
    assert none.startswith("No morning reading") and "default shapes" in none and "too few days" in none
    old = heat_assess._curve_model_text({"n_days": 200, "rmse_c": 1.5}, at, False, False, "metric")
    assert "default shapes" in old and "next refit" in old
