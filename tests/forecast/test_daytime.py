"""Unit tests for advisory.forecast.daytime (hourly curve, humidity, morning maximum)."""

import datetime as dt_
import json

import numpy as np
import pandas as pd
import pytest
from astral import LocationInfo
from astral.sun import sun

from advisory.forecast import daytime as dt

SR, NOON, SS = 6.0, 12.5, 19.0   # hours on a plain axis


def _curve(times, tn=10.0, tx=30.0, **kw):
    return dt.diurnal_temperature_c(times, tn, tx, SR, SS, NOON, **kw)


def test_anchors_of_the_published_form():
    p = dt.DEFAULT_PARAMS                       # maximum 4 h before sunset, k = 0.39
    tmax_time = SS + p.max_offset_h
    vals = _curve(np.array([SR, tmax_time, SS, SR + 24.0]), next_min_temp_c=12.0)
    to = 30.0 - 0.39 * (30.0 - 12.0)
    np.testing.assert_allclose(vals, [10.0, 30.0, to, 12.0], atol=1e-9)


def test_curve_is_continuous_at_its_junctions():
    tx = SS + dt.DEFAULT_PARAMS.max_offset_h
    eps = 1e-7
    for junction in (SR, tx, SS, SR + 24.0):
        y = _curve(np.array([junction - eps, junction + eps]), next_min_temp_c=8.0,
                   prev_sunset_temp_c=20.0, prev_sunset=SS - 24)
        assert abs(y[1] - y[0]) < 1e-2
    # The night part starts from the previous sunset's temperature.
    assert _curve(np.array([SS - 24]), prev_sunset_temp_c=20.0, prev_sunset=SS - 24)[0] == pytest.approx(20.0)


def test_maximum_and_minimum_are_the_given_ones():
    t = np.linspace(SR, SS, 2000)
    y = _curve(t)
    assert y.max() == pytest.approx(30.0, abs=1e-3)
    assert y.min() == pytest.approx(10.0, abs=1e-9)


def test_noon_anchor_and_clipping():
    p = dt.DiurnalParams("noon", 3.0, 0.3)
    t = np.linspace(SR, SS, 5000)
    y = dt.diurnal_temperature_c(t, 10, 30, SR, SS, NOON, params=p)
    assert t[np.argmax(y)] == pytest.approx(NOON + 3.0, abs=0.01)
    # A maximum asked after sunset is kept before it.
    late = dt.DiurnalParams("noon", 9.0, 0.3)
    y = dt.diurnal_temperature_c(t, 10, 30, SR, SS, NOON, params=late)
    assert t[np.argmax(y)] <= SS - 0.1 * (SS - SR) + 0.01


def test_vectorised_days_by_blocks():
    days, blocks = 3, 5
    tn = np.random.default_rng(1).uniform(5, 15, (days, blocks))
    tx = tn + 15
    times = np.arange(24.0)
    out = dt.diurnal_temperature_c(times, tn, tx, np.full((days, blocks), SR), np.full((days, blocks), SS),
                                   np.full((days, blocks), NOON))
    assert out.shape == (days, blocks, 24)
    one = dt.diurnal_temperature_c(times, tn[1, 2], tx[1, 2], SR, SS, NOON)
    np.testing.assert_allclose(out[1, 2], one)


def test_max_below_min_is_raised():
    y = _curve(np.arange(24.0), tn=20.0, tx=15.0)
    assert np.allclose(y, 20.0)


def test_polar_day_and_night_fall_back_to_cosine():
    t = np.arange(0, 24.0, 0.25)
    y = dt.diurnal_temperature_c(t, 2.0, 8.0, np.nan, np.nan, 12.0)
    assert y.max() == pytest.approx(8.0, abs=0.01)
    assert y.min() == pytest.approx(2.0, abs=0.01)
    assert 12.0 <= t[np.argmax(y)] <= 17.0


def test_params_dict_round_trip():
    p = dt.DiurnalParams("noon", 2.75, 0.4)
    assert dt.DiurnalParams.from_dict(json.loads(json.dumps(p.to_dict()))) == p
    with pytest.raises(ValueError):
        dt.DiurnalParams("midnight", 1.0, 0.3)


def test_to_hours_accepts_aware_naive_and_numbers():
    aware = pd.Timestamp("2024-07-01 12:00", tz="Europe/Madrid")
    assert dt.to_hours(aware) == pytest.approx(dt.to_hours(np.datetime64("2024-07-01T10:00")))
    idx = pd.date_range("2024-07-01", periods=3, freq="h", tz="UTC")
    np.testing.assert_allclose(np.diff(dt.to_hours(idx)), 1.0)
    assert dt.to_hours(5.5) == 5.5
    arr = np.array([aware.to_pydatetime(), None], dtype=object)
    out = dt.to_hours(arr)
    assert np.isnan(out[1]) and out[0] == pytest.approx(dt.to_hours(aware))


def test_local_day_hours_over_dst():
    # Spring forward and fall back in Europe/Madrid (2024-03-31 and 2024-10-27).
    assert len(dt.local_day_hours("2024-03-31", "Europe/Madrid")) == 23
    assert len(dt.local_day_hours("2024-10-27", "Europe/Madrid")) == 25
    assert len(dt.local_day_hours(dt_.date(2024, 7, 1), "Europe/Madrid")) == 24


