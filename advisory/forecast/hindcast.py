"""Rolling-origin verification (hindcast) of the night-minimum forecast over a station history.

Night ``k`` is forecast exactly as it would have been that evening: from the
observations up to its reference time and from a calibration fitted on the
nights verified before it (all of them end at sunrise + 1 h, before night
``k``'s evening).  Nights before :data:`~advisory.forecast.calibration.MIN_NIGHTS`
verified nights use the physical model and are reported on their own line.

A night is verified when its whole window -- from sunset to one hour after
sunrise -- is covered by air-temperature readings with no gap longer than 90
minutes; the observed minimum is the lowest reading from the reference time to
one hour after sunrise.  Nights whose window is broken (missing data, or
records spliced from different years) are skipped and counted.

Scores (Wilks [1]_): mean absolute error, bias (forecast - observed) and RMSE,
on all nights, cold nights (observed minimum <= 2 °C) and radiative evenings
(cloud <= 30 %, wind <= 3 m/s); for the event "minimum <= 0 °C" the Brier score,
hit rate and false-alarm ratio at the warning probability
(:data:`WARNING_PROBABILITY`) and a reliability table; and the share of nights
inside the p10-p90 range (0.8 if the spread is honest).

The warning probability is 0.1: active frost protection costs far less than the
crop it saves, and in the cost-loss model acting pays whenever the probability
exceeds the cost/loss ratio, typically under 0.1 for orchards and vineyards
(Snyder & de Melo-Abreu [2]_ on the economics; common practice).

References
----------
.. [1] Wilks, D. S. (2011) Statistical Methods in the Atmospheric Sciences, 3rd ed.,
   Academic Press, ch. 8 (Brier score, hit rate, false-alarm ratio, reliability).
.. [2] Snyder, R. L. & de Melo-Abreu, J. P. (2005) Frost Protection: fundamentals,
   practice and economics, Vol. 1. FAO Environment and Natural Resources Series 10.
"""

from __future__ import annotations

import json
import re
from pathlib import Path

import numpy as np
import pandas as pd

from advisory.errors import InputError
from advisory.forecast.calibration import (
    MAX_NIGHTS,
    MIN_NIGHTS,
    PIT_MAX_NIGHTS,
    PREDICTORS,
    fit_arrays,
    forecast_quantiles,
    is_radiative,
    pit_levels,
    pit_of,
    predictor_matrix,
    recalibrate_table,
)
from advisory.forecast.cooling import physical_night
from advisory.forecast.evening import MAX_AGE_MIN, OK, REFERENCE_OFFSET_H, evening_states
from advisory.forecast.result import (
    CALIBRATED,
    LEVELS,
    PHYSICAL,
    table_crps,
    table_prob_below,
    table_quantile,
)
from advisory.physics.moisture import dew_point_c_from_rh
from advisory.physics.sun import sun_times_batch

__all__ = [
    "WARNING_PROBABILITY", "COLD_NIGHT_C", "FROST_C", "MAX_GAP_MIN", "VERIFY_AFTER_SUNRISE_H",
    "read_observations_csv", "verify_windows", "verified_nights", "hindcast_frame", "summarize",
    "run_hindcast", "format_summary", "plot_hindcast",
]

#: Probability of a minimum <= 0 °C at which a frost warning is counted as issued.
WARNING_PROBABILITY = 0.1
#: Cold night: observed minimum at or below this [°C].
COLD_NIGHT_C = 2.0
#: Frost event: observed minimum at or below this [°C].
FROST_C = 0.0
#: Longest gap between readings inside a verified night's window [min].
MAX_GAP_MIN = 90.0
#: The observed minimum is searched up to this long after sunrise [h].
VERIFY_AFTER_SUNRISE_H = 1.0
#: Reliability-table bin edges for the forecast probability.
RELIABILITY_EDGES = (0.0, 0.05, 0.15, 0.25, 0.35, 0.45, 0.55, 0.65, 0.75, 0.85, 0.95, 1.0)

_NS_PER_MIN = 60 * 10**9
_OFFSET = re.compile(r"(?:Z|[+-]\d\d(?::?\d\d)?)$")

