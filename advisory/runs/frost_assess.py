"""Forecast and assess a frost night for a set of blocks (all as arrays): evening state,
cooling curve and calibration, night outlooks, damage probability, level and protection plan.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Callable, Mapping

import numpy as np
import pandas as pd
from sqlalchemy.orm import Session

from advisory import assessment as asm
from advisory.crops import thresholds
from advisory.forecast import calibration as calib
from advisory.forecast import outlook_effect
from advisory.forecast.evening import evening_states
from advisory.forecast.result import NightForecast, table_prob_below
from advisory.ingest.night_outlook import load_night_outlooks
from advisory.ingest.observations import load_observations_many
from advisory.physics import moisture, sun
from advisory.risk import damage, frost, frost_assessment, frost_data
from advisory.runs import stage_check
from advisory.runs.blocks import _equipment_of, _latest_calibrations, _recent_verification
from advisory.runs.record import StageTimes, _lap
from advisory.store.schema import (
    Block,
    Station,
)

#: Observations older than this before the reference time are not used for the evening state [h].
LOOKBACK_H = 30


def _base_assessment(b: Block, night: dt.date, kind: str = "frost", *, critical: dict | None = None
                     ) -> asm.Assessment:
    """The block's fixed part of an assessment; ``critical`` memoises the critical temperatures."""
    ct = _critical(b, critical)
    return asm.Assessment(
        kind=kind, farm=b.farm.name, farm_tz=b.farm.timezone, units=b.farm.units, block_id=b.id,
        block=b.name, station=b.station.code, crop=b.crop, variety=b.variety, stage=b.stage,
        area_ha=b.area_ha, night=night, t10_c=ct.t10_c, t90_c=ct.t90_c, critical_source=ct.source,
        details={"stage_date": b.stage_date.isoformat()} if getattr(b, "stage_date", None) else {})


def _silence_reason(station: Station, latest: pd.Timestamp | None, reason: str | None, tz: str) -> str:
    if latest is None:
        return f"no forecast tonight: station {station.code} has sent no usable readings"
    local = latest.tz_convert(tz)
    return (f"no forecast tonight: station {station.code} silent since "
            f"{local:%a %d %b %H:%M} {local.tzname()}" + (f" ({reason})" if reason else ""))


def _curves_on_grid(fc: NightForecast, states: pd.DataFrame, idx: np.ndarray, elevation_m: np.ndarray
                    ) -> frost_data.NightCurves:
    """The forecast's median curves for blocks ``idx`` on one shared 15-minute UTC grid."""
    ref = fc.reference_time[idx].as_unit("ns")
    end = (fc.sunrise[idx] + pd.Timedelta(hours=2)).as_unit("ns")
    start = ref.min().floor("15min")
    grid = pd.date_range(start, end.max().ceil("15min"), freq="15min").as_unit("ns")
    hours = (grid.asi8[:, None] - ref.asi8[None, :]) / 3.6e12          # (H, n)
    sub_phys = fc.physical.subset(idx)
    tmin = fc.quantile(0.5)[idx]
    t_ref = fc.reference_temp_c[idx]
    from advisory.forecast.cooling import curve_fraction

    frac = curve_fraction(sub_phys, np.maximum(hours, 0.0))
    after = np.maximum(hours - sub_phys.hours_to_minimum, 0.0)
    temps = np.where(after > 0, tmin + sub_phys.warming_k_per_h * after, t_ref - (t_ref - tmin) * frac)
    inside = (hours >= 0) & (grid.asi8[:, None] <= end.asi8[None, :])
    temps = np.where(inside, temps, np.nan).T                            # (n, H)
    dew = states["dew_point_c"].to_numpy(float)[idx]
    wind = np.nan_to_num(states["wind_speed_ms"].to_numpy(float)[idx], nan=1.0)
    return frost_data.NightCurves(
        times_utc=grid, air_temp_c=temps,
        dew_point_c=np.minimum(dew[:, None], np.where(np.isfinite(temps), temps, dew[:, None])),
        wind_speed_ms=wind[:, None], sunrise_utc=fc.sunrise[idx],
        pressure_kpa=np.asarray(moisture.pressure_kpa_from_elevation(elevation_m[idx]), float))


#: Blocks whose reference times lie within this span share one risk pass (one time grid) [h].
GROUP_SPAN_H = 1.0


