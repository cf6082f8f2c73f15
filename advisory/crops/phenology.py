"""Heat accumulation since the biofix and the phenological stage it suggests.

Pure and vectorised over blocks: no database, no network.  ``n`` blocks share
one grid of ``m`` reading times.

Heat
----
Growing degree-days from station readings are the integral of the air
temperature above the crop's base temperature (optionally capped at an upper
threshold, horizontal cut-off), each reading standing for the time until the
next one (at most ``max_gap_h``; a longer gap counts as missing, never as
heat).  With hourly readings this is the degree-hour sum divided by 24 [1]_.
From daily extremes only, :func:`degree_days_single_sine` gives the single-sine
estimate of Baskerville & Emin [2]_.

Stages
------
``data/phenology_stages.csv`` holds, per crop, the base temperature and for
each stage (the stage names of ``data/critical_temperatures.csv``) the heat
from the biofix at which the stage is typically reached (mean and spread,
°C-days), each row with its source.  The expected stage is the last stage whose
mean has been reached; its uncertainty is the range of stages reached at the
heat sum minus and plus one spread.

A recorded stage goes stale as the buds move on.  :func:`expected_from_recorded`
starts from the recorded stage (its typical heat) and adds the heat measured
since the day it was recorded; :func:`stale_stage_sentence` says so when the
stage expected today is a stage or more past the recorded one.  A heat sum
whose readings start after the period's beginning is a lower bound (the
missing heat is never invented), so such a sum can only show a stage to be
late, never early.

References
----------
.. [1] Snyder, R. L., Spano, D., Cesaraccio, C. & Duce, P. (1999) Determining
   degree-day thresholds from field observations. Int. J. Biometeorol. 42,
   177-182 (hourly degree-hour integration; citation details from memory).
.. [2] Baskerville, G. L. & Emin, P. (1969) Rapid estimation of heat
   accumulation from maximum and minimum temperatures. Ecology 50, 514-517.
.. [3] Zavalloni, C., Andresen, J. A. & Flore, J. A. (2006) Phenological
   models of flower bud stages and fruit growth of 'Montmorency' sour cherry
   based on growing degree-day accumulation. J. Amer. Soc. Hort. Sci. 131,
   601-607 (base 4 °C for cherry bud development).
.. [4] Extension-service bud-stage guides for apple (base 43 °F), pear, peach
   and grape; see the ``source`` column of the table (stage sums from memory).
"""

from __future__ import annotations

import datetime as dt
import functools
from dataclasses import dataclass
from importlib import resources

import numpy as np
import pandas as pd

from advisory.crops import thresholds
from advisory.errors import InputError


@dataclass(frozen=True)
class CropHeat:
    """Heat model of one crop.

    Attributes
    ----------
    crop : str
        Canonical crop key.
    base_c : float
        Base temperature [°C].
    upper_c : float
        Upper threshold [°C] (``inf`` for none).
    biofix : str
        Default start of accumulation, ``MM-DD`` (northern hemisphere).
    stages : tuple of str
        Stage names in season order (as in the critical-temperature table).
    gdd_mean_c, gdd_sd_c : ndarray
        Heat from the biofix to reach each stage and its spread [°C-days].
    sources : tuple of str
        Source of each row.
    verified : tuple of bool
        Whether each row was checked against a copy of its source.
    """

    crop: str
    base_c: float
    upper_c: float
    biofix: str
    stages: tuple[str, ...]
    gdd_mean_c: np.ndarray
    gdd_sd_c: np.ndarray
    sources: tuple[str, ...]
    verified: tuple[bool, ...]


@functools.lru_cache(maxsize=1)
def stage_table() -> dict[str, CropHeat]:
    """The heat-to-stage table by crop (read once from ``data/phenology_stages.csv``)."""
    path = resources.files("advisory.crops").joinpath("data/phenology_stages.csv")
    with path.open("r", encoding="utf-8") as fh:
        df = pd.read_csv(fh, keep_default_na=False, dtype={"upper_c": str, "biofix": str})
    out: dict[str, CropHeat] = {}
    for crop, g in df.groupby("crop", sort=False):
        order = {s: i for i, s in enumerate(thresholds.stages_for(crop))}
        g = g.assign(_o=[order[s] for s in g["stage"]]).sort_values("_o")
        upper = g["upper_c"].iloc[0]
        out[crop] = CropHeat(
            crop=crop, base_c=float(g["base_c"].iloc[0]), upper_c=float(upper) if upper else np.inf,
            biofix=str(g["biofix"].iloc[0]), stages=tuple(g["stage"]),
            gdd_mean_c=g["gdd_mean_c"].to_numpy(float), gdd_sd_c=g["gdd_sd_c"].to_numpy(float),
            sources=tuple(g["source"]), verified=tuple(str(v).lower() == "true" for v in g["verified"]))
    return out


