"""Evening state of a block's station at the forecast reference time.

The reference time of a block and night is sunset plus an offset (default 2 h,
configurable per block).  The evening state is read from the station's
QC-passed observations -- a DataFrame indexed by timezone-aware time with the
canonical columns ``air_temp_c``, ``dew_point_c`` (or ``rel_humidity_pct``),
``wind_speed_ms``, ``cloud_cover_pct`` and optionally ``upper_air_temp_c``;
values that failed QC are NaN.  For every variable the latest valid value at or
before the reference time is taken, provided it is no older than a limit
(default 90 min, enough for hourly reports with some delay).

Air temperature and dew point are required: without them the row says
``status == "no_forecast"`` with a plain ``reason``.  Wind and cloud may be
missing; the forecast then assumes calm air and a clear sky -- the colder
case -- and the ``assumed`` column says so.  Nothing is guessed silently.

Derived predictors:

* ``cooling_since_sunset_c`` -- air temperature at sunset minus that at the
  reference time (positive when cooling), the night's own Brunt rate [1]_;
* ``dew_point_change_3h_c`` -- dew point at the reference time minus 3 h
  earlier: a falling dew point in the evening marks drier air arriving;
* ``hours_since_sunset`` and ``hours_to_sunrise`` at the reference time.

The batch form works on whole arrays: all stations' observations are merged
into one sorted key array and every lookup is a single ``numpy.searchsorted``.

References
----------
.. [1] Brunt, D. (1941) Physical and Dynamical Meteorology, 2nd ed., Cambridge
   University Press (nocturnal cooling proportional to the square root of time).
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Mapping
from dataclasses import dataclass, fields

import numpy as np
import pandas as pd

from advisory.physics.moisture import dew_point_c_from_rh

__all__ = [
    "REFERENCE_OFFSET_H", "MAX_AGE_MIN", "TENDENCY_H", "OK", "NO_FORECAST", "VARIABLES",
    "STATE_COLUMNS", "reference_times", "evening_states", "evening_state", "EveningState",
]

#: Default reference time: this many hours after sunset.
REFERENCE_OFFSET_H = 2.0
#: Default age limit of an observation at the reference time [min].
MAX_AGE_MIN = 90.0
#: Look-back for the dew-point tendency [h].
TENDENCY_H = 3.0
#: Row status: an evening state usable for a forecast.
OK = "ok"
#: Row status: no forecast; ``reason`` says why.
NO_FORECAST = "no_forecast"
#: Canonical observation columns read by this module.
VARIABLES = ("air_temp_c", "dew_point_c", "wind_speed_ms", "cloud_cover_pct", "upper_air_temp_c")

STATE_COLUMNS = [
    "station", "night", "status", "reason", "assumed", "sunset", "sunrise", "reference_time",
    "hours_since_sunset", "hours_to_sunrise", "air_temp_c", "air_temp_time", "air_temp_age_min",
    "dew_point_c", "wind_speed_ms", "cloud_cover_pct", "upper_air_temp_c", "sunset_air_temp_c",
    "cooling_since_sunset_c", "dew_point_change_3h_c",
]

_NS_PER_MIN = 60 * 10**9
_NS_PER_H = 3600 * 10**9


def reference_times(sunset, offset_h=REFERENCE_OFFSET_H) -> pd.DatetimeIndex:
    """Reference times: sunset plus an offset.

    Parameters
    ----------
    sunset : array_like of aware datetimes
        Sunset of each block and night (``NaT`` allowed).
    offset_h : float or array_like
        Hours after sunset, per block or for all.

    Returns
    -------
    pandas.DatetimeIndex
        UTC reference times (``NaT`` where sunset is missing).
    """
    ss = _utc_index(sunset)
    off = np.broadcast_to(np.asarray(offset_h, dtype=float), (len(ss),))
    return (ss + pd.to_timedelta(off, unit="h")).as_unit("ns")


def _utc_index(times) -> pd.DatetimeIndex:
    idx = times if isinstance(times, pd.DatetimeIndex) else pd.DatetimeIndex(pd.Series(times, dtype=object)
                                                                              if isinstance(times, list)
                                                                              else times)
    if idx.tz is None:
        if idx.notna().any():
            raise ValueError("times must be timezone-aware")
        idx = idx.tz_localize("UTC")
    return idx.tz_convert("UTC").as_unit("ns")


def _ns(times) -> np.ndarray:
    """Aware times as int64 ns since the epoch; NaT as the minimum int64."""
    return _utc_index(times).asi8


def _frame_time_ns(frame: pd.DataFrame) -> np.ndarray:
    idx = frame.index if "time" not in frame.columns else pd.DatetimeIndex(frame["time"])
    if not isinstance(idx, pd.DatetimeIndex):
        raise ValueError("observations must be indexed by time (or have a 'time' column)")
    if idx.tz is None:
        raise ValueError("observation times must be timezone-aware")
    return idx.tz_convert("UTC").as_unit("ns").asi8


def _column(frame: pd.DataFrame, var: str) -> np.ndarray:
    if var in frame.columns:
        return pd.to_numeric(frame[var], errors="coerce").to_numpy(dtype=float)
    if var == "dew_point_c" and "rel_humidity_pct" in frame.columns and "air_temp_c" in frame.columns:
        t = pd.to_numeric(frame["air_temp_c"], errors="coerce").to_numpy(dtype=float)
        rh = pd.to_numeric(frame["rel_humidity_pct"], errors="coerce").to_numpy(dtype=float)
        with np.errstate(invalid="ignore", divide="ignore"):
            td = np.asarray(dew_point_c_from_rh(t, np.where(rh > 0, rh, np.nan)), dtype=float)
        return td
    return np.full(len(frame), np.nan)


class _ObservationIndex:
    """All stations' observations as sorted (station, time) keys per variable."""

    def __init__(self, observations, station_keys):
        if isinstance(observations, Mapping):
            names = pd.Index(list(observations), dtype=object)
            frames = [observations[k] for k in names]
            codes = np.concatenate([np.full(len(f), i, dtype=np.int64) for i, f in enumerate(frames)]
                                   or [np.zeros(0, np.int64)])
            times = np.concatenate([_frame_time_ns(f) for f in frames] or [np.zeros(0, np.int64)])
            values = {v: np.concatenate([_column(f, v) for f in frames] or [np.zeros(0)]) for v in VARIABLES}
        elif isinstance(observations, pd.DataFrame) and "station" in observations.columns:
            codes, uniques = pd.factorize(observations["station"], sort=False)
            codes = codes.astype(np.int64)
            names = pd.Index(uniques, dtype=object)
            times = _frame_time_ns(observations)
            values = {v: _column(observations, v) for v in VARIABLES}
        elif isinstance(observations, pd.DataFrame):
            names = pd.Index([None], dtype=object)
            codes = np.zeros(len(observations), dtype=np.int64)
            times = _frame_time_ns(observations)
            values = {v: _column(observations, v) for v in VARIABLES}
        else:
            raise TypeError("observations must be a DataFrame or a mapping of station -> DataFrame")
        self.names = names
        self.t0 = int(times.min()) if len(times) else 0
        t_ms = (times - self.t0) // 10**6
        self.span = int(t_ms.max()) + 2 if len(times) else 2
        key = codes * self.span + t_ms
        order = None if len(key) < 2 or np.all(key[1:] >= key[:-1]) else np.argsort(key, kind="stable")
        if order is not None:
            key, codes, times = key[order], codes[order], times[order]
        self.by_var = {}
        for v, vals in values.items():
            vals = vals if order is None else vals[order]
            ok = np.isfinite(vals)
            self.by_var[v] = (key[ok], codes[ok], times[ok], vals[ok])
        self.query_codes = self._codes_for(station_keys)

    def _codes_for(self, station_keys):
        if len(self.names) == 1 and self.names[0] is None:
            return None  # one station's frame serves every row
        if station_keys is None:
            if len(self.names) != 1:
                raise ValueError("station keys are required when observations cover several stations")
            return None
        return self.names.get_indexer(pd.Index(np.asarray(station_keys, dtype=object))).astype(np.int64)

    def latest(self, var, t_ns, max_age_ns):
        """Latest valid value at or before each time, no older than max_age_ns."""
        n = len(t_ns)
        codes = np.zeros(n, np.int64) if self.query_codes is None else self.query_codes
        key, kc, kt, kv = self.by_var[var]
        out_v = np.full(n, np.nan)
        out_t = np.full(n, np.iinfo(np.int64).min, dtype=np.int64)
        if len(key) == 0:
            return out_v, out_t
        valid_q = (codes >= 0) & (t_ns != np.iinfo(np.int64).min) & (t_ns >= self.t0)
        off = np.clip((t_ns - self.t0) // 10**6, 0, self.span - 1)
        idx = np.searchsorted(key, np.where(codes >= 0, codes, 0) * self.span + off, side="right") - 1
        idx_c = np.clip(idx, 0, len(key) - 1)
        hit = valid_q & (idx >= 0) & (kc[idx_c] == codes) & (t_ns - kt[idx_c] <= max_age_ns)
        out_v[hit] = kv[idx_c[hit]]
        out_t[hit] = kt[idx_c[hit]]
        return out_v, out_t

    def known(self, n):
        codes = self.query_codes
        return np.ones(n, bool) if codes is None else codes >= 0


def evening_states(observations, sun: pd.DataFrame, *, station=None, reference_offset_h=REFERENCE_OFFSET_H,
                   max_age_min=MAX_AGE_MIN) -> pd.DataFrame:
    """Evening states of many blocks (or stations, or nights) at once.

    Parameters
    ----------
    observations : pandas.DataFrame or mapping
        QC-passed observations: one DataFrame indexed by aware time (a single
        station), a mapping ``station -> DataFrame``, or one long DataFrame
        with a ``station`` column and a ``time`` column or index.
    sun : pandas.DataFrame
        One row per block and night with aware ``sunset`` and ``sunrise``
        columns, and optionally ``status`` and ``night`` -- e.g. the result of
        :func:`advisory.physics.sun.sun_times_batch`.
    station : array_like, optional
        Station key of each row of ``sun`` (needed when ``observations``
        covers several stations).
    reference_offset_h : float or array_like, default 2
        Reference time after sunset [h], for all rows or per row.
    max_age_min : float, default 90
        Oldest acceptable observation at the reference time (and at sunset and
        three hours before the reference time, for the derived predictors) [min].

    Returns
    -------
    pandas.DataFrame
        One row per row of ``sun`` (same index), columns :data:`STATE_COLUMNS`:
        ``status`` (``"ok"`` / ``"no_forecast"``), ``reason`` (None when ok),
        ``assumed`` (tuple of plain sentences on assumptions made),
        times as ``datetime64[ns, UTC]``, temperatures [°C], wind [m s-1],
        cloud [%], ``air_temp_age_min`` [min], hours [h].
    """
    n = len(sun)
    sunset = _utc_index(sun["sunset"])
    sunrise = _utc_index(sun["sunrise"])
    ref = reference_times(sunset, reference_offset_h)
    ref_ns = ref.asi8
    nat = np.iinfo(np.int64).min
    keys = None if station is None else np.asarray(station, dtype=object)
    if keys is not None and len(keys) != n:
        raise ValueError("station must have one key per row of sun")
    index = _ObservationIndex(observations, keys)
    max_age_ns = int(max_age_min * _NS_PER_MIN)

    got = {v: index.latest(v, ref_ns, max_age_ns) for v in VARIABLES}
    t_air, t_air_time = got["air_temp_c"]
    td, _ = got["dew_point_c"]
    wind, _ = got["wind_speed_ms"]
    cloud, _ = got["cloud_cover_pct"]
    upper, _ = got["upper_air_temp_c"]
    t_ss, _ = index.latest("air_temp_c", sunset.asi8, max_age_ns)
    td_back, _ = index.latest("dew_point_c", np.where(ref_ns == nat, nat, ref_ns - int(TENDENCY_H * _NS_PER_H)),
                              max_age_ns)

    status = np.full(n, OK, dtype=object)
    reason = np.full(n, None, dtype=object)

    def fail(mask, text):
        new = mask & (status == OK)
        status[new] = NO_FORECAST
        reason[new] = text

    sun_status = sun["status"].to_numpy(dtype=object) if "status" in sun.columns else np.full(n, "normal")
    fail(sun_status == "polar_day", "The sun does not set this night: no nocturnal forecast.")
    fail(sun_status == "polar_night", "The sun does not rise this day: no nocturnal forecast.")
    fail(ref_ns == nat, "No sunset time for this night: no nocturnal forecast.")
    if keys is not None:
        fail(~index.known(n), "No observations at all for this station.")
    limit = f"{max_age_min:g} min"
    latest_any_air, latest_any_time = index.latest("air_temp_c", ref_ns, np.iinfo(np.int64).max // 2)
    for i in np.flatnonzero(np.isnan(t_air) & (status == OK)):
        if np.isfinite(latest_any_air[i]):
            age_h = (ref_ns[i] - latest_any_time[i]) / _NS_PER_H
            age = f"{age_h:.1f} h" if age_h < 48 else f"{age_h / 24:.0f} days"
            reason[i] = (f"Air temperature is stale: the latest reading before the reference time is "
                         f"{age} old (limit {limit}).")
        else:
            reason[i] = "No air temperature reading before the reference time."
        status[i] = NO_FORECAST
    fail(np.isnan(td), f"No dew point (or humidity) reading within {limit} before the reference time.")

    assumed = np.empty(n, dtype=object)
    no_wind = np.isnan(wind)
    no_cloud = np.isnan(cloud)
    for i in range(n):
        a = []
        if no_wind[i]:
            a.append("wind unknown: calm air assumed (the colder case)")
        if no_cloud[i]:
            a.append("cloud unknown: clear sky assumed (the colder case)")
        assumed[i] = tuple(a)

    with np.errstate(invalid="ignore"):
        age = np.where(t_air_time == nat, np.nan, (ref_ns - t_air_time) / _NS_PER_MIN)
    air_time = pd.DatetimeIndex(np.where(t_air_time == nat, np.datetime64("NaT", "ns"),
                                         t_air_time.astype("datetime64[ns]"))).tz_localize("UTC")
    nights = sun["night"].to_numpy(dtype=object) if "night" in sun.columns else np.full(n, None)
    out = pd.DataFrame({
        "station": keys if keys is not None else np.full(n, None, dtype=object),
        "night": nights,
        "status": status,
        "reason": reason,
        "assumed": assumed,
        "sunset": sunset,
        "sunrise": sunrise,
        "reference_time": ref,
        "hours_since_sunset": (ref - sunset).total_seconds().to_numpy() / 3600.0,
        "hours_to_sunrise": (sunrise - ref).total_seconds().to_numpy() / 3600.0,
        "air_temp_c": t_air,
        "air_temp_time": air_time,
        "air_temp_age_min": age,
        "dew_point_c": td,
        "wind_speed_ms": wind,
        "cloud_cover_pct": cloud,
        "upper_air_temp_c": upper,
        "sunset_air_temp_c": t_ss,
        "cooling_since_sunset_c": t_ss - t_air,
        "dew_point_change_3h_c": td - td_back,
    }, columns=STATE_COLUMNS)
    out.index = sun.index
    return out


@dataclass(frozen=True)
class EveningState:
    """Evening state of one block and night (see :func:`evening_states` for the fields)."""

    station: object
    night: dt.date | None
    status: str
    reason: str | None
    assumed: tuple
    sunset: pd.Timestamp
    sunrise: pd.Timestamp
    reference_time: pd.Timestamp
    hours_since_sunset: float
    hours_to_sunrise: float
    air_temp_c: float
    air_temp_time: pd.Timestamp
    air_temp_age_min: float
    dew_point_c: float
    wind_speed_ms: float
    cloud_cover_pct: float
    upper_air_temp_c: float
    sunset_air_temp_c: float
    cooling_since_sunset_c: float
    dew_point_change_3h_c: float

    @property
    def ok(self) -> bool:
        """True when a forecast can be made."""
        return self.status == OK

    @classmethod
    def from_row(cls, row: pd.Series) -> EveningState:
        """One row of :func:`evening_states` as an EveningState."""
        values = {f.name: row[f.name] for f in fields(cls)}
        if not isinstance(values["reason"], str):
            values["reason"] = None
        if not isinstance(values["assumed"], tuple):
            values["assumed"] = tuple(values["assumed"]) if isinstance(values["assumed"], list) else ()
        return cls(**values)


def evening_state(observations: pd.DataFrame, sunset, sunrise, *, night=None,
                  reference_offset_h=REFERENCE_OFFSET_H, max_age_min=MAX_AGE_MIN,
                  sun_status: str = "normal") -> EveningState:
    """Evening state of one station for one night.

    Parameters
    ----------
    observations : pandas.DataFrame
        The station's QC-passed observations, indexed by aware time.
    sunset, sunrise : aware datetime or None
        Sunset of the evening and the sunrise ending the night.
    night : datetime.date, optional
        Local date of the evening (carried into the result).
    reference_offset_h : float, default 2
        Reference time after sunset [h].
    max_age_min : float, default 90
        Oldest acceptable observation [min].
    sun_status : str, default "normal"
        Status from :func:`advisory.physics.sun.sun_times`.

    Returns
    -------
    EveningState
    """
    sun = pd.DataFrame({"sunset": pd.DatetimeIndex([sunset], tz="UTC") if sunset is None else
                        _utc_index([sunset]),
                        "sunrise": pd.DatetimeIndex([sunrise], tz="UTC") if sunrise is None else
                        _utc_index([sunrise]),
                        "status": [sun_status], "night": [night]})
    states = evening_states(observations, sun, reference_offset_h=reference_offset_h,
                            max_age_min=max_age_min)
    return EveningState.from_row(states.iloc[0])
