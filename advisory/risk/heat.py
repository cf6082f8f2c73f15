"""Daytime heat risk for fruit and for field crews, from an hourly temperature curve.

Pure and vectorised over blocks: arrays of shape ``(B, H)`` (blocks x hours)
in, arrays out.  No database, no network.

Risk levels (this tool's own names, used for crops and crews alike), in rising
order: ``easy``, ``hot``, ``very_hot``, ``scorching``.

Crop heat
---------
Sunburn of fruit is driven by the fruit-surface temperature (FST), which in
full sun runs well above the air.  For apple, Schrader et al. [1]_ [2]_ found
sunburn browning begins at FST of about 46-49 °C and necrosis at about
52 °C (10 min).  Growers translate that into air temperatures: full sun can
bring browning-level FST at air temperatures near 31-32 °C (this translation
is common practice, not a result of the papers).  The thresholds below are air
temperatures in full sun; each carries a note of where it comes from.  Grapes
and sweet cherries have no equally crisp published threshold; their values are
common practice and marked so.

Evaporative (over-tree sprinkler or mister) cooling runs from when the air
reaches the crop's start temperature until it falls below the stop
temperature (both common practice); the water for the run is
``rate [mm/h] x area [ha] x hours x 10`` m³.  It cools poorly when the air is
humid (small wet-bulb depression).

Crew heat
---------
Hourly heat index (:func:`advisory.physics.heat.heat_index_c`) and WBGT
estimate (:func:`advisory.physics.heat.wbgt_estimate_c`).  Work-rest guidance
for heavy work follows the screening table of the ACGIH TLV for heat stress as
reproduced by OSHA [3]_: its TLV column for acclimatised workers and its action
limit for workers who are not acclimatised (about 2-3 °C lower), by share of
each hour worked (75-100 %, 50-75 %, 25-50 %, 0-25 %).  The table gives no
value for continuous (75-100 %) heavy work, nor for very heavy work above
25-50 %; this tool never offers what the table does not give.  The values in
:data:`WBGT_TLV_C` and :data:`WBGT_ACTION_LIMIT_C` are from memory (unverified
against the printed table); NIOSH [4]_ gives the same order of limits by
metabolic rate.  Heat-index band edges (91 / 103 / 115 °F) are from memory,
unverified.  Local workplace-safety rules come first wherever they are
stricter; this tool does not replace a workplace heat plan.

References
----------
.. [1] Schrader, L. E., Zhang, J. & Duplaga, W. K. (2001) Two types of sunburn
   in apple caused by high fruit surface (peel) temperature. Plant Health
   Progress, doi:10.1094/PHP-2001-1004-01-RS.
.. [2] Schrader, L. E., Zhang, J. & Sun, J. (2003) Environmental stresses that
   cause sunburn of apple. Acta Horticulturae 618, 397-405.
.. [3] OSHA Technical Manual, Section III, Chapter 4: Heat Stress (2017),
   "Screening criteria for ACGIH TLV and action limit for heat stress exposure".
.. [4] NIOSH (2016) Criteria for a recommended standard: occupational exposure
   to heat and hot environments. DHHS (NIOSH) Publication 2016-106.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from advisory.forecast.daytime import to_hours
from advisory.physics import heat as heat_physics
from advisory.physics.moisture import STANDARD_PRESSURE_KPA, rel_humidity_pct_from_dew_point, wet_bulb_c

__all__ = [
    "CAUTIONS",
    "WBGT_ACTION_LIMIT_C",
    "WBGT_TLV_C",
    "CREW_WORK_REST_HEAVY",
    "CROP_HEAT",
    "CropHeatResult",
    "CropHeatThresholds",
    "CrewHeatResult",
    "HEAT_INDEX_BANDS_C",
    "LEVELS",
    "crew_heat",
    "crop_heat",
    "hours_to_utc",
    "safe_windows",
]

#: Risk level names, lowest first (this tool's own names).
LEVELS = ("easy", "hot", "very_hot", "scorching")


@dataclass(frozen=True)
class CropHeatThresholds:
    """Air temperatures (full sun) at which a crop's heat risk rises [°C]."""

    crop: str
    elevated_c: float
    high_c: float
    acute_c: float
    cooling_start_c: float
    cooling_stop_c: float
    what: tuple[str, str, str]
    source: str


