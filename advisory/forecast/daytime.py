"""Daytime temperature and humidity: the hourly curve of a day, and the day's maximum estimated in the morning.

Two parts, both pure (no database, no network):

1. **Hourly curve** (:func:`diurnal_temperature_c`).  The model of Cesaraccio
   et al. (2001) [1]_: a quarter sine from the minimum at sunrise to the
   maximum, a quarter cosine from the maximum down to the sunset temperature,
   and a square-root-of-time fall through the night to the next sunrise.  The
   sunset temperature is ``Tx - k (Tx - Tp)`` with ``Tp`` the *next* morning's
   minimum, so an evening that cools toward a colder night shows it.

   Why this model.  It keeps Parton & Logan's (1981) [2]_ sine rise but ties
   the evening to the next minimum, and its published coefficients (maximum
   4 h before sunset, ``k = 0.39``) are the defaults.  :func:`parton_logan_c`
   is kept for comparison.

   Per-station calibration (:func:`calibrate_diurnal_params`).  When the
   maximum comes depends on the site: inland it lags solar noon by 3 h or
   more, on a coast the sea breeze brings it before 1 p.m.  So a station with
   a season of hourly observations gets its own two coefficients -- the lag of
   the maximum after solar noon and ``k`` -- by least squares over a coarse
   grid of physically plausible values (lag 0.5-4.5 h, ``k`` 0.1-0.7), on
   daytime hours only.  Checked on three of pvlib's hourly files (inland
   piedmont, sub-tropical coast, sub-arctic island): coefficients fitted on odd
   months beat Parton & Logan's published ones on the even months at every
   site (see ``tests/reference/test_daytime_tmy3.py``).

   When the morning's readings are at hand (the heat note is made after
   sunrise + 2 h), :func:`advisory.forecast.dayshape.anchored_temperature_c`
   draws the rest of the day through the morning reading instead (daytime
   RMSE 1.18 °C held out on the same file, against 1.69 here).

   Sun times are inputs (from :mod:`advisory.physics.sun`).  Where the sun does
   not rise or set (polar day or night: sunrise or sunset NaN/NaT), the curve
   falls back to a cosine between the minimum and maximum with the maximum
   2 h after solar noon -- this tool's own fallback; no published diurnal
   model covers it.

2. **Morning estimate of the maximum** (:func:`morning_features`,
   :func:`fit_max_temp_model`, :func:`predict_max_temp`,
   :func:`rolling_origin_max_temp`).  Where no outlook gives the day's high,
   estimate it from the station's first observation at or after sunrise + 2 h:
   a per-station ridge regression of the rise still to come (maximum minus the
   morning temperature) on the morning temperature, dew point, cloud, wind,
   day length, yesterday's maximum, the rise since sunrise and yesterday's
   rise from its morning to its maximum.  Recent days weigh more (exponential
   forgetting, half-life 60 days) so the fit follows the season.  The
   uncertainty is the spread of the model's own out-of-sample (rolling-origin)
   residuals.  Parameters are a JSON-able dict.

Humidity through the day keeps the dew point constant (no moisture advection)
and recomputes relative humidity from the hourly temperature
(:func:`hourly_rel_humidity_pct`).

Times
-----
Time arguments accept timezone-aware pandas/``datetime`` values, numpy
``datetime64`` (taken as UTC) or plain floats (hours on any common axis).
Everything is converted to hours since 1970-01-01 UTC, so DST days (23 or 25
hours) need no special care.

References
----------
.. [1] Cesaraccio, C., Spano, D., Duce, P. & Snyder, R. L. (2001) An improved
   model for determining degree-day values from daily temperature data.
   Int. J. Biometeorol. 45, 161-169.
.. [2] Parton, W. J. & Logan, J. A. (1981) A model for diurnal variation in soil
   and air temperature. Agricultural Meteorology 23, 205-216.
.. [3] Wilks, D. S. (2011) Statistical Methods in the Atmospheric Sciences,
   3rd ed., Academic Press (ridge regression, cross-validated error).
"""

from __future__ import annotations

import datetime as _dt
import math
from dataclasses import asdict, dataclass

import numpy as np
import pandas as pd

from advisory.physics import moisture

__all__ = [
    "DEFAULT_PARAMS",
    "DiurnalParams",
    "calibrate_diurnal_params",
    "MORNING_FEATURES",
    "dew_point_from_min_rh_c",
    "diurnal_temperature_c",
    "fit_max_temp_model",
    "hourly_rel_humidity_pct",
    "local_day_hours",
    "morning_features",
    "parton_logan_c",
    "predict_max_temp",
    "rolling_origin_max_temp",
    "to_hours",
]

