"""A station's day models for the heat run: sun times by date, the day-maximum regression and
the diurnal shapes, refitted when missing or old.
"""

from __future__ import annotations

import datetime as dt
import math
from collections import defaultdict
from collections.abc import Sequence

import numpy as np
import pandas as pd
from sqlalchemy import select
from sqlalchemy.orm import Session

from advisory.forecast import dayshape, daytime
from advisory.ingest.observations import load_observations_many
from advisory.physics import sun
from advisory.store.schema import Calibration, Outlook, Station

#: The morning reading is the first at or after sunrise + this [h] (the regression's lead).
MORNING_LEAD_H = 2.0
#: How far after that instant the morning reading may be [h].
MORNING_TOLERANCE_H = 1.5
#: With no reading after sunrise + 2 h yet, a reading from sunrise + this [h] on is used instead.
EARLY_READING_MIN_LEAD_H = 1.0
#: History used to fit a station's day models [days].
FIT_HISTORY_DAYS = 730
#: A fitted day-maximum regression is refitted when older than this [days].
REFIT_AFTER_DAYS = 7
#: Assumed 80 % range of an outlook's high, as (10th, 90th) percentile of outlook minus observed [°C].
#: This tool's assumption (day-ahead maximum forecasts typically miss by 1-2 °C; from memory,
#: unverified); replaced by the station's own record when it has one.
OUTLOOK_RESIDUAL_Q_C = (-2.0, 2.0)
#: Past outlook days needed before a station's own outlook misses set the range.
MIN_OUTLOOK_PAIRS = 10
#: Range of yesterday's maximum as today's, as (10th, 90th) percentile of yesterday minus today [°C].
#: Measured on pvlib's 723170TYA.CSV (364 days: MAE 3.14, RMSE 4.18, q10 -5.0, q90 +5.5 °C).
PERSISTENCE_RESIDUAL_Q_C = (-5.0, 5.5)
#: Typical miss of that fallback, for the notice [°C] (same source).
PERSISTENCE_MAE_C = 3.1
#: Half the 80 % range of a regression estimate before it has an out-of-sample record (ten days) [°C].
#: This tool's assumption, a little wider than the 1.6 °C MAE the regression showed on 723170TYA.CSV.
REGRESSION_HALF_RANGE_C = 2.5
#: Day's range assumed when neither readings nor outlook give a minimum [°C] (from memory, unverified).
ASSUMED_RANGE_C = 12.0
#: Local time of the heat note where the sun does not set (no sunrise to count from).
POLAR_ISSUE_LOCAL = dt.time(8, 0)
#: Minimum readings in a local day for its maximum to count (as in :func:`daytime.morning_features`).
MIN_OBS_PER_DAY = 18
#: Observation columns the heat day reads.
_OBS_COLUMNS = ("air_temp_c", "dew_point_c", "rel_humidity_pct", "cloud_cover_pct", "wind_speed_ms")


# --------------------------------------------------------------------------- small helpers

def _ts(x) -> pd.Timestamp | None:
    if x is None or (not isinstance(x, pd.Timestamp | dt.datetime) and pd.isna(x)):
        return None
    t = pd.Timestamp(x)
    if pd.isna(t):
        return None
    return t.tz_localize("UTC") if t.tzinfo is None else t.tz_convert("UTC")


def _py(x) -> dt.datetime | None:
    t = _ts(x)
    return None if t is None else t.round("s").to_pydatetime()


def _f(x) -> float | None:
    """A plain float, or None for NaN/None."""
    if x is None:
        return None
    v = float(x)
    return v if math.isfinite(v) else None


