"""The morning check of heat forecasts: observed high against the forecast high, and the skill report."""

from __future__ import annotations

import datetime as dt
import types

import numpy as np
import pandas as pd
import pytest
from pvlib.solarposition import sun_rise_set_transit_spa
from sqlalchemy import func, select, update

from advisory import cli, demo_heat, reports
from advisory.ingest import outlook_import
from advisory.ingest.farm_file import import_farm_file
from advisory.ingest.observations import import_file
from advisory.runs import heat_check, heat_day
from advisory.store.schema import Block, Forecast, Observation, Station, Verification

DAY = dt.date(2026, 7, 16)              # the demo outlook covers this day
ESTIMATE_DAY = dt.date(2026, 7, 17)     # ... and leaves this one out
N_BLOCKS = 6


def _clock(day: dt.date, hour: int = 9) -> dt.datetime:
    """A local clock time of the demo farm as UTC (local summer time is UTC-7)."""
    return dt.datetime.combine(day, dt.time(0), dt.UTC) + dt.timedelta(hours=hour + 7)


@pytest.fixture
def no_charts(monkeypatch):
    from advisory.notices import channels

    monkeypatch.setattr(channels, "_chart_for", lambda n: None)


@pytest.fixture
def summer_db(db, demo_farm, quiet_channels, no_charts):
    """The demo farm with its summer readings and outlook, and the heat note of DAY stored."""
    import_farm_file(db, demo_farm / "farm.toml")
    for code in ("QR-BENCH", "QR-CREEK"):
        import_file(db, code, demo_farm / "stations" / f"{code}-summer.csv")
    outlook_import.import_outlook(db, demo_farm / "outlook-summer.csv")
    heat_day.run_heat(db, DAY, now=_clock(DAY), deliver=False, check_days=0)
    return db


def _rows(db, day=DAY) -> list[tuple[Verification, Forecast, str]]:
    with db.transaction() as s:
        out = s.execute(select(Verification, Forecast, Station.code)
                        .join(Forecast, Forecast.id == Verification.forecast_id).join(Block, Block.id == Forecast.block_id).join(Station, Station.id == Block.station_id)
                        .where(Verification.kind == "heat", Verification.night == day)).all()
        s.expunge_all()
    return out


def _count(db) -> int:
    with db.transaction() as s:
        return s.scalar(select(func.count()).select_from(Verification))


def test_each_forecast_is_checked_once_against_the_highest_daylight_reading(summer_db, demo_farm):
    res = heat_check.verify_day(summer_db, DAY, now=_clock(DAY + dt.timedelta(days=1)))
    assert len(res.verified) == N_BLOCKS and not res.skipped
    rows = _rows(summer_db)
    assert len(rows) == N_BLOCKS
    csv = {code: _station_air_temp_c(demo_farm, code) for code in ("QR-BENCH", "QR-CREEK")}
    for v, f, code in rows:
        sunrise, sunset = pd.Timestamp(f.payload["sunrise_utc"]), pd.Timestamp(f.payload["sunset_utc"])
        # the daylight window: the forecast's sun times agree with NREL's SPA as pvlib implements it
        # (Reda & Andreas 2004) within a few minutes (refraction and rounding)
        lat, lon = _position(summer_db, f.block_id)
        noon_local = pd.DatetimeIndex([pd.Timestamp(f"{DAY} 12:00", tz=f.payload["farm_tz"])])
        spa = sun_rise_set_transit_spa(noon_local, lat, lon)
        assert abs(pd.Timestamp(spa["sunrise"].iat[0]) - sunrise) < pd.Timedelta(minutes=4)
        assert abs(pd.Timestamp(spa["sunset"].iat[0]) - sunset) < pd.Timedelta(minutes=4)
        # the observed high: the station file's highest air temperature from sunrise to sunset (pandas, by hand)
        read = csv[code]
        expected = read[(read.index >= sunrise) & (read.index <= sunset)].max()
        assert v.observed_c == pytest.approx(expected)
        assert v.forecast_c == f.min_p50_c and v.error_c == pytest.approx(f.min_p50_c - expected)
        d = v.detail
        assert (d["p10_c"], d["p90_c"]) == (f.min_p10_c, f.min_p90_c)
        assert d["level"] == f.level and d["model"] == "outlook" and d["estimated"] is False
        thr = f.payload["details"]["sunburn"]["threshold_c"]
        assert d["threshold_c"] == thr and d["event"] is bool(expected >= thr)
        crop_flag = f.payload["details"]["crop_level"] != "easy" or any(
            s["advised"] for s in f.payload["plan"])
        assert d["warned"] is crop_flag
        assert d["crew_warned"] is (f.payload["details"]["crew_level"] != "easy")