_EPOCH = pd.Timestamp(0, tz="UTC")
#: Hours after solar noon of the maximum in the polar fallback (this tool's choice).
_POLAR_MAX_LAG_H = 2.0


# --------------------------------------------------------------------------- time axis
def to_hours(x):
    """Times as float hours since 1970-01-01 UTC (NaN for NaT/None).

    Parameters
    ----------
    x : array_like
        Aware datetimes (pandas or ``datetime``), numpy ``datetime64`` (taken
        as UTC) or numbers (returned as float, already hours).

    Returns
    -------
    hours : float or ndarray
    """
    if x is None:
        return None
    if isinstance(x, pd.DatetimeIndex | pd.Series) and pd.api.types.is_datetime64_any_dtype(x.dtype):
        s = x if getattr(x.dtype, "tz", None) is not None else x.tz_localize("UTC") \
            if isinstance(x, pd.DatetimeIndex) else x.dt.tz_localize("UTC")
        return np.asarray((s - _EPOCH) / pd.Timedelta(hours=1), dtype=float)
    if isinstance(x, pd.Timestamp | _dt.datetime):
        ts = pd.Timestamp(x)
        if ts.tzinfo is None:
            ts = ts.tz_localize("UTC")
        return float((ts - _EPOCH) / pd.Timedelta(hours=1))
    arr = np.asarray(x)
    if arr.dtype.kind in "fiub":
        return arr.astype(float) if arr.ndim else float(arr)
    if arr.dtype.kind == "M":
        ns = arr.astype("datetime64[ns]")
        out = ns.astype("int64").astype(float) / 3.6e12
        out = np.where(np.isnat(ns), np.nan, out)
        return out if out.ndim else float(out)
    flat = pd.to_datetime(pd.Series(arr.ravel(), dtype=object), utc=True)
    out = np.asarray((flat - _EPOCH) / pd.Timedelta(hours=1), dtype=float).reshape(arr.shape)
    return out if out.ndim else float(out)


def local_day_hours(day, tz, step_minutes=60):
    """The instants of one local calendar day, every ``step_minutes``, as UTC.

    A spring-forward day has 23 hourly instants, a fall-back day 25.

    Parameters
    ----------
    day : datetime.date or str
        Local calendar date.
    tz : str
        IANA time zone of the block.
    step_minutes : int, default 60

    Returns
    -------
    pandas.DatetimeIndex
        Aware (UTC) instants from local midnight (included) to the next local
        midnight (excluded).
    """
    d = pd.Timestamp(day).date()
    start = pd.Timestamp(d).tz_localize(tz)
    end = pd.Timestamp(d + _dt.timedelta(days=1)).tz_localize(tz)
    return pd.date_range(start.tz_convert("UTC"), end.tz_convert("UTC"),
                         freq=f"{int(step_minutes)}min", inclusive="left")


# --------------------------------------------------------------------------- hourly curve
@dataclass(frozen=True)
class DiurnalParams:
    """Coefficients of the daytime curve (see module docstring).

    Attributes
    ----------
    max_anchor : {"sunset", "noon"}
        What the time of the maximum is counted from.
    max_offset_h : float
        Hours from the anchor to the maximum (negative: before it).
        Cesaraccio et al. (2001): 4 h before sunset.
    sunset_fall_fraction : float
        ``k`` in ``T_sunset = Tx - k (Tx - T_next_min)`` (Cesaraccio et al.
        2001 publish 0.39).
    """

    max_anchor: str = "sunset"
    max_offset_h: float = -4.0
    sunset_fall_fraction: float = 0.39

    def __post_init__(self):
        if self.max_anchor not in ("sunset", "noon"):
            raise ValueError(f"max_anchor must be 'sunset' or 'noon', not {self.max_anchor!r}")

    def to_dict(self) -> dict:
        return asdict(self)

    @classmethod
    def from_dict(cls, d: dict) -> DiurnalParams:
        kw = {k: d[k] for k in cls.__dataclass_fields__ if k in d}
        for k in ("max_offset_h", "sunset_fall_fraction"):
            if k in kw:
                kw[k] = float(kw[k])
        return cls(**kw)


#: The published coefficients of Cesaraccio et al. (2001): maximum 4 h before sunset, k = 0.39.
DEFAULT_PARAMS = DiurnalParams()


def _day_inputs(times, *per_day):
    """Hours of ``times`` and per-day values with a trailing axis for broadcasting."""
    t = np.asarray(to_hours(times), dtype=float)
    cols = [None if v is None else np.asarray(to_hours(v) if _is_time(v) else v, dtype=float)[..., None]
            for v in per_day]
    return t, cols