CROP_HEAT: dict[str, CropHeatThresholds] = {
    "apple": CropHeatThresholds(
        "apple", 31.0, 35.0, 38.0, 30.0, 29.0,
        ("sunburn browning possible on exposed fruit",
         "sunburn browning likely; necrosis possible on exposed fruit",
         "sunburn necrosis likely on exposed fruit"),
        "Schrader et al. 2001/2003: browning at fruit-surface 46-49 °C, necrosis ~52 °C; "
        "air equivalents 31 / 35 / 38 °C and cooling start 30 °C, stop 29 °C are common practice"),
    "grape": CropHeatThresholds(
        "grape", 35.0, 38.0, 41.0, 35.0, 33.0,
        ("heat stress: photosynthesis slows, berry sunburn possible on exposed clusters",
         "berry sunburn and shrivel likely on exposed clusters",
         "severe berry scald and leaf damage likely"),
        "common practice (from memory, unverified)"),
    "cherry": CropHeatThresholds(
        "cherry", 32.0, 35.0, 38.0, 30.0, 28.0,
        ("heat stress: fruit softening; risk of doubled fruit next season",
         "fruit sunburn and soft fruit likely; doubling risk next season",
         "severe fruit damage likely"),
        "common practice (from memory, unverified)"),
}
# Crops not in the table: treated like apple but flagged as a generic threshold.
_GENERIC = CropHeatThresholds("other", 32.0, 35.0, 38.0, 30.0, 29.0,
                              ("heat stress possible", "heat damage likely", "severe heat damage likely"),
                              "generic fallback (common practice, from memory)")
_CROP_ALIASES = {"apples": "apple", "pome": "apple", "pear": "apple", "pears": "apple",
                 "grapes": "grape", "vine": "grape", "wine grape": "grape", "table grape": "grape",
                 "sweet cherry": "cherry", "cherries": "cherry", "tart cherry": "cherry",
                 "wine_grape": "grape"}

#: Work-rest regimens of the screening table: share of each hour worked, and the words for it.
REGIMENS = ("75-100 %", "50-75 %", "25-50 %", "0-25 %")
REGIMEN_WORDS = {"75-100 %": "continuous work", "50-75 %": "up to 45 min work an hour",
                 "25-50 %": "up to 30 min work an hour", "0-25 %": "up to 15 min work an hour"}
#: Where the work-rest values come from (named beside them in every note).
WORK_REST_SOURCE = ("ACGIH TLV for heat stress, screening table as reproduced in the OSHA Technical Manual "
                    "III:4 (TLV column: acclimatised; action limit: not acclimatised); values from memory")
#: ACGIH TLV screening criteria, acclimatised workers: WBGT [°C] by regimen and work load (None: the
#: table gives no value).  From memory, unverified.
WBGT_TLV_C = {
    "light": (31.0, 31.0, 32.0, 32.5),
    "moderate": (28.0, 29.0, 30.0, 31.5),
    "heavy": (None, 27.5, 29.0, 30.5),
    "very_heavy": (None, None, 28.0, 30.0),
}
#: The table's action limit, workers not acclimatised: WBGT [°C].  From memory, unverified.
WBGT_ACTION_LIMIT_C = {
    "light": (28.0, 28.5, 29.5, 30.0),
    "moderate": (25.0, 26.0, 27.0, 29.0),
    "heavy": (None, 24.0, 25.5, 28.0),
    "very_heavy": (None, None, 24.5, 27.0),
}