# (canonical name, alternatives with converters) for the small CSV reader
_UNITS = {
    "air_temp_c": [("air_temp_c", None), ("air_temp_f", lambda f: (f - 32.0) / 1.8)],
    "dew_point_c": [("dew_point_c", None), ("dew_point_f", lambda f: (f - 32.0) / 1.8)],
    "wind_speed_ms": [("wind_speed_ms", None), ("wind_speed_kmh", lambda v: v / 3.6),
                      ("wind_speed_mph", lambda v: v * 0.44704)],
    "cloud_cover_pct": [("cloud_cover_pct", None)],
    "upper_air_temp_c": [("upper_air_temp_c", None)],
    "rel_humidity_pct": [("rel_humidity_pct", None)],
}
# physical limits: values outside are treated as failed QC (NaN)
_LIMITS = {"air_temp_c": (-80.0, 60.0), "dew_point_c": (-90.0, 40.0), "wind_speed_ms": (0.0, 75.0),
           "cloud_cover_pct": (0.0, 100.0), "upper_air_temp_c": (-80.0, 60.0),
           "rel_humidity_pct": (0.5, 100.5)}


# --------------------------------------------------------------------------- reading
def read_observations_csv(path, tz: str | None = None) -> pd.DataFrame:
    """Read a canonical observation CSV (a small reader for the hindcast).

    Handles the canonical columns: ``time`` (ISO 8601, with a UTC offset; a
    naive time is read in ``tz`` and an ambiguous or non-existent local time is
    an error), ``air_temp_c`` or ``air_temp_f``, ``dew_point_c`` /
    ``dew_point_f`` or ``rel_humidity_pct``, optional ``wind_speed_ms`` /
    ``wind_speed_kmh`` / ``wind_speed_mph``, ``cloud_cover_pct``,
    ``upper_air_temp_c``.  An empty cell is missing.  Quality control is
    limited to physical limits (a value outside them becomes NaN) and a dew
    point above the air temperature by more than 1 K (NaN); duplicate times
    keep the last row.  The full importer with QC lives in
    :mod:`advisory.ingest`.

    Parameters
    ----------
    path : path-like
        CSV file.
    tz : str, optional
        IANA zone for naive times.

    Returns
    -------
    pandas.DataFrame
        Indexed by UTC time (sorted), canonical columns in SI/°C.

    Raises
    ------
    InputError
        Unreadable file, missing columns, bad times or numbers (with line and field).
    """
    path = str(path)
    try:
        raw = pd.read_csv(path, dtype=str, keep_default_na=False, skipinitialspace=True)
    except FileNotFoundError:
        raise InputError("file not found", file=path) from None
    except (pd.errors.ParserError, UnicodeDecodeError, pd.errors.EmptyDataError) as exc:
        raise InputError(f"not a readable CSV file ({exc})", file=path) from None
    raw.columns = [c.strip() for c in raw.columns]
    if "time" not in raw.columns:
        raise InputError("no 'time' column", file=path, field="time")
    out = pd.DataFrame(index=raw.index)
    for canon, options in _UNITS.items():
        for name, conv in options:
            if name in raw.columns:
                text = raw[name].str.strip()
                vals = pd.to_numeric(text.where(text != ""), errors="coerce")
                bad = vals.isna() & (text != "")
                if bad.any():
                    i = int(np.flatnonzero(bad.to_numpy())[0])
                    raise InputError(f"not a number: {text.iloc[i]!r}", file=path, line=i + 2, field=name)
                vals = vals.to_numpy(dtype=float)
                out[canon] = conv(vals) if conv else vals
                break
    if "air_temp_c" not in out.columns:
        raise InputError("no air temperature column (air_temp_c or air_temp_f)", file=path, field="air_temp_c")
    if "dew_point_c" not in out.columns and "rel_humidity_pct" not in out.columns:
        raise InputError("no humidity column (dew_point_c, dew_point_f or rel_humidity_pct)", file=path,
                         field="dew_point_c")
    for col, (lo, hi) in _LIMITS.items():
        if col in out.columns:
            v = out[col].to_numpy(dtype=float)
            out[col] = np.where((v >= lo) & (v <= hi), v, np.nan)
    if "dew_point_c" not in out.columns:
        with np.errstate(invalid="ignore", divide="ignore"):
            out["dew_point_c"] = np.asarray(dew_point_c_from_rh(out["air_temp_c"], out["rel_humidity_pct"]),
                                            dtype=float)
    td = out["dew_point_c"].to_numpy(dtype=float)
    out["dew_point_c"] = np.where(td <= out["air_temp_c"].to_numpy(dtype=float) + 1.0, td, np.nan)
    out.index = _parse_times(raw["time"].str.strip(), tz, path)
    out.index.name = "time"
    out = out[~out.index.duplicated(keep="last")].sort_index()
    return out