def _is_time(v):
    if isinstance(v, pd.DatetimeIndex | pd.Timestamp | _dt.datetime):
        return True
    if isinstance(v, pd.Series):
        return pd.api.types.is_datetime64_any_dtype(v.dtype)
    arr = np.asarray(v)
    if arr.dtype.kind == "M":
        return True
    if arr.dtype.kind == "O" and arr.size:
        first = next((e for e in arr.ravel() if e is not None and e is not pd.NaT), None)
        return isinstance(first, _dt.datetime | pd.Timestamp) or first is None
    return False


def diurnal_temperature_c(times, min_temp_c, max_temp_c, sunrise, sunset, solar_noon, *,
                          next_min_temp_c=None, next_sunrise=None,
                          prev_sunset_temp_c=None, prev_sunset=None,
                          params: DiurnalParams = DEFAULT_PARAMS):
    """Hourly air temperature of a day from its minimum, maximum and sun times.

    Cesaraccio et al. (2001) form (module docstring):

    * sunrise to ``tx``: ``Tn + (Tx - Tn) sin(pi/2 (t - sr)/(tx - sr))``
    * ``tx`` to sunset:  ``To + (Tx - To) cos(pi/2 (t - tx)/(ss - tx))``,
      ``To = Tx - k (Tx - Tp)``
    * after sunset:      ``To + (Tp - To) sqrt((t - ss)/(sr_next - ss))``
    * before sunrise:    ``To_prev + (Tn - To_prev) sqrt((t - ss_prev)/(sr - ss_prev))``

    with ``tx`` the anchor (sunset or solar noon) plus ``max_offset_h``, kept
    in [noon, sunset - 0.1 day length], ``Tp`` the next morning's minimum (default: this day's minimum),
    ``sr_next`` the next sunrise (default sunrise + 24 h), ``To_prev`` and
    ``ss_prev`` the previous evening's sunset temperature and time (defaults:
    as if yesterday were today).  Before the previous sunset the value stays at
    ``To_prev``; after the next sunrise it stays at ``Tp`` -- evaluate each day's
    own curve for its own hours.

    Parameters
    ----------
    times : array_like
        Instants to evaluate, shape ``(H,)`` shared by all days/blocks or
        ``S + (H,)``.
    min_temp_c, max_temp_c : array_like
        The day's minimum (taken to occur at sunrise) and maximum [°C], shape ``S``.
    sunrise, sunset, solar_noon : array_like
        Sun times of the day, shape ``S`` (NaN/NaT sunrise or sunset: polar day
        or night, see Notes).
    next_min_temp_c : array_like, optional
        Next morning's minimum [°C].
    next_sunrise : array_like, optional
        Next sunrise.
    prev_sunset_temp_c : array_like, optional
        Previous evening's temperature at sunset [°C].
    prev_sunset : array_like, optional
        Previous sunset.
    params : DiurnalParams

    Returns
    -------
    air_temp_c : ndarray
        Shape ``S + (H,)`` (or ``(H,)`` for scalar days).

    Notes
    -----
    Where sunrise or sunset is missing (the sun neither rises nor sets), the
    curve is ``(Tn + Tx)/2 + (Tx - Tn)/2 cos(2 pi (t - noon - lag)/24 h)``:
    this tool's fallback.  A maximum below the minimum is raised to the minimum.

    References
    ----------
    .. [1] Cesaraccio et al. (2001).
    """
    t, (tn, tx_temp, sr, ss, noon, tp, srn, top, ssp) = _day_inputs(
        times, min_temp_c, max_temp_c, sunrise, sunset, solar_noon,
        next_min_temp_c, next_sunrise, prev_sunset_temp_c, prev_sunset)
    tx_temp = np.maximum(tx_temp, tn)
    k = params.sunset_fall_fraction
    tp = tn if tp is None else np.where(np.isfinite(tp), tp, tn)
    day_len = ss - sr
    srn = sr + 24.0 if srn is None else np.where(np.isfinite(srn), srn, sr + 24.0)
    ssp = ss - 24.0 if ssp is None else np.where(np.isfinite(ssp), ssp, ss - 24.0)
    to = tx_temp - k * (tx_temp - tp)
    to_prev_default = tx_temp - k * (tx_temp - tn)
    top = to_prev_default if top is None else np.where(np.isfinite(top), top, to_prev_default)
    anchor = ss if params.max_anchor == "sunset" else noon
    t_max = np.clip(anchor + params.max_offset_h, noon, ss - 0.1 * day_len)

    with np.errstate(invalid="ignore", divide="ignore"):
        u = np.clip((t - sr) / (t_max - sr), 0.0, 1.0)
        rise = tn + (tx_temp - tn) * np.sin(0.5 * np.pi * u)
        v = np.clip((t - t_max) / (ss - t_max), 0.0, 1.0)
        fall = to + (tx_temp - to) * np.cos(0.5 * np.pi * v)
        w = np.clip((t - ss) / (srn - ss), 0.0, 1.0)
        night = to + (tp - to) * np.sqrt(w)
        z = np.clip((t - ssp) / (sr - ssp), 0.0, 1.0)
        dawn = top + (tn - top) * np.sqrt(z)
        out = np.where(t < sr, dawn, np.where(t <= t_max, rise, np.where(t <= ss, fall, night)))
        polar = ~(np.isfinite(sr) & np.isfinite(ss) & (day_len > 0))
        if np.any(polar):
            cosine = 0.5 * (tn + tx_temp) + 0.5 * (tx_temp - tn) * np.cos(
                2.0 * np.pi * (t - noon - _POLAR_MAX_LAG_H) / 24.0)
            out = np.where(polar, cosine, out)
    return out