def most_work_allowed(wbgt_c: float, load: str = "heavy", acclimatised: bool = True) -> str | None:
    """The regimen with the most work the table allows at a WBGT, or None when it allows none.

    Parameters
    ----------
    wbgt_c : float
        Wet-bulb globe temperature [°C].
    load : str
        "light", "moderate", "heavy" or "very_heavy".
    acclimatised : bool
        TLV column (True) or action limit (False).

    Returns
    -------
    str or None
        One of :data:`REGIMENS`; None when the WBGT is above every value of the column.
    """
    limits = (WBGT_TLV_C if acclimatised else WBGT_ACTION_LIMIT_C)[load]
    for regimen, lim in zip(REGIMENS, limits, strict=True):
        if lim is not None and wbgt_c <= lim:
            return regimen
    return None


def _heavy_advice(wbgt_c: float) -> str:
    """Heavy-work advice at a WBGT, for acclimatised workers (TLV) and the others (action limit)."""
    def one(acc: bool) -> str:
        r = most_work_allowed(wbgt_c, "heavy", acc)
        return "none" if r is None else f"up to {REGIMEN_WORDS[r].split('up to ')[-1].replace(' work', '')}"
    a, u = one(True), one(False)
    if a == u:
        return f"heavy work {a}, acclimatised or not; rest in shade the rest of each hour"
    return (f"heavy work: acclimatised (TLV) {a}; not acclimatised (action limit) {u}; "
            "rest in shade the rest of each hour")


def _heavy_edges() -> tuple[float, ...]:
    edges = {lim for col in (WBGT_TLV_C["heavy"], WBGT_ACTION_LIMIT_C["heavy"]) for lim in col if lim is not None}
    return tuple(sorted(edges))


#: Heavy-work advice by WBGT band: (upper WBGT edge [°C], advice for acclimatised and for
#: unacclimatised workers).  The edges are every heavy-work value of both columns, so each band has
#: one answer for each; the first band already needs rest (the table has no continuous heavy work).
CREW_WORK_REST_HEAVY = tuple((edge, _heavy_advice(edge)) for edge in _heavy_edges()) + (
    (float("inf"), "no heavy work, acclimatised or not; only light tasks with frequent rest in shade"),)
#: WBGT [°C] up to which the table allows the most heavy work it gives (50-75 % of the hour) to workers
#: who are not acclimatised (action limit): the "safer hours" for heavy work.
SAFER_WBGT_C = WBGT_ACTION_LIMIT_C["heavy"][1]
#: Heat-index band edges [°C] (91, 103, 115 °F) separating the crew levels.
HEAT_INDEX_BANDS_C = (32.8, 39.4, 46.1)
#: WBGT edges [°C] separating crew levels: where heavy work needs rest even for workers not
#: acclimatised (action limit, 50-75 %), where acclimatised workers need more than 15 min rest an hour
#: (TLV, 50-75 %), and where the TLV allows no heavy work (above 0-25 %).
WBGT_BANDS_C = (24.0, 27.5, 30.5)

WATER_GUIDANCE = ("Drink about a cup (250 mL) of cool water every 15-20 minutes while working in the heat, "
                  "even without thirst; for long shifts add electrolytes, and do not exceed about "
                  "1.5 L an hour.")
ACCLIMATISATION_GUIDANCE = ("New and returning workers are not acclimatised: give them lighter loads and more "
                            "rest, building up over 7-14 days.")
CAUTIONS = (
    "Heat exhaustion: heavy sweating, weakness, dizziness, headache, nausea, muscle cramps. "
    "Move the person to shade, loosen clothing, give water, cool with wet cloths; get medical help "
    "if it does not ease within an hour.",
    "Heat stroke: confusion, slurred speech, collapse or seizures, very high body temperature. "
    "Call emergency services at once and cool the person with water and ice while waiting.",
    "Never work alone in the heat: pair workers so each watches the other.",
    "This note does not replace your workplace heat plan. Local workplace-safety rules come first "
    "wherever they are stricter.",
)