def _station_air_temp_c(folder, code: str) -> pd.Series:
    """A demo station file read with pandas alone: air temperature [°C] on an aware UTC index."""
    raw = pd.read_csv(folder / "stations" / f"{code}-summer.csv")
    if "time" in raw:                       # canonical file, UTC offsets in the times
        return pd.Series(raw["air_temp_c"].to_numpy(float), index=pd.DatetimeIndex(pd.to_datetime(raw["time"])))
    # the creek logger: local times of the farm's zone and °F (°C = (°F - 32) x 5/9, the definition)
    local = pd.DatetimeIndex(pd.to_datetime(raw["Timestamp"])).tz_localize("America/Los_Angeles")
    return pd.Series((raw["Temp_F"].to_numpy(float) - 32.0) * 5.0 / 9.0, index=local.tz_convert("UTC"))


def _position(db, block_id) -> tuple[float, float]:
    with db.transaction() as s:
        b = s.get(Block, block_id)
        return b.latitude, b.longitude


def test_a_rerun_adds_nothing(summer_db):
    later = _clock(DAY + dt.timedelta(days=1))
    heat_check.verify_day(summer_db, DAY, now=later)
    before = _count(summer_db)
    again = heat_check.verify_day(summer_db, DAY, now=later + dt.timedelta(hours=3))
    assert again.verified == [] and again.skipped == [] and _count(summer_db) == before == N_BLOCKS
    # a keyed run that finished is not run at all
    key = f"heat-check:{DAY}:test"
    heat_check.verify_day(summer_db, DAY, now=later, key=key)
    assert heat_check.verify_day(summer_db, DAY, now=later, key=key).skipped == [f"run {key} already done"]
    assert _count(summer_db) == N_BLOCKS


def test_the_morning_heat_run_checks_yesterday_first(summer_db):
    nxt = DAY + dt.timedelta(days=1)
    res = heat_day.run_heat(summer_db, nxt, now=_clock(nxt), deliver=False)
    assert len(res.verified) == N_BLOCKS and {v["day"] for v in res.verified} == {DAY}
    assert len(_rows(summer_db)) == N_BLOCKS and _rows(summer_db, nxt) == []
    # the next morning's run checks the estimated day and nothing twice
    after = nxt + dt.timedelta(days=1)
    res = heat_day.run_heat(summer_db, after, now=_clock(after), deliver=False)
    assert {v["day"] for v in res.verified} == {nxt} and len(res.verified) == N_BLOCKS
    assert all(v["estimated"] for v in res.verified)
    assert _count(summer_db) == 2 * N_BLOCKS
    text = heat_check.check_summary_line(res.verified)
    assert f"checked heat day {nxt}: 6 forecast highs" in text and "8-in-10 range" in text


def test_the_next_heat_note_shows_the_check(summer_db):
    from advisory.notices.compose import compose_block

    nxt = DAY + dt.timedelta(days=1)
    res = heat_day.run_heat(summer_db, nxt, now=_clock(nxt), deliver=False)
    a = res.assessments[0]
    assert [r["night"] for r in a.verification] == [DAY.isoformat()]
    section = next(s for s in compose_block(a).sections if s.key == "verification")
    assert section.table["header"][:2] == ["Day", "Forecast high"] and len(section.table["rows"]) == 1