def _parse_times(text: pd.Series, tz, path) -> pd.DatetimeIndex:
    has_offset = text.str.contains(_OFFSET)
    result = np.empty(len(text), dtype="datetime64[ns]")
    if has_offset.any():
        try:
            aware = pd.to_datetime(text[has_offset], utc=True, format="ISO8601")
        except (ValueError, TypeError):
            aware = pd.to_datetime(text[has_offset], utc=True, format="ISO8601", errors="coerce")
            i = int(np.flatnonzero(has_offset.to_numpy())[int(np.flatnonzero(aware.isna().to_numpy())[0])])
            raise InputError(f"not an ISO 8601 time: {text.iloc[i]!r}", file=path, line=i + 2,
                             field="time") from None
        result[has_offset.to_numpy()] = aware.dt.tz_localize(None).to_numpy(dtype="datetime64[ns]")
    naive = ~has_offset
    if naive.any():
        i0 = int(np.flatnonzero(naive.to_numpy())[0])
        if tz is None:
            raise InputError(f"time without UTC offset: {text.iloc[i0]!r} (give the station's zone)",
                             file=path, line=i0 + 2, field="time")
        local = pd.to_datetime(text[naive], format="ISO8601", errors="coerce")
        if local.isna().any():
            i = int(np.flatnonzero(naive.to_numpy())[int(np.flatnonzero(local.isna().to_numpy())[0])])
            raise InputError(f"not an ISO 8601 time: {text.iloc[i]!r}", file=path, line=i + 2, field="time")
        loc = pd.DatetimeIndex(local).tz_localize(tz, ambiguous="NaT", nonexistent="NaT")
        if loc.isna().any():
            i = int(np.flatnonzero(naive.to_numpy())[int(np.flatnonzero(loc.isna())[0])])
            raise InputError(f"local time {text.iloc[i]!r} is ambiguous or does not exist in {tz}",
                             file=path, line=i + 2, field="time")
        result[naive.to_numpy()] = loc.tz_convert("UTC").tz_localize(None).to_numpy(dtype="datetime64[ns]")
    return pd.DatetimeIndex(result).tz_localize("UTC")


# --------------------------------------------------------------------------- nights
def _candidate_nights(times_utc: pd.DatetimeIndex, tz: str):
    """Local evening dates of every night that has at least one reading."""
    local = times_utc.tz_convert(tz) - pd.Timedelta(hours=12)
    return np.asarray(sorted(set(local.date)), dtype=object)


def verify_windows(obs: pd.DataFrame, states: pd.DataFrame, max_gap_min: float = MAX_GAP_MIN):
    """Continuity of each night's window and its observed minimum (vectorised).

    Parameters
    ----------
    obs : pandas.DataFrame
        The station's QC-passed observations, indexed by aware time.
    states : pandas.DataFrame
        Evening states of the nights (``sunset``, ``sunrise``, ``reference_time``).
    max_gap_min : float, default 90
        Longest gap allowed between air-temperature readings [min].

    Returns
    -------
    continuous : ndarray of bool
        The window from sunset to sunrise + 1 h is covered without a longer gap.
    observed_min_c : ndarray
        Lowest air temperature from the reference time to sunrise + 1 h [°C]
        (NaN unless continuous).
    """
    obs = obs.sort_index()
    air = obs["air_temp_c"].to_numpy(dtype=float)
    ok = np.isfinite(air)
    t = obs.index.as_unit("ns").asi8[ok]
    v = air[ok]
    gap = int(max_gap_min * _NS_PER_MIN)
    sunset = pd.DatetimeIndex(states["sunset"]).as_unit("ns").asi8
    end = (pd.DatetimeIndex(states["sunrise"]).as_unit("ns") + pd.Timedelta(hours=VERIFY_AFTER_SUNRISE_H)).asi8
    ref = pd.DatetimeIndex(states["reference_time"]).as_unit("ns").asi8
    nat = np.iinfo(np.int64).min
    valid_times = (sunset != nat) & (end != nat)
    n = len(states)
    continuous = np.zeros(n, bool)
    observed = np.full(n, np.nan)
    if len(t) < 2:
        return continuous, observed
    big = np.concatenate([[0], np.cumsum(np.diff(t) > gap)])  # big[i]: big gaps before reading i
    i0 = np.searchsorted(t, sunset - gap, side="left")
    i1 = np.searchsorted(t, end, side="right")  # exclusive
    has = valid_times & (i1 - i0 >= 2)
    a = np.clip(i0, 0, len(t) - 1)
    b = np.clip(i1 - 1, 0, len(t) - 1)
    continuous = has & (t[a] <= sunset) & (end - t[b] <= gap) & (big[b] - big[a] == 0)
    j0 = np.searchsorted(t, ref, side="left")
    rows = np.flatnonzero(continuous & (i1 > j0))
    if len(rows):
        idx = np.empty(2 * len(rows), dtype=np.int64)
        idx[0::2] = j0[rows]
        idx[1::2] = i1[rows]
        mins = np.minimum.reduceat(np.append(v, np.inf), idx)[0::2]
        observed[rows] = mins
    return continuous, observed


