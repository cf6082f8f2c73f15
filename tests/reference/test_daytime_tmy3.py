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
  +0.29).  This family, given only the extremes, stays above 1.5 °C: even
  knowing each day's true sunrise temperature and true daytime maximum it
  scores about 1.47 on held-out months.
* the curve drawn when the heat note is made (:mod:`advisory.forecast.dayshape`):
  through the morning reading (first at or after sunrise + 2 h), shapes by
  cloud class fitted on the odd months.  **The 1.5 °C bar counts every hour
  from sunrise to sunset, with the hours up to the reading shown as read**
  (what a note made then shows): 1.184 °C on the held-out even months (bias
  +0.15), 1.179 over the year; rolling origin (each month from March fitted on
  the months before it) 1.253.  The forecast hours alone (after the reading):
  1.365 held out (bias +0.20; the calibrated Cesaraccio curve 1.715 on the
  same hours), 1.438 rolling origin.  The maximum had already been read by the
  reading on 25 days (warm nights ahead of fronts).
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

from advisory.forecast import dayshape as ds
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
    # The curve drawn through the morning reading too (default and fitted shapes; the maximum not yet read).
    a = _anchor(d, cloud)
    a = {k: v[clear] for k, v in a.items()}
    a["max_so_far_c"] = None
    for shapes in (ds.DEFAULT_SHAPES, _fit_shapes(d, _anchor(d, cloud), d["months"] % 2 == 1)):
        curve = ds.anchored_temperature_c(fine[clear], d["tmin"][clear], d["tmax"][clear], d["sr"][clear],
                                          d["ss"][clear], d["noon"][clear], a["anchor_time"], a["anchor_temp_c"],
                                          next_min_temp_c=d["next_min"][clear], cloud_cover_pct=a["cloud_cover_pct"],
                                          shapes=shapes)
        lag = fine[clear][np.arange(clear.sum()), np.argmax(curve, axis=1)] - d["noon"][clear]
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


# --------------------------------------------------------------------------- the curve drawn through the morning reading
def _cloud_grid(d) -> np.ndarray:
    cloud = np.full(d["temp"].shape, np.nan)
    frame = d["frame"]
    pos = {day: i for i, day in enumerate(d["dates"])}
    cloud[[pos[x] for x in frame.index.date], frame.index.hour] = frame["cloud_cover_pct"].to_numpy(float)
    return cloud


def _anchor(d, cloud=None) -> dict:
    # The morning reading: the first at or after sunrise + 2 h (the heat note's reading, see
    # advisory.runs.heat_refit.MORNING_LEAD_H); every hour up to it is already observed.
    return ds.morning_anchor(d["times"], d["temp"], d["sr"], cloud_cover_pct=cloud)


def _fit_shapes(d, a, rows):
    return ds.calibrate_day_shapes(d["times"], np.where(rows[:, None], d["temp"], np.nan), d["tmax"], d["sr"],
                                   d["ss"], d["noon"], a["anchor_time"], a["anchor_temp_c"],
                                   next_min_temp_c=d["next_min"], min_temp_c=d["tmin"],
                                   max_so_far_c=a["max_so_far_c"], cloud_cover_pct=a["cloud_cover_pct"])[0]


def _anchored(d, a, shapes, observed=None, times=None):
    return ds.anchored_temperature_c(d["times"] if times is None else times, d["tmin"], d["tmax"], d["sr"], d["ss"],
                                     d["noon"], a["anchor_time"], a["anchor_temp_c"], next_min_temp_c=d["next_min"],
                                     max_so_far_c=a["max_so_far_c"], cloud_cover_pct=a["cloud_cover_pct"],
                                     shapes=shapes, observed_c=observed)


def _rmse(d, model, mask):
    err = (model - d["temp"])[mask]
    return float(np.sqrt(np.mean(err ** 2))), float(np.mean(err))


@functools.lru_cache(maxsize=1)
def _anchored_figures() -> dict:
    d = piedmont()
    odd = d["months"] % 2 == 1
    a = _anchor(d, _cloud_grid(d))
    shapes = _fit_shapes(d, a, odd)
    model = _anchored(d, a, shapes)
    shown = _anchored(d, a, shapes, observed=d["temp"])
    after = d["daytime"] & (d["times"] > a["anchor_time"][:, None])
    even, year = ~odd[:, None], np.ones_like(odd)[:, None]
    cesaraccio = _curve(d, _calibrate(d, odd)[0])
    return dict(
        shapes=shapes,
        shown_even=_rmse(d, shown, d["daytime"] & even), shown_year=_rmse(d, shown, d["daytime"] & year),
        after_even=_rmse(d, model, after & even), after_year=_rmse(d, model, after & year),
        model_even=_rmse(d, model, d["daytime"] & even),
        default_after_even=_rmse(d, _anchored(d, a, ds.DEFAULT_SHAPES), after & even),
        cesaraccio_after_even=_rmse(d, cesaraccio, after & even),
        spent_days=int(np.sum(a["max_so_far_c"] >= d["tmax"] - 0.05)))