def crop_heat(crop: str) -> CropHeat | None:
    """The heat model of a crop, or None for a crop the table does not cover."""
    return stage_table().get(thresholds.normalise_crop(crop))


# --------------------------------------------------------------------------------------------------
# Dates
# --------------------------------------------------------------------------------------------------

def _mmdd(text: str) -> tuple[int, int]:
    m, d = (int(x) for x in str(text).split("-"))
    dt.date(2000, m, d)  # raises ValueError for an impossible day
    return m, d


def season_start(day: dt.date, latitude: float, north_mmdd: str, south_mmdd: str,
                 override_mmdd: str | None = None) -> dt.date:
    """The latest date on or before ``day`` with the season's start month-day.

    Parameters
    ----------
    day : date
        Today (the farm's local date).
    latitude : float
        [°]; south of the equator ``south_mmdd`` applies.
    north_mmdd, south_mmdd : str
        Default start month-day in each hemisphere (``MM-DD``).
    override_mmdd : str, optional
        The farm's own start (``MM-DD``), used in either hemisphere.

    Returns
    -------
    date
    """
    m, d = _mmdd(override_mmdd or (north_mmdd if latitude >= 0 else south_mmdd))
    start = dt.date(day.year, m, d) if not (m == 2 and d == 29) else dt.date(day.year, 2, 28)
    if start > day:
        start = start.replace(year=day.year - 1) if not (m == 2 and d == 29) else dt.date(day.year - 1, 2, 28)
    return start


def biofix_date(day: dt.date, latitude: float, override_mmdd: str | None = None,
                crop: str | None = None) -> dt.date:
    """Start of heat accumulation.

    The farm's own date for the crop wins; otherwise the stage table's biofix
    for the crop (the date its stage sums count from: 1 March for the apple,
    pear and peach guides, 1 January otherwise), six months later south of the
    equator; without a crop, 1 January in the north and 1 July in the south
    (common practice).
    """
    north = "01-01"
    ch = stage_table().get(_crop_key(crop)) if crop else None
    if ch is not None:
        north = ch.biofix
    m, d = _mmdd(north)
    south = f"{(m + 5) % 12 + 1:02d}-{d:02d}"
    return season_start(day, latitude, north, south, override_mmdd)


# --------------------------------------------------------------------------------------------------
# Degree-days
# --------------------------------------------------------------------------------------------------

def degree_days_from_readings(times_utc, air_temp_c, base_c, upper_c=np.inf, *, since_utc=None,
                              until_utc=None, max_gap_h: float = 1.5):
    """Growing degree-days from station readings, for many blocks at once.

    Each reading stands for the interval until the next reading (the last one
    for the record's median step; at most ``max_gap_h`` hours, and not past
    ``until_utc``); a missing reading (NaN)
    contributes neither heat nor hours.  With hourly readings the result is the
    degree-hour sum over 24.

    Parameters
    ----------
    times_utc : array_like of datetime, shape (m,)
        Reading times, increasing (tz-aware or ``datetime64`` in UTC).
    air_temp_c : array_like, shape (n, m) or (m,)
        Air temperature [°C]; NaN where missing.
    base_c : array_like, shape (n,) or scalar
        Base temperature [°C].
    upper_c : array_like, shape (n,) or scalar, default inf
        Upper threshold [°C], horizontal cut-off: temperatures above count as
        ``upper_c``.
    since_utc, until_utc : array_like of datetime64, shape (n,), optional
        Per-block window [since, until); default the whole record.
    max_gap_h : float, default 1.5
        Longest interval one reading may stand for [h].

    Returns
    -------
    gdd_c : ndarray, shape (n,)
        Degree-days [°C-days].
    hours_covered_h : ndarray, shape (n,)
        Hours of readings behind each sum [h].
    first_utc : ndarray of datetime64[ns], shape (n,)
        First reading counted (NaT when none).

    References
    ----------
    .. [1] Snyder et al. (1999) (degree-hours from hourly data).
    """
    t = _ns(times_utc)
    temp = np.atleast_2d(np.asarray(air_temp_c, dtype=float))
    n, m = temp.shape
    base = np.broadcast_to(np.asarray(base_c, float), (n,))[:, None]
    upper = np.broadcast_to(np.asarray(upper_c, float), (n,))[:, None]
    if m == 0:
        return np.zeros(n), np.zeros(n), np.full(n, np.datetime64("NaT", "ns"))
    # The last reading stands for the record's usual step.
    step = np.int64(np.median(np.diff(t))) if m > 1 else np.int64(3600 * 10**9)
    nxt = np.append(t[1:], t[-1] + step)
    lo = np.full(n, np.iinfo(np.int64).min) if since_utc is None else _ns(since_utc, n)
    hi = np.full(n, np.iinfo(np.int64).max) if until_utc is None else _ns(until_utc, n)
    end = np.minimum(nxt[None, :], hi[:, None])
    end = np.minimum(end, t[None, :] + np.int64(max_gap_h * 3600 * 10**9))
    start = np.maximum(t[None, :], lo[:, None])
    dur_h = np.clip((end - start) / 3.6e12, 0.0, None)
    ok = np.isfinite(temp) & (dur_h > 0)
    dur_h = np.where(ok, dur_h, 0.0)
    excess = np.clip(np.minimum(np.where(ok, temp, 0.0), upper) - base, 0.0, None)
    gdd = (excess * dur_h).sum(axis=1) / 24.0
    hours = dur_h.sum(axis=1)
    first_idx = np.argmax(ok, axis=1)
    first = np.where(ok.any(axis=1), t[first_idx], np.iinfo(np.int64).min).astype("datetime64[ns]")
    return gdd, hours, first


