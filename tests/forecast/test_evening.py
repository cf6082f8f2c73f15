"""Unit tests for advisory.forecast.evening."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd
import pytest

from advisory.forecast import evening as ev

SUNSET = pd.Timestamp("2024-04-10 23:40", tz="UTC")
SUNRISE = pd.Timestamp("2024-04-11 10:50", tz="UTC")


def hourly(start="2024-04-10 18:00", hours=20, **cols):
    idx = pd.date_range(start, periods=hours, freq="h", tz="UTC")
    data = {k: (v(np.arange(hours)) if callable(v) else np.full(hours, v, dtype=float)) for k, v in cols.items()}
    return pd.DataFrame(data, index=idx)


def sun_frame(n=1, sunset=SUNSET, sunrise=SUNRISE, status="normal"):
    return pd.DataFrame({"sunset": [sunset] * n, "sunrise": [sunrise] * n, "status": [status] * n,
                         "night": [dt.date(2024, 4, 10)] * n})


def obs_default():
    # air temperature falls 1 K per hour from 20 °C at 18:00 UTC
    return hourly(air_temp_c=lambda h: 20.0 - h, dew_point_c=lambda h: 5.0 - 0.2 * h, wind_speed_ms=2.0,
                  cloud_cover_pct=10.0)


def test_reference_time_and_latest_values():
    st = ev.evening_states(obs_default(), sun_frame())
    row = st.iloc[0]
    assert row["status"] == ev.OK
    assert row["reference_time"] == SUNSET + pd.Timedelta(hours=2)  # 01:40
    # latest reading at or before 01:40 is the 01:00 one (hour 7): 20 - 7
    assert row["air_temp_c"] == pytest.approx(13.0)
    assert row["air_temp_time"] == pd.Timestamp("2024-04-11 01:00", tz="UTC")
    assert row["air_temp_age_min"] == pytest.approx(40.0)
    assert row["dew_point_c"] == pytest.approx(5.0 - 1.4)
    assert row["hours_since_sunset"] == pytest.approx(2.0)
    assert row["hours_to_sunrise"] == pytest.approx(9.1667, abs=1e-3)
    # at sunset (23:40) the latest is 23:00 (hour 5): 15 °C; cooling since sunset 15 - 13
    assert row["sunset_air_temp_c"] == pytest.approx(15.0)
    assert row["cooling_since_sunset_c"] == pytest.approx(2.0)
    # dew point 3 h earlier (22:40 -> 22:00, hour 4): 4.2; now 3.6
    assert row["dew_point_change_3h_c"] == pytest.approx(-0.6)
    assert row["assumed"] == ()
    assert str(st["reference_time"].dt.tz) == "UTC"


def test_configurable_offset_per_row():
    st = ev.evening_states(obs_default(), sun_frame(2), reference_offset_h=[1.0, 3.0])
    assert list(st["air_temp_c"]) == [14.0, 12.0]


def test_qc_failed_values_are_skipped_within_the_age_limit():
    obs = obs_default()
    obs.loc[pd.Timestamp("2024-04-11 01:00", tz="UTC"), "air_temp_c"] = np.nan
    row = ev.evening_states(obs, sun_frame(), max_age_min=120).iloc[0]
    assert row["status"] == ev.OK
    assert row["air_temp_c"] == pytest.approx(14.0)  # the 00:00 reading
    assert row["air_temp_age_min"] == pytest.approx(100.0)


def test_stale_air_temperature_gives_no_forecast():
    obs = obs_default()[:5]  # last reading 22:00, reference 01:40
    row = ev.evening_states(obs, sun_frame()).iloc[0]
    assert row["status"] == ev.NO_FORECAST
    assert "stale" in row["reason"] and "3.7 h" in row["reason"]
    assert np.isnan(row["air_temp_c"])


def test_age_limit_is_configurable():
    obs = obs_default()
    obs.loc[pd.Timestamp("2024-04-11 01:00", tz="UTC"), "air_temp_c"] = np.nan
    row = ev.evening_states(obs, sun_frame(), max_age_min=60).iloc[0]
    assert row["status"] == ev.NO_FORECAST


def test_missing_dew_point_gives_no_forecast():
    obs = obs_default().drop(columns=["dew_point_c"])
    row = ev.evening_states(obs, sun_frame()).iloc[0]
    assert row["status"] == ev.NO_FORECAST and "dew point" in row["reason"]


def test_relative_humidity_replaces_dew_point():
    obs = obs_default().drop(columns=["dew_point_c"])
    obs["rel_humidity_pct"] = 50.0
    row = ev.evening_states(obs, sun_frame()).iloc[0]
    assert row["status"] == ev.OK
    # Magnus over water: 13 °C at 50 % -> about 2.7 °C (common practice value)
    assert row["dew_point_c"] == pytest.approx(2.7, abs=0.2)


def test_missing_wind_and_cloud_are_assumed_and_said():
    obs = obs_default().drop(columns=["wind_speed_ms", "cloud_cover_pct"])
    row = ev.evening_states(obs, sun_frame()).iloc[0]
    assert row["status"] == ev.OK
    assert np.isnan(row["wind_speed_ms"]) and np.isnan(row["cloud_cover_pct"])
    assert any("calm" in a for a in row["assumed"]) and any("clear" in a for a in row["assumed"])


def test_polar_nights_are_explicit():
    sun = pd.DataFrame({"sunset": [pd.NaT, pd.NaT], "sunrise": [pd.NaT, pd.NaT],
                        "status": ["polar_day", "polar_night"]})
    sun["sunset"] = pd.to_datetime(sun["sunset"], utc=True)
    sun["sunrise"] = pd.to_datetime(sun["sunrise"], utc=True)
    st = ev.evening_states(obs_default(), sun)
    assert list(st["status"]) == [ev.NO_FORECAST] * 2
    assert "does not set" in st["reason"].iloc[0] and "does not rise" in st["reason"].iloc[1]


def test_many_stations_mapping_and_long_frame_agree():
    a = obs_default()
    b = obs_default() - 5.0
    sun = sun_frame(3)
    keys = ["A", "B", "Z"]
    by_map = ev.evening_states({"A": a, "B": b}, sun, station=keys)
    long = pd.concat([a.assign(station="A"), b.assign(station="B")]).reset_index(names="time")
    by_long = ev.evening_states(long, sun, station=keys)
    for st in (by_map, by_long):
        assert list(st["status"]) == [ev.OK, ev.OK, ev.NO_FORECAST]
        assert st["air_temp_c"].iloc[0] - st["air_temp_c"].iloc[1] == pytest.approx(5.0)
        assert "No observations" in st["reason"].iloc[2]
    with pytest.raises(ValueError):
        ev.evening_states({"A": a, "B": b}, sun)


def test_unsorted_observations_are_handled():
    obs = obs_default().sample(frac=1.0, random_state=3)
    row = ev.evening_states(obs, sun_frame()).iloc[0]
    assert row["air_temp_c"] == pytest.approx(13.0)


def test_naive_times_are_refused():
    obs = obs_default()
    obs.index = obs.index.tz_localize(None)
    with pytest.raises(ValueError):
        ev.evening_states(obs, sun_frame())


def test_single_form():
    state = ev.evening_state(obs_default(), SUNSET, SUNRISE, night=dt.date(2024, 4, 10))
    assert isinstance(state, ev.EveningState) and state.ok
    assert state.air_temp_c == pytest.approx(13.0)
    none = ev.evening_state(obs_default(), None, None, sun_status="polar_day")
    assert not none.ok and "does not set" in none.reason


def test_dst_night_reference_time_is_two_real_hours_after_sunset():
    from advisory.physics.sun import sun_times_batch

    sun = sun_times_batch(36.1, -79.95, [dt.date(2024, 3, 9), dt.date(2024, 11, 2)], "America/New_York")
    idx = pd.date_range("2024-03-09 12:00", "2024-03-10 18:00", freq="h", tz="UTC").append(
        pd.date_range("2024-11-02 12:00", "2024-11-03 18:00", freq="h", tz="UTC"))
    obs = pd.DataFrame({"air_temp_c": 10.0, "dew_point_c": 0.0}, index=idx)
    st = ev.evening_states(obs, sun)
    np.testing.assert_allclose(st["hours_since_sunset"], 2.0)
    assert (st["status"] == ev.OK).all()


def test_one_station_frame_serves_all_rows_with_keys():
    st = ev.evening_states(obs_default(), sun_frame(2), station=["B1", "B2"])
    assert list(st["status"]) == [ev.OK, ev.OK] and list(st["station"]) == ["B1", "B2"]