def verified_nights(obs: pd.DataFrame, lat: float, lon: float, tz: str, *, until=None,
                    reference_offset_h: float = REFERENCE_OFFSET_H, max_age_min: float = MAX_AGE_MIN,
                    max_gap_min: float = MAX_GAP_MIN) -> pd.DataFrame:
    """Every verifiable past night of a station: evening state plus observed minimum.

    The rows are what :func:`advisory.forecast.calibration.fit_calibration`
    takes, defined exactly as in the hindcast.

    Parameters
    ----------
    obs : pandas.DataFrame
        QC-passed observations indexed by aware time.
    lat, lon : float
        Station position [degrees].
    tz : str
        IANA zone of the station.
    until : aware datetime, optional
        Only nights whose window (to sunrise + 1 h) has closed by then.
    reference_offset_h, max_age_min, max_gap_min : float
        As in :func:`hindcast_frame`.

    Returns
    -------
    pandas.DataFrame
        Evening-state columns plus ``observed_min_c``, oldest night first.
    """
    rows, _ = _verified(obs, lat, lon, tz, reference_offset_h, max_age_min, max_gap_min)
    if until is not None:
        end = pd.DatetimeIndex(rows["sunrise"]).as_unit("ns") + pd.Timedelta(hours=VERIFY_AFTER_SUNRISE_H)
        rows = rows[np.asarray(end <= pd.Timestamp(until).tz_convert("UTC"))]
    return rows.reset_index(drop=True)


def _verified(obs, lat, lon, tz, reference_offset_h, max_age_min, max_gap_min):
    obs = obs.sort_index()
    nights = _candidate_nights(obs.index, tz)
    sun = sun_times_batch(lat, lon, nights, tz)
    states = evening_states(obs, sun, reference_offset_h=reference_offset_h, max_age_min=max_age_min)
    continuous, observed = verify_windows(obs, states, max_gap_min)
    status_ok = states["status"].to_numpy(dtype=object) == OK
    usable = status_ok & continuous & np.isfinite(observed)
    skipped = {
        "no forecast possible (polar day or night, stale or missing evening data)": int((~status_ok).sum()),
        "window from sunset to sunrise + 1 h not continuous": int((status_ok & ~continuous).sum()),
        "no reading from the reference time to sunrise + 1 h": int((status_ok & continuous
                                                                    & ~np.isfinite(observed)).sum()),
    }
    st = states[usable].copy()
    st["observed_min_c"] = observed[usable]
    return st.sort_values("reference_time", kind="stable"), skipped