def calibrate_diurnal_params(times, observed_c, min_temp_c, max_temp_c, sunrise, sunset, solar_noon, *,
                             next_min_temp_c=None, lags_h=None, fall_fractions=None, min_days: int = 20):
    """Fit a station's lag of the maximum and sunset fall fraction to its own hours.

    Least squares over a grid (noon-anchored lag, ``k``) of the daytime (sunrise to sunset) error of
    :func:`diurnal_temperature_c` given each day's observed minimum and maximum.

    Parameters
    ----------
    times : array_like
        Shape ``(D, H)``: the instants of the observations.
    observed_c : array_like
        Shape ``(D, H)``: observed air temperature [°C], NaN where missing.
    min_temp_c, max_temp_c, sunrise, sunset, solar_noon : array_like
        Shape ``(D,)``: the days' extremes and sun times.
    next_min_temp_c : array_like, optional
        Shape ``(D,)``: each next day's minimum.
    lags_h : sequence of float, optional
        Lags to try.  Default: 0.5 to 4.5 h by 0.5 h, then the quarter hours
        around the best.
    fall_fractions : sequence of float, optional
        ``k`` values to try.  Default: 0.1 to 0.7 by 0.1, then +-0.05 around
        the best.
    min_days : int, default 20
        With fewer days that have daytime observations, the published
        defaults are returned.

    Returns
    -------
    params : DiurnalParams
    rmse_c : float
        Daytime root-mean-square error of the returned params on these days
        (NaN when the defaults are returned).
    """
    t = np.asarray(to_hours(times), dtype=float)
    obs = np.asarray(observed_c, dtype=float)
    sr = np.asarray(to_hours(sunrise), dtype=float)[:, None]
    ss = np.asarray(to_hours(sunset), dtype=float)[:, None]
    mask = np.isfinite(obs) & (t >= sr) & (t <= ss)
    if mask.any(axis=1).sum() < min_days:
        return DEFAULT_PARAMS, float("nan")

    def rmse_of(lag, k):
        p = DiurnalParams("noon", float(round(lag, 4)), float(round(k, 4)))
        model = diurnal_temperature_c(t, min_temp_c, max_temp_c, sunrise, sunset, solar_noon,
                                      next_min_temp_c=next_min_temp_c, params=p)
        return float(np.sqrt(np.mean((model - obs)[mask] ** 2))), p

    if lags_h is None and fall_fractions is None:
        # Coarse grid (0.5 h, 0.1), then the neighbours of its best point (0.25 h, 0.05).
        best = min((rmse_of(lag, k) for lag in np.arange(0.5, 4.501, 0.5) for k in np.arange(0.1, 0.701, 0.1)),
                   key=lambda r: r[0])
        lag0, k0 = best[1].max_offset_h, best[1].sunset_fall_fraction
        fine = [(lag0 + dl, k0 + dk) for dl in (-0.25, 0.0, 0.25) for dk in (-0.05, 0.0, 0.05)
                if 0.5 <= lag0 + dl <= 4.5 and 0.1 <= k0 + dk <= 0.7 and (dl, dk) != (0.0, 0.0)]
        best = min([best] + [rmse_of(lag, k) for lag, k in fine], key=lambda r: r[0])
    else:
        lags = np.arange(0.5, 4.501, 0.25) if lags_h is None else np.asarray(lags_h, dtype=float)
        fracs = np.arange(0.10, 0.701, 0.05) if fall_fractions is None else np.asarray(fall_fractions, float)
        best = min((rmse_of(lag, k) for lag in lags for k in fracs), key=lambda r: r[0])
    return best[1], best[0]