def _night_groups(fc: NightForecast, idx: np.ndarray, span_h: float | None = None) -> list[np.ndarray]:
    """Split blocks ``idx`` into groups whose reference times lie within ``span_h`` of each other.

    The risk model works on one shared 15-minute grid per call, from the earliest reference time to
    the latest end of the night; one call for farms on several continents would pad every block with
    a day of empty grid.  Each block's results do not depend on the grid's extent.
    """
    ref = fc.reference_time[idx].as_unit("ns").asi8
    order = np.argsort(ref, kind="stable")
    groups, start = [], 0
    limit = int((GROUP_SPAN_H if span_h is None else span_h) * 3600 * 10**9)
    for k in range(1, len(order) + 1):
        if k == len(order) or ref[order[k]] - ref[order[start]] > limit:
            groups.append(np.sort(idx[order[start:k]]))
            start = k
    return groups


def _cdf(fc: NightForecast, idx: np.ndarray) -> Callable[[np.ndarray], np.ndarray]:
    """P(minimum <= x) from the forecast's quantile table, for x of shape (n, g).

    Same values as :func:`advisory.forecast.result.table_prob_below` column by column; rows whose
    quantiles are finite and sorted (all in practice) are counted with one binary search per row
    instead of comparing every level with every x.
    """
    q = np.asarray(fc.quantiles_c[idx], float)
    sorted_rows = np.all(np.isfinite(q), axis=1)
    if q.shape[1] > 1:
        sorted_rows &= np.all(np.diff(q, axis=1) >= 0, axis=1)

    def cdf(x):
        x = np.asarray(x, float)
        if x.ndim != 2 or not sorted_rows.all():
            return np.stack([table_prob_below(q, x[:, j]) for j in range(x.shape[1])], axis=1)
        return _table_prob_below_sorted(q, x)

    return cdf


def _table_quantiles(fc: NightForecast, idx: np.ndarray) -> Callable[[np.ndarray], np.ndarray]:
    """Quantiles at probabilities q (k,) from the forecast's quantile table, shape (n, k): the exact
    inverse of :func:`_cdf` (linear between the table's levels; q within the table's levels)."""
    from advisory.forecast.result import LEVELS

    table = np.asarray(fc.quantiles_c[idx], float)

    def quantile(q):
        q = np.clip(np.asarray(q, float), LEVELS[0], LEVELS[-1])
        j = np.clip(np.searchsorted(LEVELS, q, side="right") - 1, 0, len(LEVELS) - 2)
        f = (q - LEVELS[j]) / (LEVELS[j + 1] - LEVELS[j])
        return table[:, j] * (1.0 - f) + table[:, j + 1] * f

    return quantile