def hindcast_frame(obs: pd.DataFrame, lat: float, lon: float, tz: str, *, min_nights: int = MIN_NIGHTS,
                   reference_offset_h: float = REFERENCE_OFFSET_H, max_age_min: float = MAX_AGE_MIN,
                   max_gap_min: float = MAX_GAP_MIN, chunk: int = 256):
    """Rolling-origin forecasts for every verifiable night of a station history.

    Parameters
    ----------
    obs : pandas.DataFrame
        Observations indexed by aware time (canonical columns).
    lat, lon : float
        Station position [degrees].
    tz : str
        IANA zone of the station (names the nights).
    min_nights : int, default 30
        Verified nights before the calibrated model is used.
    reference_offset_h, max_age_min, max_gap_min : float
        See :mod:`advisory.forecast.evening` and :data:`MAX_GAP_MIN`.
    chunk : int
        Nights forecast per vectorised batch.

    Returns
    -------
    rows : pandas.DataFrame
        One row per verified night, in time order, with the fields written to
        ``--rows-out``.
    skipped : dict
        Number of candidate nights skipped, by reason.
    """
    st, skipped = _verified(obs, lat, lon, tz, reference_offset_h, max_age_min, max_gap_min)
    n = len(st)
    x_raw = predictor_matrix(st, {"cooling_since_sunset_c": np.nan})
    phys = physical_night(st)
    y = st["observed_min_c"].to_numpy(dtype=float)
    ref_ns = pd.DatetimeIndex(st["reference_time"]).as_unit("ns").asi8
    end_ns = (pd.DatetimeIndex(st["sunrise"]).as_unit("ns") + pd.Timedelta(hours=VERIFY_AFTER_SUNRISE_H)).asi8
    # nights whose verification window has closed before each reference time
    known = np.searchsorted(np.maximum.accumulate(end_ns), ref_ns, side="right")
    known = np.minimum(known, np.arange(n))  # never the night itself or later ones
    nights_iso = [str(d) for d in st["night"]]

    q = np.full((n, len(LEVELS)), np.nan)
    model = np.empty(n, dtype=object)
    trained = np.zeros(n, dtype=np.int64)
    for a in range(0, n, chunk):
        b = min(a + chunk, n)
        cals = []
        for k in range(a, b):
            m = known[k]
            lo = max(0, m - MAX_NIGHTS)
            cals.append(fit_arrays(x_raw[lo:m], y[lo:m], phys.minimum_c[lo:m], min_nights=min_nights,
                                   last_night=nights_iso[m - 1] if m else None))
        qq, mm, tn, _ = forecast_quantiles(st.iloc[a:b], cals)
        q[a:b], model[a:b], trained[a:b] = qq, mm, tn
    # each night's raw forecast is read through the PIT map of the nights verified before it
    # (:func:`advisory.forecast.calibration.fit_calibration` does the same replay for a live station)
    calibrated = model == CALIBRATED
    raw_pit = np.where(calibrated, pit_of(q, y), np.nan)
    for k in np.flatnonzero(calibrated):
        m = known[k]
        levels = pit_levels(raw_pit[max(0, m - PIT_MAX_NIGHTS):m])
        if len(levels):
            q[k:k + 1] = recalibrate_table(q[k:k + 1], levels)
    cloud = x_raw[:, PREDICTORS.index("cloud_cover_pct")]
    wind = x_raw[:, PREDICTORS.index("wind_speed_ms")]
    rows = pd.DataFrame({
        "night": nights_iso,
        "reference_time": [pd.Timestamp(t).floor("s").isoformat() for t in st["reference_time"]],
        "model": model.astype(str),
        "training_nights": trained,
        "forecast_min_c": table_quantile(q, 0.5),
        "forecast_p10_c": table_quantile(q, 0.1),
        "forecast_p90_c": table_quantile(q, 0.9),
        "p_min_le_0c": table_prob_below(q, FROST_C),
        "crps_c": table_crps(q, y),
        "observed_min_c": y,
        "air_temp_c": st["air_temp_c"].to_numpy(dtype=float),
        "dew_point_c": st["dew_point_c"].to_numpy(dtype=float),
        "wind_speed_ms": st["wind_speed_ms"].to_numpy(dtype=float),
        "cloud_cover_pct": st["cloud_cover_pct"].to_numpy(dtype=float),
        "radiative": is_radiative(cloud, wind),
    })
    return rows, skipped


# --------------------------------------------------------------------------- scores
def crps_gaussian(mean_c, sd_c, observed_c) -> np.ndarray:
    """CRPS of a normal forecast in closed form (Gneiting et al. 2005 [3]_, eq. 5) [°C]."""
    from scipy.stats import norm

    sd = np.maximum(np.asarray(sd_c, dtype=float), 1e-9)
    z = (np.asarray(observed_c, dtype=float) - np.asarray(mean_c, dtype=float)) / sd
    return sd * (z * (2.0 * norm.cdf(z) - 1.0) + 2.0 * norm.pdf(z) - 1.0 / np.sqrt(np.pi))