def sun_by_date(latitude, longitude, tz, dates) -> pd.DataFrame:
    """Sunrise, solar noon and sunset of local calendar days (vectorised).

    Parameters
    ----------
    latitude, longitude : float or array_like
        Position(s) [degrees].
    tz : str or array_like of str
        IANA zone(s).
    dates : date or array_like of dates
        Local calendar dates, broadcast against the positions.

    Returns
    -------
    pandas.DataFrame
        One row per input: ``sunrise``, ``solar_noon``, ``sunset``,
        ``next_sunrise`` (aware UTC, NaT where the sun does not rise or set),
        ``no_sun`` (the sun does not rise that day).
    """
    dates = pd.Index(np.atleast_1d(np.asarray(dates, dtype=object)))
    n = max(len(dates), np.size(latitude), np.size(longitude), np.size(tz))
    lat = np.broadcast_to(np.asarray(latitude, float), (n,))
    lon = np.broadcast_to(np.asarray(longitude, float), (n,))
    tzs = np.broadcast_to(np.asarray(tz, dtype=object), (n,))
    days = np.broadcast_to(np.asarray([pd.Timestamp(d).date() for d in dates], dtype=object), (n,))
    prev = sun.sun_times_batch(lat, lon, np.array([d - dt.timedelta(days=1) for d in days], dtype=object), tzs)
    cur = sun.sun_times_batch(lat, lon, days, tzs)
    no_sun = ((prev["status"] == sun.POLAR_NIGHT) & (cur["status"] == sun.POLAR_NIGHT)
              & prev["sunrise"].isna() & cur["sunset"].isna()).to_numpy(bool)
    return pd.DataFrame({"sunrise": prev["sunrise"].to_numpy(), "solar_noon": cur["solar_noon"].to_numpy(),
                         "sunset": cur["sunset"].to_numpy(), "next_sunrise": cur["sunrise"].to_numpy(),
                         "no_sun": no_sun})


def _station_sun(lat: float, lon: float, tz: str, dates) -> pd.DataFrame:
    """:func:`sun_by_date` for one place, indexed by date (the form ``morning_features`` takes)."""
    dates = list(dates)
    table = sun_by_date(lat, lon, tz, dates)
    table.index = pd.Index(dates)
    return table


# --------------------------------------------------------------------------- fitting a station's day models

def fit_station_day_models(frame: pd.DataFrame, latitude: float, longitude: float, tz: str, day: dt.date, *,
                           outlook_highs: dict[dt.date, float] | None = None,
                           history_days: int = FIT_HISTORY_DAYS) -> tuple[dict, dict | None]:
    """Fit a station's day-maximum regression and diurnal coefficients from its readings before ``day``.

    Parameters
    ----------
    frame : pandas.DataFrame
        The station's readings (aware UTC index; ``air_temp_c``, ``dew_point_c``
        or ``rel_humidity_pct``, optional ``cloud_cover_pct``, ``wind_speed_ms``).
        Readings from local midnight of ``day`` on are ignored.
    latitude, longitude : float
        The station's position [degrees].
    tz : str
        The station's IANA zone.
    day : date
        The day the models are for (local).
    outlook_highs : dict of date to float, optional
        Past outlook highs of the station [°C]: their misses against the
        observed maxima give the outlook's range.
    history_days : int
        Days of history used at most.

    Returns
    -------
    max_params : dict
        :func:`advisory.forecast.daytime.fit_max_temp_model` output plus
        ``fitted_for`` (ISO date), ``lead_h`` and, with enough past outlooks,
        ``outlook_residual_q10_c``, ``outlook_residual_q50_c``,
        ``outlook_residual_q90_c`` (outlook minus observed maximum),
        ``outlook_residual_mae_c`` and ``outlook_n``.  ``coefficients`` is
        empty when the history is too short.
    diurnal : dict or None
        :class:`advisory.forecast.daytime.DiurnalParams` as a dict plus
        ``rmse_c`` (daytime, on the fitting days) and ``n_days``; and the
        anchored curve's ``day_shapes``
        (:meth:`advisory.forecast.dayshape.DayShapes.to_dict`, the defaults
        when too few days have a morning reading), ``day_shape_rmse_c``
        (its miss after the morning reading from sunrise to sunset, None for
        the defaults) and ``day_shape_days`` (days with a morning reading).
        None when fewer than 20 days allow a fit.
    """
    end = sun.local_midnight_utc(day, tz)
    start = end - pd.Timedelta(days=history_days)
    hist = frame[(frame.index >= start) & (frame.index < end)] if len(frame) else frame
    if "air_temp_c" in hist:
        hist = hist[hist["air_temp_c"].notna()]
    if len(hist) == 0:
        params = daytime.fit_max_temp_model(_empty_features())
        params.update(fitted_for=day.isoformat(), lead_h=MORNING_LEAD_H, outlook_n=0)
        return params, None
    first = hist.index.min().tz_convert(tz).date()
    dates = [d.date() for d in pd.date_range(first, day - dt.timedelta(days=1), freq="D")]
    sun_table = _station_sun(latitude, longitude, tz, dates)
    feats = daytime.morning_features(hist, sun_table[["sunrise", "sunset"]], tz, lead_h=MORNING_LEAD_H,
                                     tolerance_h=MORNING_TOLERANCE_H, min_obs_per_day=MIN_OBS_PER_DAY)
    params = daytime.fit_max_temp_model(feats)
    params.update(fitted_for=day.isoformat(), lead_h=MORNING_LEAD_H, outlook_n=0)
    if outlook_highs:
        obs_max = feats["max_temp_c"]
        pairs = [(h, obs_max.get(d)) for d, h in outlook_highs.items() if d in obs_max.index]
        res = np.array([h - o for h, o in pairs if o is not None and np.isfinite(o) and np.isfinite(h)])
        if len(res) >= MIN_OUTLOOK_PAIRS:
            params.update(outlook_residual_q10_c=float(np.quantile(res, 0.1)),
                          outlook_residual_q50_c=float(np.quantile(res, 0.5)),
                          outlook_residual_q90_c=float(np.quantile(res, 0.9)),
                          outlook_residual_mae_c=float(np.mean(np.abs(res))), outlook_n=int(len(res)))
    return params, _fit_diurnal(hist, sun_table, tz)


