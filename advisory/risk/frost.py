"""Frost damage risk for a block's crop and stage, risk levels, and protection plans.

Pure and vectorised over blocks: no database, no network.  The pipeline hands
in plain arrays for all the blocks due at one time and gets back one
:class:`BlockRisk` per block.

Data shapes
-----------
``n`` blocks, ``m`` hourly time steps shared by all blocks.

:class:`NightCurves`
    ``times_utc`` (m,) tz-aware UTC ``DatetimeIndex`` (regular steps, normally
    hourly); ``air_temp_c``, ``dew_point_c``, ``wind_speed_ms`` (n, m) floats,
    NaN outside a block's own night (so blocks with different windows can
    share one grid); ``pressure_kpa`` (n,); ``sunrise_utc`` (n,)
    ``datetime64[ns]`` in UTC, NaT where the sun does not rise in the window;
    ``polar_day`` (n,) bool, True where the sun does not set (then "after
    sunrise" is always true).  The air-temperature curve is the central
    (median) forecast; only its *shape* is used, its level comes from the
    minimum-temperature distribution below.
:class:`MinTempForecast`
    The forecast distribution of each block's night minimum: ``p10_c``,
    ``p50_c``, ``p90_c`` (n,), and optionally ``cdf`` - a callable taking an
    (n, k) array of temperatures [°C] and returning P(minimum <= x), same shape.
    Without ``cdf`` a two-piece normal through the three quantiles is used.
:class:`BlockSetup`
    One per block: name, crop, stage, T10, T90, area, equipment (a sequence of
    mappings with ``kind`` in {"wind_machine", "overtree_sprinkler",
    "undertree_sprinkler", "heater"} and the parameters listed in
    :data:`EQUIPMENT_PARAMS`), measured inversion (upper minus screen air
    temperature at the evening reference time, °C; None without an upper
    sensor), evening cloud cover, and :class:`FrostSettings`.

Damage model
------------
Bud kill after a 30-minute exposure at temperature ``T`` is a logistic curve
through the published points (10 % at T10, 90 % at T90)::

    kill(T) = 1 / (1 + exp((T - T50) / s)),  T50 = (T10 + T90) / 2,
    s = (T10 - T90) / (2 ln 9)

so that kill(T10) = 0.1 and kill(T90) = 0.9 exactly.  The logistic is the form
used for bud-kill curves in the frost literature (Snyder & de Melo-Abreu
2005, ch. 5, citing Katz, Murphy & Winkler 1982); the spread is fixed by the
two table values.

Duration.  The tables are for 30 minutes, so the temperature used is not the
curve's instantaneous minimum but its *30-minute sustained minimum*: the
hourly curve is interpolated to 5-minute steps and the lowest 30-minute
running maximum is taken (a short dip counts less than a long flat bottom).
Longer exposures do more harm than the 30-minute tables show; as a model
assumption (settable, not from the tables) the effective temperature is
lowered by ``duration_shift_c_per_doubling`` for each doubling of the time the
curve stays within ``near_min_band_c`` of its sustained minimum beyond 30
minutes, up to ``duration_max_doublings`` doublings.

Uncertainty.  The hourly curve is shifted so that its minimum equals each
possible night minimum m.  Since the sustained minimum and the duration both
move with the shift, the effective temperature is m + (sustained - minimum) -
shift, and:

* P(kill >= 10 %) = F(T10 - offset), P(kill >= 90 %) = F(T90 - offset), with F
  the forecast CDF of the minimum and offset = sustained - minimum - shift;
* expected kill = E[kill(m + offset)], by quantile quadrature (equal-probability
  midpoints of F).

Risk levels (names of our own): ``nil``, ``slight``, ``marked``, ``serious``,
``grave``, from P(kill >= 10 %), P(kill >= 90 %) and the expected kill, with
thresholds settable per farm or block (:class:`FrostSettings`).

Protection plans
----------------
Start and stop times come from the central curve (shifted to the median
minimum); "ready by" times from the cold curve.  The cold curve is the one the
notice's chart draws as the lower edge of its 8-in-10 band: it leaves the
central curve at the first forecast hour (the latest observation) and fans out
in proportion to the fall already made, reaching the 10th-percentile minimum at
the time of the minimum (``cold = central + (p10 - p50) x share of the fall``;
after the minimum the whole difference).  Hours already observed are not moved.  Crossings are interpolated linearly between steps, then starts are
rounded *down* and stops *up* to ``round_minutes``.

* Wind machine: worthwhile when the inversion is at least
  ``wind_machine_min_inversion_c`` and the mean wind over the run is at most
  ``wind_machine_max_wind_ms`` (common practice: about 1.5-2 °C and light
  wind).  The inversion comes from the upper sensor if present, else from
  :func:`estimate_inversion_c` and is flagged as an estimate.  Start when the
  air reaches critical + margin; stop after sunrise once the air is back above
  it.
* Over-tree sprinklers: start when the *wet bulb* reaches critical + margin;
  stop only after sunrise once the wet bulb is above critical and the air is
  above 0 °C (ice melting).  Needed application rate from
  :func:`required_sprinkler_rate_mm_h` (by wind and the cold-case minimum)
  versus the equipment's rate; water = rate x area x hours.
* Under-tree sprinklers: start on the wet-bulb rule, stop as a wind machine;
  water as above.
* Heaters: start at critical + margin, stop as a wind machine; fuel = rate x
  area x hours when a rate is given.
* No equipment: a plan of method ``none`` that states the risk.

"Critical" here is T10 of the stage (where damage begins).  The *critical
time* is when the central curve reaches T10 itself (None when it does not);
the start time is earlier, when the air reaches T10 plus the start margin.

References
----------
.. [1] Snyder, R. L. & de Melo-Abreu, J. P. (2005) Frost Protection:
   fundamentals, practice and economics, vol. 1. FAO Environment and Natural
   Resources Series 10 (ch. 5 damage functions; ch. 7 wind machines,
   sprinklers, heaters; start/stop rules).
.. [2] Ballard, J. K., Proebsting, E. L. & Tukey, R. B., WSU Extension
   bulletins (T10 and T90, 30-minute exposure); see
   :mod:`advisory.crops.thresholds`.
.. [3] Gerber, J. F. & Harrison, D. S. (1964) Sprinkler irrigation for cold
   protection of citrus. Trans. ASAE 7, 464-468 (application-rate table, as
   reproduced in extension guides; citation details from memory).
.. [4] Katz, R. W., Murphy, A. H. & Winkler, R. L. (1982) Assessing the value
   of frost forecasts to orchardists. J. Appl. Meteor. 21, 518-531 (citation
   details from memory; cited by [1] ch. 5 for logistic damage functions).
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field, fields
from datetime import UTC, datetime
from functools import lru_cache

import numpy as np
import pandas as pd
from scipy.special import ndtr, ndtri

from advisory.errors import InputError
from advisory.fieldcalc import start_air_temp_c
from advisory.physics import moisture
from advisory.risk import cautions

LN9 = math.log(9.0)

#: Risk level names, lowest first.
LEVELS: tuple[str, ...] = ("nil", "slight", "marked", "serious", "grave")

#: Protection methods, in the order plans are listed.
METHODS: tuple[str, ...] = ("overtree_sprinkler", "wind_machine", "heater", "undertree_sprinkler")

#: Equipment parameters read from each equipment entry (all optional unless noted).
EQUIPMENT_PARAMS: dict[str, dict[str, str]] = {
    "wind_machine": {
        "count": "number of machines (information only)",
    },
    "overtree_sprinkler": {
        "rate_mm_h": "application rate [mm/h] (required for water and adequacy)",
        "water_supply_m3": "water available for the night [m³]",
    },
    "undertree_sprinkler": {
        "rate_mm_h": "application rate [mm/h]",
        "water_supply_m3": "water available for the night [m³]",
    },
    "heater": {
        "fuel_l_per_h_per_ha": "fuel burned per hour per hectare [L/(h·ha)]",
        "heaters_per_ha": "heaters per hectare (with fuel_l_per_h_per_heater)",
        "fuel_l_per_h_per_heater": "fuel burned per heater per hour [L/h]",
        "fuel_stock_l": "fuel on hand for the block [L]",
    },
}


# --------------------------------------------------------------------------------------------------
# Damage curve
# --------------------------------------------------------------------------------------------------

def kill_fraction(temp_c, t10_c, t90_c):
    """Fraction of buds killed by a 30-minute exposure, logistic through T10 and T90.

    Parameters
    ----------
    temp_c : array_like
        Exposure (bud or air) temperature [°C].
    t10_c, t90_c : array_like
        Temperatures killing 10 % and 90 % of buds [°C]; T10 > T90.

    Returns
    -------
    kill : float or ndarray
        Killed fraction in [0, 1]; exactly 0.1 at T10 and 0.9 at T90.

    References
    ----------
    .. [1] Snyder & de Melo-Abreu (2005), ch. 5; [4] Katz et al. (1982).
    """
    t, t10, t90 = (np.asarray(a, dtype=float) for a in (temp_c, t10_c, t90_c))
    t50 = 0.5 * (t10 + t90)
    s = (t10 - t90) / (2.0 * LN9)
    z = np.clip((t - t50) / s, -700.0, 700.0)
    out = 1.0 / (1.0 + np.exp(z))
    return float(out) if out.ndim == 0 else out


def temp_for_kill_c(kill, t10_c, t90_c):
    """Inverse of :func:`kill_fraction`: the temperature giving a kill fraction [°C]."""
    k, t10, t90 = (np.asarray(a, dtype=float) for a in (kill, t10_c, t90_c))
    t50 = 0.5 * (t10 + t90)
    s = (t10 - t90) / (2.0 * LN9)
    out = t50 + s * np.log((1.0 - k) / k)
    return float(out) if out.ndim == 0 else out


# --------------------------------------------------------------------------------------------------
# Minimum-temperature distribution
# --------------------------------------------------------------------------------------------------

_Z90 = float(ndtri(0.9))  # 1.2816


@dataclass(frozen=True)
class MinTempForecast:
    """Forecast distribution of each block's night minimum.

    Attributes
    ----------
    p10_c, p50_c, p90_c : ndarray, shape (n,)
        10th, 50th, 90th percentiles [°C]; p10 <= p50 <= p90.
    cdf : callable, optional
        ``cdf(x) -> P(min <= x)`` for ``x`` of shape (n, k) [°C], returning the
        same shape, non-decreasing along the last axis.  When absent, a
        two-piece normal through the three quantiles is used.
    quantile : callable, optional
        ``quantile(q) -> (n, k)``: the inverse of ``cdf`` at probabilities ``q``
        (k,) [°C], when known exactly; otherwise ``cdf`` is inverted numerically.
    """

    p10_c: np.ndarray
    p50_c: np.ndarray
    p90_c: np.ndarray
    cdf: Callable[[np.ndarray], np.ndarray] | None = None
    quantile: Callable[[np.ndarray], np.ndarray] | None = None

    def __post_init__(self):
        for name in ("p10_c", "p50_c", "p90_c"):
            object.__setattr__(self, name, np.atleast_1d(np.asarray(getattr(self, name), dtype=float)))
        if not (self.p10_c.shape == self.p50_c.shape == self.p90_c.shape):
            raise ValueError("p10_c, p50_c and p90_c must have the same shape")
        if np.any(self.p10_c > self.p50_c + 1e-9) or np.any(self.p50_c > self.p90_c + 1e-9):
            raise ValueError("quantiles must satisfy p10 <= p50 <= p90")

    @property
    def _sigmas(self):
        lo = np.maximum(self.p50_c - self.p10_c, 0.0) / _Z90
        hi = np.maximum(self.p90_c - self.p50_c, 0.0) / _Z90
        return lo, hi

    def cdf_at(self, x) -> np.ndarray:
        """P(min <= x) for ``x`` of shape (n,) or (n, k)."""
        x = np.asarray(x, dtype=float)
        squeeze = x.ndim == 1
        x2 = x[:, None] if squeeze else x
        if self.cdf is not None:
            out = np.clip(np.asarray(self.cdf(x2), dtype=float), 0.0, 1.0)
        else:
            lo, hi = self._sigmas
            d = x2 - self.p50_c[:, None]
            sig = np.where(d < 0, lo[:, None], hi[:, None])
            with np.errstate(divide="ignore", invalid="ignore"):
                z = np.where(sig > 0, d / np.where(sig > 0, sig, 1.0), np.where(d < 0, -np.inf, np.inf))
            # A point mass at p50 (zero spread) counts as "<= x" when x >= p50.
            out = np.where((sig == 0) & (d == 0), 1.0, ndtr(z))
        return out[:, 0] if squeeze else out

    def quantiles(self, q) -> np.ndarray:
        """Quantiles of the minimum for probabilities ``q`` (k,), shape (n, k) [°C]."""
        q = np.asarray(q, dtype=float)
        if self.cdf is None:
            lo, hi = self._sigmas
            z = ndtri(q)[None, :]
            sig = np.where(z < 0, lo[:, None], hi[:, None])
            return self.p50_c[:, None] + sig * z
        if self.quantile is not None:
            return np.asarray(self.quantile(q), dtype=float)
        # Invert a user CDF on a grid spanning well beyond the quantiles.
        spread = np.maximum(self.p90_c - self.p10_c, 0.5)
        x = np.linspace(self.p10_c - 4 * spread, self.p90_c + 4 * spread, 401, axis=1)  # (n, g)
        f = np.maximum.accumulate(self.cdf_at(x), axis=1)
        return _interp_rows(q, f, x)


def _interp_rows(xq: np.ndarray, xp: np.ndarray, fp: np.ndarray) -> np.ndarray:
    """Row-wise linear interpolation: for each row i, interp(xq, xp[i], fp[i]).

    ``xp`` (n, g) non-decreasing per row; ``xq`` (k,) or (n, k).  Returns (n, k),
    clamped to the end values outside each row's range.  One ``searchsorted``
    over all rows at once (rows are separated by offsets), so memory stays
    O(n (g + k)).
    """
    xp = np.asarray(xp, float)
    fp = np.asarray(fp, float)
    n, g = xp.shape
    xq2 = np.broadcast_to(np.asarray(xq, float), (n, np.shape(xq)[-1])) if np.ndim(xq) == 1 else np.asarray(xq)
    lo = min(np.nanmin(xp), np.nanmin(xq2))
    span = max(np.nanmax(xp), np.nanmax(xq2)) - lo + 1.0
    off = (np.arange(n, dtype=float) * span)[:, None]
    flat = (xp - lo + off).ravel()
    pos = np.searchsorted(flat, (xq2 - lo + off).ravel(), side="right").reshape(xq2.shape)
    idx = pos - (np.arange(n) * g)[:, None]  # count of xp <= xq within the row
    i1 = np.clip(idx, 1, g - 1)
    i0 = i1 - 1
    rows = np.arange(n)[:, None]
    x0, x1 = xp[rows, i0], xp[rows, i1]
    y0, y1 = fp[rows, i0], fp[rows, i1]
    with np.errstate(divide="ignore", invalid="ignore"):
        w = np.where(x1 > x0, (xq2 - x0) / (x1 - x0), 0.0)
    out = y0 + np.clip(w, 0.0, 1.0) * (y1 - y0)
    out = np.where(idx <= 0, fp[:, :1], out)
    return np.where(idx >= g, fp[:, -1:], out)


# --------------------------------------------------------------------------------------------------
# Settings
# --------------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class FrostSettings:
    """Risk thresholds, margins and model options for one block.

    Read from the farm's and the block's settings tables (the block's keys win)
    with :meth:`from_mappings`; unknown keys are ignored (they belong to other
    topics), known keys are checked.

    Attributes
    ----------
    start_margin_c : float
        Margin above the critical temperature for starting protection [°C]
        (common practice 1-2 °C; default 1.0).
    sprinkler_start_margin_c : float or None
        Margin for the sprinklers' wet-bulb start; None = ``start_margin_c``.
    level_slight_p, level_marked_p, level_serious_p : float
        P(kill >= 10 %) at which the level becomes slight, marked, serious.
    level_serious_kill : float
        Expected kill fraction that makes the level at least serious.
    level_grave_kill, level_grave_p90 : float
        Expected kill, or P(kill >= 90 %), that makes the level grave.
    protect_from_level : str
        Lowest level at which the block is put on the run sheet.
    wind_machine_min_inversion_c, wind_machine_max_wind_ms : float
        When a wind machine is worthwhile (common practice: inversion >= about
        1.5-2 °C, light wind).
    wind_machine_gain_fraction : float
        Share of the inversion a wind machine is expected to recover at the
        buds (from memory, unverified; used only to decide whether heaters
        should join it).
    duration_shift_c_per_doubling, duration_max_doublings, near_min_band_c : float
        Duration adjustment (see module docstring; a model assumption).
    round_minutes : int
        Rounding of start (down) and stop (up) times.
    """

    start_margin_c: float = 1.0
    sprinkler_start_margin_c: float | None = None
    level_slight_p: float = 0.05
    level_marked_p: float = 0.20
    level_serious_p: float = 0.50
    level_serious_kill: float = 0.10
    level_grave_kill: float = 0.30
    level_grave_p90: float = 0.50
    protect_from_level: str = "marked"
    wind_machine_min_inversion_c: float = 1.5
    wind_machine_max_wind_ms: float = 2.5
    wind_machine_gain_fraction: float = 0.5
    duration_shift_c_per_doubling: float = 0.15
    duration_max_doublings: float = 3.0
    near_min_band_c: float = 0.5
    round_minutes: int = 15

    _RANGES = {
        "start_margin_c": (0.0, 5.0), "sprinkler_start_margin_c": (0.0, 5.0),
        "level_slight_p": (0.0, 1.0), "level_marked_p": (0.0, 1.0), "level_serious_p": (0.0, 1.0),
        "level_serious_kill": (0.0, 1.0), "level_grave_kill": (0.0, 1.0), "level_grave_p90": (0.0, 1.0),
        "wind_machine_min_inversion_c": (0.0, 10.0), "wind_machine_max_wind_ms": (0.0, 20.0),
        "wind_machine_gain_fraction": (0.0, 1.0), "duration_shift_c_per_doubling": (0.0, 2.0),
        "duration_max_doublings": (0.0, 10.0), "near_min_band_c": (0.0, 5.0), "round_minutes": (1, 60),
    }

    @property
    def sprinkler_margin_c(self) -> float:
        return self.start_margin_c if self.sprinkler_start_margin_c is None else self.sprinkler_start_margin_c

    @property
    def protect_level_index(self) -> int:
        return LEVELS.index(self.protect_from_level)

    @classmethod
    def from_mappings(cls, *mappings: Mapping | None, where: str = "settings") -> FrostSettings:
        """Settings from one or more mappings, later ones overriding earlier ones.

        A nested ``frost`` table inside a mapping is read too (its keys win
        over the flat keys of the same mapping).

        Raises
        ------
        InputError
            A known key with a bad value; ``field`` names the key.
        """
        merged: dict = {}
        for m in mappings:
            if not m:
                continue
            merged.update({k: v for k, v in m.items() if k != "frost"})
            if isinstance(m.get("frost"), Mapping):
                merged.update(m["frost"])
        names = {f.name for f in fields(cls)}
        kwargs = {}
        for key, value in merged.items():
            if key not in names:
                continue
            if key == "protect_from_level":
                if value not in LEVELS:
                    raise InputError(f"{key} must be one of {', '.join(LEVELS)}", file=where, field=key)
                kwargs[key] = value
                continue
            if value is None and key == "sprinkler_start_margin_c":
                kwargs[key] = None
                continue
            try:
                v = float(value)
            except (TypeError, ValueError):
                raise InputError(f"{key} must be a number", file=where, field=key) from None
            lo, hi = cls._RANGES[key]
            if not (math.isfinite(v) and lo <= v <= hi):
                raise InputError(f"{key} must be between {lo:g} and {hi:g}", file=where, field=key)
            kwargs[key] = int(v) if key == "round_minutes" else v
        out = cls(**kwargs)
        if not out.level_slight_p <= out.level_marked_p <= out.level_serious_p:
            raise InputError("level thresholds must rise: level_slight_p <= level_marked_p <= level_serious_p",
                             file=where, field="level_marked_p")
        return out


# --------------------------------------------------------------------------------------------------
# Inputs
# --------------------------------------------------------------------------------------------------

@dataclass
class NightCurves:
    """Hourly forecast curves for ``n`` blocks on a shared time grid (see module docstring)."""

    times_utc: pd.DatetimeIndex
    air_temp_c: np.ndarray
    dew_point_c: np.ndarray
    wind_speed_ms: np.ndarray
    sunrise_utc: np.ndarray
    pressure_kpa: np.ndarray | float = moisture.STANDARD_PRESSURE_KPA
    polar_day: np.ndarray | None = None

    def __post_init__(self):
        t = pd.DatetimeIndex(self.times_utc)
        if t.tz is None:
            raise ValueError("times_utc must be timezone-aware")
        self.times_utc = t.tz_convert("UTC")
        if len(t) < 2 or not t.is_monotonic_increasing:
            raise ValueError("times_utc must hold at least two increasing times")
        self.air_temp_c = np.atleast_2d(np.asarray(self.air_temp_c, dtype=float))
        n, m = self.air_temp_c.shape
        if m != len(t):
            raise ValueError(f"air_temp_c has {m} columns for {len(t)} times")
        self.dew_point_c = np.broadcast_to(np.asarray(self.dew_point_c, dtype=float), (n, m)).copy()
        self.wind_speed_ms = np.broadcast_to(np.asarray(self.wind_speed_ms, dtype=float), (n, m)).copy()
        self.pressure_kpa = np.broadcast_to(np.asarray(self.pressure_kpa, dtype=float), (n,)).copy()
        sr = pd.to_datetime(pd.Series(np.atleast_1d(self.sunrise_utc)), utc=True)
        self.sunrise_utc = sr.dt.tz_localize(None).to_numpy(dtype="datetime64[ns]")
        if self.sunrise_utc.shape != (n,):
            raise ValueError("sunrise_utc must have one entry per block")
        self.polar_day = (np.zeros(n, bool) if self.polar_day is None
                          else np.broadcast_to(np.asarray(self.polar_day, bool), (n,)).copy())
        if np.any(np.isfinite(self.air_temp_c).sum(axis=1) < 2):
            raise ValueError("every block needs at least two valid hourly air temperatures")

    @property
    def n_blocks(self) -> int:
        return self.air_temp_c.shape[0]


@dataclass
class BlockSetup:
    """One block's static inputs (see module docstring)."""

    name: str
    crop: str
    stage: str
    t10_c: float
    t90_c: float
    area_ha: float
    equipment: Sequence[Mapping] = ()
    upper_inversion_c: float | None = None
    cloud_cover_pct: float | None = None
    settings: FrostSettings = field(default_factory=FrostSettings)


# --------------------------------------------------------------------------------------------------
# Outputs
# --------------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class MethodPlan:
    """Plan for one protection method on one block.

    Times are tz-aware UTC datetimes (None when not applicable).  Quantities
    are for the central forecast; ``*_cold`` for the cold (10th-percentile)
    case.

    Attributes
    ----------
    method : str
        One of :data:`METHODS` or "none".
    usable : bool
        The method can be expected to help tonight.
    recommended : bool
        Part of the plan the run sheet shows.
    start_utc, stop_utc : datetime or None
        Expected start and stop.  ``start_utc`` None with ``ready_by_utc`` set
        means the start condition is reached only in the cold case.
    ready_by_utc : datetime or None
        Start in the cold case: be ready by then.
    stop_open : bool
        The stop condition is not reached before the curve ends; ``stop_utc``
        is then the end of the curve and run figures are lower bounds.
    run_hours, run_hours_cold : float or None
    start_air_temp_c : float or None
        Air (thermometer) temperature at which to start.
    start_wet_bulb_c : float or None
        Wet-bulb temperature at which to start (sprinklers).
    rate_mm_h, required_rate_mm_h : float or None
        Equipment and needed application rate (sprinklers).
    water_m3, water_m3_cold, water_l_per_ha : float or None
    fuel_l, fuel_l_cold : float or None
    inversion_c : float or None
    inversion_estimated : bool
    notes : tuple of str
        Plain-language reasons and remarks.
    caution_keys : tuple of str
        Keys into :mod:`advisory.risk.cautions`.
    """

    method: str
    usable: bool
    recommended: bool = False
    start_utc: datetime | None = None
    ready_by_utc: datetime | None = None
    stop_utc: datetime | None = None
    stop_open: bool = False
    run_hours: float | None = None
    run_hours_cold: float | None = None
    start_air_temp_c: float | None = None
    start_wet_bulb_c: float | None = None
    rate_mm_h: float | None = None
    required_rate_mm_h: float | None = None
    water_m3: float | None = None
    water_m3_cold: float | None = None
    water_l_per_ha: float | None = None
    fuel_l: float | None = None
    fuel_l_cold: float | None = None
    inversion_c: float | None = None
    inversion_estimated: bool = False
    notes: tuple[str, ...] = ()
    caution_keys: tuple[str, ...] = ()


@dataclass(frozen=True)
class BlockRisk:
    """Frost risk and protection plans for one block and night.

    Attributes
    ----------
    block, crop, stage : str
    t10_c, t90_c : float
    critical_c : float
        The critical temperature used for starting protection (T10).
    min_p10_c, min_p50_c, min_p90_c : float
        Forecast minimum and its range [°C].
    time_of_min_utc : datetime
        Time of the minimum on the central curve.
    sustained_min_offset_c : float
        30-minute sustained minimum minus the minimum on the curve [°C].
    duration_shift_c : float
        Extra cooling equivalent for long exposure [°C].
    near_min_hours : float
        Hours within ``near_min_band_c`` of the sustained minimum.
    hours_below_t10, hours_below_t10_cold : float
        Hours at or below T10 on the central and cold curves.
    expected_kill : float
        Expected fraction of buds killed.
    p_kill_10, p_kill_90 : float
        P(kill >= 10 %), P(kill >= 90 %).
    level : str
        One of :data:`LEVELS`.
    needs_protection : bool
        Level at or above the block's ``protect_from_level``.
    plans : tuple of MethodPlan
        One per method the block has (or one "none").
    p_min_below_t10, p_min_below_t90 : float
        P(night minimum <= T10), P(night minimum <= T90).
    critical_time_utc : datetime or None
        When the central curve first reaches the critical temperature (T10)
        itself; None when the central forecast stays above it.  (Protection
        starts earlier, at critical + start margin: see the plans.)
    """

    block: str
    crop: str
    stage: str
    t10_c: float
    t90_c: float
    critical_c: float
    min_p10_c: float
    min_p50_c: float
    min_p90_c: float
    time_of_min_utc: datetime
    sustained_min_offset_c: float
    duration_shift_c: float
    near_min_hours: float
    hours_below_t10: float
    hours_below_t10_cold: float
    expected_kill: float
    p_kill_10: float
    p_kill_90: float
    level: str
    needs_protection: bool
    plans: tuple[MethodPlan, ...]
    p_min_below_t10: float = float("nan")
    p_min_below_t90: float = float("nan")
    critical_time_utc: datetime | None = None

    @property
    def level_index(self) -> int:
        return LEVELS.index(self.level)

    @property
    def recommended(self) -> tuple[MethodPlan, ...]:
        return tuple(p for p in self.plans if p.recommended)


# --------------------------------------------------------------------------------------------------
# Vectorised pieces
# --------------------------------------------------------------------------------------------------

_FINE_STEP_NS = 5 * 60 * 10**9  # sub-step for the sustained minimum and durations: about 5 minutes


def _fine(times_ns: np.ndarray, values: np.ndarray):
    """Linear interpolation of (n, m) values to about 5-minute sub-steps (NaN propagates)."""
    n, m = values.shape
    steps = max(1, int(round(float(np.median(np.diff(times_ns))) / _FINE_STEP_NS)))
    frac = np.arange(steps) / steps
    v0, v1 = values[:, :-1], values[:, 1:]
    fine = (v0[:, :, None] + (v1 - v0)[:, :, None] * frac).reshape(n, -1)
    fine = np.concatenate([fine, values[:, -1:]], axis=1)
    dt = np.diff(times_ns).astype(float)
    tf = (times_ns[:-1, None].astype(float) + dt[:, None] * frac).reshape(-1)
    tf = np.concatenate([tf, times_ns[-1:].astype(float)])
    return tf, fine


def sustained_minimum_c(times_utc, air_temp_c, window_min: float = 30.0):
    """Lowest temperature sustained for ``window_min`` minutes on each curve.

    The curve is interpolated linearly to sub-steps; the running maximum over
    a window of ``window_min`` is taken and its minimum returned.

    Parameters
    ----------
    times_utc : DatetimeIndex, shape (m,)
    air_temp_c : ndarray, shape (n, m)
        NaN outside the block's night.
    window_min : float
        Exposure window [min] (30 for the published tables).

    Returns
    -------
    sustained_c : ndarray, shape (n,)
    """
    t = _ns(times_utc)
    tf, fine = _fine(t, np.atleast_2d(np.asarray(air_temp_c, float)))
    step = np.median(np.diff(tf))
    w = max(int(round(window_min * 60e9 / step)), 0) + 1
    filled = np.where(np.isfinite(fine), fine, -np.inf)
    if w > 1 and fine.shape[1] >= w:
        win = np.lib.stride_tricks.sliding_window_view(filled, w, axis=1).max(axis=2)
        win = np.where(np.isfinite(win), win, np.inf)  # windows touching NaN are ignored
        out = win.min(axis=1)
        # Too short a valid stretch: fall back to the plain minimum.
        return np.where(np.isfinite(out), out, np.nanmin(fine, axis=1))
    return np.nanmin(fine, axis=1)


def _hours_at_or_below(times_ns, values, thr):
    """Hours each row spends at or below thr (n,) (fine-step count)."""
    tf, fine = _fine(times_ns, values)
    dt_h = np.median(np.diff(tf)) / 3.6e12
    return (fine <= thr[:, None]).sum(axis=1) * dt_h


def estimate_inversion_c(cloud_cover_pct, wind_speed_ms):
    """Rough inversion strength (about 10 m minus screen height) from sky and wind [°C].

    An estimate only, used when a block's station has no upper thermometer:
    clear, calm radiation nights typically build inversions of a few degrees
    (common practice); clouds and wind destroy them.  Here ``3.0 * (1 -
    (N/100)**2) * clip((4 - u) / 3, 0, 1)`` with cloud cover N [%] and wind
    speed u [m/s]; the 3.0 °C clear-calm value is from memory, unverified.

    Parameters
    ----------
    cloud_cover_pct : array_like
        Evening cloud cover [%]; NaN gives NaN.
    wind_speed_ms : array_like
        Wind speed [m/s].

    Returns
    -------
    inversion_c : float or ndarray
    """
    n = np.clip(np.asarray(cloud_cover_pct, float), 0.0, 100.0) / 100.0
    u = np.asarray(wind_speed_ms, float)
    out = 3.0 * (1.0 - n ** 2) * np.clip((4.0 - u) / 3.0, 0.0, 1.0)
    return float(out) if out.ndim == 0 else out


# Application rate needed for over-tree sprinkling [in/h] by minimum temperature [°F]
# (rows) and wind class [mph] (columns): Gerber & Harrison (1964) as reproduced in
# extension guides (from memory, unverified; consistent with MSU Extension's note
# that 0.12-0.15 in/h protects to about 22 °F in calm air and 24-25 °F in light wind).
_RATE_TEMPS_F = np.array([27.0, 26.0, 24.0, 22.0, 20.0, 18.0, 15.0, 11.0])
_RATE_WIND_UPPER_MPH = np.array([1.0, 4.0, 8.0, 14.0, 22.0])
_RATE_IN_H = np.array([
    [0.10, 0.10, 0.10, 0.10, 0.20],
    [0.10, 0.10, 0.14, 0.20, 0.40],
    [0.10, 0.16, 0.30, 0.40, 0.80],
    [0.12, 0.24, 0.50, 0.60, 1.20],
    [0.16, 0.30, 0.60, 0.80, 1.60],
    [0.20, 0.40, 0.70, 1.00, 2.00],
    [0.26, 0.50, 0.90, 1.30, 2.60],
    [0.34, 0.70, 1.20, 1.70, 3.40],
])
#: The same table in SI: rows = minimum temperature [°C], columns = wind class upper bound [m/s].
RATE_TABLE_TEMPS_C = (_RATE_TEMPS_F - 32.0) / 1.8
RATE_TABLE_WIND_UPPER_MS = _RATE_WIND_UPPER_MPH * 0.44704
RATE_TABLE_MM_H = _RATE_IN_H * 25.4


def required_sprinkler_rate_mm_h(min_temp_c, wind_speed_ms):
    """Over-tree sprinkler application rate needed for a minimum temperature and wind.

    Bilinear interpolation in the table: between its temperature rows and
    between its wind columns (each column taken at its class's upper wind
    bound), so the need changes smoothly with the forecast and equals the table
    at every node.  Minima warmer than the warmest row use that row; winds
    lighter than the first class bound use the first column.  The table was
    built for citrus; notices say so where they use it.

    Parameters
    ----------
    min_temp_c : array_like
        Expected night minimum [°C].
    wind_speed_ms : array_like
        Wind speed during sprinkling [m/s].

    Returns
    -------
    rate_mm_h : ndarray
        Needed rate [mm/h]; NaN beyond the table (colder than its coldest row or
        windier than its windiest class): sprinkling is outside the guidance.

    References
    ----------
    .. [3] Gerber & Harrison (1964); see also [1] Snyder & de Melo-Abreu (2005) ch. 7.
    """
    t, u = np.broadcast_arrays(np.asarray(min_temp_c, float), np.asarray(wind_speed_ms, float))
    shape = t.shape
    tf, uf = t.reshape(-1), u.reshape(-1)
    temps = RATE_TABLE_TEMPS_C[::-1]           # rising, for np.interp
    table = RATE_TABLE_MM_H[::-1]              # rows in the same order
    winds = RATE_TABLE_WIND_UPPER_MS
    ok = np.isfinite(tf) & np.isfinite(uf) & (tf >= temps[0] - 1e-6) & (uf <= winds[-1] + 1e-6)
    tc = np.clip(np.nan_to_num(tf, nan=temps[-1]), temps[0], temps[-1])
    uc = np.clip(np.nan_to_num(uf, nan=winds[0]), winds[0], winds[-1])
    # interpolate each wind column in temperature, then across the columns in wind
    by_col = np.stack([np.interp(tc, temps, table[:, k]) for k in range(table.shape[1])], axis=1)  # (N, nc)
    hi = np.clip(np.searchsorted(winds, uc, side="left"), 1, len(winds) - 1)
    lo = hi - 1
    w = (uc - winds[lo]) / (winds[hi] - winds[lo])
    rows = np.arange(len(uc))
    out = by_col[rows, lo] + np.clip(w, 0.0, 1.0) * (by_col[rows, hi] - by_col[rows, lo])
    out = np.where(ok, out, np.nan)
    return float(out[0]) if shape == () else out.reshape(shape)


#: Where the sprinkler rate table comes from, for the notices (the table was made for citrus).
RATE_TABLE_ORIGIN = ("the rate table was built for citrus (Gerber & Harrison 1964) and is used here for lack "
                     "of one for this crop")


def _crossing_down(times_ns, series, thr, valid):
    """First time each row's series falls to thr or below (linear interpolation).

    Returns (time_ns float (n,), found (n,), index (n,)).
    """
    n, m = series.shape
    mask = valid & (series <= thr[:, None])
    found = mask.any(axis=1)
    i = np.argmax(mask, axis=1)
    rows = np.arange(n)
    ip = np.maximum(i - 1, 0)
    prev_ok = (i > 0) & valid[rows, ip]
    s0, s1 = series[rows, ip], series[rows, i]
    with np.errstate(divide="ignore", invalid="ignore"):
        frac = np.where(prev_ok & (s0 > s1), (s0 - thr) / (s0 - s1), 1.0)
    frac = np.clip(np.nan_to_num(frac, nan=1.0), 0.0, 1.0)
    t0, t1 = times_ns[ip].astype(float), times_ns[i].astype(float)
    t = np.where(prev_ok, t0 + frac * (t1 - t0), t1)
    return np.where(found, t, np.nan), found, i


def _stop_time(times_ns, margin_ok, g, valid, after_idx, sunrise_ns):
    """First time after ``after_idx`` and sunrise at which the stop condition holds.

    ``g`` (n, m) is positive when the condition holds (used to interpolate the
    crossing); ``margin_ok`` = valid & (g > 0).  Returns (time_ns, found).
    """
    n, m = g.shape
    idx = np.arange(m)[None, :]
    after_sun = times_ns[None, :].astype(float) >= sunrise_ns[:, None]
    cand = margin_ok & after_sun & (idx > after_idx[:, None])
    found = cand.any(axis=1)
    j = np.argmax(cand, axis=1)
    rows = np.arange(n)
    jp = np.maximum(j - 1, 0)
    prev_in = (j - 1 > after_idx) & valid[rows, jp]
    prev_ok = prev_in & margin_ok[rows, jp]
    g0, g1 = g[rows, jp], g[rows, j]
    with np.errstate(divide="ignore", invalid="ignore"):
        frac = np.where(prev_in & ~prev_ok & (g1 > g0), (0.0 - g0) / (g1 - g0), 1.0)
    frac = np.clip(np.nan_to_num(frac, nan=1.0), 0.0, 1.0)
    t0, t1 = times_ns[jp].astype(float), times_ns[j].astype(float)
    t_cross = np.where(prev_in & ~prev_ok, t0 + frac * (t1 - t0), np.where(prev_ok, t0, t1))
    t = np.maximum(t_cross, np.where(np.isfinite(sunrise_ns), sunrise_ns, -np.inf))
    return np.where(found, t, np.nan), found


def _ns(times) -> np.ndarray:
    """Nanoseconds since the epoch (int64) of a tz-aware DatetimeIndex, whatever its unit."""
    return pd.DatetimeIndex(times).tz_convert("UTC").tz_localize(None).to_numpy().astype(
        "datetime64[ns]").astype(np.int64)


def _round_ns(t_ns, minutes, up):
    q = minutes * 60e9
    if isinstance(t_ns, float):  # one instant (per block in a plan): plain Python is much faster
        if not math.isfinite(t_ns):
            return math.nan
        return (math.ceil(t_ns / q) if up else math.floor(t_ns / q)) * q
    f = np.ceil if up else np.floor
    return np.where(np.isfinite(t_ns), f(t_ns / q) * q, np.nan)


def _to_dt(t_ns) -> datetime | None:
    if t_ns is None or not np.isfinite(t_ns):
        return None
    return datetime.fromtimestamp(float(t_ns) / 1e9, tz=UTC)


# --------------------------------------------------------------------------------------------------
# Damage over the night
# --------------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class DamageArrays:
    """Vectorised damage results, all shape (n,) (see :class:`BlockRisk` for meanings)."""

    curve_min_c: np.ndarray
    time_of_min_ns: np.ndarray
    sustained_offset_c: np.ndarray
    near_min_hours: np.ndarray
    duration_shift_c: np.ndarray
    expected_kill: np.ndarray
    p_kill_10: np.ndarray
    p_kill_90: np.ndarray
    level_index: np.ndarray


def damage(curves: NightCurves, forecast: MinTempForecast, t10_c, t90_c, *,
           duration_shift_c_per_doubling=0.15, duration_max_doublings=3.0, near_min_band_c=0.5,
           level_thresholds: Mapping[str, np.ndarray] | None = None, n_quad: int = 200) -> DamageArrays:
    """Expected bud kill, P(kill >= 10 %), P(kill >= 90 %) and risk level for every block.

    Parameters
    ----------
    curves : NightCurves
        Hourly curves (only ``air_temp_c`` and ``times_utc`` are used).
    forecast : MinTempForecast
        Distribution of the night minimum.
    t10_c, t90_c : array_like, shape (n,)
        Critical temperatures [°C].
    duration_shift_c_per_doubling, duration_max_doublings, near_min_band_c : array_like
        Duration adjustment (module docstring), scalars or (n,).
    level_thresholds : mapping, optional
        Arrays (n,) or scalars for the :class:`FrostSettings` ``level_*``
        fields; defaults from :class:`FrostSettings`.
    n_quad : int
        Quadrature points for the expected kill.

    Returns
    -------
    DamageArrays
    """
    air = curves.air_temp_c
    n = air.shape[0]
    t10 = np.broadcast_to(np.asarray(t10_c, float), (n,))
    t90 = np.broadcast_to(np.asarray(t90_c, float), (n,))
    times_ns = _ns(curves.times_utc)
    cmin = np.nanmin(air, axis=1)
    imin = np.nanargmin(np.where(np.isfinite(air), air, np.inf), axis=1)
    sus = sustained_minimum_c(curves.times_utc, air)
    offset = sus - cmin
    band = np.broadcast_to(np.asarray(near_min_band_c, float), (n,))
    near_h = _hours_at_or_below(times_ns, air, sus + band)
    rate = np.broadcast_to(np.asarray(duration_shift_c_per_doubling, float), (n,))
    cap = np.broadcast_to(np.asarray(duration_max_doublings, float), (n,))
    doublings = np.clip(np.log2(np.maximum(near_h, 0.5) / 0.5), 0.0, cap)
    shift = rate * doublings
    eff_offset = offset - shift  # effective exposure temperature = night minimum + eff_offset

    p10k = forecast.cdf_at(t10 - eff_offset)
    p90k = forecast.cdf_at(t90 - eff_offset)
    q = (np.arange(n_quad) + 0.5) / n_quad
    mins = forecast.quantiles(q)  # (n, K)
    ek = kill_fraction(mins + eff_offset[:, None], t10[:, None], t90[:, None]).mean(axis=1)

    d = {f.name: getattr(FrostSettings(), f.name) for f in fields(FrostSettings) if f.name.startswith("level_")}
    if level_thresholds:
        d.update(level_thresholds)
    th = {k: np.broadcast_to(np.asarray(v, float), (n,)) for k, v in d.items()}
    lvl = np.zeros(n, dtype=int)
    lvl = np.where(p10k >= th["level_slight_p"], 1, lvl)
    lvl = np.where(p10k >= th["level_marked_p"], 2, lvl)
    lvl = np.where((p10k >= th["level_serious_p"]) | (ek >= th["level_serious_kill"]), 3, lvl)
    lvl = np.where((ek >= th["level_grave_kill"]) | (p90k >= th["level_grave_p90"]), 4, lvl)
    return DamageArrays(cmin, times_ns[imin].astype(float), offset, near_h, shift, ek, p10k, p90k, lvl)


# --------------------------------------------------------------------------------------------------
# Plans
# --------------------------------------------------------------------------------------------------

def _equipment_by_kind(equipment: Sequence[Mapping]) -> dict[str, dict]:
    out: dict[str, dict] = {}
    for e in equipment or ():
        kind = str(e.get("kind", "")).strip().lower().replace("-", "_").replace(" ", "_")
        if kind not in METHODS:
            raise InputError(f"unknown equipment kind {e.get('kind')!r}; choose one of: {', '.join(METHODS)}",
                             field="kind")
        params = dict(e.get("params") or {})
        params.update({k: v for k, v in e.items() if k not in ("kind", "params")})
        if kind in out:  # two entries of one kind: add rates, keep the rest of the first
            for key in ("rate_mm_h", "water_supply_m3", "fuel_l_per_h_per_ha", "fuel_stock_l"):
                if key in params and key in out[kind]:
                    out[kind][key] = float(out[kind][key]) + float(params[key])
            continue
        out[kind] = params
    return out


def _num(params: Mapping, key: str, lo: float = 0.0, hi: float = 1e9) -> float | None:
    v = params.get(key)
    if v is None:
        return None
    try:
        f = float(v)
    except (TypeError, ValueError):
        raise InputError(f"equipment {key} must be a number", field=key) from None
    if not (math.isfinite(f) and lo <= f <= hi):
        raise InputError(f"equipment {key} must be between {lo:g} and {hi:g}", field=key)
    return f


def cold_fan_weight(air_temp_c) -> np.ndarray:
    """Share of the night's fall reached at each step, the weight of the cold-case shift.

    0 at each row's first valid value (the latest observation), rising with the
    fall already made (``(first - air) / (first - minimum)``) to 1 at the
    minimum, and 1 from the minimum on.  A curve that does not fall gets 1
    throughout (the whole shift).  The 10th-percentile curve of the forecast
    (the lower edge of the chart's band) is ``central + (p10 - p50) x weight``.

    Parameters
    ----------
    air_temp_c : ndarray, shape (n, m)
        Central air-temperature curves [°C], NaN outside each block's night.

    Returns
    -------
    weight : ndarray, shape (n, m)
        In [0, 1]; NaN where the curve is NaN.
    """
    air = np.atleast_2d(np.asarray(air_temp_c, float))
    valid = np.isfinite(air)
    n, m = air.shape
    rows = np.arange(n)
    first = air[rows, np.argmax(valid, axis=1)]
    imin = np.nanargmin(np.where(valid, air, np.inf), axis=1)
    low = air[rows, imin]
    fall = first - low
    with np.errstate(invalid="ignore", divide="ignore"):
        share = np.where(fall[:, None] > 1e-9, (first[:, None] - air) / np.where(fall > 1e-9, fall, 1.0)[:, None],
                         1.0)
    share = np.clip(share, 0.0, 1.0)
    share = np.where(np.arange(m)[None, :] >= imin[:, None], 1.0, share)
    return np.where(valid, share, np.nan)


def _scenario(curves: NightCurves, shift: np.ndarray, rows: np.ndarray, weight: np.ndarray | None = None):
    """Air and wet-bulb curves shifted by ``shift`` (n,), times ``weight`` (n, m) when given.

    The wet bulb (the costly part) is computed only for ``rows`` (bool, n) -
    the blocks with sprinklers; elsewhere it is NaN and unused.
    """
    air = curves.air_temp_c + (shift[:, None] if weight is None else shift[:, None] * weight)
    td = np.minimum(curves.dew_point_c, air)
    td = np.where(np.isfinite(td), td, air - 3.0)  # missing dew point: assume a 3 K depression
    wb = np.full_like(air, np.nan)
    if rows.any():
        a, d = air[rows], td[rows]
        ok = np.isfinite(a)
        w = np.asarray(moisture.wet_bulb_c(np.where(ok, a, 0.0), np.where(ok, d, 0.0),
                                           curves.pressure_kpa[rows][:, None]))
        wb[rows] = np.where(ok, w, np.nan)
    return air, td, wb


def _window_stat(values, valid, start_idx, stop_idx, fn):
    m = values.shape[1]
    idx = np.arange(m)[None, :]
    inwin = valid & (idx >= start_idx[:, None]) & (idx <= stop_idx[:, None])
    inwin = np.where(inwin.any(axis=1)[:, None], inwin, valid)
    v = np.where(inwin & np.isfinite(values), values, np.nan)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN rows give NaN
        return fn(v, axis=1)


def plan_night(blocks: Sequence[BlockSetup], curves: NightCurves, forecast: MinTempForecast) -> list[BlockRisk]:
    """Damage risk and protection plans for every block of one night.

    Parameters
    ----------
    blocks : sequence of BlockSetup, length n
    curves : NightCurves
        Curves for the same n blocks, in the same order.
    forecast : MinTempForecast
        Minimum distribution for the same n blocks.

    Returns
    -------
    list of BlockRisk
        In the order of ``blocks``.
    """
    n = len(blocks)
    if curves.n_blocks != n or forecast.p50_c.shape != (n,):
        raise ValueError("blocks, curves and forecast must describe the same number of blocks")
    s = [b.settings for b in blocks]
    t10 = np.array([b.t10_c for b in blocks], float)
    t90 = np.array([b.t90_c for b in blocks], float)
    if np.any(~(t10 > t90)):
        raise InputError("T10 must be warmer than T90 for every block", field="t90_c")
    area = np.array([b.area_ha for b in blocks], float)
    margin = np.array([x.start_margin_c for x in s])
    s_margin = np.array([x.sprinkler_margin_c for x in s])
    lvl_th = {f.name: np.array([getattr(x, f.name) for x in s]) for f in fields(FrostSettings)
              if f.name.startswith("level_")}
    dmg = damage(curves, forecast, t10, t90,
                 duration_shift_c_per_doubling=np.array([x.duration_shift_c_per_doubling for x in s]),
                 duration_max_doublings=np.array([x.duration_max_doublings for x in s]),
                 near_min_band_c=np.array([x.near_min_band_c for x in s]), level_thresholds=lvl_th)

    times_ns = _ns(curves.times_utc)
    valid = np.isfinite(curves.air_temp_c)
    crit = t10
    # Scenarios: the curve moved so its minimum is the median (central) or the 10th percentile (cold).
    kinds_per_block = [_equipment_by_kind(b.equipment) for b in blocks]
    has_spr = np.array([bool({"overtree_sprinkler", "undertree_sprinkler"} & k.keys()) for k in kinds_per_block])
    air_c, _, wb_c = _scenario(curves, forecast.p50_c - dmg.curve_min_c, has_spr)
    air_k, _, wb_k = _scenario(curves, forecast.p10_c - dmg.curve_min_c, has_spr,
                               weight=cold_fan_weight(curves.air_temp_c))
    hours_t10 = _hours_at_or_below(times_ns, air_c, crit)
    p_min_t10 = forecast.cdf_at(t10)
    p_min_t90 = forecast.cdf_at(t90)
    crit_time, _, _ = _crossing_down(times_ns, air_c, crit, valid)
    hours_t10_k = _hours_at_or_below(times_ns, air_k, crit)
    imin = np.nanargmin(np.where(valid, curves.air_temp_c, np.inf), axis=1)

    no_sunrise = np.isnat(curves.sunrise_utc) & ~curves.polar_day
    sunrise_ns = np.where(curves.polar_day | np.isnat(curves.sunrise_utc), -np.inf,
                          curves.sunrise_utc.astype("datetime64[ns]").astype(np.int64).astype(float))
    last_valid = valid.shape[1] - 1 - np.argmax(valid[:, ::-1], axis=1)
    end_ns = times_ns[last_valid].astype(float)

    # ---- start/stop for the two rule families, central and cold
    def rule_times(air, wb, use_wb):
        thr_start = crit + (s_margin if use_wb else margin)
        series = wb if use_wb else air
        t_start, found, i_start = _crossing_down(times_ns, series, thr_start, valid)
        if use_wb:
            g = np.minimum(wb - crit[:, None], air - 0.0)
        else:
            g = air - thr_start[:, None]
        ok = valid & (g > 0)
        after = np.maximum(imin, np.where(found, i_start, imin))
        t_stop, stop_found = _stop_time(times_ns, ok, g, valid, after, sunrise_ns)
        t_stop = np.where(stop_found, t_stop, end_ns)
        return t_start, found, i_start, t_stop, stop_found

    fams = {}
    for use_wb in (False, True):
        c = rule_times(air_c, wb_c, use_wb)
        k = rule_times(air_k, wb_k, use_wb)
        fams[use_wb] = (c, k)

    # wind over the central run window (air rule)
    (cs, cf, ci, ct, _), _ = fams[False]
    stop_idx_air = np.searchsorted(times_ns, np.nan_to_num(ct, nan=float(times_ns[-1])))
    wind_mean = _window_stat(curves.wind_speed_ms, valid, np.where(cf, ci, imin), stop_idx_air, np.nanmean)
    (_, wf, wi, wt, _), _ = fams[True]
    stop_idx_wb = np.searchsorted(times_ns, np.nan_to_num(wt, nan=float(times_ns[-1])))
    wind_max_spr = _window_stat(curves.wind_speed_ms, valid, np.where(wf, wi, imin), stop_idx_wb, np.nanmax)
    # The rate is judged on the central forecast; the cold case (p10) is reported beside it.  Judging on the
    # cold case alone would rule sprinklers out on most uncertain nights, when they are the best tool.
    req_rate = required_sprinkler_rate_mm_h(forecast.p50_c, np.nan_to_num(wind_max_spr, nan=0.0))
    req_rate_cold = required_sprinkler_rate_mm_h(forecast.p10_c, np.nan_to_num(wind_max_spr, nan=0.0))

    # dew point at the (central, else cold) sprinkler start for the thermometer reading
    (wcs, wcf, wci, _, _), (wks, wkf, wki, _, _) = fams[True]
    i_dew = np.where(wcf, wci, np.where(wkf, wki, imin))
    dew_at = curves.dew_point_c[np.arange(n), i_dew]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        dew_at = np.where(np.isfinite(dew_at), dew_at, np.nanmean(curves.dew_point_c, axis=1))
    spr_start_air = start_air_temp_c(crit, np.nan_to_num(dew_at, nan=-50.0), s_margin, curves.pressure_kpa)

    # evening wind for the inversion estimate: first valid hour
    first_valid = np.argmax(valid, axis=1)
    evening_wind = curves.wind_speed_ms[np.arange(n), first_valid]

    # Per block from here: the arrays as Python lists (indexing those is many times cheaper).
    fams = {k: tuple(tuple(x.tolist() for x in rule) for rule in v) for k, v in fams.items()}
    col = _Columns(t10=t10, t90=t90, crit=crit, margin=margin, s_margin=s_margin, area=area,
                   wind_mean=wind_mean, wind_max=wind_max_spr, req_rate=req_rate, req_rate_cold=req_rate_cold,
                   spr_start_air=spr_start_air, evening_wind=evening_wind, no_sunrise=no_sunrise,
                   first_valid=first_valid, p10=forecast.p10_c, p50=forecast.p50_c, p90=forecast.p90_c,
                   level=dmg.level_index, time_of_min=dmg.time_of_min_ns, sustained=dmg.sustained_offset_c,
                   shift=dmg.duration_shift_c, near_min=dmg.near_min_hours, hours_t10=hours_t10,
                   hours_t10_k=hours_t10_k, kill=dmg.expected_kill, kill_10=dmg.p_kill_10, kill_90=dmg.p_kill_90,
                   p_t10=p_min_t10, p_t90=p_min_t90, crit_time=crit_time)
    out: list[BlockRisk] = []
    for i, b in enumerate(blocks):
        st = s[i]
        kinds = kinds_per_block[i]
        level_i = col.level[i]
        needs = level_i >= st.protect_level_index
        plans: list[MethodPlan] = []
        for method in METHODS:
            if method not in kinds:
                continue
            plans.append(_method_plan(method, kinds[method], i, b, st, fams, col))
        plans = _recommend(plans, needs, col.p50[i], col.crit[i], st)
        if not plans:
            note = ("No protection equipment recorded for this block."
                    + (f" Unprotected, expected bud loss tonight {100 * col.kill[i]:.0f} %, "
                       f"with a {100 * col.kill_10[i]:.0f} % chance of losing 10 % or more." if needs else ""))
            plans = [MethodPlan("none", usable=False, recommended=needs, notes=(note,),
                                caution_keys=cautions.cautions_for_method("none"))]
        out.append(BlockRisk(
            block=b.name, crop=b.crop, stage=b.stage, t10_c=col.t10[i], t90_c=col.t90[i],
            critical_c=col.crit[i], min_p10_c=col.p10[i], min_p50_c=col.p50[i],
            min_p90_c=col.p90[i], time_of_min_utc=_to_dt(col.time_of_min[i]),
            sustained_min_offset_c=col.sustained[i],
            duration_shift_c=col.shift[i], near_min_hours=col.near_min[i],
            hours_below_t10=col.hours_t10[i], hours_below_t10_cold=col.hours_t10_k[i],
            expected_kill=col.kill[i], p_kill_10=col.kill_10[i],
            p_kill_90=col.kill_90[i], level=LEVELS[level_i],
            needs_protection=bool(needs), plans=tuple(plans), p_min_below_t10=col.p_t10[i],
            p_min_below_t90=col.p_t90[i], critical_time_utc=_to_dt(col.crit_time[i])))
    return out


class _Columns:
    """Per-block figures of :func:`plan_night` as Python lists: ``float`` but for the level
    (``int``), the first valid hour (``int``), ``no_sunrise`` (``bool``) and the two instants
    (nanoseconds, for :func:`_to_dt`)."""

    _KEEP = ("level", "first_valid", "no_sunrise", "time_of_min", "crit_time")

    def __init__(self, **arrays):
        for name, values in arrays.items():
            values = np.asarray(values) if name in self._KEEP else np.asarray(values, dtype=float)
            setattr(self, name, values.tolist())


def _method_plan(method, params, i, b, st, fams, col: _Columns) -> MethodPlan:
    """One method's plan for block ``i`` of :func:`plan_night` (``fams``: its rule times as lists)."""
    crit, margin, s_margin, area = col.crit[i], col.margin[i], col.s_margin[i], col.area[i]
    wind_mean, wind_max = col.wind_mean[i], col.wind_max[i]
    req_rate, req_rate_cold = col.req_rate[i], col.req_rate_cold[i]
    spr_start_air, evening_wind, no_sunrise, first_valid = (col.spr_start_air[i], col.evening_wind[i],
                                                            col.no_sunrise[i], col.first_valid[i])
    p50_c, p10_c = col.p50[i], col.p10[i]
    use_wb = method in ("overtree_sprinkler", "undertree_sprinkler")
    (cs, cf, ci, ct, csf), (ks, kf, _, kt, ksf) = fams[use_wb]
    rnd = st.round_minutes
    start = _round_ns(float(cs[i]), rnd, up=False) if cf[i] else np.nan
    ready = _round_ns(float(ks[i]), rnd, up=False) if kf[i] else np.nan
    stop = _round_ns(float(ct[i]), rnd, up=True) if cf[i] else np.nan
    stop_k = _round_ns(float(kt[i]), rnd, up=True) if kf[i] else np.nan
    run_h = (stop - start) / 3.6e12 if cf[i] else None
    run_k = (stop_k - ready) / 3.6e12 if kf[i] else None
    stop_open = bool(cf[i] and not csf[i])
    notes: list[str] = []
    keys = list(cautions.cautions_for_method(method))
    usable = True
    if not kf[i]:
        notes.append("Start condition not reached even in the cold case; stand by only.")
    elif not cf[i]:
        notes.append("Start condition reached only if the night turns out colder than the median forecast.")
    if cf[i] and ci[i] == first_valid:
        notes.append("Already at the start temperature when the forecast begins: start now.")
    if stop_open:
        notes.append("Stop condition not reached before the forecast ends; keep running until it is.")
    if no_sunrise:
        notes.append("The sun does not rise in this window: stop only once temperatures have recovered.")
    kw: dict = {}

    if use_wb:
        rate = _num(params, "rate_mm_h", 0.0, 100.0)
        supply = _num(params, "water_supply_m3")
        kw.update(start_wet_bulb_c=float(crit + s_margin), start_air_temp_c=float(spr_start_air), rate_mm_h=rate)
        if rate is not None:
            vol = rate * area * 10.0 * run_h if run_h is not None else None  # 1 mm on 1 ha = 10 m³
            vol_k = rate * area * 10.0 * run_k if run_k is not None else None
            kw.update(water_m3=vol, water_m3_cold=vol_k,
                      water_l_per_ha=rate * 1e4 * run_h if run_h is not None else None)
            hours_needed = run_k if run_k is not None else run_h
            if supply is not None and hours_needed is not None and rate * area > 0:
                lasts_h = supply / (rate * area * 10.0)
                if lasts_h < hours_needed:
                    notes.append(f"Water supply ({supply:.0f} m³) lasts about {lasts_h:.1f} h at "
                                 f"{rate:g} mm/h, less than the {hours_needed:.1f} h run.")
                    if method == "overtree_sprinkler":
                        usable = False
        else:
            notes.append("Application rate not recorded; water volume unknown.")
        if method == "overtree_sprinkler":
            kw["required_rate_mm_h"] = None if not np.isfinite(req_rate) else float(req_rate)
            if not np.isfinite(req_rate):
                usable = False
                notes.append("Forecast wind or minimum is beyond the published sprinkler-rate guidance; "
                             "over-tree sprinkling is not advised tonight.")
                keys.insert(0, "sprinkler_rate_short")
            elif rate is None:
                usable = False
                notes.append(f"Needed rate about {req_rate:.1f} mm/h; {RATE_TABLE_ORIGIN}. Check the "
                             "system can deliver it.")
            elif rate + 1e-9 < req_rate:
                usable = False
                notes.append(f"System {rate:g} mm/h, needs {req_rate:.1f} mm/h: {_share(rate, req_rate)} of the "
                             f"need for wind up to {wind_max:.1f} m/s and a minimum near {_c(p50_c)} °C; "
                             f"{RATE_TABLE_ORIGIN}. Too little water can freeze buds harder than none.")
                keys.insert(0, "sprinkler_rate_short")
            else:
                notes.append(f"System {rate:g} mm/h, needs {req_rate:.1f} mm/h: {_share(rate, req_rate)} of the "
                             f"need for the forecast minimum near {_c(p50_c)} °C; {RATE_TABLE_ORIGIN}.")
                cold_need = float(req_rate_cold)
                if not np.isfinite(cold_need) or rate + 1e-9 < cold_need:
                    need_txt = "more than the guidance covers" if not np.isfinite(cold_need) \
                        else f"about {cold_need:.1f} mm/h (the system gives {_share(rate, cold_need)} of that)"
                    notes.append(f"If the night runs as cold as {_c(p10_c)} °C, {need_txt} would be "
                                 "needed: watch the block thermometers and the ice (clear, dripping ice is "
                                 "working; milky, dry ice is not).")
    else:
        kw["start_air_temp_c"] = float(crit + margin)

    if method == "wind_machine":
        measured = b.upper_inversion_c is not None and np.isfinite(b.upper_inversion_c)
        if measured:
            inv, est = float(b.upper_inversion_c), False
        else:
            cloud = np.nan if b.cloud_cover_pct is None else b.cloud_cover_pct
            inv = float(estimate_inversion_c(cloud, evening_wind if np.isfinite(evening_wind) else np.nan))
            est = True
            keys.insert(0, "inversion_estimated")
        kw.update(inversion_c=None if not np.isfinite(inv) else inv, inversion_estimated=est)
        label = "estimated" if est else "measured"
        if not np.isfinite(inv):
            usable = False
            notes.append("Inversion unknown (no upper sensor, no cloud report): measure it before relying "
                         "on wind machines.")
        elif inv < st.wind_machine_min_inversion_c:
            usable = False
            notes.append(f"Inversion {_c(inv)} °C ({label}) is weaker than the "
                         f"{st.wind_machine_min_inversion_c:g} °C a wind machine needs.")
        else:
            notes.append(f"Inversion {_c(inv)} °C ({label}).")
        if np.isfinite(wind_mean) and wind_mean > st.wind_machine_max_wind_ms:
            usable = False
            notes.append(f"Wind {wind_mean:.1f} m/s is above the {st.wind_machine_max_wind_ms:g} m/s "
                         "at which wind machines help.")

    if method == "heater":
        per_ha = _num(params, "fuel_l_per_h_per_ha")
        if per_ha is None:
            n_ha = _num(params, "heaters_per_ha")
            per_h = _num(params, "fuel_l_per_h_per_heater")
            per_ha = n_ha * per_h if n_ha is not None and per_h is not None else None
        stock = _num(params, "fuel_stock_l")
        if per_ha is not None:
            fuel = per_ha * area * run_h if run_h is not None else None
            fuel_k = per_ha * area * run_k if run_k is not None else None
            kw.update(fuel_l=fuel, fuel_l_cold=fuel_k)
            need = fuel_k if fuel_k is not None else fuel
            if stock is not None and need is not None and need > stock:
                notes.append(f"Fuel on hand ({stock:.0f} L) is less than the {need:.0f} L the run needs.")
        else:
            notes.append("Fuel rate not recorded; fuel use unknown.")

    kw = {k: (None if v is None else (v if isinstance(v, bool) else float(v))) for k, v in kw.items()}
    return MethodPlan(method=method, usable=usable, start_utc=_to_dt(start), ready_by_utc=_to_dt(ready),
                      stop_utc=_to_dt(stop), stop_open=stop_open,
                      run_hours=None if run_h is None else float(run_h),
                      run_hours_cold=None if run_k is None else float(run_k),
                      notes=tuple(notes), caution_keys=tuple(dict.fromkeys(keys)), **kw)


def _recommend(plans: list[MethodPlan], needs: bool, min_p50_c: float, crit_c: float,
               st: FrostSettings) -> list[MethodPlan]:
    """Mark the plans the run sheet shows.

    Order of preference: over-tree sprinklers if usable (they protect the most);
    else a worthwhile wind machine, joined by heaters when the expected gain
    (``wind_machine_gain_fraction`` x inversion) would not lift the median
    minimum to the critical temperature; else heaters; else under-tree
    sprinklers.
    """
    if not needs or not plans:
        return plans
    by = {p.method: p for p in plans}
    chosen: list[str] = []
    if by.get("overtree_sprinkler") and by["overtree_sprinkler"].usable:
        chosen = ["overtree_sprinkler"]
    elif by.get("wind_machine") and by["wind_machine"].usable:
        chosen = ["wind_machine"]
        gain = st.wind_machine_gain_fraction * (by["wind_machine"].inversion_c or 0.0)
        if min_p50_c + gain < crit_c and by.get("heater") and by["heater"].usable:
            chosen.append("heater")
    elif by.get("heater") and by["heater"].usable:
        chosen = ["heater"]
    elif by.get("undertree_sprinkler") and by["undertree_sprinkler"].usable:
        chosen = ["undertree_sprinkler"]
    if not chosen:
        # Nothing usable: say so on the sheet with a "none" line, keep the per-method reasons.
        reasons = "; ".join(f"{_METHOD_LABELS.get(p.method, p.method)}: {p.notes[-1] if p.notes else 'not usable'}"
                            for p in plans)
        none = MethodPlan("none", usable=False, recommended=True,
                          notes=("No usable protection tonight. " + reasons,),
                          caution_keys=cautions.cautions_for_method("none"))
        return plans + [none]
    return [_replace(p, recommended=p.method in chosen) for p in plans]


#: Method names in the plan's own notes (the notices have their own, in advisory.notices.words).
_METHOD_LABELS = {"wind_machine": "Wind machines", "overtree_sprinkler": "Over-tree sprinklers",
                  "undertree_sprinkler": "Under-tree sprinklers", "heater": "Heaters"}


def _replace(p: MethodPlan, **kw) -> MethodPlan:
    from dataclasses import replace
    return replace(p, **kw)


# --------------------------------------------------------------------------------------------------
# Bridges to the pipeline's Assessment contract (advisory.assessment)
# --------------------------------------------------------------------------------------------------

#: MethodPlan attribute -> ProtectionStep.quantities key.
_QUANTITY_KEYS = {
    "run_hours": "hours", "run_hours_cold": "hours_cold", "start_air_temp_c": "start_air_temp_c",
    "start_wet_bulb_c": "start_wet_bulb_c", "rate_mm_h": "rate_available_mm_h",
    "required_rate_mm_h": "rate_needed_mm_h", "water_m3": "water_m3", "water_m3_cold": "water_m3_cold",
    "water_l_per_ha": "water_l_per_ha", "fuel_l": "fuel_l", "fuel_l_cold": "fuel_l_cold",
    "inversion_c": "inversion_c",
}


def _share(have: float, need: float) -> str:
    """How much of a need a system covers, e.g. "93 %" (floored, so "100 %" means the need is met)."""
    return f"{math.floor(100.0 * have / need + 1e-9):.0f} %" if need > 0 else "all"


def _c(value_c: float) -> str:
    """A temperature to one decimal, for the texts of a plan (never "-0.0")."""
    s = f"{value_c:.1f}"
    return "0.0" if s == "-0.0" else s


def start_rule_text(risk: BlockRisk, plan: MethodPlan) -> str:
    """Plain-language start rule in °C, e.g. "when the wet bulb falls to -1.2 °C"."""
    if plan.method == "none":
        return ""
    if plan.start_wet_bulb_c is not None:
        return (f"when the wet bulb falls to {_c(plan.start_wet_bulb_c)} °C "
                f"(air about {_c(plan.start_air_temp_c)} °C at the forecast dew point)")
    return f"when the air falls to {_c(plan.start_air_temp_c)} °C"


def stop_rule_text(risk: BlockRisk, plan: MethodPlan) -> str:
    """Plain-language stop rule in °C."""
    if plan.method == "none":
        return ""
    if plan.method == "overtree_sprinkler":
        return (f"after sunrise, once the wet bulb is above {_c(risk.critical_c)} °C and the ice is "
                "melting; never earlier")
    return f"after sunrise, once the air is back above {_c(plan.start_air_temp_c)} °C"


def protection_steps(risk: BlockRisk) -> list:
    """The block's plans as :class:`advisory.assessment.ProtectionStep` objects.

    ``advised`` is the plan's ``recommended`` flag.  Numbers go to
    ``quantities`` (keys in :data:`_QUANTITY_KEYS`); ``ready_by_utc`` and
    ``stop_open`` are set when the ProtectionStep class has those fields, else
    kept as quantities ``ready_by_unix_s`` and ``stop_open_flag``.
    """
    from advisory.assessment import ProtectionStep

    have = _step_fields(ProtectionStep)
    out = []
    for p in risk.plans:
        q = {key: float(getattr(p, attr)) for attr, key in _QUANTITY_KEYS.items()
             if getattr(p, attr) is not None}
        kw = {}
        if "ready_by_utc" in have:
            kw["ready_by_utc"] = p.ready_by_utc
        elif p.ready_by_utc is not None:  # until ProtectionStep has the field: epoch seconds
            q["ready_by_unix_s"] = p.ready_by_utc.timestamp()
        if "stop_open" in have:
            kw["stop_open"] = p.stop_open
        elif p.stop_open:
            q["stop_open_flag"] = 1.0
        if "caution_keys" in have:
            kw["caution_keys"] = list(p.caution_keys)
        out.append(ProtectionStep(method=p.method, advised=p.recommended, start_utc=p.start_utc,
                                  stop_utc=p.stop_utc, start_rule=start_rule_text(risk, p),
                                  stop_rule=stop_rule_text(risk, p), quantities=q, notes=list(p.notes),
                                  estimated=p.inversion_estimated, **kw))
    return out


@lru_cache(maxsize=4)
def _step_fields(cls) -> frozenset[str]:
    return frozenset(f.name for f in fields(cls))


def assessment_fields(risk: BlockRisk) -> dict:
    """Values for the risk fields of :class:`advisory.assessment.Assessment`.

    Returns a dict with keys p10_c, p50_c, p90_c, t10_c, t90_c, level, level_rank,
    p_below_t10, p_below_t90, expected_kill_pct, p_kill_ge_10pct,
    critical_time_utc, hours_below_t10, plan (ProtectionStep list), cautions
    (caution keys of the advised plans) and details (the remaining figures).
    """
    keys: list[str] = []
    for p in risk.recommended:
        keys.extend(p.caution_keys)
    return {
        "p10_c": risk.min_p10_c, "p50_c": risk.min_p50_c, "p90_c": risk.min_p90_c,
        "t10_c": risk.t10_c, "t90_c": risk.t90_c, "level": risk.level, "level_rank": risk.level_index,
        "p_below_t10": risk.p_min_below_t10, "p_below_t90": risk.p_min_below_t90,
        "expected_kill_pct": 100.0 * risk.expected_kill, "p_kill_ge_10pct": risk.p_kill_10,
        "critical_time_utc": risk.critical_time_utc, "hours_below_t10": risk.hours_below_t10,
        "plan": protection_steps(risk), "cautions": list(dict.fromkeys(keys)),
        "details": {
            "p_kill_ge_90pct": risk.p_kill_90, "needs_protection": risk.needs_protection,
            "critical_c": risk.critical_c, "hours_below_t10_cold": risk.hours_below_t10_cold,
            "sustained_min_offset_c": risk.sustained_min_offset_c,
            "duration_shift_c": risk.duration_shift_c, "near_min_hours": risk.near_min_hours,
            "time_of_min_utc": risk.time_of_min_utc.isoformat() if risk.time_of_min_utc else None,
        },
    }


def _ready_by(step) -> datetime | None:
    t = getattr(step, "ready_by_utc", None)
    if t is None and (step.quantities or {}).get("ready_by_unix_s") is not None:
        t = datetime.fromtimestamp(float(step.quantities["ready_by_unix_s"]), tz=UTC)
    return t


def risk_from_assessment(a) -> BlockRisk:
    """Rebuild a :class:`BlockRisk` from a stored frost Assessment (for reprinting run sheets).

    Figures the Assessment does not keep are NaN.
    """
    nan = float("nan")
    d = a.details or {}
    plans = []
    for st in a.plan:
        q = st.quantities or {}
        kw = {attr: q.get(key) for attr, key in _QUANTITY_KEYS.items()}
        keys = getattr(st, "caution_keys", None)
        if not keys:
            keys = list(cautions.cautions_for_method(st.method))
            if st.method == "overtree_sprinkler" and not st.advised and (
                    q.get("rate_needed_mm_h") is None
                    or (q.get("rate_available_mm_h") or 0.0) < q.get("rate_needed_mm_h", 0.0)):
                keys.insert(0, "sprinkler_rate_short")
            if st.method == "wind_machine" and st.estimated:
                keys.insert(0, "inversion_estimated")
        plans.append(MethodPlan(
            method=st.method, usable=bool(st.advised), recommended=bool(st.advised),
            start_utc=st.start_utc, ready_by_utc=_ready_by(st), stop_utc=st.stop_utc,
            stop_open=bool(getattr(st, "stop_open", False) or q.get("stop_open_flag")),
            inversion_estimated=bool(st.estimated),
            notes=tuple(st.notes), caution_keys=tuple(dict.fromkeys(keys)), **kw))
    t_min = d.get("time_of_min_utc")
    level = a.level if a.level in LEVELS else LEVELS[0]
    needs = d.get("needs_protection")
    if needs is None:
        needs = any(p.recommended for p in plans)
    return BlockRisk(
        block=a.block, crop=a.crop, stage=a.stage, t10_c=a.t10_c if a.t10_c is not None else nan,
        t90_c=a.t90_c if a.t90_c is not None else nan,
        critical_c=d.get("critical_c", a.t10_c if a.t10_c is not None else nan),
        min_p10_c=a.p10_c if a.p10_c is not None else nan, min_p50_c=a.p50_c if a.p50_c is not None else nan,
        min_p90_c=a.p90_c if a.p90_c is not None else nan,
        time_of_min_utc=datetime.fromisoformat(t_min) if isinstance(t_min, str) else t_min,
        sustained_min_offset_c=d.get("sustained_min_offset_c", nan), duration_shift_c=d.get("duration_shift_c", nan),
        near_min_hours=d.get("near_min_hours", nan),
        hours_below_t10=a.hours_below_t10 if a.hours_below_t10 is not None else nan,
        hours_below_t10_cold=d.get("hours_below_t10_cold", nan),
        expected_kill=(a.expected_kill_pct / 100.0) if a.expected_kill_pct is not None else nan,
        p_kill_10=a.p_kill_ge_10pct if a.p_kill_ge_10pct is not None else nan,
        p_kill_90=d.get("p_kill_ge_90pct", nan), level=level, needs_protection=bool(needs),
        plans=tuple(plans), p_min_below_t10=a.p_below_t10 if a.p_below_t10 is not None else nan,
        p_min_below_t90=a.p_below_t90 if a.p_below_t90 is not None else nan,
        critical_time_utc=a.critical_time_utc)