def site_regression_baseline(rows: pd.DataFrame, min_nights: int = MIN_NIGHTS):
    """The plain site regression with a constant spread, with the same rolling origin.

    Allen-type ordinary least squares of the observed minimum on the evening air
    temperature, dew point, wind and cloud (missing wind and cloud as calm and
    clear), refitted before each night on every earlier row; its spread is the
    standard deviation of that fit's residuals (degrees of freedom corrected),
    the same for every evening.  It is the yardstick the calibrated model must
    beat; rows before ``min_nights`` earlier rows get NaN.

    Returns
    -------
    mean_c, sd_c : ndarray (n,)
    """
    x = np.column_stack([np.ones(len(rows)), rows["air_temp_c"].to_numpy(float),
                         rows["dew_point_c"].to_numpy(float),
                         np.nan_to_num(rows["wind_speed_ms"].to_numpy(float), nan=0.0),
                         np.nan_to_num(rows["cloud_cover_pct"].to_numpy(float), nan=0.0)])
    y = rows["observed_min_c"].to_numpy(float)
    mean = np.full(len(y), np.nan)
    sd = np.full(len(y), np.nan)
    p = x.shape[1]
    for k in range(max(min_nights, p + 2), len(y)):
        beta, *_ = np.linalg.lstsq(x[:k], y[:k], rcond=None)
        mean[k] = x[k] @ beta
        r = y[:k] - x[:k] @ beta
        sd[k] = np.sqrt(np.sum(r**2) / (k - p))
    return mean, sd


def _errors(f, o):
    e = f - o
    if len(e) == 0:
        return {"nights": 0, "mae_c": None, "bias_c": None, "rmse_c": None}
    return {"nights": int(len(e)), "mae_c": round(float(np.mean(np.abs(e))), 3),
            "bias_c": round(float(np.mean(e)), 3), "rmse_c": round(float(np.sqrt(np.mean(e**2))), 3)}


def summarize(rows: pd.DataFrame, warning_probability: float = WARNING_PROBABILITY,
              skipped: dict | None = None) -> dict:
    """Scores of a hindcast (see the module docstring).

    Parameters
    ----------
    rows : pandas.DataFrame
        Output of :func:`hindcast_frame`.
    warning_probability : float, default 0.1
        P(min <= 0 °C) at or above which a frost warning counts as issued.
    skipped : dict, optional
        Skipped-night counts to carry into the summary.

    Returns
    -------
    dict
        JSON-able summary.
    """
    cal = rows[rows["model"] == CALIBRATED]
    phy = rows[rows["model"] == PHYSICAL]
    f, o = cal["forecast_min_c"].to_numpy(float), cal["observed_min_c"].to_numpy(float)
    cold = o <= COLD_NIGHT_C
    rad = cal["radiative"].to_numpy(bool)
    p = cal["p_min_le_0c"].to_numpy(float)
    event = o <= FROST_C
    warn = p >= warning_probability
    hits, misses = int((warn & event).sum()), int((~warn & event).sum())
    false_alarms = int((warn & ~event).sum())
    brier = float(np.mean((p - event) ** 2)) if len(p) else None
    base = float(event.mean()) if len(p) else None
    brier_clim = base * (1 - base) if base is not None else None
    table = []
    edges = RELIABILITY_EDGES
    for lo, hi in zip(edges[:-1], edges[1:], strict=True):
        m = (p >= lo) & ((p < hi) if hi < 1.0 else (p <= hi))
        table.append({"bin": f"{lo:.2f}-{hi:.2f}", "nights": int(m.sum()),
                      "mean_forecast": round(float(p[m].mean()), 3) if m.any() else None,
                      "observed_frequency": round(float(event[m].mean()), 3) if m.any() else None})
    p10, p90 = cal["forecast_p10_c"].to_numpy(float), cal["forecast_p90_c"].to_numpy(float)
    inside = (p10 <= o) & (o <= p90)
    is_cal = (rows["model"] == CALIBRATED).to_numpy()
    if {"air_temp_c", "dew_point_c", "wind_speed_ms", "cloud_cover_pct"} <= set(rows.columns):
        base_mean, base_sd = site_regression_baseline(rows)
        base_crps = crps_gaussian(base_mean[is_cal], base_sd[is_cal], o)
    else:
        base_crps = np.full(len(o), np.nan)
    ours_crps = cal["crps_c"].to_numpy(float) if "crps_c" in cal.columns else np.full(len(o), np.nan)
    both = np.isfinite(base_crps) & np.isfinite(ours_crps)
    crps = {
        "crps_c": round(float(np.mean(ours_crps[both])), 3) if both.any() else None,
        "crps_site_regression_c": round(float(np.mean(base_crps[both])), 3) if both.any() else None,
        "crps_skill": round(1.0 - float(np.mean(ours_crps[both]) / np.mean(base_crps[both])), 3)
        if both.any() else None,
        "crps_nights": int(both.sum()),
    }
    return {
        "nights_verified": int(len(rows)),
        "nights_skipped": dict(skipped or {}),
        "calibrated": {**_errors(f, o),
                       "cold": _errors(f[cold], o[cold]),
                       "radiative": {**_errors(f[rad], o[rad]), "cold": _errors(f[rad & cold], o[rad & cold])},
                       "p10_p90_coverage": round(float(inside.mean()), 3) if len(o) else None,
                       "p10_p90_coverage_cold": round(float(inside[cold].mean()), 3) if cold.any() else None,
                       "p10_p90_width_c": round(float(np.mean(p90 - p10)), 2) if len(o) else None,
                       "below_p10_cold": round(float((o < p10)[cold].mean()), 3) if cold.any() else None,
                       **crps},
        "physical": _errors(phy["forecast_min_c"].to_numpy(float), phy["observed_min_c"].to_numpy(float)),
        "frost": {
            "threshold_c": FROST_C, "events": int(event.sum()), "nights": int(len(p)),
            "brier": None if brier is None else round(brier, 4),
            "brier_climatology": None if brier_clim is None else round(brier_clim, 4),
            "warning_probability": warning_probability, "hits": hits, "misses": misses,
            "false_alarms": false_alarms,
            "hit_rate": round(hits / (hits + misses), 3) if hits + misses else None,
            "false_alarm_ratio": round(false_alarms / (hits + false_alarms), 3) if hits + false_alarms else None,
            "reliability": table,
        },
        "cold_night_c": COLD_NIGHT_C,
    }


