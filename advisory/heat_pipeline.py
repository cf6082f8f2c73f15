"""One heat day for a set of blocks: the day's high, the hourly curve, crop and crew heat, notices.

The morning counterpart of the frost night in :mod:`advisory.pipeline`, and
built from the same parts: blocks load with :func:`advisory.pipeline._load_blocks`,
forecasts and notices are stored with :func:`advisory.pipeline._store` (the heat
notice of a block and day is made once; a rerun sends nothing), runs are
recorded with :func:`advisory.pipeline._start_run` / :func:`advisory.pipeline._mark_run`
and notices are delivered with :func:`advisory.pipeline._deliver`.

How a block's day is assessed (:func:`assess_day`), all blocks as arrays:

1. **Sun times** of the local day: sunrise, solar noon, sunset, next sunrise.
   Where the sun does not rise at all there is no heat note
   (``no_night`` status); where it does not set, the curve uses the polar
   fallback of :func:`advisory.forecast.daytime.diurnal_temperature_c`.
2. **The day's high**, in this order:

   * the **outlook** the grower imported for the block's station and date
     (``advisory outlook import``); when ten or more past outlook days can be
     checked against the station's readings, their misses set the range and
     correct the centre (median miss), else the outlook's high is taken as is
     with +-2 °C for the 80 % range (this tool's assumption, see
     :data:`OUTLOOK_RESIDUAL_Q_C`);
   * else an **estimate from the morning reading** (the first at or after
     sunrise + 2 h) with the station's regression
     (:func:`advisory.forecast.daytime.fit_max_temp_model`), refitted from the
     station's history when missing or older than :data:`REFIT_AFTER_DAYS`
     and stored as a ``Calibration`` row of kind ``day_max``; its range is the
     regression's own out-of-sample miss;
   * else, with too little history for the regression (fewer than 30 complete
     days), **yesterday's maximum carried over** (never below this morning's
     readings), with the range that persistence showed on a year of real
     hourly data (:data:`PERSISTENCE_RESIDUAL_Q_C`).

   An estimated high is flagged (``details["max_estimated"]``,
   ``data_quality["estimated"]``) and the notice says so.
3. **The morning minimum**: the lowest reading from 3 h before sunrise to the
   morning reading; else the outlook's low; else yesterday's minimum; else
   the high minus :data:`ASSUMED_RANGE_C`.  **Dew point**: from the outlook's
   minimum relative humidity at the high; else the morning reading; else the
   latest reading of the last 3 h; else the minimum (FAO-56 eq. 48 [1]_).
4. **Hourly curve** (:func:`advisory.forecast.dayshape.anchored_temperature_c`):
   drawn through this morning's reading (the same one the regression reads),
   rising to the high after solar noon and falling toward the sunset
   temperature, with the shapes fitted on the station's own days by cloud class
   (``day_shapes`` of the ``Calibration`` kind ``diurnal``, fitted beside the
   regression when 20 or more days of readings allow) or
   :data:`advisory.forecast.dayshape.DEFAULT_SHAPES`.  Hours already read
   (nearest reading within 10 min, up to the morning reading) show as read;
   without a morning reading the curve rises from the minimum at sunrise.
   The 10th and 90th percentile curves use the high's range.
5. **Crop heat and crew heat** (:mod:`advisory.risk.heat`): sunburn hours,
   evaporative cooling start, stop and water on blocks with over-tree
   sprinklers, heat index, WBGT estimate, safer hours for heavy work.  The
   block's level is the higher of the crop's and the crew's.

Each morning run first checks the forecasts of the days before
(:func:`check_heat_days`, by hand :func:`verify_day`): the forecast high
against the highest reading of the block's station from sunrise to sunset,
stored once as a ``Verification`` of kind ``heat``; ``advisory verify report``
turns these into the skill to date.

References
----------
.. [1] Allen, R. G., Pereira, L. S., Raes, D. & Smith, M. (1998) Crop
   evapotranspiration. FAO Irrigation and Drainage Paper 56, eq. 48 (dew
   point near the daily minimum where no humidity data exist).
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import logging
import math
from collections import defaultdict
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd
from sqlalchemy import exists, func, select
from sqlalchemy.orm import Session, selectinload

from advisory import assessment as asm
from advisory import settings as settings_mod
from advisory.errors import InputError
from advisory.forecast import dayshape, daytime
from advisory.ingest.observations import load_observations_many
from advisory.ingest.outlook import read_outlook_csv
from advisory.notices import words as w
from advisory.physics import moisture, sun
from advisory.pipeline import (
    RunResult,
    _chunked,
    _deliver,
    _load_blocks,
    _mark_run,
    _pending_notices,
    _recent_verification,
    _start_run,
    _store,
)
from advisory.risk import heat as risk_heat
from advisory.store.schema import Block, Calibration, Farm, Forecast, Notice, Outlook, Station, Verification

log = logging.getLogger("advisory.heat_pipeline")

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


def _local_midnight_utc(day: dt.date, tz: str) -> pd.Timestamp:
    return pd.Timestamp(day).tz_localize(tz).tz_convert("UTC")


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
    end = _local_midnight_utc(day, tz)
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
    mid = daytime.to_hours(pd.DatetimeIndex([_local_midnight_utc(d, tz) for d in dates]))
    mid_next = daytime.to_hours(pd.DatetimeIndex([_local_midnight_utc(d + dt.timedelta(days=1), tz)
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


# --------------------------------------------------------------------------- the stations' morning

#: Columns of :func:`morning_states`.
MORNING_COLUMNS = ("issued_at", *daytime.MORNING_FEATURES, "max_so_far_c", "max_temp_c", "early",
                   "morning_min_c", "prev_min_c", "recent_dew_point_c", "latest_obs")
_OBS = ("air_temp_c", "dew_point_c", "cloud_cover_pct", "wind_speed_ms")


def _epoch_day(local_ns: np.ndarray) -> np.ndarray:
    return np.floor_divide(local_ns, 86_400 * 10**9)


def morning_states(obs: dict[int, pd.DataFrame], station_ids: Sequence[int], latitude, longitude, tz,
                   day: dt.date, *, cutoff: pd.Timestamp | None = None,
                   lead_h: float = MORNING_LEAD_H, tolerance_h: float = MORNING_TOLERANCE_H,
                   min_obs_per_day: int = MIN_OBS_PER_DAY) -> pd.DataFrame:
    """The morning of ``day`` at many stations in one pass, as the day-maximum regression sees it.

    The predictors are those of :func:`advisory.forecast.daytime.morning_features`
    (same definitions: the first reading at or after sunrise + ``lead_h`` within
    ``tolerance_h``, the reading at sunrise, yesterday's maximum over a day of at
    least ``min_obs_per_day`` readings ...) computed for all stations together
    with ``merge_asof(by=station)`` instead of one call per station.  When no
    reading at or after sunrise + ``lead_h`` has arrived yet (a run right at that
    time), the latest reading from sunrise + 1 h on stands in (``early`` True).

    Parameters
    ----------
    obs : dict of int to DataFrame
        Readings per station id (aware UTC index), e.g. from
        :func:`advisory.ingest.observations.load_observations_many`; they should
        cover yesterday and this morning.  Readings without an air temperature
        are ignored.
    station_ids : sequence of int
    latitude, longitude : array_like
        Station positions [degrees], aligned with ``station_ids``.
    tz : array_like of str
        Station zones.
    day : date
        Local date.
    cutoff : Timestamp, optional
        Readings at or after it are ignored.

    Returns
    -------
    pandas.DataFrame
        Indexed by station id, columns :data:`MORNING_COLUMNS`: ``issued_at``
        (time of the morning reading), the predictors, ``max_so_far_c``,
        ``max_temp_c`` (NaN: the day is not over), ``early``,
        ``morning_min_c`` (lowest reading from 3 h before sunrise to the morning
        reading), ``prev_min_c`` (yesterday's lowest), ``recent_dew_point_c``
        (mean of the last 3 h of readings) and ``latest_obs``.
    """
    ids = np.asarray(list(station_ids), dtype=np.int64)
    n = len(ids)
    tzs = np.broadcast_to(np.asarray(tz, dtype=object), (n,))
    out = pd.DataFrame(index=pd.Index(ids, name="station_id"))
    for c in MORNING_COLUMNS:
        out[c] = np.nan
    out["issued_at"] = pd.Series(pd.NaT, index=out.index, dtype="datetime64[ns, UTC]")
    out["latest_obs"] = pd.Series(pd.NaT, index=out.index, dtype="datetime64[ns, UTC]")
    out["early"] = False
    if n == 0:
        return out
    prev = day - dt.timedelta(days=1)
    sun_cur = sun_by_date(latitude, longitude, tzs, [day] * n)
    sun_prev = sun_by_date(latitude, longitude, tzs, [prev] * n)
    parts: dict[str, list[np.ndarray]] = {c: [] for c in ("time", "k", *_OBS)}
    for k, sid in enumerate(ids.tolist()):       # gathering arrays only; the work below is one pass
        f = obs.get(sid)
        if f is None or not len(f):
            continue
        m = len(f)
        parts["time"].append(f.index.tz_convert("UTC").as_unit("ns").asi8)
        parts["k"].append(np.full(m, k, dtype=np.int64))
        values = f.to_numpy(dtype=float, na_value=np.nan)
        where = f.columns.get_indexer([*_OBS, "rel_humidity_pct"])
        for c, j in zip(_OBS, where, strict=False):
            parts[c].append(values[:, j] if j >= 0 else np.full(m, np.nan))
        if where[1] < 0 and where[-1] >= 0:      # no dew point column: from relative humidity
            parts["dew_point_c"][-1] = np.asarray(moisture.dew_point_c_from_rh(
                parts["air_temp_c"][-1], values[:, where[-1]]), float)
    if not parts["time"]:
        return out
    cat = {c: np.concatenate(v) for c, v in parts.items()}
    keep = np.isfinite(cat["air_temp_c"])
    if cutoff is not None:
        keep &= cat["time"] < pd.Timestamp(cutoff).as_unit("ns").value
    if not keep.any():
        return out
    df = pd.DataFrame({c: v[keep] for c, v in cat.items() if c != "time"})
    df["sid"] = ids[df["k"].to_numpy()]
    times_utc = pd.DatetimeIndex(cat["time"][keep]).tz_localize("UTC")
    df["time"] = times_utc
    # local calendar day of each reading (one conversion per zone)
    row_tz = tzs[df["k"].to_numpy()]
    ld = np.empty(len(df), dtype=np.int64)
    for z in set(tzs.tolist()):
        m = row_tz == z
        if m.any():
            ld[m] = _epoch_day(times_utc[m].tz_convert(z).tz_localize(None).as_unit("ns").asi8)
    df["_ld"] = ld
    df = df.sort_values(["sid", "time"], kind="stable")
    df["_cummax"] = df.groupby(["sid", "_ld"])["air_temp_c"].cummax()
    daily = df.groupby(["sid", "_ld"])["air_temp_c"].agg(["max", "min", "count"])
    right = df.sort_values("time", kind="stable").reset_index(drop=True)
    tol = pd.Timedelta(hours=tolerance_h)
    day_num = (day - dt.date(1970, 1, 1)).days

    def asof(when: pd.Series, direction: str) -> pd.DataFrame:
        left = pd.DataFrame({"when": pd.DatetimeIndex(when).as_unit("ns"), "sid": ids, "_row": np.arange(n)})
        left = left.dropna(subset=["when"]).sort_values("when", kind="stable")
        got = pd.merge_asof(left, right, left_on="when", right_on="time", by="sid", direction=direction,
                            tolerance=tol)
        return got.set_index("_row").reindex(np.arange(n))

    sr, ss = pd.DatetimeIndex(sun_cur["sunrise"]), pd.DatetimeIndex(sun_cur["sunset"])
    lead = pd.Timedelta(hours=lead_h)
    morning = asof(pd.Series(sr + lead), "forward")
    at_sunrise = asof(pd.Series(sr), "backward")
    morning_prev = asof(pd.Series(pd.DatetimeIndex(sun_prev["sunrise"]) + lead), "forward")
    latest = pd.DatetimeIndex(right.groupby("sid")["time"].max().reindex(ids))
    # a run right at sunrise + 2 h: the latest reading from sunrise + 1 h on stands in
    missing = (morning["air_temp_c"].isna().to_numpy() & sr.notna()
               & np.asarray(latest >= sr + pd.Timedelta(hours=EARLY_READING_MIN_LEAD_H)))
    if missing.any():
        again = asof(pd.Series(latest.where(missing)), "forward")
        morning = pd.concat([morning[~missing], again[missing]]).sort_index()
    out["early"] = missing
    out["issued_at"] = pd.Series(pd.DatetimeIndex(morning["time"]), index=out.index)
    for c in _OBS:
        out[c] = morning[c].to_numpy(float)
    out["day_length_h"] = ((ss - sr) / pd.Timedelta(hours=1)).to_numpy(float)
    out["morning_rise_c"] = morning["air_temp_c"].to_numpy(float) - at_sunrise["air_temp_c"].to_numpy(float)
    same_day = morning["_ld"].to_numpy(float) == day_num
    out["max_so_far_c"] = np.where(same_day, morning["_cummax"].to_numpy(float), np.nan)
    key_prev = pd.MultiIndex.from_arrays([ids, np.full(n, day_num - 1)])
    prev_stats = daily.reindex(key_prev)
    prev_max = prev_stats["max"].where(prev_stats["count"] >= min_obs_per_day).to_numpy(float)
    out["prev_max_temp_c"] = prev_max
    out["prev_day_rise_c"] = prev_max - morning_prev["air_temp_c"].to_numpy(float)
    out["prev_min_c"] = prev_stats["min"].to_numpy(float)
    out["max_temp_c"] = np.nan
    out["latest_obs"] = pd.Series(latest, index=out.index)
    # lowest reading from 3 h before sunrise to the morning reading; mean dew point of the last 3 h
    pos = pd.Series(np.arange(n), index=ids)
    k = pos.reindex(right["sid"].to_numpy()).to_numpy()
    t = pd.DatetimeIndex(right["time"])
    win = (t >= (sr - pd.Timedelta(hours=3))[k]) & (t <= pd.DatetimeIndex(out["issued_at"])[k])
    out["morning_min_c"] = right.loc[win, ["sid", "air_temp_c"]].groupby("sid")["air_temp_c"].min().reindex(ids)\
        .to_numpy(float)
    recent = t >= latest[k] - pd.Timedelta(hours=3)
    out["recent_dew_point_c"] = right.loc[recent, ["sid", "dew_point_c"]].groupby("sid")["dew_point_c"].mean()\
        .reindex(ids).to_numpy(float)
    return out


# --------------------------------------------------------------------------- the day's high per station

@dataclass
class _High:
    p50: float = math.nan
    p10: float = math.nan
    p90: float = math.nan
    source: str = ""            # outlook | ridge-rise-v1 | persistence | ""
    estimated: bool = False
    text: str = ""              # how it was made, for the notice
    flag: str = ""              # quality flag (estimates only)
    training_days: int = 0


def _high_for(station: Station, outlook: Outlook | None, morning: pd.DataFrame, max_params: dict | None,
              units: str) -> _High:
    """The day's high at one station from its outlook, its regression or persistence.

    ``morning`` is the station's one-row slice of :func:`morning_states`.
    """
    air = float(morning["air_temp_c"].iat[0])
    h = _High()
    if outlook is not None and outlook.high_c is not None and np.isfinite(outlook.high_c):
        q10, q50, q90 = OUTLOOK_RESIDUAL_Q_C[0], 0.0, OUTLOOK_RESIDUAL_Q_C[1]
        own = (max_params or {}).get("outlook_n", 0) >= MIN_OUTLOOK_PAIRS
        if own:
            q10, q50, q90 = (max_params["outlook_residual_q10_c"], max_params.get("outlook_residual_q50_c", 0.0),
                             max_params["outlook_residual_q90_c"])
        hi = float(outlook.high_c)
        # residual = outlook - observed, so the observed high lies in [hi - q90, hi - q10], median hi - q50
        h.p50, h.p10, h.p90 = hi - q50, hi - q90, hi - q10
        h.source = "outlook"
        h.text = (f"outlook for {outlook.day.isoformat()} ({w.temp(hi, units)}, imported "
                  f"{outlook.imported_at:%Y-%m-%d}); "
                  + (f"centre and range from this station's {max_params['outlook_n']} past outlook days "
                     f"(median miss {w.temp_delta(q50, units, signed=True)})"
                     if own else "range from an assumed outlook miss of about 2 °C"))
        return h
    if max_params and max_params.get("coefficients") and np.isfinite(air):
        pred = daytime.predict_max_temp(max_params, morning)
        estimate = float(pred["max_temp_c"].iat[0])
        if np.isfinite(estimate):
            lo, hi = float(pred["low_c"].iat[0]), float(pred["high_c"].iat[0])
            h.p50 = estimate
            h.p10 = lo if np.isfinite(lo) else estimate - REGRESSION_HALF_RANGE_C
            h.p90 = hi if np.isfinite(hi) else estimate + REGRESSION_HALF_RANGE_C
            h.source, h.estimated = "ridge-rise-v1", True
            h.training_days = int(max_params.get("n_days", 0))
            when = pd.Timestamp(morning["issued_at"].iat[0]).tz_convert(station.timezone)
            mae = max_params.get("residual_mae_c")
            h.text = (f"estimated from the {when:%H:%M} reading with this station's regression "
                      f"(fitted on {h.training_days} days"
                      + (f", typical miss {w.temp_delta(mae, units)}" if mae else "") + ")")
            h.flag = ("No outlook for this day: the high is estimated from this morning's "
                      f"{when:%H:%M} reading with {station.code}'s own regression"
                      + (f" (typical miss {w.temp_delta(mae, units)})" if mae else "") + ".")
            if bool(morning["early"].iat[0]):
                h.flag += " The reading came before sunrise + 2 h, so the estimate may run low."
            return h
    prev_max = float(morning["prev_max_temp_c"].iat[0])
    if np.isfinite(prev_max):
        base = prev_max
        floor = max((v for v in (float(morning["max_so_far_c"].iat[0]), air) if np.isfinite(v)), default=-np.inf)
        p50 = max(base, floor)
        q10, q90 = PERSISTENCE_RESIDUAL_Q_C
        h.p50, h.p10, h.p90 = p50, max(p50 - q90, floor), p50 - q10
        h.source, h.estimated = "persistence", True
        n = int((max_params or {}).get("n_days", 0))
        why = (f"{station.code}'s own regression is not fitted yet (it needs 30 complete days of readings; "
               f"it has {n})")
        h.text = f"estimated: yesterday's maximum carried over ({why})"
        kept = ", kept at or above this morning's readings" if floor > base else ""
        h.flag = (f"No outlook for this day: the high is an estimate, yesterday's maximum "
                  f"({w.temp(base, units)}) carried over{kept}, because {why}. Typical miss of this fallback: "
                  f"about {w.temp_delta(PERSISTENCE_MAE_C, units)}. Import an outlook "
                  "(`advisory outlook import`) for a better high.")
        return h
    return h


# --------------------------------------------------------------------------- assessment

def _latest_outlooks(session: Session, station_ids: Sequence[int], days: Sequence[dt.date]
                     ) -> dict[tuple[int, dt.date], Outlook]:
    if not station_ids:
        return {}
    rows = session.scalars(select(Outlook).where(Outlook.station_id.in_(list(station_ids)),
                                                 Outlook.day.in_(list(days))))
    return {(o.station_id, o.day): o for o in rows}


def _cooling_equipment(b: Block) -> dict | None:
    for e in b.equipment:
        if e.kind == "overtree_sprinkler":
            return dict(e.params or {})
    return None


def assess_day(session: Session, blocks: list[Block], day: dt.date, *, as_of: dt.datetime | None = None,
               refit: bool = True, now: dt.datetime | None = None) -> list[asm.Assessment]:
    """Assess heat on ``day`` for ``blocks`` (reads; with ``refit`` it adds station calibrations).

    Parameters
    ----------
    session : Session
    blocks : list of Block
        Blocks with their farm, station and equipment loaded.
    day : date
        The local date of the day.
    as_of : datetime, optional
        The run's clock: readings at or after it are not used.  Default: the
        readings up to the morning reading (first at or after sunrise + 2 h).
    refit : bool, default True
        Fit missing or stale station models (:func:`needs_refit`) and add the
        ``Calibration`` rows to the session (the caller commits).
    now : datetime, optional
        Time stamp of new calibrations (default ``as_of`` or the real time).

    Returns
    -------
    list of Assessment
        One per block (kind ``"heat"``), in the order given.
    """
    if not blocks:
        return []
    now = now or as_of or dt.datetime.now(dt.UTC)
    cutoff = _ts(as_of)
    n = len(blocks)
    lat = np.array([b.latitude for b in blocks], float)
    lon = np.array([b.longitude for b in blocks], float)
    tzs = np.array([b.farm.timezone for b in blocks], dtype=object)
    elev = np.array([b.elevation_m for b in blocks], float)
    table = sun_by_date(lat, lon, tzs, [day] * n)
    sunrise = pd.DatetimeIndex(table["sunrise"])
    sunset = pd.DatetimeIndex(table["sunset"])
    issue_nominal = [(_ts(sunrise[i]) + pd.Timedelta(hours=MORNING_LEAD_H)) if not pd.isna(sunrise[i])
                     else pd.Timestamp(dt.datetime.combine(day, POLAR_ISSUE_LOCAL), tz=tzs[i]).tz_convert("UTC")
                     for i in range(n)]

    stations = {b.station_id: b.station for b in blocks}
    sids = sorted(stations)
    start = pd.Timestamp(day - dt.timedelta(days=2)).tz_localize("UTC")
    end = max(issue_nominal) + pd.Timedelta(hours=MORNING_TOLERANCE_H, minutes=1)
    if cutoff is not None:
        end = min(end, cutoff) if cutoff > start else start + pd.Timedelta(seconds=1)
    obs = load_observations_many(session, sids, start, end, columns=_OBS_COLUMNS)
    outlooks = _latest_outlooks(session, sids, [day, day + dt.timedelta(days=1)])

    max_rows = _usable_rows(session, sids, "day_max", day)
    max_params = {sid: r.params for sid, r in max_rows.items()}
    diurnal_params = {sid: r.params for sid, r in _usable_rows(session, sids, "diurnal", day).items()}
    if refit:
        stale = [stations[s] for s in sids if needs_refit(max_rows.get(s), day)]
        if stale:
            for sid, (p, d) in refit_day_models(session, stale, day, now).items():
                max_params[sid] = p
                if d is not None:
                    diurnal_params[sid] = {**d, "fitted_for": day.isoformat()}

    units_by_station = {b.station_id: b.farm.units for b in blocks}
    st_list = [stations[x] for x in sids]
    ms = morning_states(obs, sids, [x.latitude for x in st_list], [x.longitude for x in st_list],
                        [x.timezone for x in st_list], day, cutoff=cutoff)
    highs = {sid: _high_for(stations[sid], outlooks.get((sid, day)), ms.loc[[sid]], max_params.get(sid),
                            units_by_station[sid]) for sid in sids}

    # Per station: the high, then the minimum, the dew point and the next minimum from the first source
    # that has a value (see the module docstring for the order).
    def col(values):
        return np.array([np.nan if v is None else float(v) for v in values], float)

    ol_today = [outlooks.get((x, day)) for x in sids]
    ol_next = [outlooks.get((x, day + dt.timedelta(days=1))) for x in sids]
    s_tx50 = col(highs[x].p50 for x in sids)
    tn_all = np.vstack([ms["morning_min_c"].to_numpy(float), col(o and o.low_c for o in ol_today),
                        ms["prev_min_c"].to_numpy(float), s_tx50 - ASSUMED_RANGE_C])
    tn_names = np.array(["this morning's readings", "the outlook's low", "yesterday's minimum (assumed)",
                         f"assumed {ASSUMED_RANGE_C:.0f} °C below the high", ""], dtype=object)
    s_tn, tn_k = _first_finite(tn_all)
    rh = col(o and o.min_rel_humidity_pct for o in ol_today)
    with np.errstate(invalid="ignore"):
        td_outlook = np.where(np.isfinite(rh) & np.isfinite(s_tx50),
                              daytime.dew_point_from_min_rh_c(s_tx50, np.where(np.isfinite(rh), rh, 50.0)), np.nan)
    td_all = np.vstack([td_outlook, ms["dew_point_c"].to_numpy(float), ms["recent_dew_point_c"].to_numpy(float),
                        s_tn])
    td_names = np.array(["the outlook's minimum humidity", "this morning's reading", "the latest readings",
                         "assumed equal to the minimum (FAO-56 eq. 48)", ""], dtype=object)
    s_td, td_k = _first_finite(td_all)
    s_tn = np.minimum(s_tn, s_tx50)
    s_td = np.minimum(s_td, s_tn)       # a conserved dew point cannot exceed the day's minimum
    s_tp = col(o and o.low_c for o in ol_next)

    # ... and per block: its station's values.
    pos = {x: k for k, x in enumerate(sids)}
    k_of = np.array([pos[b.station_id] for b in blocks])
    tx50 = s_tx50[k_of]
    tx10 = col(highs[x].p10 for x in sids)[k_of]
    tx90 = col(highs[x].p90 for x in sids)[k_of]
    tn, td, tp = s_tn[k_of], s_td[k_of], s_tp[k_of]
    tn_src, td_src = tn_names[tn_k][k_of], td_names[td_k][k_of]
    # the morning reading each block's curve is drawn through (NaN: none yet)
    morning = {"anchor_t": daytime.to_hours(pd.DatetimeIndex(ms["issued_at"]))[k_of],
               "anchor_c": ms["air_temp_c"].to_numpy(float)[k_of],
               "so_far": ms["max_so_far_c"].to_numpy(float)[k_of],
               "cloud": ms["cloud_cover_pct"].to_numpy(float)[k_of],
               "early": ms["early"].to_numpy(bool)[k_of],
               "station_id": np.array([b.station_id for b in blocks], dtype=np.int64), "obs": obs}
    pressure = np.asarray(moisture.pressure_kpa_from_elevation(elev), float)

    ok = np.isfinite(tx50) & np.isfinite(tn) & np.isfinite(td) & ~table["no_sun"].to_numpy(bool)
    out: list[asm.Assessment] = []
    issued = pd.DatetimeIndex(ms["issued_at"])
    latest_obs = pd.DatetimeIndex(ms["latest_obs"])
    checked = _recent_verification(session, [b.id for b in blocks], day, kind="heat")
    for i, b in enumerate(blocks):
        a = _heat_base(b, day)
        a.verification = checked.get(b.id, [])
        a.sunrise_utc = _py(sunrise[i])
        a.sunset_utc = _py(sunset[i])
        k = k_of[i]
        hgh = highs[b.station_id]
        reading = _ts(issued[k])
        a.reference_time_utc = _py(reading) if reading is not None \
            else _py(min(issue_nominal[i], cutoff) if cutoff is not None else issue_nominal[i])
        latest = reading or _ts(latest_obs[k])
        row = ms.iloc[k]
        a.data_quality = {
            "latest_obs_utc": None if latest is None else latest.isoformat(),
            "air_temp_c": _f(row["air_temp_c"]), "dew_point_c": _f(row["dew_point_c"]),
            "wind_speed_ms": _f(row["wind_speed_ms"]), "cloud_cover_pct": _f(row["cloud_cover_pct"]),
            "flags": [hgh.flag] if hgh.flag else [],
            "estimated": {"max": bool(hgh.estimated), "min": bool(tn_k[k] >= 2), "dew_point": bool(td_k[k] >= 3)},
            "sources": {"max": hgh.text, "min": str(tn_src[i]), "dew_point": str(td_src[i])},
        }
        if latest is not None and a.reference_time_utc is not None:
            age = (pd.Timestamp(a.reference_time_utc) - latest) / pd.Timedelta(minutes=1)
            if age > 0:
                a.data_quality["obs_age_min"] = float(age)
        if table["no_sun"].iat[i]:
            a.status = asm.STATUS_NO_NIGHT
            a.reason = "the sun does not rise on this day at this latitude: no heat note"
        elif not ok[i]:
            a.status = asm.STATUS_NO_FORECAST
            a.reason = (f"no outlook for this day and station {b.station.code} has no readings from this "
                        "morning or yesterday to estimate the high from")
        out.append(a)

    idx = np.flatnonzero(ok)
    groups: dict[str, list[int]] = defaultdict(list)
    for i in idx:
        groups[str(tzs[i])].append(int(i))
    for tz, members in groups.items():   # one pass per time zone (a shared local-hour grid)
        _assess_group(blocks, out, np.array(members), tz, day, table, tx10, tx50, tx90, tn, td, tp, pressure,
                      highs, diurnal_params, tn_src, td_src, morning)
    return out


def _heat_base(b: Block, day: dt.date) -> asm.Assessment:
    """The block's identity fields, as :func:`advisory.pipeline._base_assessment` fills them, without the
    frost critical temperatures of the bud stage (meaningless for a heat note, and about 2 ms a block)."""
    return asm.Assessment(kind="heat", farm=b.farm.name, farm_tz=b.farm.timezone, units=b.farm.units,
                          block_id=b.id, block=b.name, station=b.station.code, crop=b.crop, variety=b.variety,
                          stage=b.stage, area_ha=b.area_ha, night=day)


def _first_finite(stack: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per column of ``stack`` (sources x stations): the first finite value and its row (len(stack) if none)."""
    fin = np.isfinite(stack)
    k = np.where(fin.any(axis=0), np.argmax(fin, axis=0), len(stack))
    cols = np.arange(stack.shape[1])
    vals = np.where(k < len(stack), stack[np.minimum(k, len(stack) - 1), cols], np.nan)
    return vals, k


def _day_shapes(params: dict | None) -> dayshape.DayShapes:
    """A station's fitted day shapes from its ``diurnal`` calibration, else the defaults."""
    shapes = (params or {}).get("day_shapes")
    return dayshape.DayShapes.from_dict(shapes) if shapes else dayshape.DEFAULT_SHAPES


#: Readings within this of an hour of the curve show as that hour's value.
GRID_TOLERANCE = pd.Timedelta(minutes=10)


def readings_on_grid(obs: dict[int, pd.DataFrame], station_ids, times: pd.DatetimeIndex,
                     tolerance: pd.Timedelta = GRID_TOLERANCE) -> np.ndarray:
    """Air temperature readings of stations on a shared time grid (nearest reading within ``tolerance``).

    Parameters
    ----------
    obs : dict of int to DataFrame
        Readings per station id (aware UTC index, ``air_temp_c``).
    station_ids : array_like of int
        One station per output row (repeats allowed).
    times : pandas.DatetimeIndex
        The grid (aware).
    tolerance : Timedelta

    Returns
    -------
    ndarray
        Shape ``(len(station_ids), len(times))`` [°C], NaN where no reading is near.
    """
    ids = np.asarray(station_ids, dtype=np.int64)
    uniq, inv = np.unique(ids, return_inverse=True)
    h = len(times)
    grid = np.full((len(uniq), h), np.nan)
    parts_t, parts_k, parts_v = [], [], []
    for k, sid in enumerate(uniq.tolist()):      # gathering arrays only; the matching is one merge
        f = obs.get(sid)
        if f is None or not len(f) or "air_temp_c" not in f:
            continue
        v = f["air_temp_c"].to_numpy(dtype=float, na_value=np.nan)
        m = np.isfinite(v)
        parts_t.append(f.index.tz_convert("UTC").as_unit("ns").asi8[m])
        parts_k.append(np.full(int(m.sum()), k, dtype=np.int64))
        parts_v.append(v[m])
    if parts_t and h:
        right = pd.DataFrame({"time": pd.DatetimeIndex(np.concatenate(parts_t)).tz_localize("UTC"),
                              "k": np.concatenate(parts_k), "v": np.concatenate(parts_v)}).sort_values("time")
        t_ns = pd.DatetimeIndex(times).tz_convert("UTC").as_unit("ns")
        left = pd.DataFrame({"time": np.tile(t_ns, len(uniq)), "k": np.repeat(np.arange(len(uniq)), h),
                             "row": np.arange(len(uniq) * h)}).sort_values("time", kind="stable")
        got = pd.merge_asof(left, right, on="time", by="k", direction="nearest", tolerance=tolerance)
        grid.ravel()[got["row"].to_numpy()] = got["v"].to_numpy(float)
    return grid[inv]


def _curve_model_text(dp: dict | None, anchor: pd.Timestamp | None, early: bool, spent: bool, units: str) -> str:
    """How the hourly curve was drawn, for the notice."""
    fall = "then down toward the sunset temperature of Cesaraccio et al. (2001)"
    if anchor is None:
        s = f"No morning reading: curve drawn from the minimum at sunrise up to the day's high after solar noon, {fall}"
    else:
        s = f"Curve drawn through this morning's {anchor:%H:%M} reading"
        if early:
            s += " (taken before sunrise + 2 h)"
        s += (f"; the day's high was already read before it, so the afternoon rises only a little, {fall}"
              if spent else f", rising to the day's high after solar noon, {fall}")
    shapes = (dp or {}).get("day_shapes")
    miss = (dp or {}).get("day_shape_rmse_c")
    if shapes and miss is not None and math.isfinite(miss):
        n = int(dp.get("day_shape_days") or dp.get("n_days") or 0)
        return (s + f"; its shape fitted on {n} days of this station (typical daytime miss "
                f"{w.temp_delta(miss, units)})")
    if dp and not shapes:
        return s + "; default shapes (this station's own are fitted at its next refit)"
    return s + "; default shapes (this station has too few days of readings to fit its own)"


def _assess_group(blocks, out, idx, tz, day, table, tx10, tx50, tx90, tn, td, tp, pressure, highs,
                  diurnal_params, tn_src, td_src, morning) -> None:
    times = daytime.local_day_hours(day, tz)
    h = len(times)
    sr = pd.DatetimeIndex(table["sunrise"].iloc[idx])
    ss = pd.DatetimeIndex(table["sunset"].iloc[idx])
    noon = pd.DatetimeIndex(table["solar_noon"].iloc[idx])
    nsr = pd.DatetimeIndex(table["next_sunrise"].iloc[idx])
    anchor_t, anchor_c = morning["anchor_t"], morning["anchor_c"]
    so_far, cloud = morning["so_far"], morning["cloud"]
    obs_grid = np.full((len(blocks), h), np.nan)
    obs_grid[idx] = readings_on_grid(morning["obs"], morning["station_id"][idx], times)
    temps = {q: np.full((len(idx), h), np.nan) for q in (10, 50, 90)}
    by_shapes: dict[str, list[int]] = defaultdict(list)
    shape_of: dict[str, dayshape.DayShapes] = {}
    for k, i in enumerate(idx):
        shapes = _day_shapes(diurnal_params.get(blocks[i].station_id))
        key = repr(shapes)
        shape_of[key] = shapes
        by_shapes[key].append(k)
    for key, ks in by_shapes.items():   # one evaluation per distinct set of shapes
        ks = np.array(ks)
        ii = idx[ks]
        for q, tx in ((10, tx10), (50, tx50), (90, tx90)):
            temps[q][ks] = dayshape.anchored_temperature_c(
                times, tn[ii], np.maximum(tx[ii], tn[ii]), sr[ks], ss[ks], noon[ks], anchor_t[ii], anchor_c[ii],
                next_min_temp_c=tp[ii], next_sunrise=nsr[ks], max_so_far_c=so_far[ii], cloud_cover_pct=cloud[ii],
                shapes=shape_of[key], observed_c=obs_grid[ii])
    t50 = temps[50]
    sub = [blocks[i] for i in idx]
    cooling = [_cooling_equipment(b) for b in sub]
    crop = risk_heat.crop_heat(
        times, t50, [b.crop for b in sub], sunrise=sr, sunset=ss, dew_point_c=td[idx],
        has_cooling=[c is not None for c in cooling],
        cooling_rate_mm_h=[float(c.get("rate_mm_h", np.nan)) if c else np.nan for c in cooling],
        area_ha=[b.area_ha for b in sub], pressure_kpa=pressure[idx])
    crew = risk_heat.crew_heat(times, t50, td[idx][:, None], sunrise=sr, sunset=ss,
                               pressure_kpa=pressure[idx][:, None])
    safe = risk_heat.safe_windows(times, crew.heavy_work_ok, sunrise=sr, sunset=ss)
    t_hours = daytime.to_hours(times)
    sr_h = daytime.to_hours(sr)
    ss_h = daytime.to_hours(ss)
    polar = ~(np.isfinite(sr_h) & np.isfinite(ss_h))
    daylight = ((t_hours[None, :] >= sr_h[:, None]) & (t_hours[None, :] <= ss_h[:, None])) | polar[:, None]
    limits = np.array([x[0] for x in risk_heat.CREW_WORK_REST_HEAVY])
    rest_row = np.minimum(np.searchsorted(limits, crew.wbgt_c, side="left"), len(limits) - 1)
    thr = crop.thresholds_c
    sb_mask = (t50 >= thr[:, :1]) & daylight
    level = np.maximum(crop.level, crew.day_level)
    times_py = [t.round("s").to_pydatetime() for t in times]

    for k, i in enumerate(idx):      # filling the result objects (text and lists only)
        b, a = blocks[i], out[i]
        hgh = highs[b.station_id]
        units = b.farm.units
        a.level = risk_heat.LEVELS[int(level[k])]
        a.level_rank = int(level[k])
        a.p10_c, a.p50_c, a.p90_c = float(tx10[i]), float(tx50[i]), float(tx90[i])
        a.model = hgh.source
        a.training_nights = int(hgh.training_days)
        a.critical_source = crop.source[k]
        a.curve = [asm.CurvePoint(time_utc=times_py[j], p50_c=float(t50[k, j]), p10_c=float(temps[10][k, j]),
                                  p90_c=float(temps[90][k, j]), heat_index_c=float(crew.heat_index_c[k, j]),
                                  wbgt_c=float(crew.wbgt_c[k, j]))
                   for j in range(h) if np.isfinite(t50[k, j])]
        hit = np.flatnonzero(sb_mask[k])
        sb_hours = float(crop.hours_above_c[k, 0])
        anchor = (pd.Timestamp(anchor_t[i] * 3600.0, unit="s", tz="UTC").round("s").tz_convert(tz)
                  if np.isfinite(anchor_t[i]) and np.isfinite(anchor_c[i]) else None)
        curve_model = _curve_model_text(
            diurnal_params.get(b.station_id), anchor, bool(morning["early"][i]),
            bool(np.isfinite(so_far[i]) and so_far[i] >= tx50[i] - 0.05), units)
        peak_j = int(np.nanargmax(np.where(np.isfinite(t50[k]), t50[k], -np.inf)))
        what = crop.what[k]
        d = {
            "max_time_utc": times_py[peak_j],
            "max_estimated": bool(hgh.estimated),
            "max_source": hgh.text,
            "min_c": float(tn[i]), "min_source": str(tn_src[i]),
            "dew_point_c": float(td[i]), "dew_point_source": str(td_src[i]),
            "curve_model": curve_model,
            "crop_level": risk_heat.LEVELS[int(crop.level[k])],
            "crew_level": risk_heat.LEVELS[int(crew.day_level[k])],
            "sunburn": {"threshold_c": float(thr[k, 0]), "hours": sb_hours,
                        "start_utc": times_py[hit[0]] if len(hit) else None,
                        "stop_utc": times_py[hit[-1]] if len(hit) else None,
                        "note": (what[:1].upper() + what[1:] + "." if what else "")
                        + f" Thresholds: {crop.source[k]}."},
            "hours_above_c": {risk_heat.LEVELS[j + 1]: float(crop.hours_above_c[k, j]) for j in range(3)},
            "thresholds": [{"label": "damage likely", "value_c": float(thr[k, 1])}],
            "safer_hours": [{"start_utc": _py(s0), "stop_utc": _py(s1)} for s0, s1 in safe[k]],
            "crew_windows": _crew_windows(times_py, rest_row[k], crew, k, daylight[k]),
            "guidance": list(crew.guidance) + (
                [] if safe[k] else ["No daylight hour today is within the safer limit for heavy work: "
                                    "keep heavy work short, rest in shade on the schedule shown."]),
            "peak_heat_index_c": float(crew.peak_heat_index_c[k]), "peak_wbgt_c": float(crew.peak_wbgt_c[k]),
        }
        if crop.notes[k]:
            d["crop_notes"] = list(crop.notes[k])
        a.details = d
        a.cautions = list(crew.cautions)
        cool = cooling[k]
        if cool is not None:
            a.plan = [_cooling_step(crop, k, cool, b, hgh.estimated, units)]


def _crew_windows(times_py, rest_row, crew, k, daylight) -> list[dict]:
    """Daylight runs of hours that need rest breaks, with their heat figures and advice."""
    out = []
    need = (rest_row >= 1) & daylight
    j = 0
    h = len(rest_row)
    while j < h:
        if not need[j]:
            j += 1
            continue
        e = j
        while e + 1 < h and need[e + 1] and rest_row[e + 1] == rest_row[j]:
            e += 1
        lvl = int(np.max(crew.level[k, j:e + 1]))
        stop = times_py[e + 1] if e + 1 < h else times_py[e] + dt.timedelta(hours=1)
        out.append({"start_utc": times_py[j], "stop_utc": stop,
                    "label": w.level_style("heat", risk_heat.LEVELS[lvl]).name,
                    "heat_index_max_c": float(np.nanmax(crew.heat_index_c[k, j:e + 1])),
                    "wbgt_max_c": float(np.nanmax(crew.wbgt_c[k, j:e + 1])),
                    "advice": str(crew.work_rest[k, j])})
        j = e + 1
    return out


def _cooling_step(crop, k: int, cool: dict, b: Block, estimated: bool, units: str) -> asm.ProtectionStep:
    th = risk_heat._thresholds([b.crop])[0]
    start = _ts(crop.cooling_start[k])
    stop = _ts(crop.cooling_stop[k])
    rate = cool.get("rate_mm_h")
    run_h = float(crop.cooling_hours[k])
    advised = start is not None
    q: dict[str, float] = {}
    notes = list(crop.notes[k])
    if advised:
        q["hours"] = run_h
        if np.isfinite(crop.cooling_water_m3[k]):
            q["water_m3"] = float(crop.cooling_water_m3[k])
            notes.append("Water at the system's full rate; run in on/off cycles, the usual way to cool, "
                         "and it takes less.")
            supply = cool.get("water_supply_m3")
            if supply is not None and q["water_m3"] > float(supply):
                notes.append(f"More than the recorded water supply ({w.quantity('water_m3', float(supply), units)}).")
        if rate is not None:
            q["rate_mm_h"] = float(rate)
    else:
        notes.insert(0, f"Not needed today: the air is not forecast to reach {w.temp(th.cooling_start_c, units)}.")
    return asm.ProtectionStep(
        method="evaporative_cooling", advised=advised, start_utc=_py(start), stop_utc=_py(stop),
        start_rule=f"when the air reaches {w.temp(th.cooling_start_c, units)} in full sun",
        stop_rule=f"when the air falls below {w.temp(th.cooling_stop_c, units)}, at sunset at the latest",
        quantities=q, notes=notes, estimated=bool(estimated))


# --------------------------------------------------------------------------- the run

def run_heat(db, day: dt.date, block_ids: Sequence[int] | None = None, *, now: dt.datetime | None = None,
             key: str | None = None, farm: str | None = None, names: Sequence[str] | None = None,
             deliver: bool = True, settings=None, sleep: Callable[[float], object] | None = None,
             check_days: int | None = None) -> RunResult:
    """The morning heat run for a day: check the past days, assess, store, notify.

    Before the day is assessed, the heat forecasts of the selected blocks for
    the :data:`CHECK_LOOKBACK_DAYS` days before it that have no check yet are
    checked against the observed high (:func:`check_heat_days`), in the same
    transaction as the new forecasts.

    Parameters
    ----------
    db : Database
    day : date
        Local date of the day.
    block_ids, farm, names : optional
        Which active blocks (default all).  The farm's heat season is the
        scheduler's business; a run asked for runs.
    now : datetime, optional
        The run's clock (default the real time): readings from then on are not used.
    key : str, optional
        The planned run's key (restart safety).
    deliver : bool
        Deliver the notices (always to the outbox; mail and webhook when set up).
    settings : advisory.settings.Settings, optional
    sleep : callable, optional
        Pause between delivery retries (a no-op in tests and the demo).
    check_days : int, optional
        Days before ``day`` whose unchecked forecasts are checked first
        (default :data:`CHECK_LOOKBACK_DAYS`; 0 checks none).

    Returns
    -------
    advisory.pipeline.RunResult
        ``kind`` "heat", ``night`` the day; ``verified`` lists the earlier
        forecasts checked by this run (see :func:`check_heat_days`).
    """
    now = now or dt.datetime.now(dt.UTC)
    settings = settings or settings_mod.load(db.url)
    res = RunResult(kind="heat", night=day)
    state = _start_run(db, key, "heat", day, now)
    if state == "finished":
        res.skipped.append(f"run {key} already done")
        return res
    if state == "new":
        with db.transaction() as session:
            blocks = _load_blocks(session, block_ids, farm, names)
            farm_ids = sorted({b.farm_id for b in blocks})
            lookback = CHECK_LOOKBACK_DAYS if check_days is None else int(check_days)
            if blocks and lookback > 0:      # each morning: how did the last days' forecasts do?
                past = [day - dt.timedelta(days=k) for k in range(1, lookback + 1)]
                res.verified, not_checked = check_heat_days(session, past, [b.id for b in blocks], now=now)
                for msg in not_checked:
                    log.info("heat check: %s", msg)
            done = dict(session.execute(select(Forecast.block_id, Forecast.revision).where(
                Forecast.kind == "heat", Forecast.night == day,
                Forecast.block_id.in_([b.id for b in blocks]))).all()) if blocks else {}
            res.skipped = [f"{b.name}: heat {day} already assessed (revision {done[b.id]})"
                           for b in blocks if b.id in done]
            todo = [b for b in blocks if b.id not in done]
            res.assessments = assess_day(session, todo, day, as_of=now, now=now)
            stored, skipped = _store(session, res.assessments, revision_mode="heat", now=now)
            res.skipped += skipped
            res.notices = [n.id for n, _ in stored]
            _mark_run(session, key, "stored", now)
    else:  # stored before a crash or a stop: only delivery is left
        with db.transaction() as session:
            farm_ids = sorted({b.farm_id for b in _load_blocks(session, block_ids, farm, names)})
    if deliver:
        res.deliveries = _deliver(db, _pending_notices(db, day, "heat", farm_ids), settings, sleep=sleep)
    _mark_run(db, key, "finished", now)
    return res


# --------------------------------------------------------------------------- the morning check

#: Days before a heat run's day whose forecasts the run checks first, if not checked yet [days].
CHECK_LOOKBACK_DAYS = 7
#: The daylight window counts as read when readings come within this of both ends and no gap
#: between them is longer [min] (the rule of :func:`advisory.pipeline.observed_minimum`).
CHECK_MAX_GAP_MIN = 90.0
#: A day is checked from its sunset + this on [h].
CHECK_AFTER_SUNSET_H = 1.0


def observed_maximum(frame: pd.DataFrame | None, start: pd.Timestamp, end: pd.Timestamp, *,
                     max_gap_min: float = CHECK_MAX_GAP_MIN) -> float | None:
    """Highest QC-passed air temperature in [start, end], or None if the window is not covered.

    The counterpart of :func:`advisory.pipeline.observed_minimum`, with the
    same coverage rule.

    Parameters
    ----------
    frame : pandas.DataFrame or None
        A station's readings (aware UTC index, ``air_temp_c`` [°C], QC-failed
        values already NaN as :func:`advisory.ingest.observations.load_observations_many`
        returns them).
    start, end : pandas.Timestamp
        The window (aware), both ends included.
    max_gap_min : float
        The window counts as covered when a reading lies within this of
        each end [min] and no two successive readings are further apart.

    Returns
    -------
    float or None
        The highest reading in the window [°C]; None when the window is not covered.
    """
    if frame is None or not len(frame) or "air_temp_c" not in frame:
        return None
    gap = pd.Timedelta(minutes=max_gap_min)
    s = frame["air_temp_c"].dropna()
    s = s[(s.index >= start - gap) & (s.index <= end + pd.Timedelta(minutes=1))]
    inside = s[(s.index >= start) & (s.index <= end)]
    if len(inside) == 0:
        return None
    times = s.index.as_unit("ns")
    if times.min() > start + gap or times.max() < end - gap:
        return None
    steps_min = np.diff(times.asi8) / 6e10
    if len(steps_min) and steps_min.max() > max_gap_min:
        return None
    return float(inside.max())


def daylight_window(payload: dict) -> tuple[pd.Timestamp, pd.Timestamp]:
    """The daylight of a stored heat forecast: its sunrise to its sunset (aware UTC).

    Where the sun does not rise or set that day (polar day), the missing end is
    the local midnight that starts or ends the day.
    """
    day = dt.date.fromisoformat(str(payload["night"]))
    tz = payload.get("farm_tz") or "UTC"
    rise, down = _ts(payload.get("sunrise_utc")), _ts(payload.get("sunset_utc"))
    start = rise if rise is not None else _local_midnight_utc(day, tz)
    end = down if down is not None else _local_midnight_utc(day + dt.timedelta(days=1), tz)
    return start, end


def heat_flags(payload: dict) -> dict:
    """What a stored heat note told the grower, for the check.

    Returns
    -------
    dict
        ``warned``: the note flagged fruit sunburn risk (crop level above
        the lowest level) or advised evaporative cooling -- the warning scored against the
        sunburn event; ``crew_warned``: the crew level was above the lowest;
        ``threshold_c``: the crop's sunburn air temperature [°C] (None if the
        note has none); ``estimated``: the high was estimated from the morning
        readings (no outlook).
    """
    details = payload.get("details") or {}
    calm = (risk_heat.LEVELS[0], "quiet")  # "quiet": the lowest level's key in payloads stored before it was renamed
    crop_level = details.get("crop_level", calm[0])
    cooling = any(bool(step.get("advised")) for step in payload.get("plan") or []
                  if step.get("method") == "evaporative_cooling")
    return {"warned": bool(crop_level not in calm or cooling),
            "crew_warned": details.get("crew_level", calm[0]) not in calm,
            "threshold_c": _f((details.get("sunburn") or {}).get("threshold_c")),
            "estimated": bool(details.get("max_estimated"))}


def check_heat_days(session: Session, days: Sequence[dt.date], block_ids: Sequence[int] | None = None, *,
                    now: dt.datetime) -> tuple[list[dict], list[str]]:
    """Check the unchecked heat forecasts of ``days`` against the observed high; add the rows to the session.

    Every revision-0 heat forecast with status ok, no ``Verification`` yet and
    a day that is over (sunset + :data:`CHECK_AFTER_SUNSET_H` before ``now``)
    gets a ``Verification`` of kind ``"heat"``: the forecast high (median),
    the observed maximum over the day's daylight (:func:`observed_maximum`,
    sunrise to sunset) and their difference, with ``detail`` holding the
    80 % range (``p10_c``, ``p90_c``), ``level``, ``warned`` and
    ``crew_warned`` (:func:`heat_flags`), ``threshold_c``, ``event`` (the
    observed high reached the crop's sunburn air temperature), ``estimated``
    and ``model``.  Checked forecasts are never checked again.

    Parameters
    ----------
    session : Session
        The caller commits.
    days : sequence of date
        Local dates of the days to check.
    block_ids : sequence of int, optional
        Only these blocks (default all).
    now : datetime
        The clock: days not over by then are left for later; readings from
        then on are not used.

    Returns
    -------
    checked : list of dict
        One per new row: ``block``, ``day``, ``forecast_c``, ``p10_c``,
        ``p90_c``, ``observed_c``, ``error_c``, ``event``, ``warned``,
        ``estimated``.
    not_checked : list of str
        Why a forecast was left unchecked (day not over, readings missing).
    """
    days = sorted(set(days))
    if not days:
        return [], []
    now_ts = _ts(now)
    base = (select(Forecast).options(selectinload(Forecast.block))
            .where(Forecast.kind == "heat", Forecast.night.in_(days), Forecast.revision == 0,
                   Forecast.status == asm.STATUS_OK,
                   ~exists().where(Verification.forecast_id == Forecast.id)))
    if block_ids is None:
        forecasts = list(session.scalars(base))
    else:
        forecasts = [f for chunk in _chunked(list(block_ids)) for f in session.scalars(
            base.where(Forecast.block_id.in_(chunk)))]
    forecasts.sort(key=lambda f: (f.night, f.block.name, f.id))
    todo, not_checked = [], []
    for f in forecasts:
        p = f.payload or {}
        start, end = daylight_window(p)
        ready = end + pd.Timedelta(hours=CHECK_AFTER_SUNSET_H)
        if ready > now_ts:
            local = ready.tz_convert(p.get("farm_tz") or "UTC")
            not_checked.append(f"{f.block.name}: heat {f.night}: the day is not over yet "
                               f"(checked from {local:%Y-%m-%d %H:%M %Z})")
            continue
        todo.append((f, p, start, end))
    if not todo:
        return [], not_checked
    gap = pd.Timedelta(minutes=CHECK_MAX_GAP_MIN + 1)
    t0 = min(x[2] for x in todo) - gap
    t1 = min(max(x[3] for x in todo) + pd.Timedelta(minutes=2), now_ts)
    obs = load_observations_many(session, sorted({f.block.station_id for f, *_ in todo}), t0, t1,
                                 columns=("air_temp_c",))
    highs: dict[tuple, float | None] = {}
    checked = []
    for f, p, start, end in todo:
        where = (f.block.station_id, start, end)
        if where not in highs:    # blocks of a station share the day's reading
            highs[where] = observed_maximum(obs.get(f.block.station_id), start, end)
        obs_max = highs[where]
        if obs_max is None:
            tz = p.get("farm_tz") or "UTC"
            not_checked.append(f"{f.block.name}: heat {f.night}: the readings do not cover the daylight hours "
                               f"({start.tz_convert(tz):%H:%M} to {end.tz_convert(tz):%H:%M}; no gap over "
                               f"{CHECK_MAX_GAP_MIN:.0f} min allowed)")
            continue
        flags = heat_flags(p)
        thr = flags["threshold_c"]
        event = thr is not None and obs_max >= thr
        err = None if f.min_p50_c is None else f.min_p50_c - obs_max
        session.add(Verification(
            forecast_id=f.id, block_id=f.block_id, kind="heat", night=f.night, observed_c=obs_max,
            forecast_c=f.min_p50_c, error_c=err, verified_at=now,
            detail={"p10_c": f.min_p10_c, "p90_c": f.min_p90_c, "level": f.level, "warned": flags["warned"],
                    "crew_warned": flags["crew_warned"], "threshold_c": thr, "event": bool(event),
                    "estimated": flags["estimated"], "model": f.model}))
        checked.append({"block": f.block.name, "day": f.night, "forecast_c": f.min_p50_c, "p10_c": f.min_p10_c,
                        "p90_c": f.min_p90_c, "observed_c": obs_max, "error_c": err, "event": bool(event),
                        "warned": flags["warned"], "estimated": flags["estimated"]})
    session.flush()
    return checked, not_checked


def verify_day(db, day: dt.date, block_ids: Sequence[int] | None = None, *, now: dt.datetime | None = None,
               key: str | None = None) -> RunResult:
    """Check a day's heat forecasts against the observed high (see :func:`check_heat_days`).

    Parameters
    ----------
    db : Database
    day : date
        Local date of the day.
    block_ids : sequence of int, optional
        Only these blocks (default all).
    now : datetime, optional
        The clock (default the real time).
    key : str, optional
        A run key: a finished keyed run is not run again.

    Returns
    -------
    advisory.pipeline.RunResult
        ``kind`` "heat-check", ``verified`` the new rows (dicts as
        :func:`check_heat_days` returns them), ``skipped`` why forecasts were
        left unchecked.  A rerun adds nothing.
    """
    now = now or dt.datetime.now(dt.UTC)
    res = RunResult(kind="heat-check", night=day)
    if _start_run(db, key, "heat-check", day, now) == "finished":
        res.skipped.append(f"run {key} already done")
        return res
    with db.transaction() as session:
        res.verified, res.skipped = check_heat_days(session, [day], block_ids, now=now)
        _mark_run(session, key, "finished", now)
    return res


def checked_count(db, day: dt.date, block_ids: Sequence[int] | None = None) -> int:
    """How many of the day's heat forecasts already have their check."""
    with db.transaction() as s:
        q = (select(func.count()).select_from(Verification)
             .where(Verification.kind == "heat", Verification.night == day))
        if block_ids is not None:
            q = q.where(Verification.block_id.in_(list(block_ids)))
        return int(s.scalar(q) or 0)


def _today(db, farm: str | None, now: dt.datetime | None = None) -> dt.date:
    from advisory.reports import farm_zone

    return (now or dt.datetime.now(dt.UTC)).astimezone(ZoneInfo(farm_zone(db, farm))).date()


def heat_run_text(db, day: dt.date | None = None, *, farm: str | None = None, names: list[str] | None = None,
                  deliver: bool = True, fmt: str = "text", now: dt.datetime | None = None, settings=None,
                  sleep=None) -> str:
    """Run a heat day and return what the command line prints (the farm summaries and a tally)."""
    from advisory import reports

    day = day or _today(db, farm, now)
    ids = reports.block_ids_for(db, farm, names)
    settings = settings or settings_mod.load(db.url)
    res = run_heat(db, day, ids, farm=farm, deliver=deliver, now=now, settings=settings, sleep=sleep)
    if not res.assessments and not res.skipped:
        return f"heat day {day}: no active blocks selected"
    lines = list(reports.summary_text(db, res.notices, fmt))
    estimated = sorted({a.station for a in res.assessments if (a.details or {}).get("max_estimated")})
    if estimated and res.notices:
        lines.append(f"day {day}: no outlook for station{'s' if len(estimated) > 1 else ''} "
                     f"{', '.join(estimated)}: the high there is an estimate (see each block's note)")
    for msg in res.skipped:
        lines.append(f"skipped: {msg}")
    if res.verified:
        lines.append(check_summary_line(res.verified))
    if res.deliveries:
        lines.append("deliveries: " + ", ".join(f"{k} {v}" for k, v in sorted(res.deliveries.items())))
        lines.append(f"outbox: {settings.outbox}")
    return "\n".join(lines)


def check_summary_line(checked: list[dict]) -> str:
    """One line on forecasts just checked against the observed high (``checked`` from :func:`check_heat_days`)."""
    days = sorted({c["day"] for c in checked})
    span = f"{days[0]}" if len(days) == 1 else f"{days[0]} to {days[-1]}"
    err = np.array([c["error_c"] for c in checked if c["error_c"] is not None], float)
    inside = sum(1 for c in checked if c["p10_c"] is not None and c["p90_c"] is not None
                 and c["p10_c"] <= c["observed_c"] <= c["p90_c"])
    miss = f"typical miss {np.mean(np.abs(err)):.1f} °C, mean {np.mean(err):+.1f} °C" if len(err) else "no high"
    return (f"checked heat day {span}: {len(checked)} forecast high{'s' if len(checked) != 1 else ''} against "
            f"the observed high ({miss} (forecast - observed); {inside} of {len(checked)} inside the "
            "8-in-10 range)")


# --------------------------------------------------------------------------- outlooks

@dataclass
class OutlookImport:
    """What an outlook import did."""

    file: str
    rows: int = 0
    added: int = 0
    updated: int = 0
    unchanged: int = 0
    stations: list[str] = field(default_factory=list)
    first_day: dt.date | None = None
    last_day: dt.date | None = None

    def text(self) -> str:
        span = f" for {self.first_day} to {self.last_day}" if self.first_day else ""
        return (f"{self.file}: {self.rows} outlook rows{span} ({', '.join(self.stations)}): "
                f"{self.added} added, {self.updated} updated, {self.unchanged} unchanged")

    def as_dict(self) -> dict:
        d = dataclasses.asdict(self)
        d["first_day"] = None if self.first_day is None else self.first_day.isoformat()
        d["last_day"] = None if self.last_day is None else self.last_day.isoformat()
        return d


def _resolve_stations(session: Session, names: set[str]) -> dict[str, Station]:
    """Station per name used in an outlook file: its code, else (case-insensitively) its code or name."""
    all_st = list(session.scalars(select(Station)))
    by_code = {s.code: s for s in all_st}
    by_lower: dict[str, list[Station]] = defaultdict(list)
    for s in all_st:
        by_lower[s.code.lower()].append(s)
        if s.name and s.name.lower() != s.code.lower():
            by_lower[s.name.strip().lower()].append(s)
    out = {}
    for name in names:
        if name in by_code:
            out[name] = by_code[name]
        elif len({s.id for s in by_lower.get(name.strip().lower(), [])}) == 1:
            out[name] = by_lower[name.strip().lower()][0]
    return out


def import_outlook(db, path, *, station: str | None = None, now: dt.datetime | None = None) -> OutlookImport:
    """Read an outlook CSV and upsert it into the ``outlooks`` table, all or nothing.

    Parameters
    ----------
    db : Database
    path : path-like
        The CSV (see :mod:`advisory.ingest.outlook`).
    station : str, optional
        Station code for a file without a ``station`` column (or for its empty cells).
    now : datetime, optional
        Import time stamp.

    Returns
    -------
    OutlookImport

    Raises
    ------
    InputError
        A malformed file, an unknown station or a row without a high (naming
        the line and field); nothing is written.
    """
    now = now or dt.datetime.now(dt.UTC)
    frame = read_outlook_csv(path, station=station)
    name = str(path)
    report = OutlookImport(file=Path(name).name)
    with db.transaction() as session:
        if station is not None:
            found = _resolve_stations(session, {station})
            if station not in found:
                known = ", ".join(session.scalars(select(Station.code).order_by(Station.code))) or "none"
                raise InputError(f"no station '{station}' (stations: {known})", field="--station")
        found = _resolve_stations(session, set(frame["station"]))
        for row in frame.itertuples(index=False):
            if row.station not in found:
                known = ", ".join(session.scalars(select(Station.code).order_by(Station.code))) or "none"
                raise InputError(f"no station '{row.station}' (stations: {known})", file=name,
                                 line=int(row.line), field="station")
            if not np.isfinite(row.high_c):
                raise InputError("the row gives no high: the heat note needs the day's high", file=name,
                                 line=int(row.line), field="high_c")
        ids = sorted({found[s].id for s in frame["station"]})
        existing = {(o.station_id, o.day): o for o in session.scalars(
            select(Outlook).where(Outlook.station_id.in_(ids), Outlook.day.in_(sorted(set(frame["date"])))))}
        for row in frame.itertuples(index=False):
            sid = found[row.station].id
            values = {"high_c": float(row.high_c), "low_c": _f(row.low_c),
                      "min_rel_humidity_pct": _f(row.min_rel_humidity_pct)}
            old = existing.get((sid, row.date))
            if old is None:
                o = Outlook(station_id=sid, day=row.date, imported_at=now, **values)
                session.add(o)
                existing[(sid, row.date)] = o
                report.added += 1
            elif all(_same(getattr(old, k), v) for k, v in values.items()):
                report.unchanged += 1
            else:
                for k, v in values.items():
                    setattr(old, k, v)
                old.imported_at = now
                report.updated += 1
        report.rows = len(frame)
        report.stations = sorted({found[s].code for s in frame["station"]})
        report.first_day, report.last_day = min(frame["date"]), max(frame["date"])
    return report


def _same(a, b) -> bool:
    if a is None or b is None:
        return a is None and b is None
    return abs(float(a) - float(b)) < 1e-9


def list_outlooks(db, *, station: str | None = None, since: dt.date | None = None) -> list[dict]:
    """Stored outlook rows (station code, day, high, low, minimum humidity, imported), by station and day."""
    with db.transaction() as session:
        q = select(Outlook, Station.code).join(Station, Station.id == Outlook.station_id)
        if station is not None:
            found = _resolve_stations(session, {station})
            if station not in found:
                known = ", ".join(session.scalars(select(Station.code).order_by(Station.code))) or "none"
                raise InputError(f"no station '{station}' (stations: {known})", field="--station")
            q = q.where(Outlook.station_id == found[station].id)
        if since is not None:
            q = q.where(Outlook.day >= since)
        rows = session.execute(q.order_by(Station.code, Outlook.day)).all()
        return [{"station": code, "day": o.day.isoformat(), "high_c": o.high_c, "low_c": o.low_c,
                 "min_rel_humidity_pct": o.min_rel_humidity_pct,
                 "imported_at": o.imported_at.isoformat(timespec="seconds")} for o, code in rows]


def format_outlooks(rows: list[dict]) -> str:
    if not rows:
        return "no outlook stored (use `advisory outlook import FILE`)"
    lines = [f"{'station':<16} {'day':<10} {'high °C':>8} {'low °C':>7} {'min RH %':>9}  imported"]
    for r in rows:
        def num(v, fmt):
            return "-" if v is None else format(v, fmt)
        lines.append(f"{r['station']:<16} {r['day']:<10} {num(r['high_c'], '.1f'):>8} {num(r['low_c'], '.1f'):>7} "
                     f"{num(r['min_rel_humidity_pct'], '.0f'):>9}  {r['imported_at']}")
    return "\n".join(lines)


# --------------------------------------------------------------------------- demo

#: The demo's summer days (local dates).
DEMO_HEAT_DAYS = [dt.date(2026, 7, 14) + dt.timedelta(days=i) for i in range(6)]
#: The demo heat runs at this local time each morning (after the morning reading).
DEMO_RUN_LOCAL = dt.time(9, 0)


def demo_heat(paths, db, echo=print, *, demo_farm: Path | None = None) -> str:
    """The demo's heat week: summer readings and outlook imported, one heat run per day.

    Parameters
    ----------
    paths : advisory.demo.DemoPaths
        The demo folder (its ``outbox`` receives the notices).
    db : Database
        With the demo farm already imported.
    echo : callable
        Gets progress lines (the imports).
    demo_farm : Path, optional
        The demo farm folder (default ``paths.farm_dir`` when the paths have
        one, else ``demo-farm/`` of the checkout).

    Returns
    -------
    str
        One line per day (highs and where they came from, levels, cooling),
        then the farm summary of the day without an outlook and one block's
        full note that day, then the morning checks of the week (one line per
        day) and the heat skill report, ready to print.
    """
    from advisory import reports
    from advisory.ingest.observations import import_file
    from advisory.notices import render

    folder = demo_farm or getattr(paths, "farm_dir", None) or Path(__file__).resolve().parents[1] / "demo-farm"
    folder = Path(folder)
    for code in ("QR-BENCH", "QR-CREEK"):
        summary = import_file(db, code, folder / "stations" / f"{code}-summer.csv")
        echo(summary.text().splitlines()[0])
    echo(import_outlook(db, folder / "outlook-summer.csv").text())
    settings = dataclasses.replace(settings_mod.load(db.url), outbox=Path(paths.outbox))
    with db.transaction() as s:
        tz = s.scalar(select(Farm.timezone).order_by(Farm.name))
    lines, shown = [], None
    for day in DEMO_HEAT_DAYS:
        now = pd.Timestamp(dt.datetime.combine(day, DEMO_RUN_LOCAL), tz=tz).tz_convert("UTC").to_pydatetime()
        res = run_heat(db, day, now=now, settings=settings, sleep=lambda s: None)
        lines.append(f"  {day:%a %d %b}: " + (_demo_day_line(res) if res.assessments else
                                             f"already assessed ({len(res.skipped)} blocks)"))
        if shown is None and any((a.details or {}).get("max_estimated") for a in res.assessments):
            shown = (day, res)
    if shown is not None:
        day, res = shown
        lines.append(f"\nThe farm summary on {day:%a %d %b}, the day without an outlook:")
        lines.extend(reports.summary_text(db, res.notices))
        ok = [a for a in res.assessments if a.status == asm.STATUS_OK]
        if ok:
            a = next((x for x in ok if x.plan), ok[0])
            with db.transaction() as s:
                n = s.scalar(select(Notice).where(Notice.block_id == a.block_id, Notice.kind == "heat",
                                                  Notice.night == day))
                lines.append(f"\n{a.block}'s note that day (text; the outbox has it with its chart):")
                lines.append(render.render(n.full_content, "text"))
    last = DEMO_HEAT_DAYS[-1]
    next_morning = pd.Timestamp(dt.datetime.combine(last + dt.timedelta(days=1), DEMO_RUN_LOCAL),
                                tz=tz).tz_convert("UTC").to_pydatetime()
    verify_day(db, last, now=next_morning)       # the last day's check falls on the morning after the week
    lines.append("\nEach morning the heat run first checks the days before against what the stations read "
                 "(forecast high against the highest reading from sunrise to sunset):")
    lines.extend(_demo_check_lines(db, DEMO_HEAT_DAYS))
    lines.append("\nHeat skill to date (advisory verify report --kind heat):")
    lines.append(reports.format_verification(reports.verification_report(db, kind="heat")))
    lines.append(f"outbox: {settings.outbox}")
    return "\n".join(lines)


def _demo_check_lines(db, days: Sequence[dt.date]) -> list[str]:
    """One line per checked demo day: forecast and observed highs, misses, range, sunburn event and warning."""
    with db.transaction() as s:
        rows = list(s.scalars(select(Verification).where(Verification.kind == "heat",
                                                         Verification.night.in_(list(days)))))
    per: dict[dt.date, list[Verification]] = defaultdict(list)
    for v in rows:
        per[v.night].append(v)
    out = []
    for day in days:
        vs = per.get(day)
        if not vs:
            out.append(f"  {day:%a %d %b}: not checked")
            continue
        fc = [v.forecast_c for v in vs if v.forecast_c is not None]
        ob = [v.observed_c for v in vs]
        err = [v.error_c for v in vs if v.error_c is not None]
        inside = sum(1 for v in vs if v.detail.get("p10_c") is not None
                     and v.detail["p10_c"] <= v.observed_c <= v.detail["p90_c"])
        event = sum(1 for v in vs if v.detail.get("event"))
        hits = sum(1 for v in vs if v.detail.get("event") and v.detail.get("warned"))
        false = sum(1 for v in vs if v.detail.get("warned") and not v.detail.get("event"))
        est = " (estimated high)" if any(v.detail.get("estimated") for v in vs) else ""
        out.append(f"  {day:%a %d %b}{est}: forecast {min(fc):.1f}-{max(fc):.1f} °C, observed {min(ob):.1f}-"
                   f"{max(ob):.1f} °C ({_ran(float(np.mean(err)))}); {inside} of {len(vs)} blocks inside "
                   f"the 8-in-10 range; sunburn temperature reached at {event}, flagged at {hits} of them"
                   + (f"; {false} more flagged but not reached" if false else ""))
    return out


def _ran(mean_error_c: float) -> str:
    """How a mean error (forecast - observed) reads to a grower."""
    if abs(mean_error_c) < 0.05:
        return "spot on on average"
    return f"the forecast ran {abs(mean_error_c):.1f} °C {'high' if mean_error_c > 0 else 'low'} on average"


def _demo_day_line(res: RunResult) -> str:
    ok = [a for a in res.assessments if a.status == asm.STATUS_OK]
    if not ok:
        return "no heat note could be made"
    tz = ok[0].farm_tz
    lo, hi = min(a.p50_c for a in ok), max(a.p50_c for a in ok)
    where = sorted({a.model for a in ok})
    src = ("from the outlook" if where == ["outlook"] else
           "ESTIMATED, no outlook (" + ", ".join(where) + ")")
    counts: dict[str, int] = defaultdict(int)
    for a in ok:
        counts[w.level_style("heat", a.level).name] += 1
    cool = [f"{a.block} {pd.Timestamp(s.start_utc).tz_convert(tz):%H:%M}-"
            f"{pd.Timestamp(s.stop_utc).tz_convert(tz):%H:%M}" for a in ok for s in a.plan
            if s.advised and s.start_utc and s.stop_utc]
    return (f"highs {lo:.1f} to {hi:.1f} °C {src}; " + ", ".join(f"{v} {k}" for k, v in counts.items())
            + ("; evaporative cooling " + ", ".join(cool) if cool else ""))
