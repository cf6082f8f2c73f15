"""The daytime curve and the morning estimate of the maximum on real hourly weather.

Data: pvlib's ``723170TYA.CSV`` (real hourly observations at a humid piedmont
airport, 36.1° N), read through ``tests/helpers/tmy3.py``; timestamps are
hour-ending local standard time and are taken as is.  The file splices months
from different years; to keep the months in their calendar order every stamp is
relabelled to one year (2001) -- hour, day and month unchanged.  Sun times come
from pvlib's NREL SPA (Reda & Andreas 2004).  A calendar day counts when it has
at least 23 hourly values.

Figures measured with this code (also printed by ``-s``):

* hourly curve, sunrise to sunset, given each day's observed minimum and
  maximum: Parton & Logan (1981) published coefficients RMSE 1.87 °C (bias
  +0.77); Cesaraccio et al. (2001) published 1.83; coefficients calibrated
  on the odd months (maximum 3.5 h after solar noon, k = 0.35): 1.69 on the
  held-out even months (Parton & Logan there: 1.86), 1.67 over the year (bias
  +0.29).  A target of 1.5 °C is not reached: even knowing each day's true
  sunrise temperature and true daytime maximum, this family of curves (fitted
  on half the year) scores about 1.47 on the other half, so the remaining error
  is weather within the day (fronts, showers), not the curve's shape.
* maximum from the first observation at or after sunrise + 2 h, rolling origin
  after 30 days: MAE 1.62 °C (yesterday's maximum alone: 3.05).
"""

from __future__ import annotations

import functools
import os

import numpy as np
import pandas as pd
import pvlib
import pytest

from advisory.forecast import daytime as dt
from tests.helpers.tmy3 import LATITUDE, LONGITUDE, TZ, tmy3_frame


def _one_year(s: pd.Series | pd.DataFrame):
    s = s.copy()
    s.index = pd.DatetimeIndex([t.replace(year=2001) for t in s.index])
    s = s[~s.index.duplicated(keep="first")]
    return s[s.index.year == 2001].sort_index()


def _days(series: pd.Series, lat: float, lon: float) -> dict:
    """(D, 24) arrays of one year of hourly temperature with the day's extremes and sun times."""
    local = series.index
    dates = sorted(set(local.date))
    midnights = pd.DatetimeIndex([pd.Timestamp(d).tz_localize(local.tz) for d in dates])
    sun = pvlib.solarposition.sun_rise_set_transit_spa(midnights, lat, lon)
    pos = {d: i for i, d in enumerate(dates)}
    temp = np.full((len(dates), 24), np.nan)
    temp[[pos[d] for d in local.date], local.hour] = series.to_numpy(float)
    complete = np.isfinite(temp).sum(axis=1) >= 23
    tmin, tmax = np.nanmin(temp, axis=1), np.nanmax(temp, axis=1)
    times = dt.to_hours(midnights)[:, None] + np.arange(24.0)[None, :]
    sr, ss, noon = (dt.to_hours(sun[c]) for c in ("sunrise", "sunset", "transit"))
    daytime = (times >= sr[:, None]) & (times <= ss[:, None]) & np.isfinite(temp) & complete[:, None]
    months = np.array([d.month for d in dates])
    return dict(dates=dates, temp=temp, tmin=tmin, tmax=tmax, next_min=np.r_[tmin[1:], np.nan],
                times=times, sr=sr, ss=ss, noon=noon, daytime=daytime, months=months)


@functools.lru_cache(maxsize=1)
def piedmont() -> dict:
    frame = _one_year(tmy3_frame())
    d = _days(frame["air_temp_c"], LATITUDE, LONGITUDE)
    d["frame"] = frame
    return d


@functools.lru_cache(maxsize=4)
def other_site(name: str) -> dict:
    path = os.path.join(os.path.dirname(pvlib.__file__), "data", name)
    if name.endswith(".tm2"):
        raw, meta = pvlib.iotools.read_tmy2(path)
        temp = raw["DryBulb"].astype(float) / 10.0          # TMY2 stores tenths of °C
    else:
        raw, meta = pvlib.iotools.read_tmy3(path, map_variables=True)
        temp = raw["temp_air"].astype(float)
    return _days(_one_year(temp), meta["latitude"], meta["longitude"])


def _curve(d, params, rows=None):
    return dt.diurnal_temperature_c(d["times"], d["tmin"], d["tmax"], d["sr"], d["ss"], d["noon"],
                                    next_min_temp_c=d["next_min"], params=params)


def _score(d, model, rows):
    m = d["daytime"] & rows[:, None]
    err = (model - d["temp"])[m]
    return float(np.sqrt(np.mean(err ** 2))), float(np.mean(err))


def _calibrate(d, rows):
    obs = np.where(rows[:, None], d["temp"], np.nan)
    return dt.calibrate_diurnal_params(d["times"], obs, d["tmin"], d["tmax"], d["sr"], d["ss"], d["noon"],
                                       next_min_temp_c=d["next_min"])