def test_curve_through_the_morning_reading_held_out():
    """Sunrise-to-sunset RMSE of the curve drawn at the heat note's time, shapes fitted on odd months.

    The figure the 1.5 °C bar counts (``shown``): every daytime hour from
    sunrise to sunset of the held-out even months, where the hours up to the
    morning reading (sunrise + 2 h, the note's time) show the readings -- what a
    note made then can honestly show -- and the later hours show the curve
    through that reading, the day's observed maximum and the next minimum.
    Also asserted: the genuinely forecast hours alone (after the reading), and
    the curve on every daytime hour without substituting readings.
    """
    f = _anchored_figures()
    print(f"\nanchored shapes (odd months) {f['shapes']}\n"
          f"sunrise-sunset, observed hours shown: even {f['shown_even'][0]:.3f} (bias {f['shown_even'][1]:+.3f}), "
          f"year {f['shown_year'][0]:.3f} (bias {f['shown_year'][1]:+.3f}); after the reading only: "
          f"even {f['after_even'][0]:.3f} (bias {f['after_even'][1]:+.3f}), year {f['after_year'][0]:.3f} "
          f"(bias {f['after_year'][1]:+.3f}); model on every daytime hour: even {f['model_even'][0]:.3f}; "
          f"default shapes after the reading, even {f['default_after_even'][0]:.3f}; calibrated Cesaraccio "
          f"after the reading, even {f['cesaraccio_after_even'][0]:.3f}; maximum already read by the "
          f"reading on {f['spent_days']} days")
    # The bar (sunrise to sunset, 723170TYA.CSV, observed extremes given): RMSE <= 1.5 °C.  Measured held
    # out 1.184 (even months), 1.179 over the year.
    assert f["shown_even"][0] <= 1.20
    assert f["shown_year"][0] <= 1.20
    assert abs(f["shown_even"][1]) <= 0.2
    # The forecast hours alone (after the reading): measured 1.365 held out (bias +0.195); the Cesaraccio
    # curve with coefficients calibrated on the same odd months scores 1.715 on these hours.
    assert f["after_even"][0] <= 1.38
    assert f["after_even"][0] <= f["cesaraccio_after_even"][0] - 0.15
    assert f["model_even"][0] <= 1.38
    # The module's default shapes (fitted on these odd months, rounded) score alike on the even months.
    assert f["default_after_even"][0] <= 1.38


def test_anchored_curve_reaches_the_stated_maximum():
    # The heat note states the high; the curve must reach it (in the afternoon, or in the morning's
    # readings when the maximum was read before the note).
    d = piedmont()
    a = _anchor(d, _cloud_grid(d))
    fine = d["times"][:, :1] + np.arange(0, 24, 1 / 12)[None, :]
    curve = _anchored(d, a, _fit_shapes(d, a, d["months"] % 2 == 1), times=fine)
    day = (fine >= d["sr"][:, None]) & (fine <= d["ss"][:, None])
    peak = np.max(np.where(day, curve, -np.inf), axis=1)
    spent = a["max_so_far_c"] >= d["tmax"] - 0.05
    np.testing.assert_allclose(peak[~spent], d["tmax"][~spent], atol=0.05)
    assert np.all(peak[spent] <= d["tmax"][spent] + 1e-9)
    assert np.all(a["max_so_far_c"][spent] >= d["tmax"][spent] - 0.05)


@pytest.mark.parametrize("name", ["703165TY.csv", "12839.tm2"])
def test_anchored_curve_generalises_to_other_sites(name):
    # Same protocol on pvlib's other hourly files: shapes fitted on odd months must beat the calibrated
    # Cesaraccio curve on the even months' hours after the morning reading.
    d = other_site(name)
    odd = d["months"] % 2 == 1
    a = _anchor(d)
    after = d["daytime"] & (d["times"] > a["anchor_time"][:, None]) & ~odd[:, None]
    ours, _ = _rmse(d, _anchored(d, a, _fit_shapes(d, a, odd)), after)
    theirs, _ = _rmse(d, _curve(d, _calibrate(d, odd)[0]), after)
    print(f"\n{name}: after the morning reading, even months: anchored {ours:.3f}, Cesaraccio calibrated {theirs:.3f}")
    assert ours < theirs


def test_curve_through_the_morning_reading_rolling_origin():
    # A second out-of-sample protocol: each month from March on is drawn with shapes fitted on the
    # earlier months only (the file's months come from different years; their calendar order is kept).
    d = piedmont()
    a = _anchor(d, _cloud_grid(d))
    months = d["months"]
    shown = np.full(d["temp"].shape, np.nan)
    model = np.full(d["temp"].shape, np.nan)
    for month in range(3, 13):          # ten fits
        shapes = _fit_shapes(d, a, months < month)
        sel = months == month
        shown[sel] = _anchored(d, a, shapes, observed=d["temp"])[sel]
        model[sel] = _anchored(d, a, shapes)[sel]
    rows = (months >= 3)[:, None]
    after = d["daytime"] & (d["times"] > a["anchor_time"][:, None]) & rows
    all_rmse, all_bias = _rmse(d, shown, d["daytime"] & rows)
    after_rmse, after_bias = _rmse(d, model, after)
    print(f"\nrolling origin, March-December: sunrise-sunset {all_rmse:.3f} (bias {all_bias:+.3f}), "
          f"after the reading {after_rmse:.3f} (bias {after_bias:+.3f})")
    # Measured 1.253 (bias +0.123) and 1.438 (bias +0.161).
    assert all_rmse <= 1.27
    assert after_rmse <= 1.45