def _thresholds(crops) -> list[CropHeatThresholds]:
    out = []
    for c in np.atleast_1d(np.asarray(crops, dtype=object)):
        key = str(c).strip().lower().replace("_", " ")  # crop keys of advisory.crops ("sweet_cherry")
        key = _CROP_ALIASES.get(key, key)
        out.append(CROP_HEAT.get(key, _GENERIC))
    return out


def hours_to_utc(hours):
    """Float hours since 1970 UTC (from :func:`advisory.forecast.daytime.to_hours`) to ``datetime64[ns]``."""
    h = np.asarray(hours, dtype=float)
    ns = np.where(np.isfinite(h), np.round(h * 3.6e12), 0).astype("int64").astype("datetime64[ns]")
    return np.where(np.isfinite(h), ns, np.datetime64("NaT", "ns"))


def _times_2d(times, shape):
    t = np.asarray(to_hours(times), dtype=float)
    return np.broadcast_to(t, shape)


def _up_crossing(t, temp, level):
    """First time ``temp`` reaches ``level`` (linear interpolation), NaN if never; shapes (B, H)."""
    above = temp >= level[:, None]
    any_above = above.any(axis=1)
    i = np.argmax(above, axis=1)
    rows = np.arange(temp.shape[0])
    i0 = np.maximum(i - 1, 0)
    t1, t0 = t[rows, i], t[rows, i0]
    y1, y0 = temp[rows, i], temp[rows, i0]
    with np.errstate(invalid="ignore", divide="ignore"):
        frac = np.where(np.isfinite(y0) & (y1 > y0), (level[rows] - y0) / (y1 - y0), 1.0)
    tc = np.where(i == 0, t1, t0 + np.clip(frac, 0.0, 1.0) * (t1 - t0))
    return np.where(any_above, tc, np.nan)


def _down_crossing(t, temp, level):
    """Time after the last value at or above ``level`` when ``temp`` falls below it; NaN if never above."""
    above = temp >= level[:, None]
    any_above = above.any(axis=1)
    n = temp.shape[1]
    j = n - 1 - np.argmax(above[:, ::-1], axis=1)
    rows = np.arange(temp.shape[0])
    j1 = np.minimum(j + 1, n - 1)
    t0, t1 = t[rows, j], t[rows, j1]
    y0, y1 = temp[rows, j], temp[rows, j1]
    with np.errstate(invalid="ignore", divide="ignore"):
        frac = np.where(y0 > y1, (y0 - level[rows]) / (y0 - y1), 0.0)
    tc = np.where(j == n - 1, t0, t0 + np.clip(frac, 0.0, 1.0) * (t1 - t0))
    return np.where(any_above, tc, np.nan)


@dataclass
class CropHeatResult:
    """Crop heat per block (arrays of length B unless noted)."""

    level: np.ndarray                 # index into LEVELS
    level_name: np.ndarray            # str
    peak_c: np.ndarray
    peak_time: np.ndarray             # datetime64[ns] UTC
    hours_above_c: np.ndarray         # (B, 3): hours at or above elevated / high / acute thresholds
    thresholds_c: np.ndarray          # (B, 3)
    what: list[str]                   # what the level means for the crop ('' when quiet)
    source: list[str]
    cooling_start: np.ndarray         # datetime64[ns], NaT when no cooling or not needed
    cooling_stop: np.ndarray
    cooling_hours: np.ndarray
    cooling_water_m3: np.ndarray
    cooling_wet_bulb_depression_c: np.ndarray  # at the peak; small values mean cooling works poorly
    notes: list[list[str]] = field(default_factory=list)