def degree_days_single_sine(tmin_c, tmax_c, base_c):
    """Degree-days of one day from its minimum and maximum, single sine (Baskerville & Emin 1969).

    The day's temperature is taken as a sine between ``tmin_c`` and
    ``tmax_c``; the degree-days are the area above ``base_c`` over the day.

    Parameters
    ----------
    tmin_c, tmax_c : array_like
        Daily minimum and maximum air temperature [°C].
    base_c : array_like
        Base temperature [°C].

    Returns
    -------
    gdd_c : ndarray
        [°C-days].

    References
    ----------
    .. [2] Baskerville, G. L. & Emin, P. (1969) Ecology 50, 514-517.
    """
    lo, hi, base = np.broadcast_arrays(*(np.asarray(a, float) for a in (tmin_c, tmax_c, base_c)))
    mean = 0.5 * (lo + hi)
    amp = 0.5 * (hi - lo)
    with np.errstate(divide="ignore", invalid="ignore"):
        theta = np.arcsin(np.clip((base - mean) / np.where(amp > 0, amp, 1.0), -1.0, 1.0))
        partial = ((mean - base) * (np.pi / 2 - theta) + amp * np.cos(theta)) / np.pi
    out = np.where(lo >= base, mean - base, np.where(hi <= base, 0.0, partial))
    out = np.where(np.isfinite(lo) & np.isfinite(hi), out, np.nan)
    return float(out) if out.ndim == 0 else out


# --------------------------------------------------------------------------------------------------
# Stages
# --------------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class StageEstimate:
    """The stage a heat sum suggests, for many blocks (all arrays shape (n,)).

    Stage positions are 0-based indices into the crop's stage list
    (:attr:`CropHeat.stages`); -1 means before the first stage; -2 means the
    crop (or the recorded stage) is not covered.

    Attributes
    ----------
    expected_idx : ndarray of int
        Last stage whose typical heat has been reached.
    early_idx, late_idx : ndarray of int
        Stages reached with the heat sum plus one spread (late, the most
        advanced) and minus one spread (early, the least advanced).
    heat_c : ndarray
        The heat sum the estimate is made from [°C-days since the biofix].
    """

    expected_idx: np.ndarray
    early_idx: np.ndarray
    late_idx: np.ndarray
    heat_c: np.ndarray


def _padded(crops) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per-block stage means and spreads, padded with +inf: (n, S), (n, S), covered (n,)."""
    table = stage_table()
    keys = [_crop_key(c) for c in crops]
    width = max((len(table[k].stages) for k in keys if k in table), default=1)
    mean = np.full((len(keys), width), np.inf)
    sd = np.zeros((len(keys), width))
    covered = np.zeros(len(keys), bool)
    for i, k in enumerate(keys):
        if k in table:
            s = len(table[k].stages)
            mean[i, :s] = table[k].gdd_mean_c
            sd[i, :s] = table[k].gdd_sd_c
            covered[i] = True
    return mean, sd, covered


def _crop_key(crop: str) -> str:
    try:
        return thresholds.normalise_crop(crop)
    except InputError:
        return str(crop)


def expected_stage(crops, heat_c) -> StageEstimate:
    """The stage each block's heat since the biofix suggests, with its uncertainty.

    Parameters
    ----------
    crops : sequence of str, length n
        Crop keys.
    heat_c : array_like, shape (n,)
        Growing degree-days since the biofix, with the crop's base [°C-days].

    Returns
    -------
    StageEstimate
    """
    heat = np.asarray(heat_c, float).reshape(-1)
    mean, sd, covered = _padded(list(crops))
    h = heat[:, None]
    exp_idx = (mean <= h).sum(axis=1) - 1
    late = (mean - sd <= h).sum(axis=1) - 1
    early = (mean + sd <= h).sum(axis=1) - 1
    bad = ~covered | ~np.isfinite(heat)
    return StageEstimate(np.where(bad, -2, exp_idx), np.where(bad, -2, early), np.where(bad, -2, late), heat)


def stage_heat_c(crops, stages) -> np.ndarray:
    """Typical heat from the biofix at each block's stage [°C-days]; NaN where not covered."""
    table = stage_table()
    out = np.full(len(stages), np.nan)
    for i, (c, s) in enumerate(zip(crops, stages, strict=True)):
        ch = table.get(_crop_key(c))
        if ch is not None and s in ch.stages:
            out[i] = ch.gdd_mean_c[ch.stages.index(s)]
    return out