def _empty_features() -> pd.DataFrame:
    cols = ["issued_at", *daytime.MORNING_FEATURES, "max_so_far_c", "max_temp_c"]
    return pd.DataFrame({c: pd.Series(dtype=float) for c in cols})


def _fit_diurnal(hist: pd.DataFrame, sun_table: pd.DataFrame, tz: str) -> dict | None:
    """Calibrate the diurnal curve's lag and sunset fraction on a station's hourly readings."""
    s = hist["air_temp_c"].dropna()
    s = s[~s.index.duplicated(keep="first")].sort_index()
    local_dates = s.index.tz_convert(tz).date
    daily = s.groupby(local_dates).agg(["min", "max", "count"])
    dates = [d for d in sun_table.index if d in daily.index]
    if len(dates) < 20:
        return None
    daily = daily.reindex(dates)
    ok = daily["count"] >= MIN_OBS_PER_DAY
    tmin = daily["min"].where(ok).to_numpy(float)
    tmax = daily["max"].where(ok).to_numpy(float)
    nxt = np.r_[tmin[1:], np.nan]
    mid = daytime.to_hours(pd.DatetimeIndex([sun.local_midnight_utc(d, tz) for d in dates]))
    mid_next = daytime.to_hours(pd.DatetimeIndex([sun.local_midnight_utc(d + dt.timedelta(days=1), tz)
                                                  for d in dates]))
    times = mid[:, None] + np.arange(25.0)[None, :]
    inside = times < mid_next[:, None]
    grid = pd.DatetimeIndex(pd.to_datetime(np.round(times.ravel() * 3600.0), unit="s", utc=True))
    obs = s.reindex(grid, method="nearest", tolerance=pd.Timedelta(minutes=10)).to_numpy(float)
    obs = np.where(inside, obs.reshape(times.shape), np.nan)
    st = sun_table.loc[dates]
    sr, ss, noon = (daytime.to_hours(pd.DatetimeIndex(st[c])) for c in ("sunrise", "sunset", "solar_noon"))
    keep = np.isfinite(tmin) & np.isfinite(tmax) & np.isfinite(sr) & np.isfinite(ss)
    if keep.sum() < 20:
        return None
    params, rmse = daytime.calibrate_diurnal_params(times[keep], obs[keep], tmin[keep], tmax[keep], sr[keep],
                                                    ss[keep], noon[keep], next_min_temp_c=nxt[keep])
    if not np.isfinite(rmse):
        return None
    cloud = None
    if "cloud_cover_pct" in hist:
        c = hist["cloud_cover_pct"]
        c = c[~c.index.duplicated(keep="first")].sort_index()
        cloud = c.reindex(grid, method="nearest", tolerance=pd.Timedelta(minutes=10)).to_numpy(float)
        cloud = np.where(inside, cloud.reshape(times.shape), np.nan)
    anc = dayshape.morning_anchor(times[keep], obs[keep], sr[keep], lead_h=MORNING_LEAD_H,
                                  tolerance_h=MORNING_TOLERANCE_H,
                                  cloud_cover_pct=None if cloud is None else cloud[keep])
    shapes, shape_rmse = dayshape.calibrate_day_shapes(
        times[keep], obs[keep], tmax[keep], sr[keep], ss[keep], noon[keep], anc["anchor_time"],
        anc["anchor_temp_c"], next_min_temp_c=nxt[keep], min_temp_c=tmin[keep], max_so_far_c=anc["max_so_far_c"],
        cloud_cover_pct=anc["cloud_cover_pct"])
    fitted = bool(np.isfinite(shape_rmse))
    return {**params.to_dict(), "rmse_c": float(rmse), "n_days": int(keep.sum()),
            "day_shapes": shapes.to_dict(), "day_shape_rmse_c": float(shape_rmse) if fitted else None,
            "day_shape_days": int(np.isfinite(anc["anchor_time"]).sum()) if fitted else 0}