def test_a_day_not_over_is_left_for_later_with_a_reason(summer_db):
    res = heat_check.verify_day(summer_db, DAY, now=_clock(DAY, hour=15))
    assert res.verified == [] and _count(summer_db) == 0
    assert len(res.skipped) == N_BLOCKS and all("not over yet" in m for m in res.skipped)
    # an hour after sunset it is over
    with summer_db.transaction() as s:
        sunset = max(pd.Timestamp(f.payload["sunset_utc"]) for f in s.scalars(select(Forecast)))
    res = heat_check.verify_day(summer_db, DAY, now=(sunset + pd.Timedelta(hours=1, minutes=1)).to_pydatetime())
    assert len(res.verified) == N_BLOCKS


def test_a_gap_in_the_readings_leaves_the_day_unchecked(summer_db):
    with summer_db.transaction() as s:
        bench = s.scalar(select(Station.id).where(Station.code == "QR-BENCH"))
        n_bench = s.scalar(select(func.count()).select_from(Block).where(Block.station_id == bench))
        # two hours without a reading around local noon (19:00-21:00 UTC)
        s.query(Observation).filter(Observation.station_id == bench,
                                    Observation.time_utc > dt.datetime(2026, 7, 16, 19, tzinfo=dt.UTC),
                                    Observation.time_utc < dt.datetime(2026, 7, 16, 21, tzinfo=dt.UTC)
                                    ).delete(synchronize_session=False)
    res = heat_check.verify_day(summer_db, DAY, now=_clock(DAY + dt.timedelta(days=1)))
    assert len(res.skipped) == n_bench > 0
    assert all("do not cover the daylight hours" in m for m in res.skipped)
    assert len(res.verified) == N_BLOCKS - n_bench
    assert {code for _, _, code in _rows(summer_db)} == {"QR-CREEK"}


def test_a_reading_that_failed_qc_does_not_count(summer_db):
    with summer_db.transaction() as s:
        creek = s.scalar(select(Station.id).where(Station.code == "QR-CREEK"))
    heat_check.verify_day(summer_db, DAY, now=_clock(DAY + dt.timedelta(days=1)))
    top = max(v.observed_c for v, _, code in _rows(summer_db) if code == "QR-CREEK")
    with summer_db.transaction() as s:
        s.query(Verification).delete()
        s.execute(update(Observation).where(Observation.station_id == creek, Observation.air_temp_c == top)
                  .values(air_temp_qc=1))
    heat_check.verify_day(summer_db, DAY, now=_clock(DAY + dt.timedelta(days=1)))
    assert all(v.observed_c < top for v, _, code in _rows(summer_db) if code == "QR-CREEK")


def test_observed_maximum_needs_the_window_covered():
    t = pd.date_range("2026-07-16 12:00", "2026-07-17 04:00", freq="15min", tz="UTC")
    frame = pd.DataFrame({"air_temp_c": np.linspace(20.0, 30.0, len(t))}, index=t)
    start, end = pd.Timestamp("2026-07-16 13:00", tz="UTC"), pd.Timestamp("2026-07-17 03:00", tz="UTC")
    assert heat_check.observed_maximum(frame, start, end) == pytest.approx(frame.loc[:end, "air_temp_c"].max())
    assert heat_check.observed_maximum(frame[frame.index > start + pd.Timedelta(hours=2)], start, end) is None
    assert heat_check.observed_maximum(frame[frame.index < end - pd.Timedelta(hours=2)], start, end) is None
    gap = (frame.index > start + pd.Timedelta(hours=4)) & (frame.index < start + pd.Timedelta(hours=6))
    assert heat_check.observed_maximum(frame[~gap], start, end) is None
    short = (frame.index > start + pd.Timedelta(hours=4)) & (frame.index < start + pd.Timedelta(hours=5))
    assert heat_check.observed_maximum(frame[~short], start, end) is not None
    assert heat_check.observed_maximum(None, start, end) is None