def crop_heat(times, air_temp_c, crops, *, sunrise=None, sunset=None, dew_point_c=None, has_cooling=None,
              cooling_rate_mm_h=None, area_ha=None, pressure_kpa=STANDARD_PRESSURE_KPA,
              step_h=None) -> CropHeatResult:
    """Fruit heat risk and evaporative cooling plan per block.

    Parameters
    ----------
    times : array_like
        Hourly instants, shape ``(H,)`` or ``(B, H)`` (aware datetimes or hours).
    air_temp_c : array_like
        Air temperature [°C], shape ``(B, H)`` (e.g. from
        :func:`advisory.forecast.daytime.diurnal_temperature_c`).
    crops : sequence of str
        Crop of each block (``apple``, ``grape``, ``cherry``; others get a
        generic threshold).
    sunrise, sunset : array_like, optional
        Per block, shape ``(B,)``.  When given, only daylight hours count
        toward sunburn hours (sunburn needs sun) and cooling stops at sunset at
        the latest (common practice).
    dew_point_c : array_like, optional
        The day's dew point per block [°C], shape ``(B,)``: gives the wet-bulb
        depression at the peak (cooling effectiveness).
    has_cooling : array_like of bool, optional
        Whether each block has over-tree evaporative cooling (default none).
    cooling_rate_mm_h : array_like, optional
        Application rate of that system [mm/h].
    area_ha : array_like, optional
        Block area [ha].
    pressure_kpa : float or array_like
        Station pressure for the wet bulb [kPa].
    step_h : float, optional
        Hours represented by each value (default: the spacing of ``times``).

    Returns
    -------
    CropHeatResult
    """
    temp = np.atleast_2d(np.asarray(air_temp_c, dtype=float))
    b, h = temp.shape
    t = _times_2d(times, temp.shape)
    if step_h is None:
        step_h = float(np.nanmedian(np.diff(t, axis=1))) if h > 1 else 1.0
    th = _thresholds(crops)
    if len(th) == 1 and b > 1:
        th = th * b
    if len(th) != b:
        raise ValueError(f"{len(th)} crops for {b} blocks")
    thr = np.array([[x.elevated_c, x.high_c, x.acute_c] for x in th])
    daylight = np.ones(temp.shape, bool)
    ss = None
    if sunrise is not None and sunset is not None:
        sr = np.broadcast_to(np.asarray(to_hours(sunrise), float).reshape(-1), (b,))[:, None]
        ss = np.broadcast_to(np.asarray(to_hours(sunset), float).reshape(-1), (b,))
        polar = ~(np.isfinite(sr[:, 0]) & np.isfinite(ss))
        daylight = ((t >= sr) & (t <= ss[:, None])) | polar[:, None]
        ss = np.where(polar, np.inf, ss)
    hours_above = ((temp[:, :, None] >= thr[:, None, :]) & daylight[:, :, None]).sum(axis=1) * step_h
    level = (hours_above > 0).sum(axis=1)
    peak_i = np.nanargmax(np.where(np.isfinite(temp), temp, -np.inf), axis=1)
    rows = np.arange(b)
    peak = temp[rows, peak_i]
    peak_t = t[rows, peak_i]

    cool = np.zeros(b, bool) if has_cooling is None else np.broadcast_to(np.asarray(has_cooling, bool), (b,))
    rate = np.broadcast_to(np.asarray(np.nan if cooling_rate_mm_h is None else cooling_rate_mm_h, float), (b,))
    area = np.broadcast_to(np.asarray(np.nan if area_ha is None else area_ha, float), (b,))
    start_c = np.array([x.cooling_start_c for x in th])
    stop_c = np.array([x.cooling_stop_c for x in th])
    start = _up_crossing(t, np.where(daylight, temp, -np.inf), start_c)
    stop = _down_crossing(t, temp, stop_c)
    if ss is not None:
        stop = np.minimum(stop, ss)
    stop = np.where(np.isfinite(start), np.maximum(stop, start), np.nan)
    start = np.where(cool, start, np.nan)
    stop = np.where(cool, stop, np.nan)
    run_h = np.where(np.isfinite(start), stop - start, 0.0)
    water = np.where(cool & (run_h > 0), rate * area * run_h * 10.0, np.where(cool, 0.0, np.nan))
    if dew_point_c is None:
        depression = np.full(b, np.nan)
    else:
        td = np.broadcast_to(np.asarray(dew_point_c, float), (b,))
        depression = peak - np.asarray(wet_bulb_c(peak, np.minimum(td, peak), pressure_kpa))
        depression = np.atleast_1d(depression)

    notes = []
    for i in range(b):   # text only
        n = []
        if cool[i] and np.isfinite(start[i]) and not np.isfinite(rate[i] * area[i]):
            n.append("cooling rate or block area unknown: water for the run not computed")
        if cool[i] and np.isfinite(start[i]) and np.isfinite(depression[i]) and depression[i] < 4.0:
            n.append("humid air (small wet-bulb depression): evaporative cooling will cool the fruit little")
        if th[i] is _GENERIC:
            n.append("no crop-specific heat threshold: generic values used")
        notes.append(n)
    return CropHeatResult(
        level=level, level_name=np.array([LEVELS[v] for v in level]), peak_c=peak,
        peak_time=hours_to_utc(peak_t), hours_above_c=hours_above, thresholds_c=thr,
        what=[("" if level[i] == 0 else th[i].what[level[i] - 1]) for i in range(b)],
        source=[x.source for x in th],
        cooling_start=hours_to_utc(start), cooling_stop=hours_to_utc(stop), cooling_hours=run_h,
        cooling_water_m3=water, cooling_wet_bulb_depression_c=depression, notes=notes)