def _table_prob_below_sorted(q: np.ndarray, x: np.ndarray) -> np.ndarray:
    """:func:`~advisory.forecast.result.table_prob_below` for rows of finite, sorted quantiles ``q`` (n, k)
    at thresholds ``x`` (n, g); returns (n, g)."""
    from advisory.forecast.result import LEVELS

    n, k = q.shape
    below = np.empty(x.shape, dtype=np.int64)
    for i in range(n):  # count of q[i] <= x[i] (q[i] sorted): one binary search per row
        below[i] = np.searchsorted(q[i], x[i], side="right")
    j = np.clip(below, 1, k - 1)
    lo = np.take_along_axis(q, j - 1, axis=1)
    hi = np.take_along_axis(q, j, axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        f = np.where(hi > lo, (x - lo) / (hi - lo), 1.0)
    p = LEVELS[j - 1] + np.clip(f, 0.0, 1.0) * (LEVELS[j] - LEVELS[j - 1])
    p = np.where(below == 0, 0.0, np.where(below >= k, 1.0, p))
    return np.where(np.isfinite(x), p, np.nan)


def _critical(b: Block, cache: dict | None):
    """The block's critical temperatures (memoised per crop, stage and overrides within one run)."""
    key = (b.crop, b.stage, b.t10_override_c, b.t90_override_c)
    if cache is None or key not in cache:
        ct = thresholds.critical_temps(b.crop, b.stage, b.t10_override_c, b.t90_override_c)
        if cache is None:
            return ct
        cache[key] = ct
    return cache[key]


def _frost_settings(b: Block, cache: dict) -> frost_data.FrostSettings:
    """The block's frost settings (farm's, overridden by the block's), memoised per distinct pair."""
    key = (b.farm_id, repr(b.farm.settings), repr(b.settings))
    if key not in cache:
        cache[key] = frost_data.FrostSettings.from_mappings(b.farm.settings, b.settings,
                                                       where=f"block '{b.name}' settings")
    return cache[key]


def _nullable(values: np.ndarray) -> list:
    """Floats as a list, NaN as None."""
    return [None if v != v else v for v in np.asarray(values, float).tolist()]


def _pydatetimes(values) -> list:
    """Aware UTC datetimes (None for NaT) from datetime64 values."""
    idx = pd.DatetimeIndex(values)
    if idx.tz is None:
        idx = idx.tz_localize("UTC")
    py = idx.to_pydatetime()
    return [None if m else v for v, m in zip(py, idx.isna(), strict=True)]


def _latest_valid(obs: dict[int, pd.DataFrame], station_ids: np.ndarray, ref_ns: np.ndarray) -> list:
    """Time of each block's latest valid air temperature at or before its reference time (None: none)."""
    out: list = [None] * len(station_ids)
    order = np.argsort(station_ids, kind="stable")
    keys = station_ids[order]
    bounds = np.flatnonzero(np.r_[True, keys[1:] != keys[:-1], True])
    stamps: dict[int, pd.Timestamp] = {}
    for a, z in zip(bounds[:-1], bounds[1:], strict=True):
        frame = obs.get(int(keys[a]))
        if frame is None or not len(frame):
            continue
        t = frame.index.as_unit("ns").asi8[frame["air_temp_c"].notna().to_numpy()]
        rows = order[a:z]
        pos = np.searchsorted(t, ref_ns[rows], side="right") - 1
        for r, p in zip(rows.tolist(), pos.tolist(), strict=True):
            if p >= 0:
                v = int(t[p])
                if v not in stamps:
                    stamps[v] = pd.Timestamp(v, tz="UTC")
                out[r] = stamps[v]
    return out


_EVENING_KEYS = ("air_temp_c", "dew_point_c", "wind_speed_ms", "cloud_cover_pct", "upper_air_temp_c",
                 "cooling_since_sunset_c")


def _assessments(blocks: list[Block], night: dt.date, update: bool, table: pd.DataFrame, states: pd.DataFrame,
                 obs: dict[int, pd.DataFrame], fc: NightForecast, ok: np.ndarray, verif: dict,
                 ref_max: pd.Timestamp) -> list[asm.Assessment]:
    """Every block's assessment before the risk: sun times, data quality, status and reason.

    Works on whole columns; the only Python loop per block fills the dataclasses.
    """
    sunsets = _pydatetimes(table["sunset"])
    sunrises = _pydatetimes(table["sunrise"])
    status = table["status"].to_numpy(dtype=object)
    ref = pd.DatetimeIndex(states["reference_time"])
    ref_ns = np.where(ref.isna(), pd.Timestamp(ref_max).as_unit("ns").value, ref.as_unit("ns").asi8)
    latest = _latest_valid(obs, np.array([b.station_id for b in blocks], np.int64), ref_ns)
    refs = _pydatetimes(ref.round("s"))
    age = _nullable(states["air_temp_age_min"].to_numpy(float))
    evening = {k: _nullable(states[k].to_numpy(float)) for k in _EVENING_KEYS}
    crit: dict = {}
    out: list[asm.Assessment] = []
    for i, b in enumerate(blocks):
        a = _base_assessment(b, night, critical=crit)
        a.is_update = update
        a.sunset_utc = sunsets[i]
        a.sunrise_utc = sunrises[i]
        a.verification = verif.get(b.id, [])
        last = latest[i]
        a.data_quality = {
            "latest_obs_utc": None if last is None else last.isoformat(),
            "obs_age_min": age[i],
            "evening": {k: v[i] for k, v in evening.items()},
            "assumed": list(fc.assumed[i] or ()),
        }
        if status[i] != sun.NORMAL:
            a.status = asm.STATUS_NO_NIGHT
            a.reason = ("the sun does not set tonight at this latitude: no nocturnal forecast"
                        if status[i] == sun.POLAR_DAY else
                        "the sun does not rise tomorrow at this latitude: no nocturnal forecast")
        elif not ok[i]:
            a.status = asm.STATUS_NO_FORECAST
            a.reason = _silence_reason(b.station, last, fc.reason[i], b.farm.timezone)
        if refs[i] is not None:
            a.reference_time_utc = refs[i]
        out.append(a)
    return out


def _set_curves(out: list[asm.Assessment], fc: NightForecast, states: pd.DataFrame, idx: np.ndarray,
                pressure_kpa: np.ndarray) -> None:
    """The hourly night curve of blocks ``idx`` (median, 10th and 90th percentile, wet bulb), in one pass."""
    times, p50 = fc.curve(0.5)
    _, p10 = fc.curve(0.1)
    _, p90 = fc.curve(0.9)
    # (blocks, hours), row-major: each block's points in time order
    times, p50, p10, p90 = (x[:, idx].T for x in (times, p50, p10, p90))
    valid = ~np.isnat(times) & np.isfinite(p50)
    dew = states["dew_point_c"].to_numpy(float)[idx][:, None]
    pk = np.broadcast_to(np.asarray(pressure_kpa, float)[:, None], p50.shape)
    wet = np.asarray(moisture.wet_bulb_c(p50[valid], np.minimum(dew, p50)[valid], pk[valid]), float)
    # one datetime object per distinct hour, shared by every block's curve (the blocks of a pass share
    # one time grid): fewer objects to make, keep, encode and hand back from a worker process
    hours, which = np.unique(times[valid], return_inverse=True)
    shared = pd.DatetimeIndex(hours).tz_localize("UTC").round("s").to_pydatetime()
    when = [shared[k] for k in which.tolist()]
    # Hundredths of a degree are kept: finer digits mean nothing and would only fill the
    # stored payloads, notices and outbox files of every block.
    rows = zip(when, *(np.round(x, 2).tolist() for x in (p50[valid], p10[valid], p90[valid], wet)), strict=True)
    points = [asm.CurvePoint(time_utc=t, p50_c=a, p10_c=b, p90_c=c, wet_bulb_c=w) for t, a, b, c, w in rows]
    ends = np.cumsum(valid.sum(axis=1))
    start = 0
    for i, end in zip(idx, ends.tolist(), strict=True):
        out[i].curve = points[start:end]
        start = end


def _apply_night_outlooks(session: Session, fc: NightForecast, states: pd.DataFrame, blocks: list[Block],
                          cals: Mapping, station_ids: list[int]) -> list:
    """Shift each block's forecast by its station's night outlook, where one is stored; its sentence per block.

    See :mod:`advisory.forecast.outlook_effect`.  Without an outlook nothing changes.
    """
    ref = pd.DatetimeIndex(states["reference_time"])
    rise = pd.DatetimeIndex(states["sunrise"])
    valid = ~(ref.isna() | rise.isna())
    if not valid.any():
        return [None] * len(blocks)
    hours = load_night_outlooks(session, station_ids, ref[valid].min(), rise[valid].max())
    if not hours:
        return [None] * len(blocks)
    means = [outlook_effect.outlook_means(hours.get(b.station_id), ref[i], rise[i], b.farm.timezone)
             for i, b in enumerate(blocks)]
    weights = [getattr(cals.get(b.station_id), "outlook_weight", None) for b in blocks]
    delta, notes = outlook_effect.outlook_shifts(states, means, weights)
    fc.quantiles_c[:] = fc.quantiles_c + delta[:, None]
    return notes


def assess_night(session: Session, blocks: list[Block], night: dt.date, *, as_of: dt.datetime | None = None,
                 update: bool = False, timings: StageTimes | None = None) -> list[asm.Assessment]:
    """Forecast and assess ``night`` for ``blocks`` (pure reads; nothing is written).

    Parameters
    ----------
    session : Session
    blocks : list of Block
    night : date
        Local date of the evening.
    as_of : datetime, optional
        For an update: re-forecast from the observations up to this instant
        (the reference time becomes ``as_of``).  Default: the evening
        reference time of each block (sunset + its offset).
    update : bool
        Mark the assessments as updates.
    """
    if not blocks:
        return []
    lat = np.array([b.latitude for b in blocks], float)
    lon = np.array([b.longitude for b in blocks], float)
    tzs = np.array([b.farm.timezone for b in blocks], dtype=object)
    elev = np.array([b.elevation_m for b in blocks], float)
    table = sun.sun_times_batch(lat, lon, night, tzs)
    offset_h = np.array([b.reference_offset_min / 60.0 for b in blocks], float)
    if as_of is not None:
        since_sunset_h = (pd.Timestamp(as_of).tz_convert("UTC") - table["sunset"]).dt.total_seconds() / 3600
        offset_h = np.where(np.isfinite(since_sunset_h), np.maximum(since_sunset_h.to_numpy(float), offset_h),
                            offset_h)
    station_ids = sorted({b.station_id for b in blocks})
    ref_max = table["sunset"].max() + pd.Timedelta(hours=float(np.nanmax(offset_h)) + 0.5)
    if pd.isna(ref_max):  # polar everywhere
        ref_max = pd.Timestamp(dt.datetime.combine(night, dt.time(23), dt.UTC))
    ref_min = table["sunset"].min()
    if pd.isna(ref_min):
        ref_min = ref_max
    _lap(timings, "sun+evening state")
    obs = load_observations_many(session, station_ids, ref_min - pd.Timedelta(hours=LOOKBACK_H),
                                 ref_max + pd.Timedelta(minutes=1))
    _lap(timings, "load observations")
    station_keys = np.array([b.station_id for b in blocks], dtype=object)
    sun_rows = table.assign(night=night)
    states = evening_states(obs, sun_rows, station=station_keys, reference_offset_h=offset_h)
    states["station"] = station_keys
    _lap(timings, "sun+evening state")
    cals = _latest_calibrations(session, station_ids, before=pd.Timestamp(ref_max).floor("us").to_pydatetime())
    fc = calib.forecast_night(states, {k: v for k, v in cals.items()}, block=[b.id for b in blocks])
    outlook_notes = _apply_night_outlooks(session, fc, states, blocks, cals, station_ids)
    ok = fc.ok & (table["status"].to_numpy(dtype=object) == sun.NORMAL)
    verif = _recent_verification(session, [b.id for b in blocks], night)
    _lap(timings, "forecast")

    out = _assessments(blocks, night, update, table, states, obs, fc, ok, verif, ref_max)
    for i, note in enumerate(outlook_notes):
        if note and ok[i]:
            out[i].details["night_outlook"] = note
    idx = np.flatnonzero(ok)
    if len(idx):
        upper = states["upper_air_temp_c"].to_numpy(float)
        air = states["air_temp_c"].to_numpy(float)
        cloud = states["cloud_cover_pct"].to_numpy(float)
        inversion = upper - air
        frost_settings: dict = {}
        gear = _equipment_of(session, [blocks[i] for i in idx])
        # The stage check: heat since each block's recorded stage date from one read of its readings.
        checks = stage_check.stage_checks(session, [blocks[i] for i in idx], night, ref_max)
        check_of = dict(zip(idx.tolist(), checks, strict=True))
        # Blocks whose nights overlap share one time grid; far-apart zones get their own, so the
        # grid of each pass is not padded with the hours of the other side of the world.
        for group in _night_groups(fc, idx):
            curves = _curves_on_grid(fc, states, group, elev)
            forecast = damage.MinTempForecast(fc.quantile(0.1)[group], fc.quantile(0.5)[group],
                                             fc.quantile(0.9)[group], cdf=_cdf(fc, group),
                                             quantile=_table_quantiles(fc, group))
            setups = []
            for i in group:
                b = blocks[i]
                a = out[i]
                setups.append(frost_data.BlockSetup(
                    name=b.name, crop=b.crop, stage=b.stage, t10_c=a.t10_c, t90_c=a.t90_c, area_ha=b.area_ha,
                    equipment=gear.get(b.id, []),
                    upper_inversion_c=None if np.isnan(inversion[i]) else float(inversion[i]),
                    cloud_cover_pct=None if np.isnan(cloud[i]) else float(cloud[i]),
                    settings=_frost_settings(b, frost_settings)))
            risks = frost.plan_night(setups, curves, forecast)
            group_checks = [check_of[i] for i in group.tolist()]
            stage_check.expected_stage_risk(group_checks, [blocks[i].crop for i in group], risks, forecast)
            eco = stage_check.block_economics(
                [blocks[i] for i in group], risks, [gear.get(blocks[i].id, []) for i in group],
                inversion[group], np.array([x.settings.wind_machine_gain_fraction for x in setups]), forecast)
            for k, i in enumerate(group):
                a = out[i]
                for key, value in frost_assessment.assessment_fields(risks[k]).items():
                    setattr(a, key, {**(a.details or {}), **value} if key == "details" else value)
                a.model = str(fc.model[i])
                a.training_nights = int(fc.training_nights[i])
                if group_checks[k] is not None:
                    a.details["stage_check"] = group_checks[k]
                if eco[k]:
                    a.details["economics"] = eco[k]
                crew = (blocks[i].farm.settings or {}).get("crew_size")
                if crew is not None:
                    a.details["crew_size"] = int(crew)
        pressure = np.asarray(moisture.pressure_kpa_from_elevation(elev[idx]), float)
        _set_curves(out, fc, states, idx, pressure)
    _lap(timings, "risk/plan")
    return out