def parton_logan_c(times, min_temp_c, max_temp_c, sunrise, sunset, *,
                   next_min_temp_c=None, a_h=1.86, b=2.20, c_h=-0.17):
    """Hourly air temperature by Parton & Logan (1981), for comparison.

    Day (``sr + c`` to sunset): ``Tn + (Tx - Tn) sin(pi m / (Y + 2a))`` with
    ``m`` hours since ``sr + c`` and ``Y`` the day length; night:
    ``Tn' + (Ts - Tn') exp(-b n / Z)`` with ``n`` hours since sunset, ``Z``
    the night length and ``Tn'`` the next minimum (default this day's).
    Before ``sr + c`` the value is ``Tn``.  Default coefficients are Parton &
    Logan's for air at 150 cm.

    Parameters
    ----------
    times, min_temp_c, max_temp_c, sunrise, sunset :
        As for :func:`diurnal_temperature_c`.
    next_min_temp_c : array_like, optional
    a_h, b, c_h : float
        Lag of the maximum [h], night decay coefficient [-], lag of the
        minimum after sunrise [h].

    Returns
    -------
    air_temp_c : ndarray

    References
    ----------
    .. [2] Parton & Logan (1981), Table 1 (150 cm air temperature).
    """
    t, (tn, tx, sr, ss, tp) = _day_inputs(times, min_temp_c, max_temp_c, sunrise, sunset, next_min_temp_c)
    tp = tn if tp is None else tp
    y = ss - sr
    z = 24.0 - y
    with np.errstate(invalid="ignore", divide="ignore"):
        m = np.clip(t - (sr + c_h), 0.0, None)
        day = tn + (tx - tn) * np.clip(np.sin(np.pi * m / (y + 2.0 * a_h)), 0.0, 1.0)
        ts = tn + (tx - tn) * np.clip(np.sin(np.pi * (y - c_h) / (y + 2.0 * a_h)), 0.0, 1.0)
        night = tp + (ts - tp) * np.exp(-b * np.clip(t - ss, 0.0, None) / z)
    return np.where(t > ss, night, day)


# --------------------------------------------------------------------------- humidity
def dew_point_from_min_rh_c(max_temp_c, min_rel_humidity_pct):
    """The day's dew point from its maximum and minimum relative humidity [°C].

    With a conserved dew point the lowest humidity comes with the highest
    temperature, so ``Td = dew_point(Tmax, RHmin)`` (Magnus, Alduchov &
    Eskridge 1996).

    Parameters
    ----------
    max_temp_c : array_like
        Day's maximum [°C].
    min_rel_humidity_pct : array_like
        Day's minimum relative humidity [%].

    Returns
    -------
    dew_point_c : float or ndarray
    """
    rh = np.clip(np.asarray(min_rel_humidity_pct, dtype=float), 0.5, 100.0)
    return moisture.dew_point_c_from_rh(max_temp_c, rh)


def hourly_rel_humidity_pct(air_temp_c, dew_point_c):
    """Relative humidity through the day from a conserved dew point [%].

    Where the curve falls below the dew point, the air is saturated: 100 %.

    Parameters
    ----------
    air_temp_c : array_like
        Hourly air temperature [°C], e.g. shape ``S + (H,)``.
    dew_point_c : array_like
        The day's dew point [°C], broadcastable (e.g. shape ``S + (1,)``).

    Returns
    -------
    rel_humidity_pct : ndarray
    """
    t = np.asarray(air_temp_c, dtype=float)
    td = np.minimum(np.asarray(dew_point_c, dtype=float), t)
    return np.minimum(np.asarray(moisture.rel_humidity_pct_from_dew_point(t, td)), 100.0)


# --------------------------------------------------------------------------- morning estimate of the maximum
#: Predictors of the maximum, in the order of the fitted coefficients.
MORNING_FEATURES = (
    "air_temp_c",        # first observation at or after sunrise + 2 h
    "dew_point_c",
    "cloud_cover_pct",
    "wind_speed_ms",
    "day_length_h",
    "prev_max_temp_c",   # yesterday's (local calendar day) maximum
    "morning_rise_c",    # morning temperature minus the temperature at sunrise
    "prev_day_rise_c",   # yesterday's maximum minus yesterday's morning temperature
)
# Fixed physical scales (so the ridge penalty treats features alike without refitting scales).
_SCALES = {"air_temp_c": 10.0, "dew_point_c": 10.0, "cloud_cover_pct": 50.0, "wind_speed_ms": 3.0,
           "day_length_h": 2.0, "prev_max_temp_c": 10.0, "morning_rise_c": 3.0, "prev_day_rise_c": 5.0}
_METHOD = "ridge-rise-v1"