def test_hourly_curve_sunrise_to_sunset():
    d = piedmont()
    odd = d["months"] % 2 == 1
    everything = np.ones_like(odd)
    pl = dt.parton_logan_c(d["times"], d["tmin"], d["tmax"], d["sr"], d["ss"])
    pl_year, pl_bias = _score(d, pl, everything)
    pl_even, _ = _score(d, pl, ~odd)
    pub_year, _ = _score(d, _curve(d, dt.DEFAULT_PARAMS), everything)
    params, _ = _calibrate(d, odd)
    model = _curve(d, params)
    even, even_bias = _score(d, model, ~odd)
    year, year_bias = _score(d, model, everything)
    print(f"\nParton-Logan published: RMSE {pl_year:.3f} bias {pl_bias:+.3f}; "
          f"Cesaraccio published: {pub_year:.3f}; calibrated on odd months {params}: "
          f"even months {even:.3f} (bias {even_bias:+.3f}; Parton-Logan {pl_even:.3f}), "
          f"year {year:.3f} (bias {year_bias:+.3f})")
    # Parton & Logan with their published coefficients was measured at 1.82 (bias +0.77) elsewhere
    # on this file; reproduce that baseline before comparing.
    assert pl_year == pytest.approx(1.85, abs=0.05)
    assert pl_bias == pytest.approx(0.77, abs=0.05)
    # Honest held-out gain (even months were not used to calibrate) and over the year.
    assert even <= pl_even - 0.15
    assert even <= 1.72
    assert year <= 1.70
    assert abs(year_bias) < abs(pl_bias) - 0.2


@pytest.mark.parametrize("name", ["703165TY.csv", "12839.tm2"])
def test_calibration_generalises_to_other_sites(name):
    # pvlib's other hourly files: a sub-arctic island (TMY3) and a sub-tropical coast (TMY2).
    # Calibrating on odd months must beat Parton & Logan's published coefficients on even months.
    d = other_site(name)
    odd = d["months"] % 2 == 1
    params, _ = _calibrate(d, odd)
    ours, _ = _score(d, _curve(d, params), ~odd)
    pl, _ = _score(d, dt.parton_logan_c(d["times"], d["tmin"], d["tmax"], d["sr"], d["ss"]), ~odd)
    print(f"\n{name}: calibrated {params} even-month RMSE {ours:.3f} vs Parton-Logan {pl:.3f}")
    assert ours < pl


def test_maximum_between_noon_and_five_hours_after_on_clear_days():
    # Common practice: on clear days the day's maximum comes between solar noon and noon + 5 h.
    d = piedmont()
    cloud = np.full(d["temp"].shape, np.nan)
    frame = d["frame"]
    pos = {day: i for i, day in enumerate(d["dates"])}
    cloud[[pos[x] for x in frame.index.date], frame.index.hour] = frame["cloud_cover_pct"].to_numpy(float)
    clear = np.array([np.nanmax(np.where(d["daytime"][i], cloud[i], -1)) <= 20 for i in range(len(pos))])
    clear &= d["daytime"].any(axis=1)
    assert clear.sum() >= 20
    fine = d["times"][:, :1] + np.arange(0, 24, 1 / 12)[None, :]      # every 5 minutes
    for params in (dt.DEFAULT_PARAMS, _calibrate(d, d["months"] % 2 == 1)[0]):
        curve = dt.diurnal_temperature_c(fine[clear], d["tmin"][clear], d["tmax"][clear], d["sr"][clear],
                                         d["ss"][clear], d["noon"][clear],
                                         next_min_temp_c=d["next_min"][clear], params=params)
        t_max = fine[clear][np.arange(clear.sum()), np.argmax(curve, axis=1)]
        lag = t_max - d["noon"][clear]
        assert np.all(lag >= 0.0) and np.all(lag <= 5.0)
    # The observations agree on most clear days (hour-ending stamps, taken as is).
    obs_lag = d["times"][clear][np.arange(clear.sum()), np.nanargmax(
        np.where(d["daytime"][clear], d["temp"][clear], -np.inf), axis=1)] - d["noon"][clear]
    assert np.mean((obs_lag >= 0) & (obs_lag <= 5)) >= 0.8


@functools.lru_cache(maxsize=1)
def _features() -> pd.DataFrame:
    d = piedmont()
    sun = pd.DataFrame({"sunrise": pd.to_datetime(d["sr"] * 3.6e12, utc=True),
                        "sunset": pd.to_datetime(d["ss"] * 3.6e12, utc=True)}, index=d["dates"])
    obs = d["frame"][["air_temp_c", "dew_point_c", "cloud_cover_pct", "wind_speed_ms"]]
    return dt.morning_features(obs, sun, TZ)


def test_maximum_from_morning_observations_rolling_origin():
    f = _features()
    ro = dt.rolling_origin_max_temp(f, min_train_days=30)
    err = ro["residual_c"].dropna()
    mae = float(err.abs().mean())
    first = ro.index[ro["predicted_c"].notna()][0]
    persistence = (f["prev_max_temp_c"] - f["max_temp_c"]).loc[first:].abs().mean()
    print(f"\nmorning estimate: MAE {mae:.3f} over {len(err)} days; yesterday's maximum alone {persistence:.3f}")
    assert len(err) >= 300
    assert (ro["n_train"][ro["predicted_c"].notna()] >= 30).all()
    assert mae <= 1.7
    assert mae < persistence - 1.0


def test_fitted_model_round_trips_and_states_its_spread():
    import json

    f = _features()
    params = dt.fit_max_temp_model(f)
    again = json.loads(json.dumps(params))
    a = dt.predict_max_temp(params, f.tail(5))
    b = dt.predict_max_temp(again, f.tail(5))
    np.testing.assert_allclose(a["max_temp_c"], b["max_temp_c"])
    assert 1.0 < params["residual_sd_c"] < 3.5
    assert params["residual_q10_c"] < 0 < params["residual_q90_c"]
    assert (a["low_c"] < a["max_temp_c"]).all() and (a["max_temp_c"] < a["high_c"]).all()
    assert a["estimated"].all()
