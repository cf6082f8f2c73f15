"""What a frost plan takes and gives: the settings (:class:`FrostSettings`), the night's curves
(:class:`NightCurves`), each block's setup (:class:`BlockSetup`), and the results
(:class:`MethodPlan`, :class:`BlockRisk`).  The data shapes are described in
:mod:`advisory.risk.frost`.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, fields
from datetime import datetime

import numpy as np
import pandas as pd

from advisory.errors import InputError
from advisory.physics import moisture
from advisory.risk.levels import LEVELS

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