def morning_features(obs: pd.DataFrame, sun: pd.DataFrame, tz: str, *, lead_h: float = 2.0,
                     tolerance_h: float = 1.5, min_obs_per_day: int = 18) -> pd.DataFrame:
    """Per-day predictors of the maximum from a station's observations.

    Parameters
    ----------
    obs : pandas.DataFrame
        Indexed by aware observation time; columns ``air_temp_c`` and
        ``dew_point_c`` (or ``rel_humidity_pct``), optional ``cloud_cover_pct``
        and ``wind_speed_ms``.
    sun : pandas.DataFrame
        Indexed by local date; columns ``sunrise`` and ``sunset`` (aware
        timestamps, NaT where the sun does not rise or set).
    tz : str
        The station's IANA zone (defines calendar days).
    lead_h : float, default 2
        The morning observation is the first one at or after sunrise + ``lead_h``.
    tolerance_h : float, default 1.5
        How far the morning and sunrise observations may be from their times.
    min_obs_per_day : int, default 18
        Fewer observations in a local day leave its observed maximum NaN.

    Returns
    -------
    pandas.DataFrame
        Indexed by local date, with ``issued_at`` (time of the morning
        observation), the columns of :data:`MORNING_FEATURES`, ``max_so_far_c``
        (highest observation from local midnight to ``issued_at``) and
        ``max_temp_c`` (the day's observed maximum, the target).
    """
    df = obs.sort_index().copy()
    if "dew_point_c" not in df and "rel_humidity_pct" in df:
        df["dew_point_c"] = moisture.dew_point_c_from_rh(df["air_temp_c"].to_numpy(float),
                                                          df["rel_humidity_pct"].to_numpy(float))
    for col in ("dew_point_c", "cloud_cover_pct", "wind_speed_ms"):
        if col not in df:
            df[col] = np.nan
    local = df.index.tz_convert(tz)
    df["_date"] = local.date
    df["_time"] = df.index.tz_convert("UTC").astype("datetime64[ns, UTC]")
    df["_cummax"] = df.groupby("_date")["air_temp_c"].cummax()
    daily = df.groupby("_date")["air_temp_c"].agg(["max", "count"])

    s = sun.copy()
    s.index = pd.Index([pd.Timestamp(d).date() for d in s.index])
    s = s.sort_index()
    sunrise = pd.to_datetime(s["sunrise"], utc=True).astype("datetime64[ns, UTC]")
    sunset = pd.to_datetime(s["sunset"], utc=True).astype("datetime64[ns, UTC]")
    tol = pd.Timedelta(hours=tolerance_h)
    obs_cols = ["_time", "air_temp_c", "dew_point_c", "cloud_cover_pct", "wind_speed_ms", "_cummax", "_date"]
    right = df[obs_cols].reset_index(drop=True)

    def _asof(when, direction):
        left = pd.DataFrame({"when": when.to_numpy(), "day": s.index}).dropna(subset=["when"])
        left = left.sort_values("when")
        got = pd.merge_asof(left, right, left_on="when", right_on="_time", direction=direction,
                            tolerance=tol)
        return got.set_index("day").reindex(s.index)

    morning = _asof(sunrise + pd.Timedelta(hours=lead_h), "forward")
    at_sunrise = _asof(sunrise, "backward")

    out = pd.DataFrame(index=s.index)
    out.index.name = "date"
    out["issued_at"] = morning["_time"]
    for col in ("air_temp_c", "dew_point_c", "cloud_cover_pct", "wind_speed_ms"):
        out[col] = morning[col].astype(float)
    out["day_length_h"] = (sunset - sunrise).dt.total_seconds().to_numpy() / 3600.0
    out["morning_rise_c"] = out["air_temp_c"] - at_sunrise["air_temp_c"].astype(float)
    same_day = morning["_date"].to_numpy() == np.asarray(out.index, dtype=object)
    out["max_so_far_c"] = np.where(same_day, morning["_cummax"].astype(float), np.nan)
    mx = daily["max"].where(daily["count"] >= min_obs_per_day)
    out["max_temp_c"] = mx.reindex(out.index).astype(float)
    prev_days = [d - _dt.timedelta(days=1) for d in out.index]
    out["prev_max_temp_c"] = mx.reindex(prev_days).to_numpy(float)
    morning_t = out["air_temp_c"]
    out["prev_day_rise_c"] = (mx.reindex(prev_days).to_numpy(float)
                              - morning_t.reindex(prev_days).to_numpy(float))
    return out


def _design(features: pd.DataFrame, names) -> np.ndarray:
    cols = [features[n].to_numpy(float) / _SCALES[n] if n in features else np.full(len(features), np.nan)
            for n in names]
    return np.column_stack([np.ones(len(features))] + cols)


