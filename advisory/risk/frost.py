"""The frost plan of a night for a set of blocks: damage risk, level and each method's protection plan.

Damage: :mod:`advisory.risk.damage`; levels: :mod:`advisory.risk.levels`; the data taken and given:
:mod:`advisory.risk.frost_data`; each method's part of a plan: :mod:`advisory.risk.protection`;
the bridge to the runs' Assessment: :mod:`advisory.risk.frost_assessment`.

Pure and vectorised over blocks: no database, no network.  The runs hand
in plain arrays for all the blocks due at one time and get back one
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
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from dataclasses import fields

import numpy as np

from advisory.errors import InputError
from advisory.fieldcalc import start_air_temp_c
from advisory.physics import moisture
from advisory.risk import cautions
from advisory.risk.damage import MinTempForecast, damage
from advisory.risk.frost_data import METHODS, BlockRisk, BlockSetup, FrostSettings, MethodPlan, NightCurves
from advisory.risk.levels import LEVELS
from advisory.risk.night_curve import _crossing_down, _hours_at_or_below, _ns, _round_ns, _stop_time, _to_dt
from advisory.risk.protection import heaters, sprinklers, wind_machine
from advisory.risk.protection.equipment import _equipment_by_kind
from advisory.risk.protection.sprinklers import required_sprinkler_rate_mm_h


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
        usable = sprinklers.sprinkler_plan(method, params, crit, s_margin, spr_start_air, area, run_h,
                                           run_k, req_rate, req_rate_cold, wind_max, p50_c, p10_c, kw,
                                           notes, keys)
    else:
        kw["start_air_temp_c"] = float(crit + margin)

    if method == "wind_machine":
        usable = wind_machine.wind_machine_plan(b, st, evening_wind, wind_mean, kw, notes, keys)

    if method == "heater":
        heaters.heater_plan(params, area, run_h, run_k, kw, notes)

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
        reasons = "; ".join(f"{_METHOD_LABELS.get(p.method, p.method)}: {_lower_first(p.notes[-1]) if p.notes else 'not usable'}"
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


def _lower_first(sentence: str) -> str:
    """A sentence continued after a colon: its first letter in lower case, unless the first word is a
    symbol or an abbreviation ("T10", "RH")."""
    head = sentence.split(" ", 1)[0]
    return sentence[:1].lower() + sentence[1:] if head[:1].isupper() and head[1:].islower() else sentence