def _usable_rows(session: Session, station_ids: Sequence[int], kind: str, day: dt.date) -> dict[int, Calibration]:
    """Per station, the calibration of ``kind`` fitted for the latest day not after ``day``.

    Only rows fitted recently enough to be fresh are looked at (a row for day X
    is made on X's run or later, so ``fitted_at`` before ``day`` minus
    :data:`REFIT_AFTER_DAYS` means a stale model).  Rows fitted for later days
    (made when a later day ran first) are never used for an earlier one.
    """
    if not station_ids:
        return {}
    since = pd.Timestamp(day - dt.timedelta(days=REFIT_AFTER_DAYS + 1)).tz_localize("UTC").to_pydatetime()
    best: dict[int, tuple[tuple[dt.date, int], Calibration]] = {}
    for r in session.scalars(select(Calibration).where(Calibration.kind == kind,
                                                       Calibration.station_id.in_(list(station_ids)),
                                                       Calibration.fitted_at >= since)):
        text = (r.params or {}).get("fitted_for")
        if not text or dt.date.fromisoformat(text) > day:
            continue
        rank = (dt.date.fromisoformat(text), r.id)
        if r.station_id not in best or rank > best[r.station_id][0]:
            best[r.station_id] = (rank, r)
    return {sid: r for sid, (_, r) in best.items()}


def needs_refit(row: Calibration | None, day: dt.date) -> bool:
    """Whether a station's stored day-maximum regression must be refitted before ``day``.

    Yes when there is none, when it was fitted for a later day (a rerun of a
    past day must not use later readings), when it could not be fitted and a
    day has passed since, or when it is older than :data:`REFIT_AFTER_DAYS`.
    """
    if row is None:
        return True
    text = (row.params or {}).get("fitted_for")
    if not text:
        return True
    fitted_for = dt.date.fromisoformat(text)
    if fitted_for > day:
        return True
    if not (row.params or {}).get("coefficients"):
        return fitted_for < day
    return (day - fitted_for).days > REFIT_AFTER_DAYS


def refit_day_models(session: Session, stations: Sequence[Station], day: dt.date, now: dt.datetime,
                     *, chunk: int = 20) -> dict[int, tuple[dict, dict | None]]:
    """Fit and store (``Calibration`` kinds ``day_max`` and ``diurnal``) the day models of ``stations``.

    Returns ``{station_id: (max_params, diurnal_params_or_None)}``.
    """
    out: dict[int, tuple[dict, dict | None]] = {}
    stations = list(stations)
    end = pd.Timestamp(day).tz_localize("UTC") + pd.Timedelta(hours=15)
    start = end - pd.Timedelta(days=FIT_HISTORY_DAYS + 2)
    for k in range(0, len(stations), chunk):
        part = stations[k:k + chunk]
        ids = [s.id for s in part]
        obs = load_observations_many(session, ids, start, end, columns=_OBS_COLUMNS)
        past = defaultdict(dict)
        for o in session.scalars(select(Outlook).where(Outlook.station_id.in_(ids), Outlook.day < day,
                                                       Outlook.day >= day - dt.timedelta(days=FIT_HISTORY_DAYS))):
            past[o.station_id][o.day] = float(o.high_c)
        for st in part:
            params, diurnal = fit_station_day_models(obs[st.id], st.latitude, st.longitude, st.timezone, day,
                                                     outlook_highs=past.get(st.id))
            session.add(Calibration(station_id=st.id, kind="day_max", fitted_at=now,
                                    training_nights=int(params.get("n_days", 0)), params=params))
            if diurnal is not None:
                session.add(Calibration(station_id=st.id, kind="diurnal", fitted_at=now,
                                        training_nights=int(diurnal["n_days"]),
                                        params={**diurnal, "fitted_for": day.isoformat()}))
            out[st.id] = (params, diurnal)
    session.flush()
    return out
