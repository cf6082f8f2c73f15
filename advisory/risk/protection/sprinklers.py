"""Over-tree and under-tree sprinklers: start on the wet bulb, the application rate the night
needs (by wind and minimum), water volume and supply.
"""

from __future__ import annotations

import numpy as np

from advisory.risk.protection.equipment import _c, _num, _share

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


def sprinkler_plan(method: str, params, crit: float, s_margin: float, spr_start_air: float, area: float,
                   run_h: float | None, run_k: float | None, req_rate: float, req_rate_cold: float,
                   wind_max: float, p50_c: float, p10_c: float, kw: dict, notes: list[str],
                   keys: list[str]) -> bool:
    """A sprinkler method's part of a plan (:func:`advisory.risk.frost._method_plan`): its start rule,
    rate, water and supply into ``kw``, ``notes`` and ``keys``; whether the method stays usable."""
    usable = True
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
    return usable
