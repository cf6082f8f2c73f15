"""How a heat day is assessed for a set of blocks: the day's high, the hourly curve, crop and crew heat.

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

import datetime as dt
import math
from collections import defaultdict
from collections.abc import Sequence

import numpy as np
import pandas as pd
from sqlalchemy import select
from sqlalchemy.orm import Session

from advisory import assessment as asm
from advisory.forecast import dayshape, daytime
from advisory.ingest.observations import load_observations_many
from advisory.notices import words as w
from advisory.physics import moisture
from advisory.risk import heat as risk_heat
from advisory.runs.blocks import _recent_verification
from advisory.runs.heat_morning import _high_for, morning_states
from advisory.runs.heat_refit import (
    _OBS_COLUMNS,
    ASSUMED_RANGE_C,
    MORNING_LEAD_H,
    MORNING_TOLERANCE_H,
    POLAR_ISSUE_LOCAL,
    _f,
    _py,
    _ts,
    _usable_rows,
    needs_refit,
    refit_day_models,
    sun_by_date,
)
from advisory.store.schema import Block, Outlook


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
    """The block's identity fields, as :func:`advisory.runs.frost_assess._base_assessment` fills them, without the
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
        sb_start, sb_stop, sb_hours = _sunburn_window(times_py, hit, float(crop.hours_above_c[k, 0]),
                                                      _py(ss[k]) if not polar[k] else None)
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
                        "start_utc": sb_start, "stop_utc": sb_stop,
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


def _sunburn_window(times_py, hit, hours_counted: float, sunset_utc):
    """(start, stop, hours) of the fruit's sunburn risk from the hours whose air is at or above the threshold.

    Each hourly value stands for the hour it starts, as in the crew windows, so the window runs to the
    end of the last such hour, and not past sunset (sunburn needs sun).  The hours are the window's
    length when those hours run together, else the hours counted.
    """
    if not len(hit):
        return None, None, hours_counted
    start = times_py[hit[0]]
    j = int(hit[-1])
    stop = times_py[j + 1] if j + 1 < len(times_py) else times_py[j] + dt.timedelta(hours=1)
    if sunset_utc is not None and start < sunset_utc < stop:
        stop = sunset_utc
    if len(hit) == j - int(hit[0]) + 1:
        hours_counted = (stop - start).total_seconds() / 3600.0
    return start, stop, hours_counted


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