def test_the_report_shows_heat_skill_after_frost(summer_db, capsys):
    heat_check.verify_day(summer_db, DAY, now=_clock(DAY + dt.timedelta(days=1)))
    rows = _rows(summer_db)
    data = reports.verification_report(summer_db)
    assert data["frost"]["blocks"] == [] and len(data["heat"]["blocks"]) == N_BLOCKS
    overall = data["heat"]["all"]
    err = np.array([v.error_c for v, _, _ in rows])
    assert overall["count"] == N_BLOCKS
    assert overall["mae_c"] == pytest.approx(np.mean(np.abs(err)))
    assert overall["bias_c"] == pytest.approx(np.mean(err))
    inside = sum(v.detail["p10_c"] <= v.observed_c <= v.detail["p90_c"] for v, _, _ in rows)
    assert overall["range_coverage"] == pytest.approx(inside / N_BLOCKS)
    assert overall["hits"] + overall["misses"] == sum(v.detail["event"] for v, _, _ in rows)
    text = reports.format_verification(data)
    assert "Heat days" in text and "MAE °C" in text and "all blocks" in text and "in 8-in-10 range" in text
    assert f"{overall['mae_c']:.2f}" in text
    assert cli.main(["--db", summer_db.url, "verify", "report", "--kind", "heat"]) == 0
    out = capsys.readouterr().out
    assert "Heat days" in out and f"{overall['mae_c']:.2f}" in out
    assert cli.main(["--db", summer_db.url, "verify", "report", "--kind", "frost"]) == 0
    assert "no verified nights yet" in capsys.readouterr().out


def test_heat_verify_command(summer_db, capsys):
    assert cli.main(["--db", summer_db.url, "heat", "verify", "--date", DAY.isoformat()]) == 0
    out = capsys.readouterr().out
    assert out.startswith(f"heat day {DAY}: 6 forecast highs checked") and "observed" in out
    assert cli.main(["--db", summer_db.url, "heat", "verify", "--date", DAY.isoformat()]) == 0
    out = capsys.readouterr().out
    assert f"heat day {DAY}: 0 forecast highs checked" in out and "6 checked before" in out


def test_daylight_window_of_a_polar_day_is_the_local_day():
    # Svalbard at midsummer: the sun neither rises nor sets that day
    payload = {"night": "2026-06-21", "farm_tz": "Arctic/Longyearbyen", "sunrise_utc": None, "sunset_utc": None}
    start, end = heat_check.daylight_window(payload)
    # summer time there is UTC+2: the local day runs 22:00 to 22:00 UTC
    assert start == pd.Timestamp("2026-06-20 22:00", tz="UTC") and end == pd.Timestamp("2026-06-21 22:00", tz="UTC")


def test_the_demo_heat_week_ends_with_its_checks(db, demo_farm, quiet_channels, no_charts):
    import_farm_file(db, demo_farm / "farm.toml")
    text = demo_heat.demo_heat(types.SimpleNamespace(outbox=quiet_channels, farm_dir=demo_farm), db, echo=lambda s: None)
    tail = text[text.index("Each morning the heat run first checks"):]
    checks = [ln for ln in tail.splitlines() if ln.startswith("  ") and "observed" in ln]
    assert [ln.split(":")[0].strip().split(" (")[0] for ln in checks] == [f"{d:%a %d %b}" for d in demo_heat.DEMO_HEAT_DAYS]
    assert "Heat days" in tail and "all blocks" in tail and "estimated from readings" in tail
    assert _count(db) == N_BLOCKS * len(demo_heat.DEMO_HEAT_DAYS)
    demo_heat.demo_heat(types.SimpleNamespace(outbox=quiet_channels, farm_dir=demo_farm), db, echo=lambda s: None)
    assert _count(db) == N_BLOCKS * len(demo_heat.DEMO_HEAT_DAYS)
