"""Quality control of station observations: documented tests, one bit mask per value.

Every stored value carries an integer bit mask (``*_qc`` columns); 0 means the
value passed every test.  A value with any bit set is kept in the database and
shown in reports, but :func:`advisory.ingest.observations.load_observations`
hands it to the models as missing.

Flag bits
---------
=====  ================  =====================================================
bit    name              meaning
=====  ================  =====================================================
1      ``RANGE``         outside the physically plausible range of the variable
2      ``SPIKE``         an isolated excursion: departs from both neighbours,
                         in opposite directions, by more than the time-step
                         tolerance
4      ``STEP``          a jump from the previous reading larger than the step
                         limit that does not come back (sensor fault, swap)
8      ``STUCK``         the same value repeated for too long (frozen sensor)
16     ``DEW_ABOVE_AIR`` dew point above the air temperature by more than the
                         tolerance (set on both the dew point and the humidity)
=====  ================  =====================================================

Gaps (missing readings) are not value flags; :func:`find_gaps` lists them and
the import summary and station report show them.

Dew point and relative humidity describe one measurement (with the air
temperature), so in a row holding both they share their flags: a bit set on
one is set on the other.

Thresholds and their sources
----------------------------
Range (``RANGE``)
    air and upper-air temperature -80 to 60 °C, dew point -80 to 35 °C, wind
    speed 0 to 75 m/s: WMO gross-error limits for automatic weather stations
    as given by Zahumenský [1] (from memory, unverified).  Relative humidity
    above 0 and at most 105 %: the upper limit 105 % is the one the University
    of Washington observation QC uses after Shafer et al. [2]; capacitive
    hygrometers read a few per cent above 100 % when wet (common practice).
    Cloud cover 0 to 100 % by definition.
Spike (``SPIKE``)
    Tolerance by the time between readings: for air temperature 4, 7, 9, 15
    and 25 °C over 1, 2, 3, 6 and 12 h, for dew point 4, 6, 8, 12 and 20 °C:
    the WMO time-consistency tolerances (WMO-No. 305 [3], VI.21; verified as
    quoted by the documentation of the dataresqc R package).  Below one hour
    the tolerance falls linearly to 3 °C (air) and 2 °C (dew point) at one
    minute, Zahumenský's [1] limits between consecutive one-minute values
    (from memory, unverified).  Wind speed: 20 m/s at any step up to 12 h [1]
    (from memory, unverified).  Readings more than 12 h apart are not
    compared.
Step (``STEP``)
    10 °C between readings at most 1 h apart for air, upper-air temperature
    and dew point: the "suspect" step threshold of the University of
    Washington observation QC after Shafer et al. [2] (verified on its
    documentation page).  The WMO tolerances above would flag ordinary
    morning warming of 4-7 °C per hour, which is real, so the one-sided step
    uses this wider limit; only isolated excursions use the WMO tolerances.
Stuck (``STUCK``)
    The same value for at least 6 h and at least 4 readings.  Zahumenský [1]
    flags temperature that varies by less than 0.1 °C over 60 min of
    one-minute data (from memory, unverified); farm loggers often record at
    0.1 °C or 1 °F resolution and calm, overcast or foggy nights hold a reading
    steady for hours, so the window here is longer (common practice).  Not
    applied to calm wind (0 m/s), to relative humidity at or above 97 % (a
    wetted hygrometer reads its saturation value for hours in fog), nor to
    cloud cover (clear and overcast skies last).
Dew point above air temperature (``DEW_ABOVE_AIR``)
    Dew point may not exceed the air temperature (internal consistency check
    of [1]); tolerance 0.5 °C, about the combined uncertainty of a ±0.2 °C
    thermometer and a ±3 % hygrometer near saturation (common practice).
Gaps
    An interval between consecutive readings longer than 1.5 times the
    station's typical (median) interval, i.e. at least one reading missing
    (common practice).

References
----------
.. [1] Zahumenský, I. (2004) Guidelines on quality control procedures for data
   from automatic weather stations. WMO CBS/OPAG-IOS/ET AWS-3/Doc. 4(1).
.. [2] Shafer, M. A., Fiebrich, C. A., Arndt, D. S., Fredrickson, S. E. &
   Hughes, T. W. (2000) Quality assurance procedures in the Oklahoma Mesonetwork.
   J. Atmos. Oceanic Technol. 17, 474-494; thresholds as applied by the
   University of Washington observation QC (atmos.uw.edu/~jbaars/qc_documentation.html).
.. [3] WMO (1993) Guide on the Global Data-processing System, WMO-No. 305,
   chapter VI, quality control procedures.
.. [4] Meek, D. W. & Hatfield, J. L. (1994) Data quality checking for single
   station meteorological databases. Agric. For. Meteorol. 69, 85-109 (range,
   rate-of-change and persistence tests as a family).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

RANGE = 1
SPIKE = 2
STEP = 4
STUCK = 8
DEW_ABOVE_AIR = 16

#: Bit -> name, for reports.
FLAG_NAMES: dict[int, str] = {
    RANGE: "range",
    SPIKE: "spike",
    STEP: "step",
    STUCK: "stuck",
    DEW_ABOVE_AIR: "dew_above_air",
}
#: Every defined bit.
ALL_FLAGS = RANGE | SPIKE | STEP | STUCK | DEW_ABOVE_AIR

#: Stored value column -> its QC column.
QC_COLUMNS: dict[str, str] = {
    "air_temp_c": "air_temp_qc",
    "dew_point_c": "dew_point_qc",
    "rel_humidity_pct": "rel_humidity_qc",
    "wind_speed_ms": "wind_speed_qc",
    "cloud_cover_pct": "cloud_cover_qc",
    "upper_air_temp_c": "upper_air_temp_qc",
}
VALUE_COLUMNS: tuple[str, ...] = tuple(QC_COLUMNS)

_HOUR_S = 3600.0
# WMO-No. 305 VI.21 time-consistency tolerances, with the one-minute limits of
# Zahumenský (2004) below one hour (see the module docstring).
_TEMP_TOL = ((60.0, 3.0), (3600.0, 4.0), (7200.0, 7.0), (10800.0, 9.0), (21600.0, 15.0), (43200.0, 25.0))
_DEW_TOL = ((60.0, 2.0), (3600.0, 4.0), (7200.0, 6.0), (10800.0, 8.0), (21600.0, 12.0), (43200.0, 20.0))
_WIND_TOL = ((60.0, 20.0), (43200.0, 20.0))


@dataclass(frozen=True)
class VariableLimits:
    """QC limits of one variable.

    Parameters
    ----------
    low, high : float
        Plausible range, inclusive [unit of the variable]; ``low_exclusive``
        makes the lower bound exclusive.
    spike_tolerance : tuple of (seconds, tolerance), optional
        Tolerance of the spike test as a function of the time between
        readings, interpolated linearly; no spike test when None.
    step_limit : float, optional
        Largest one-sided change between readings at most ``step_max_dt_s``
        apart; no step test when None.
    stuck_exempt_at_or_above, stuck_exempt_value : float, optional
        Values exempt from the stuck test.
    stuck_test : bool
        Whether the stuck test applies at all.
    """

    low: float
    high: float
    low_exclusive: bool = False
    spike_tolerance: tuple[tuple[float, float], ...] | None = None
    step_limit: float | None = None
    step_max_dt_s: float = _HOUR_S
    stuck_test: bool = True
    stuck_exempt_at_or_above: float | None = None
    stuck_exempt_value: float | None = None


@dataclass(frozen=True)
class QcConfig:
    """All QC thresholds; the defaults are documented in the module docstring."""

    limits: dict[str, VariableLimits] = field(default_factory=lambda: {
        "air_temp_c": VariableLimits(-80.0, 60.0, spike_tolerance=_TEMP_TOL, step_limit=10.0),
        "upper_air_temp_c": VariableLimits(-80.0, 60.0, spike_tolerance=_TEMP_TOL, step_limit=10.0),
        "dew_point_c": VariableLimits(-80.0, 35.0, spike_tolerance=_DEW_TOL, step_limit=10.0),
        "rel_humidity_pct": VariableLimits(0.0, 105.0, low_exclusive=True, stuck_exempt_at_or_above=97.0),
        "wind_speed_ms": VariableLimits(0.0, 75.0, spike_tolerance=_WIND_TOL, stuck_exempt_value=0.0),
        "cloud_cover_pct": VariableLimits(0.0, 100.0, stuck_test=False),
    })
    #: Readings further apart than this are not compared by spike and step tests [s].
    max_compare_dt_s: float = 12 * _HOUR_S
    #: Stuck: the same value over at least this span [s] ...
    stuck_min_duration_s: float = 6 * _HOUR_S
    #: ... and at least this many readings.
    stuck_min_readings: int = 4
    #: Dew point may exceed the air temperature by at most this [°C].
    dew_above_air_tolerance_c: float = 0.5
    #: A gap is an interval longer than this many typical intervals.
    gap_factor: float = 1.5

    @property
    def context_s(self) -> float:
        """How far each reading's flags can depend on its neighbours [s].

        A reading's step flag looks two readings back and one forward, each at
        most ``max_compare_dt_s`` away; a stuck run is flagged once it spans
        ``stuck_min_duration_s``.  Flags of readings further than this from a
        change in the data cannot change.
        """
        return max(2 * self.max_compare_dt_s, self.stuck_min_duration_s)


DEFAULT_CONFIG = QcConfig()


def _range_flags(x: np.ndarray, lim: VariableLimits) -> np.ndarray:
    with np.errstate(invalid="ignore"):
        low_bad = x <= lim.low if lim.low_exclusive else x < lim.low
        bad = low_bad | (x > lim.high) | np.isinf(x)
    return np.where(bad, RANGE, 0).astype(np.int64)


def _spike_step_flags(t_s: np.ndarray, x: np.ndarray, usable: np.ndarray, lim: VariableLimits,
                      cfg: QcConfig) -> np.ndarray:
    """Spike and step bits, comparing each usable reading with its usable neighbours."""
    out = np.zeros(len(x), dtype=np.int64)
    idx = np.flatnonzero(usable)
    if len(idx) < 2 or (lim.spike_tolerance is None and lim.step_limit is None):
        return out
    xv = x[idx]
    d = np.diff(xv)
    dt = np.diff(t_s[idx]).astype(float)
    comparable = dt <= cfg.max_compare_dt_s
    spike = np.zeros(len(idx), dtype=bool)
    if lim.spike_tolerance is not None:
        pts = np.asarray(lim.spike_tolerance, dtype=float)
        tol = np.interp(dt, pts[:, 0], pts[:, 1])
        big = comparable & (np.abs(d) > tol)
        spike[1:-1] = big[:-1] & big[1:] & (np.sign(d[:-1]) != np.sign(d[1:]))
    step = np.zeros(len(idx), dtype=bool)
    if lim.step_limit is not None:
        jump = (dt <= lim.step_max_dt_s) & (np.abs(d) > lim.step_limit)
        # A jump lands on the later reading; the way into or out of a spike is not a step.
        step[1:] = jump & ~spike[1:] & ~spike[:-1]
    out[idx] = np.where(spike, SPIKE, 0) | np.where(step, STEP, 0)
    return out


def _stuck_flags(t_s: np.ndarray, x: np.ndarray, usable: np.ndarray, lim: VariableLimits,
                 cfg: QcConfig) -> np.ndarray:
    """Stuck bit for every reading in a run of identical values that lasts too long."""
    out = np.zeros(len(x), dtype=np.int64)
    idx = np.flatnonzero(usable)
    if not lim.stuck_test or len(idx) < max(2, cfg.stuck_min_readings):
        return out
    xv = x[idx]
    tv = t_s[idx]
    new_run = np.empty(len(idx), dtype=bool)
    new_run[0] = True
    new_run[1:] = xv[1:] != xv[:-1]
    starts = np.flatnonzero(new_run)
    ends = np.r_[starts[1:], len(idx)] - 1
    run_id = np.cumsum(new_run) - 1
    span = tv[ends] - tv[starts]
    count = ends - starts + 1
    stuck = (span >= cfg.stuck_min_duration_s) & (count >= cfg.stuck_min_readings)
    value = xv[starts]
    if lim.stuck_exempt_at_or_above is not None:
        stuck &= ~(value >= lim.stuck_exempt_at_or_above)
    if lim.stuck_exempt_value is not None:
        stuck &= value != lim.stuck_exempt_value
    out[idx] = np.where(stuck[run_id], STUCK, 0)
    return out


def qc_arrays(t_s: np.ndarray, values: dict[str, np.ndarray],
              config: QcConfig = DEFAULT_CONFIG) -> dict[str, np.ndarray]:
    """QC bit masks for sorted, unique readings of one station.

    Parameters
    ----------
    t_s : ndarray of int64
        Reading times [s since 1970-01-01 UTC], strictly increasing.
    values : dict of str to ndarray of float
        Value columns by canonical name (see :data:`VALUE_COLUMNS`); NaN is
        missing.  Absent columns are treated as all missing.
    config : QcConfig
        Thresholds.

    Returns
    -------
    dict of str to ndarray of int64
        QC column name (``air_temp_qc`` ...) -> bit mask per reading; 0 where
        the value passed or is missing.
    """
    n = len(t_s)
    t_s = np.asarray(t_s, dtype=np.int64)
    flags: dict[str, np.ndarray] = {}
    vals = {c: np.asarray(values[c], dtype=float) if c in values else np.full(n, np.nan)
            for c in VALUE_COLUMNS}
    for col in VALUE_COLUMNS:
        x = vals[col]
        lim = config.limits[col]
        present = ~np.isnan(x)
        f = np.where(present, _range_flags(x, lim), 0)
        usable = present & (f == 0)
        f |= _spike_step_flags(t_s, x, usable, lim, config)
        f |= _stuck_flags(t_s, x, usable, lim, config)
        flags[col] = f

    air, dew, rh = vals["air_temp_c"], vals["dew_point_c"], vals["rel_humidity_pct"]
    with np.errstate(invalid="ignore"):
        above = (dew - air) > config.dew_above_air_tolerance_c
    flags["dew_point_c"] |= np.where(above, DEW_ABOVE_AIR, 0)
    flags["rel_humidity_pct"] |= np.where(above & ~np.isnan(rh), DEW_ABOVE_AIR, 0)
    # One moisture measurement: share the bits where both are present.
    both = ~np.isnan(dew) & ~np.isnan(rh)
    shared = flags["dew_point_c"] | flags["rel_humidity_pct"]
    flags["dew_point_c"] = np.where(both, shared, flags["dew_point_c"])
    flags["rel_humidity_pct"] = np.where(both, shared, flags["rel_humidity_pct"])
    return {QC_COLUMNS[c]: flags[c] for c in VALUE_COLUMNS}


def apply_qc(frame: pd.DataFrame, config: QcConfig = DEFAULT_CONFIG) -> pd.DataFrame:
    """Add the QC bit-mask columns to a frame of one station's readings.

    Parameters
    ----------
    frame : DataFrame
        Indexed by a timezone-aware DatetimeIndex, sorted and unique; value
        columns by canonical name (missing columns are treated as empty).
    config : QcConfig
        Thresholds (defaults documented in this module).

    Returns
    -------
    DataFrame
        A copy with ``*_qc`` integer columns added (0 = passed).
    """
    idx = frame.index
    if not isinstance(idx, pd.DatetimeIndex) or idx.tz is None:
        raise ValueError("apply_qc needs a timezone-aware DatetimeIndex")
    if not idx.is_monotonic_increasing or idx.has_duplicates:
        raise ValueError("apply_qc needs sorted, unique times")
    t_s = epoch_seconds(idx)
    flags = qc_arrays(t_s, {c: frame[c].to_numpy(dtype=float) for c in VALUE_COLUMNS if c in frame},
                      config)
    out = frame.copy()
    for name, f in flags.items():
        out[name] = f
    return out


def epoch_seconds(index: pd.DatetimeIndex) -> np.ndarray:
    """Whole seconds since 1970-01-01 UTC of an aware DatetimeIndex (floored)."""
    return index.tz_convert("UTC").tz_localize(None).as_unit("s").asi8.astype(np.int64)


def typical_interval_s(t_s: np.ndarray) -> float | None:
    """Median interval between consecutive readings [s], or None with fewer than 2."""
    if len(t_s) < 2:
        return None
    return float(np.median(np.diff(np.asarray(t_s, dtype=np.int64))))


def find_gaps(t_s: np.ndarray, config: QcConfig = DEFAULT_CONFIG,
              interval_s: float | None = None) -> pd.DataFrame:
    """Intervals with at least one reading missing.

    Parameters
    ----------
    t_s : ndarray of int64
        Sorted reading times [s since the epoch, UTC].
    config : QcConfig
        ``gap_factor`` decides what counts as a gap.
    interval_s : float, optional
        The expected interval [s]; default the median interval.

    Returns
    -------
    DataFrame
        Columns ``start_utc`` (last reading before the gap), ``end_utc``
        (first reading after), ``duration_s`` and ``missing`` (readings
        missing at the expected interval), longest first.
    """
    t_s = np.asarray(t_s, dtype=np.int64)
    interval = interval_s if interval_s is not None else typical_interval_s(t_s)
    cols = ["start_utc", "end_utc", "duration_s", "missing"]
    if not interval or len(t_s) < 2:
        return pd.DataFrame(columns=cols)
    d = np.diff(t_s)
    at = np.flatnonzero(d > config.gap_factor * interval)
    out = pd.DataFrame({
        "start_utc": pd.to_datetime(t_s[at], unit="s", utc=True),
        "end_utc": pd.to_datetime(t_s[at + 1], unit="s", utc=True),
        "duration_s": d[at].astype(np.int64),
        "missing": np.maximum(np.rint(d[at] / interval).astype(np.int64) - 1, 1),
    })
    return out.sort_values("duration_s", ascending=False, kind="stable").reset_index(drop=True)


def flag_names(mask: int) -> list[str]:
    """Names of the bits set in a QC mask."""
    return [name for bit, name in FLAG_NAMES.items() if mask & bit]