@dataclass
class CrewHeatResult:
    """Crew heat per block and hour."""

    heat_index_c: np.ndarray          # (B, H)
    wbgt_c: np.ndarray                # (B, H)
    level: np.ndarray                 # (B, H) index into LEVELS
    heavy_work_ok: np.ndarray         # (B, H) bool: heavy work at 50-75 % within the action limit
    work_rest: np.ndarray             # (B, H) str: heavy-work guidance for the hour
    day_level: np.ndarray             # (B,) worst hourly level
    day_level_name: np.ndarray        # (B,)
    peak_wbgt_c: np.ndarray           # (B,)
    peak_heat_index_c: np.ndarray     # (B,)
    guidance: list[str]
    cautions: tuple[str, ...] = CAUTIONS


def crew_heat(times, air_temp_c, dew_point_c, *, sunrise=None, sunset=None, sun_fraction=None,
              pressure_kpa=STANDARD_PRESSURE_KPA) -> CrewHeatResult:
    """Hourly heat index, WBGT estimate, crew risk level and heavy-work guidance.

    Parameters
    ----------
    times : array_like
        Instants, shape ``(H,)`` or ``(B, H)``.
    air_temp_c : array_like
        Air temperature [°C], shape ``(B, H)``.
    dew_point_c : array_like
        Dew point [°C], shape ``(B, H)`` or ``(B, 1)`` (conserved through the day).
    sunrise, sunset : array_like, optional
        Per block, shape ``(B,)``: hours between them count as in full sun
        (``sun_fraction`` 1), others as shade.  Ignored when ``sun_fraction`` is given.
    sun_fraction : array_like, optional
        0-1 per hour, shape ``(B, H)``; default full sun in daylight (or, without
        sun times, in every hour -- the cautious choice).
    pressure_kpa : float or array_like

    Returns
    -------
    CrewHeatResult
        ``level`` per hour is the higher of the WBGT band (:data:`WBGT_BANDS_C`)
        and the heat-index band (91 / 103 / 115 °F).  ``heavy_work_ok`` marks
        hours where the table allows heavy work at 50-75 % of the hour even to
        workers not acclimatised (WBGT at or below :data:`SAFER_WBGT_C`): the
        safer hours for heavy work.  No hour offers continuous heavy work (the
        table has no value for it).
    """
    temp = np.atleast_2d(np.asarray(air_temp_c, dtype=float))
    td = np.minimum(np.broadcast_to(np.asarray(dew_point_c, dtype=float), temp.shape), temp)
    t = _times_2d(times, temp.shape)
    if sun_fraction is not None:
        sun = np.broadcast_to(np.asarray(sun_fraction, float), temp.shape)
    elif sunrise is not None and sunset is not None:
        sr = np.asarray(to_hours(sunrise), float).reshape(-1, 1)
        ss = np.asarray(to_hours(sunset), float).reshape(-1, 1)
        sun = ((t >= sr) & (t <= ss)).astype(float)
        polar = ~(np.isfinite(sr) & np.isfinite(ss))
        sun = np.where(polar, 1.0, sun)
    else:
        sun = np.ones(temp.shape)
    rh = np.minimum(np.asarray(rel_humidity_pct_from_dew_point(temp, td)), 100.0)
    hi = np.asarray(heat_physics.heat_index_c(temp, rh))
    wbgt = np.asarray(heat_physics.wbgt_estimate_c(temp, td, sun, pressure_kpa))
    lvl_w = np.searchsorted(np.asarray(WBGT_BANDS_C), wbgt, side="right")
    lvl_h = np.searchsorted(np.asarray(HEAT_INDEX_BANDS_C), hi, side="right")
    level = np.maximum(lvl_w, lvl_h)
    limits = np.array([x[0] for x in CREW_WORK_REST_HEAVY])
    texts = np.array([x[1] for x in CREW_WORK_REST_HEAVY], dtype=object)
    row = np.minimum(np.searchsorted(limits, wbgt, side="left"), len(limits) - 1)
    work_rest = texts[row]
    ok = wbgt <= SAFER_WBGT_C
    day_level = level.max(axis=1)
    guidance = [WATER_GUIDANCE, ACCLIMATISATION_GUIDANCE,
                "Plan heavy work (picking ladders, pruning, carrying bins) for the safer hours; "
                "provide shade close to the work and rest there on the schedule shown.",
                "The work-rest table gives no value for continuous heavy work: even in the safer hours, "
                "heavy work is up to 45 min an hour with rest in shade. Safer hours are those where that "
                "holds for workers not acclimatised too (WBGT at or below 24.0 °C).",
                f"Work-rest values: {WORK_REST_SOURCE}."]
    return CrewHeatResult(
        heat_index_c=hi, wbgt_c=wbgt, level=level, heavy_work_ok=ok, work_rest=work_rest,
        day_level=day_level, day_level_name=np.array([LEVELS[v] for v in day_level]),
        peak_wbgt_c=np.nanmax(wbgt, axis=1), peak_heat_index_c=np.nanmax(hi, axis=1), guidance=guidance)


