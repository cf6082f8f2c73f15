"""The morning of a heat day: each station's morning reading and features, and the day's high
(outlook, regression on the morning reading, or yesterday's maximum carried over).
"""

from __future__ import annotations

import datetime as dt
import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from advisory.forecast import daytime
from advisory.notices import words as w
from advisory.physics import moisture
from advisory.runs.heat_refit import (
    EARLY_READING_MIN_LEAD_H,
    MIN_OBS_PER_DAY,
    MIN_OUTLOOK_PAIRS,
    MORNING_LEAD_H,
    MORNING_TOLERANCE_H,
    OUTLOOK_RESIDUAL_Q_C,
    PERSISTENCE_MAE_C,
    PERSISTENCE_RESIDUAL_Q_C,
    REGRESSION_HALF_RANGE_C,
    sun_by_date,
)
from advisory.store.schema import Outlook, Station

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