def test_southern_hemisphere_summer_day():
    # Invented site in the southern hemisphere, January (summer); sun times from astral.
    site = LocationInfo("invented", "nowhere", "Australia/Sydney", -34.2, 142.1)
    s = sun(site.observer, date=dt_.date(2025, 1, 15))
    times = dt.local_day_hours("2025-01-15", "Australia/Sydney")
    y = dt.diurnal_temperature_c(times, 18.0, 38.0, s["sunrise"], s["sunset"], s["noon"])
    t_max = times[int(np.argmax(y))]
    lag_h = (t_max - s["noon"]).total_seconds() / 3600
    assert 0 <= lag_h <= 5
    assert y.max() == pytest.approx(38.0, abs=0.3)


def test_humidity_from_conserved_dew_point():
    t = np.array([[10.0, 20.0, 30.0, 8.0]])
    rh = dt.hourly_rel_humidity_pct(t, np.array([[12.0]]))
    assert rh[0, 3] == 100.0 and rh[0, 0] == 100.0
    assert rh[0, 1] > rh[0, 2]
    td = dt.dew_point_from_min_rh_c(32.0, 25.0)
    assert dt.hourly_rel_humidity_pct(np.array([32.0]), td)[0] == pytest.approx(25.0, abs=1e-6)


def test_calibration_recovers_its_own_coefficients():
    rng = np.random.default_rng(3)
    days = 40
    base = np.arange(days) * 24.0
    times = base[:, None] + np.arange(24.0)[None, :]
    sr, ss, noon = base + 5.5, base + 19.5, base + 12.5
    tn = rng.uniform(8, 16, days)
    tx = tn + rng.uniform(10, 18, days)
    truth = dt.DiurnalParams("noon", 2.5, 0.45)
    obs = dt.diurnal_temperature_c(times, tn, tx, sr, ss, noon, next_min_temp_c=np.r_[tn[1:], np.nan],
                                   params=truth)
    got, rmse = dt.calibrate_diurnal_params(times, obs, tn, tx, sr, ss, noon,
                                            next_min_temp_c=np.r_[tn[1:], np.nan])
    assert got == truth and rmse < 1e-9
    few, r = dt.calibrate_diurnal_params(times[:5], obs[:5], tn[:5], tx[:5], sr[:5], ss[:5], noon[:5])
    assert few == dt.DEFAULT_PARAMS and np.isnan(r)


def _invented_station(days=60, seed=7):
    """An invented station: hourly obs built from the curve plus noise (demo-style data)."""
    rng = np.random.default_rng(seed)
    tz = "America/Denver"
    dates = [dt_.date(2025, 6, 1) + dt_.timedelta(days=i) for i in range(days)]
    rows, sun_rows = [], []
    for i, d in enumerate(dates):
        times = dt.local_day_hours(d, tz)
        mid = pd.Timestamp(d).tz_localize(tz)
        sr, ss, noon = mid + pd.Timedelta(hours=5.6), mid + pd.Timedelta(hours=20.5), mid + pd.Timedelta(hours=13)
        tn = 14 + 3 * np.sin(i / 5) + rng.normal(0, 1)
        tx = tn + 14 + rng.normal(0, 2)
        y = dt.diurnal_temperature_c(times, tn, tx, sr, ss, noon) + rng.normal(0, 0.3, len(times))
        rows.append(pd.DataFrame({"air_temp_c": y, "dew_point_c": 8 + rng.normal(0, 1, len(times)),
                                  "cloud_cover_pct": 20.0, "wind_speed_ms": 2.0}, index=times))
        sun_rows.append((d, sr, ss))
    obs = pd.concat(rows)
    sun_df = pd.DataFrame([(s, e) for _, s, e in sun_rows], index=[d for d, _, _ in sun_rows],
                          columns=["sunrise", "sunset"])
    return obs, sun_df, tz


def test_morning_features_and_model():
    obs, sun_df, tz = _invented_station()
    f = dt.morning_features(obs, sun_df, tz)
    assert set(dt.MORNING_FEATURES) <= set(f.columns)
    row = f.iloc[5]
    # The morning observation is the first at or after sunrise + 2 h (05:36 + 2 h -> 08:00 local).
    assert pd.Timestamp(row["issued_at"]).tz_convert(tz).hour == 8
    assert row["max_so_far_c"] >= row["air_temp_c"]
    assert np.isnan(f.iloc[0]["prev_max_temp_c"]) and np.isfinite(f.iloc[1]["prev_max_temp_c"])
    params = dt.fit_max_temp_model(f)
    assert params["coefficients"] and params["n_days"] >= 55
    pred = dt.predict_max_temp(json.loads(json.dumps(params)), f.tail(10))
    err = (pred["max_temp_c"] - f["max_temp_c"].tail(10)).abs()
    assert err.mean() < 3.0
    ro = dt.rolling_origin_max_temp(f)
    assert ro["predicted_c"].iloc[:30].isna().all() and ro["predicted_c"].iloc[31:].notna().all()


def test_model_not_ready_with_few_days():
    obs, sun_df, tz = _invented_station(days=12)
    f = dt.morning_features(obs, sun_df, tz)
    params = dt.fit_max_temp_model(f)
    assert params["coefficients"] == []
    assert dt.predict_max_temp(params, f)["max_temp_c"].isna().all()


def test_missing_cloud_column_is_tolerated():
    obs, sun_df, tz = _invented_station()
    f = dt.morning_features(obs.drop(columns=["cloud_cover_pct"]), sun_df, tz)
    params = dt.fit_max_temp_model(f)
    assert "cloud_cover_pct" not in params["features"]
    assert dt.predict_max_temp(params, f.tail(3))["max_temp_c"].notna().all()