def _day_numbers(index) -> np.ndarray:
    return np.array([pd.Timestamp(d).toordinal() for d in index], dtype=float)


def _choose_features(features: pd.DataFrame, min_share: float = 0.8) -> list[str]:
    target_ok = np.isfinite(features["max_temp_c"].to_numpy(float)) if len(features) else np.array([])
    chosen = []
    for n in MORNING_FEATURES:
        if n not in features or not target_ok.any():
            continue
        share = np.isfinite(features.loc[target_ok, n].to_numpy(float)).mean()
        if share >= min_share:
            chosen.append(n)
    return chosen


def rolling_origin_max_temp(features: pd.DataFrame, *, min_train_days: int = 30,
                            half_life_days: float = 60.0, ridge: float = 1.0,
                            names=None) -> pd.DataFrame:
    """Out-of-sample estimates of each day's maximum, each from earlier days only.

    Day ``i`` is predicted by the model fitted on all days before it that have
    a complete row (exponential weights by age, half-life ``half_life_days``);
    days with fewer than ``min_train_days`` earlier complete days get NaN.

    Parameters
    ----------
    features : pandas.DataFrame
        Output of :func:`morning_features` (sorted by date).
    min_train_days : int, default 30
    half_life_days : float, default 60
    ridge : float, default 1
        Ridge penalty on the (scaled) slopes; the intercept is not penalised.
    names : sequence of str, optional
        Predictors to use (default: those present on at least 80 % of days).

    Returns
    -------
    pandas.DataFrame
        Indexed like ``features``: ``predicted_c``, ``observed_c``,
        ``residual_c`` (predicted - observed), ``n_train``.
    """
    features = features.sort_index()
    names = list(_choose_features(features) if names is None else names)
    x = _design(features, names)
    y = features["max_temp_c"].to_numpy(float) - features["air_temp_c"].to_numpy(float)
    base = features["air_temp_c"].to_numpy(float)
    so_far = features["max_so_far_c"].to_numpy(float) if "max_so_far_c" in features else np.full(len(y), np.nan)
    day = _day_numbers(features.index)
    complete = np.isfinite(x).all(axis=1) & np.isfinite(y)
    k = x.shape[1]
    decay = 0.5 ** (1.0 / half_life_days)
    gram = np.zeros((len(y), k, k))
    rhs = np.zeros((len(y), k))
    n_train = np.zeros(len(y), dtype=int)
    g = np.zeros((k, k))
    b = np.zeros(k)
    n = 0
    last_day = day[0] if len(day) else 0.0
    for i in range(len(y)):   # cheap k-by-k updates, one per day
        f = decay ** (day[i] - last_day)
        g *= f
        b *= f
        last_day = day[i]
        gram[i], rhs[i], n_train[i] = g, b, n
        if complete[i]:
            g = g + np.outer(x[i], x[i])
            b = b + x[i] * y[i]
            n += 1
    penalty = ridge * np.diag([0.0] + [1.0] * (k - 1))
    ok = n_train >= min_train_days
    pred = np.full(len(y), np.nan)
    if ok.any():
        beta = np.linalg.solve(gram[ok] + penalty, rhs[ok][..., None])[..., 0]
        xi = x[ok].copy()
        means = gram[ok][:, 0, :] / gram[ok][:, 0, :1]      # weighted means of scaled predictors
        xi = np.where(np.isfinite(xi), xi, means)
        pred[ok] = base[ok] + np.einsum("ij,ij->i", xi, beta)
        pred = np.where(np.isfinite(pred) & np.isfinite(so_far), np.maximum(pred, so_far), pred)
    observed = features["max_temp_c"].to_numpy(float)
    return pd.DataFrame({"predicted_c": pred, "observed_c": observed, "residual_c": pred - observed,
                         "n_train": n_train}, index=features.index)