def stage_index(crops, stages) -> np.ndarray:
    """Position of each block's stage in its crop's heat table; -2 where not covered."""
    table = stage_table()
    keys = [_crop_key(c) for c in crops]
    return np.array([table[c].stages.index(s) if c in table and s in table[c].stages else -2
                     for c, s in zip(keys, stages, strict=True)], dtype=int)


def expected_from_recorded(crops, recorded_stages, heat_since_record_c) -> StageEstimate:
    """The stage expected today from the recorded stage plus the heat measured since it was recorded.

    The recorded stage is placed at its typical heat; the heat since the day
    it was recorded is added.  The spread is that of the stage table.

    Parameters
    ----------
    crops, recorded_stages : sequence of str, length n
    heat_since_record_c : array_like, shape (n,)
        Degree-days since the recorded stage's date [°C-days] (a lower bound
        when readings are missing).

    Returns
    -------
    StageEstimate
        ``heat_c`` is the equivalent heat since the biofix.
    """
    heat = stage_heat_c(list(crops), list(recorded_stages)) + np.asarray(heat_since_record_c, float)
    est = expected_stage(crops, heat)
    # Never earlier than the recorded stage itself (heat is never negative).
    rec = stage_index(list(crops), list(recorded_stages))
    ok = rec >= 0
    return StageEstimate(np.where(ok, np.maximum(est.expected_idx, rec), -2),
                         np.where(ok, np.maximum(est.early_idx, rec), -2),
                         np.where(ok, np.maximum(est.late_idx, rec), -2), heat)


def stage_name(crop: str, idx: int) -> str | None:
    """Stage name at a position of :func:`expected_stage` (``"before <first stage>"`` for -1)."""
    ch = stage_table().get(_crop_key(crop))
    if ch is None or idx <= -2:
        return None
    if idx == -1:
        return f"before {ch.stages[0]}"
    return ch.stages[min(idx, len(ch.stages) - 1)]


def stale_stage_sentence(recorded_stage: str, recorded_on: dt.date, recorded_idx: int,
                         expected_stage_name: str | None, expected_idx: int) -> str | None:
    """The check sentence when the expected stage is a stage or more from the recorded one, else None.

    Parameters
    ----------
    recorded_stage : str
        The block's recorded stage.
    recorded_on : date
        The day it was recorded.
    recorded_idx, expected_idx : int
        Positions in the crop's stage list (see :class:`StageEstimate`;
        negative values below -1 mean unknown and give None).
    expected_stage_name : str or None
        The expected stage's name.

    Returns
    -------
    str or None
        ``"stage recorded X on DATE; heat since suggests Y; check the buds"``.
    """
    if expected_stage_name is None or recorded_idx < -1 or expected_idx < -1:
        return None
    if abs(int(expected_idx) - int(recorded_idx)) < 1:
        return None
    return (f"stage recorded {recorded_stage} on {recorded_on.isoformat()}; "
            f"heat since suggests {expected_stage_name}; check the buds")


def _ns(times, n: int | None = None) -> np.ndarray:
    """Times as int64 nanoseconds since the epoch, UTC."""
    if isinstance(times, pd.DatetimeIndex):
        idx = times
    else:
        arr = np.asarray(times)
        if arr.dtype.kind == "M":
            out = arr.astype("datetime64[ns]").astype(np.int64)
            return np.broadcast_to(out, (n,)).copy() if n is not None and out.ndim == 0 else out
        idx = pd.DatetimeIndex(pd.to_datetime(list(np.atleast_1d(arr)), utc=True))
    if idx.tz is not None:
        idx = idx.tz_convert("UTC").tz_localize(None)
    out = idx.as_unit("ns").asi8.astype(np.int64)
    if n is not None and out.shape == (1,) and n != 1:
        out = np.repeat(out, n)
    return out