def safe_windows(times, mask, *, sunrise=None, sunset=None):
    """Contiguous runs of True hours, per block, as (start, end) UTC ``datetime64`` pairs.

    Parameters
    ----------
    times : array_like
        Shape ``(H,)`` or ``(B, H)``.
    mask : array_like of bool
        Shape ``(B, H)``, e.g. :attr:`CrewHeatResult.heavy_work_ok`.
    sunrise, sunset : array_like, optional
        Per block: keep only daylight hours.

    Returns
    -------
    list of list of tuple
        For each block, ``[(start, end), ...]`` where ``end`` is the last
        True hour plus one step.
    """
    m = np.atleast_2d(np.asarray(mask, bool))
    t = _times_2d(times, m.shape)
    if sunrise is not None and sunset is not None:
        sr = np.asarray(to_hours(sunrise), float).reshape(-1, 1)
        ss = np.asarray(to_hours(sunset), float).reshape(-1, 1)
        m = m & (t >= sr) & (t <= ss)
    step = float(np.nanmedian(np.diff(t, axis=1))) if m.shape[1] > 1 else 1.0
    out = []
    for i in range(m.shape[0]):   # formatting of results only
        padded = np.r_[False, m[i], False].astype(int)
        edges = np.flatnonzero(np.diff(padded))
        runs = [(t[i, a], t[i, e - 1] + step) for a, e in zip(edges[::2], edges[1::2], strict=True)]
        out.append([(hours_to_utc(a)[()], hours_to_utc(e)[()]) for a, e in runs])
    return out