def run_hindcast(path, lat: float, lon: float, tz: str, rows_out=None, plot=None, *,
                 warning_probability: float = WARNING_PROBABILITY, min_nights: int = MIN_NIGHTS) -> dict:
    """Hindcast a station history in the canonical CSV and return the summary.

    Parameters
    ----------
    path : path-like
        Canonical observation CSV.
    lat, lon : float
        Station position [degrees north, east].
    tz : str
        IANA zone (names the nights; reads naive times).
    rows_out : path-like, optional
        Write one JSON line per verified night here.
    plot : path-like, optional
        Write a PNG of forecast against observed here.
    warning_probability : float, default 0.1
        See :data:`WARNING_PROBABILITY`.
    min_nights : int, default 30
        Verified nights before the calibrated model is used.

    Returns
    -------
    dict
        The summary (see :func:`summarize`), plus ``file``, ``latitude``,
        ``longitude``, ``tz``.
    """
    if not (-90.0 <= lat <= 90.0) or not (-180.0 <= lon <= 180.0):
        raise InputError("latitude must be within [-90, 90] and longitude within [-180, 180]", field="lat/lon")
    try:
        from zoneinfo import ZoneInfo
        ZoneInfo(tz)
    except Exception:
        raise InputError(f"unknown time zone {tz!r}", field="tz") from None
    obs = read_observations_csv(path, tz)
    if obs.empty:
        raise InputError("no observations in the file", file=str(path))
    rows, skipped = hindcast_frame(obs, lat, lon, tz, min_nights=min_nights)
    if rows_out is not None:
        with open(rows_out, "w", encoding="utf-8") as fh:
            for rec in rows.to_dict(orient="records"):
                fh.write(json.dumps(_jsonable(rec)) + "\n")
    if plot is not None:
        plot_hindcast(rows, plot)
    summary = summarize(rows, warning_probability, skipped)
    return {"file": str(path), "latitude": lat, "longitude": lon, "tz": tz, **summary}


def _jsonable(rec: dict) -> dict:
    out = {}
    for k, v in rec.items():
        if isinstance(v, float | np.floating):
            out[k] = None if not np.isfinite(v) else round(float(v), 3)
        elif isinstance(v, np.integer):
            out[k] = int(v)
        elif isinstance(v, np.bool_):
            out[k] = bool(v)
        else:
            out[k] = v
    return out


# --------------------------------------------------------------------------- output
def _fmt_err(label, e):
    if not e["nights"]:
        return f"  {label:<34} {0:>5} nights"
    return (f"  {label:<34} {e['nights']:>5} nights  MAE {e['mae_c']:5.2f} °C  bias {e['bias_c']:+5.2f} °C  "
            f"RMSE {e['rmse_c']:5.2f} °C")