def fit_max_temp_model(features: pd.DataFrame, *, half_life_days: float = 60.0, ridge: float = 1.0,
                       min_train_days: int = 30, residual_window_days: int = 120) -> dict:
    """Fit a station's morning-maximum regression and its out-of-sample spread.

    Parameters
    ----------
    features : pandas.DataFrame
        Output of :func:`morning_features` for the station's history.
    half_life_days, ridge, min_train_days :
        As for :func:`rolling_origin_max_temp`.
    residual_window_days : int, default 120
        The spread uses the rolling-origin residuals of the most recent days.

    Returns
    -------
    params : dict
        JSON-able: ``method``, ``features``, ``scales``, ``intercept``,
        ``coefficients``, ``feature_means`` (scaled, for missing values),
        ``ridge``, ``half_life_days``, ``n_days``, ``fitted_through`` (ISO date),
        ``residual_sd_c``, ``residual_mae_c``, ``residual_q10_c``,
        ``residual_q90_c``, ``n_residuals``.  ``coefficients`` is empty (and
        :func:`predict_max_temp` returns NaN) when fewer than
        ``min_train_days`` complete days exist.
    """
    features = features.sort_index()
    names = _choose_features(features)
    x = _design(features, names)
    y = features["max_temp_c"].to_numpy(float) - features["air_temp_c"].to_numpy(float)
    complete = np.isfinite(x).all(axis=1) & np.isfinite(y)
    params = {"method": _METHOD, "features": names, "scales": [_SCALES[n] for n in names],
              "intercept": None, "coefficients": [], "feature_means": [], "ridge": float(ridge),
              "half_life_days": float(half_life_days), "n_days": int(complete.sum()),
              "fitted_through": None, "residual_sd_c": None, "residual_mae_c": None,
              "residual_q10_c": None, "residual_q90_c": None, "n_residuals": 0}
    if complete.sum() < min_train_days:
        return params
    day = _day_numbers(features.index)
    w = 0.5 ** ((day[complete].max() - day[complete]) / half_life_days)
    xc, yc = x[complete], y[complete]
    penalty = ridge * np.diag([0.0] + [1.0] * (x.shape[1] - 1))
    beta = np.linalg.solve(xc.T @ (xc * w[:, None]) + penalty, xc.T @ (w * yc))
    means = (w[:, None] * xc).sum(axis=0) / w.sum()
    params.update(intercept=float(beta[0]), coefficients=[float(v) for v in beta[1:]],
                  feature_means=[float(v) for v in means[1:]],
                  fitted_through=pd.Timestamp(features.index[complete][-1]).date().isoformat())
    ro = rolling_origin_max_temp(features, min_train_days=min_train_days, half_life_days=half_life_days,
                                 ridge=ridge, names=names)
    res = ro["residual_c"].to_numpy(float)
    res = res[np.isfinite(res)][-residual_window_days:]
    if len(res) >= 10:
        params.update(residual_sd_c=float(np.sqrt(np.mean(res ** 2))),
                      residual_mae_c=float(np.mean(np.abs(res))),
                      residual_q10_c=float(np.quantile(res, 0.1)),
                      residual_q90_c=float(np.quantile(res, 0.9)), n_residuals=int(len(res)))
    return params


def predict_max_temp(params: dict, features: pd.DataFrame) -> pd.DataFrame:
    """The day's maximum from its morning predictors and a fitted model.

    Parameters
    ----------
    params : dict
        From :func:`fit_max_temp_model` (or its JSON round trip).
    features : pandas.DataFrame
        Rows of :func:`morning_features` (``max_temp_c`` not needed).

    Returns
    -------
    pandas.DataFrame
        ``max_temp_c`` (never below ``max_so_far_c``), ``spread_c`` (RMS of
        out-of-sample residuals), ``low_c`` and ``high_c`` (an 80 % range from
        the residuals' 10th and 90th percentiles), ``estimated`` (always True:
        say so in the notice).  NaN when the model is not fitted yet or the
        morning temperature is missing.
    """
    n = len(features)
    out = pd.DataFrame(index=features.index)
    if not params.get("coefficients"):
        pred = np.full(n, np.nan)
    else:
        names = params["features"]
        x = np.column_stack([features[nm].to_numpy(float) / sc if nm in features else np.full(n, np.nan)
                             for nm, sc in zip(names, params["scales"], strict=True)])
        means = np.asarray(params["feature_means"], dtype=float)
        x = np.where(np.isfinite(x), x, means)
        rise = params["intercept"] + x @ np.asarray(params["coefficients"], dtype=float)
        pred = features["air_temp_c"].to_numpy(float) + rise
        if "max_so_far_c" in features:
            so_far = features["max_so_far_c"].to_numpy(float)
            pred = np.where(np.isfinite(pred) & np.isfinite(so_far), np.maximum(pred, so_far), pred)
    sd = params.get("residual_sd_c")
    q10, q90 = params.get("residual_q10_c"), params.get("residual_q90_c")
    out["max_temp_c"] = pred
    out["spread_c"] = np.nan if sd is None else sd
    # residual = predicted - observed, so the observed value lies in [pred - q90, pred - q10]
    out["low_c"] = pred - (q90 if q90 is not None else (1.2816 * sd if sd is not None else math.nan))
    out["high_c"] = pred - (q10 if q10 is not None else (-1.2816 * sd if sd is not None else math.nan))
    out["estimated"] = True
    return out