def format_summary(summary: dict) -> str:
    """The summary as plain text for the terminal."""
    c = summary["calibrated"]
    fr = summary["frost"]
    lines = [f"Hindcast of {summary.get('file', 'station history')}: {summary['nights_verified']} nights verified"]
    for reason, count in summary.get("nights_skipped", {}).items():
        if count:
            lines.append(f"  skipped {count:>4}: {reason}")
    lines.append("Forecast minimum (forecast - observed):")
    lines.append(_fmt_err("calibrated nights", c))
    lines.append(_fmt_err(f"  cold nights (min <= {summary['cold_night_c']:g} °C)", c["cold"]))
    lines.append(_fmt_err("  radiative evenings", c["radiative"]))
    lines.append(_fmt_err("    radiative, cold nights", c["radiative"]["cold"]))
    lines.append(_fmt_err("physical-model nights", summary["physical"]))
    if c.get("p10_p90_coverage") is not None:
        cov = f"  observed minimum inside p10-p90: {c['p10_p90_coverage']:.0%} of nights"
        if c.get("p10_p90_coverage_cold") is not None:
            cov += f", {c['p10_p90_coverage_cold']:.0%} of cold nights"
        lines.append(cov + " (honest: 80 %)")
        width = f"  p10-p90 range {c['p10_p90_width_c']:.1f} °C wide on average"
        if c.get("below_p10_cold") is not None:
            width += f"; cold nights below p10: {c['below_p10_cold']:.0%} (honest: 10 %)"
        lines.append(width)
    if c.get("crps_c") is not None:
        lines.append(f"  CRPS {c['crps_c']:.3f} °C against {c['crps_site_regression_c']:.3f} °C for the plain "
                     f"site regression with a constant spread (skill {c['crps_skill']:+.1%}, "
                     f"{c['crps_nights']} nights; lower is better)")
    lines.append(f"Frost (minimum <= {fr['threshold_c']:g} °C) on calibrated nights: {fr['events']} of {fr['nights']}")
    if fr["brier"] is not None:
        lines.append(f"  Brier score {fr['brier']:.4f} (climatology {fr['brier_climatology']:.4f})")
    hr = "n/a" if fr["hit_rate"] is None else f"{fr['hit_rate']:.3f}"
    far = "n/a" if fr["false_alarm_ratio"] is None else f"{fr['false_alarm_ratio']:.3f}"
    lines.append(f"  warning at P >= {fr['warning_probability']:g}: hit rate {hr} ({fr['hits']} hits, "
                 f"{fr['misses']} misses), false-alarm ratio {far} ({fr['false_alarms']} false alarms)")
    lines.append("  reliability:  forecast P   nights  mean P  observed")
    for row in fr["reliability"]:
        if row["nights"]:
            lines.append(f"                {row['bin']:>9}   {row['nights']:>6}  {row['mean_forecast']:6.3f}  "
                         f"{row['observed_frequency']:8.3f}")
        else:
            lines.append(f"                {row['bin']:>9}   {0:>6}")
    return "\n".join(lines)


def plot_hindcast(rows: pd.DataFrame, path) -> Path:
    """Draw forecast (p50 with the p10-p90 range) against observed minimum to a PNG."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(6.5, 6.5), dpi=110)
    for name, colour in ((PHYSICAL, "tab:orange"), (CALIBRATED, "tab:blue")):
        r = rows[rows["model"] == name]
        if r.empty:
            continue
        f = r["forecast_min_c"].to_numpy(float)
        err = np.vstack([f - r["forecast_p10_c"].to_numpy(float), r["forecast_p90_c"].to_numpy(float) - f])
        ax.errorbar(r["observed_min_c"], f, yerr=np.maximum(err, 0), fmt="o", ms=3, lw=0.6, alpha=0.6,
                    color=colour, label=f"{name} ({len(r)} nights)")
    lo = float(np.nanmin(rows[["observed_min_c", "forecast_p10_c"]].to_numpy())) - 1 if len(rows) else -5
    hi = float(np.nanmax(rows[["observed_min_c", "forecast_p90_c"]].to_numpy())) + 1 if len(rows) else 25
    ax.plot([lo, hi], [lo, hi], color="black", lw=0.8)
    ax.axhline(0, color="grey", lw=0.5, ls=":")
    ax.axvline(0, color="grey", lw=0.5, ls=":")
    ax.set_xlim(lo, hi)
    ax.set_ylim(lo, hi)
    ax.set_xlabel("observed minimum [°C]")
    ax.set_ylabel("forecast minimum, p50 with p10-p90 [°C]")
    ax.set_title("Night minimum: forecast against observed")
    ax.legend(loc="upper left")
    fig.tight_layout()
    path = Path(path)
    fig.savefig(path)
    plt.close(fig)
    return path
