"""Field calculator: dew point, wet bulb, heat index and sprinkler start temperature.

The logic behind ``advisory calc``: resolve the user's inputs (°C or °F, dew point
or relative humidity, pressure or elevation) with range checks that name the
offending option, then compute.  Pure functions; the command module only parses
and prints.

Every ``calc_*`` function returns one flat ``dict`` holding the resolved inputs
and the results, results in °C with their °F twins (``dew_point_c`` /
``dew_point_f``, ``wet_bulb_c`` / ``wet_bulb_f``, ``heat_index_c`` /
``heat_index_f``, ``start_air_temp_c`` / ``start_air_temp_f``).

References
----------
.. [1] ASHRAE (2017) Handbook - Fundamentals, ch. 1 (wet bulb), via
   :func:`advisory.physics.moisture.wet_bulb_c`.
.. [2] Alduchov, O. A. & Eskridge, R. E. (1996) J. Appl. Meteor. 35, 601-609
   (dew point from relative humidity).
.. [3] Snyder, R. L. & de Melo-Abreu, J. P. (2005) Frost Protection:
   fundamentals, practice and economics, vol. 1, FAO, ch. 7: start sprinklers
   when the wet-bulb temperature is at or above the critical temperature.
.. [4] Rothfusz, L. P. (1990) The heat index equation. NWS SR 90-23 (via
   :func:`advisory.physics.heat.heat_index_c`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from advisory.errors import InputError
from advisory.physics import moisture

# Accepted ranges (inclusive) of each input, in the unit of the option.
_RANGES = {
    "air_temp_c": (-60.0, 60.0),
    "dew_point_c": (-80.0, 40.0),
    "rel_humidity_pct": (0.5, 100.0),
    "critical_c": (-30.0, 10.0),
    "margin_c": (0.0, 10.0),
    "pressure_kpa": (30.0, 110.0),
    "elevation_m": (-500.0, 6000.0),
}


def c_to_f(temp_c):
    """°C -> °F (float for a scalar, else ndarray)."""
    out = np.asarray(temp_c, dtype=float) * 1.8 + 32.0
    return float(out) if out.ndim == 0 else out


def f_to_c(temp_f):
    """°F -> °C (float for a scalar, else ndarray)."""
    out = (np.asarray(temp_f, dtype=float) - 32.0) / 1.8
    return float(out) if out.ndim == 0 else out


def _option(name: str) -> str:
    return "--" + name.replace("_", "-")


def _check(name: str, value: float, option: str | None = None) -> float:
    option = option or _option(name)
    if value is None or not math.isfinite(float(value)):
        raise InputError(f"{option} must be a number", field=option)
    lo, hi = _RANGES[name]
    v = float(value)
    if not lo <= v <= hi:
        raise InputError(f"value {v:g} is out of range ({lo:g} to {hi:g})", field=option)
    return v


def _pick_temp(name: str, c_value, f_value, required: bool) -> float | None:
    """One temperature from a °C or a °F option, checked against the °C range."""
    opt_c, opt_f = _option(name + "_c"), _option(name + "_f")
    if c_value is not None and f_value is not None:
        raise InputError(f"give {opt_c} or {opt_f}, not both", field=opt_f)
    if c_value is not None:
        return _check(name + "_c", c_value, opt_c)
    if f_value is not None:
        if not math.isfinite(float(f_value)):
            raise InputError(f"{opt_f} must be a number", field=opt_f)
        lo, hi = _RANGES[name + "_c"]
        v = f_to_c(float(f_value))
        if not lo <= v <= hi:
            raise InputError(f"value {float(f_value):g} is out of range ({c_to_f(lo):g} to {c_to_f(hi):g})",
                             field=opt_f)
        return v
    if required:
        raise InputError(f"{opt_c} or {opt_f} is required", field=opt_c)
    return None


@dataclass(frozen=True)
class FieldInputs:
    """Resolved calculator inputs, all SI/°C.

    Attributes
    ----------
    air_temp_c, dew_point_c, rel_humidity_pct, critical_c : float or None
    margin_c : float
        Safety margin added to the critical temperature [°C] (default 0).
    pressure_kpa : float
        Station pressure [kPa], from ``--pressure-kpa``, else from
        ``--elevation-m`` (FAO-56 eq. 7), else standard sea-level pressure.
    pressure_source : str
        "given", "elevation" or "standard".
    """

    air_temp_c: float | None
    dew_point_c: float | None
    rel_humidity_pct: float | None
    critical_c: float | None
    margin_c: float
    pressure_kpa: float
    pressure_source: str


def resolve_inputs(*, air_temp_c=None, air_temp_f=None, dew_point_c=None, dew_point_f=None,
                   rel_humidity_pct=None, critical_c=None, critical_f=None, margin_c=None,
                   pressure_kpa=None, elevation_m=None, need_air: bool = True,
                   need_humidity: bool = True, need_critical: bool = False) -> FieldInputs:
    """Check and convert calculator inputs.

    Parameters
    ----------
    air_temp_c, air_temp_f : float, optional
        Air temperature [°C] or [°F] (one of them).
    dew_point_c, dew_point_f : float, optional
        Dew point [°C] or [°F]; or give ``rel_humidity_pct``.
    rel_humidity_pct : float, optional
        Relative humidity over water [%], 0.5-100.
    critical_c, critical_f : float, optional
        Critical (damage) temperature [°C] or [°F].
    margin_c : float, optional
        Margin above the critical temperature [°C], 0-10.
    pressure_kpa, elevation_m : float, optional
        Station pressure [kPa], or elevation [m] to estimate it.
    need_air, need_humidity, need_critical : bool
        Which inputs the calculation requires.

    Returns
    -------
    FieldInputs

    Raises
    ------
    InputError
        Missing, conflicting or out-of-range input; ``field`` names the option.
    """
    air = _pick_temp("air_temp", air_temp_c, air_temp_f, need_air)
    dew = _pick_temp("dew_point", dew_point_c, dew_point_f, False)
    rh = None
    if rel_humidity_pct is not None:
        if dew is not None:
            raise InputError("give a dew point or --rel-humidity-pct, not both", field="--rel-humidity-pct")
        rh = _check("rel_humidity_pct", rel_humidity_pct)
        if air is None:
            raise InputError("--rel-humidity-pct needs --air-temp-c or --air-temp-f", field="--air-temp-c")
        dew = float(moisture.dew_point_c_from_rh(air, rh))
    if need_humidity and dew is None:
        raise InputError("give --dew-point-c, --dew-point-f or --rel-humidity-pct", field="--dew-point-c")
    if dew is not None and air is not None:
        if dew > air + 0.05:
            raise InputError(f"dew point ({dew:.1f} °C) cannot be above the air temperature ({air:.1f} °C)",
                             field="--dew-point-c")
        dew = min(dew, air)
        if rh is None:
            rh = float(moisture.rel_humidity_pct_from_dew_point(air, dew))
    crit = _pick_temp("critical", critical_c, critical_f, need_critical)
    margin = 0.0 if margin_c is None else _check("margin_c", margin_c)
    if pressure_kpa is not None and elevation_m is not None:
        raise InputError("give --pressure-kpa or --elevation-m, not both", field="--elevation-m")
    if pressure_kpa is not None:
        p, src = _check("pressure_kpa", pressure_kpa), "given"
    elif elevation_m is not None:
        p, src = float(moisture.pressure_kpa_from_elevation(_check("elevation_m", elevation_m))), "elevation"
    else:
        p, src = moisture.STANDARD_PRESSURE_KPA, "standard"
    return FieldInputs(air, dew, rh, crit, margin, p, src)


def start_air_temp_c(critical_c, dew_point_c, margin_c=0.0, pressure_kpa=moisture.STANDARD_PRESSURE_KPA):
    """Air temperature at which to start sprinklers: where the wet bulb equals critical + margin.

    When sprinklers start, evaporation cools wetted buds toward the wet-bulb
    temperature, so sprinkling must begin while the wet bulb is still at or
    above the critical temperature [3]_.  This finds the air temperature whose
    thermodynamic wet bulb (ASHRAE [1]_, as in
    :func:`advisory.physics.moisture.wet_bulb_c`) for the given dew point equals
    ``critical_c + margin_c``.

    The ASHRAE balance (eq. 33 over water, eq. 35 over ice) is linear in the
    air temperature once the wet bulb and the humidity ratio are fixed, so the
    answer is exact and closed-form::

        T = [(L - a Tw) Ws(Tw) + 1.006 Tw - W (L - b Tw)] / (1.006 + 1.86 W)

    with (L, a, b) = (2501, 2.326, 4.186) for a wet bulb above 0 °C and
    (2830, 0.24, 2.1) for an ice bulb at or below 0 °C, W the humidity ratio of
    the air (from the dew point) and Ws the saturation humidity ratio at the
    wet bulb.  Where the dew point is at or above the target the air is
    saturated at the target, so the answer is the target itself.

    Parameters
    ----------
    critical_c : array_like
        Critical temperature [°C].
    dew_point_c : array_like
        Dew point [°C] (assumed constant while the air cools).
    margin_c : array_like, default 0
        Safety margin [°C].
    pressure_kpa : array_like, default 101.325
        Station pressure [kPa].

    Returns
    -------
    start_air_temp_c : float or ndarray
        Air temperature [°C].

    References
    ----------
    .. [1] ASHRAE (2017) Handbook - Fundamentals, ch. 1, eqs. 20, 33, 35.
    .. [3] Snyder & de Melo-Abreu (2005), ch. 7.
    """
    tw, td, p = np.broadcast_arrays(np.asarray(critical_c, float) + np.asarray(margin_c, float),
                                    np.asarray(dew_point_c, float), np.asarray(pressure_kpa, float))
    eps = 0.621945  # ASHRAE ratio of molecular masses
    e = np.asarray(moisture.saturation_vapour_pressure_kpa(td))
    w = eps * e / (p - e)
    ice = tw <= 0.0
    es = np.asarray(moisture.saturation_vapour_pressure_kpa(tw, over_ice=ice))
    ws = eps * es / (p - es)
    big_l = np.where(ice, 2830.0, 2501.0)
    a = np.where(ice, 0.24, 2.326)
    b = np.where(ice, 2.1, 4.186)
    t = ((big_l - a * tw) * ws + 1.006 * tw - w * (big_l - b * tw)) / (1.006 + 1.86 * w)
    out = np.where(td >= tw, tw, np.maximum(t, tw))
    return float(out) if out.ndim == 0 else out


def _with_f(result: dict, key_c: str, value_c: float) -> None:
    result[key_c] = round(float(value_c), 2)
    result[key_c[:-2] + "_f"] = round(float(c_to_f(value_c)), 2)


def _base(name: str, inp: FieldInputs) -> dict:
    out: dict = {"calculation": name}
    if inp.air_temp_c is not None:
        _with_f(out, "air_temp_c", inp.air_temp_c)
    if inp.rel_humidity_pct is not None:
        out["rel_humidity_pct"] = round(inp.rel_humidity_pct, 1)
    return out


def calc_dew_point(**options) -> dict:
    """Dew point from air temperature and relative humidity (or echo a given dew point).

    Returns a flat dict with ``dew_point_c``, ``dew_point_f`` and ``frost_point_c``/``_f``.
    """
    inp = resolve_inputs(**options, need_air=True, need_humidity=True)
    out = _base("dew-point", inp)
    _with_f(out, "dew_point_c", inp.dew_point_c)
    _with_f(out, "frost_point_c", moisture.frost_point_c(inp.dew_point_c))
    return out


def calc_wet_bulb(**options) -> dict:
    """Thermodynamic wet-bulb temperature (ASHRAE) at the station pressure.

    Returns a flat dict with ``wet_bulb_c``, ``wet_bulb_f``, the dew point and pressure.
    """
    inp = resolve_inputs(**options, need_air=True, need_humidity=True)
    out = _base("wet-bulb", inp)
    _with_f(out, "dew_point_c", inp.dew_point_c)
    out["pressure_kpa"] = round(inp.pressure_kpa, 2)
    _with_f(out, "wet_bulb_c", moisture.wet_bulb_c(inp.air_temp_c, inp.dew_point_c, inp.pressure_kpa))
    return out


def calc_heat_index(**options) -> dict:
    """Heat index from air temperature and humidity.

    Uses :func:`advisory.physics.heat.heat_index_c` (Rothfusz 1990 with the NWS
    adjustments).  Returns a flat dict with ``heat_index_c`` and ``heat_index_f``.
    """
    from advisory.physics.heat import heat_index_c  # written alongside; imported late

    inp = resolve_inputs(**options, need_air=True, need_humidity=True)
    out = _base("heat-index", inp)
    _with_f(out, "dew_point_c", inp.dew_point_c)
    _with_f(out, "heat_index_c", heat_index_c(inp.air_temp_c, inp.rel_humidity_pct))
    return out


def calc_start_temp(**options) -> dict:
    """Air temperature at which to start sprinklers for a critical temperature and dew point.

    Needs ``critical_c``/``critical_f`` and a dew point (or air temperature with
    relative humidity); ``margin_c`` optional.  Returns a flat dict with
    ``start_air_temp_c``, ``start_air_temp_f``, ``target_wet_bulb_c``/``_f`` and
    the inputs.  If an air temperature is given, ``wet_bulb_c`` now and
    ``start_now`` (air at or below the start temperature) are included too.
    """
    need_air = options.get("rel_humidity_pct") is not None
    inp = resolve_inputs(**options, need_air=need_air, need_humidity=True, need_critical=True)
    out = _base("start-temp", inp)
    _with_f(out, "critical_c", inp.critical_c)
    out["margin_c"] = round(inp.margin_c, 2)
    _with_f(out, "dew_point_c", inp.dew_point_c)
    out["pressure_kpa"] = round(inp.pressure_kpa, 2)
    target = inp.critical_c + inp.margin_c
    _with_f(out, "target_wet_bulb_c", target)
    start = start_air_temp_c(inp.critical_c, inp.dew_point_c, inp.margin_c, inp.pressure_kpa)
    _with_f(out, "start_air_temp_c", start)
    if inp.dew_point_c >= float(start) - 1e-9:
        out["note"] = (f"the dew point ({inp.dew_point_c:.1f} °C) is at or above the start temperature "
                       f"({float(start):.1f} °C): the air is saturated before it cools that far (dew or frost "
                       "forms and the dew point falls with the air), so the start is where the air itself reaches "
                       "the start temperature; check the dew point reading")
    if inp.air_temp_c is not None:
        wb = moisture.wet_bulb_c(inp.air_temp_c, inp.dew_point_c, inp.pressure_kpa)
        _with_f(out, "wet_bulb_c", wb)
        out["start_now"] = bool(wb <= target + 1e-9)
    return out


CALCULATIONS = {
    "dew-point": calc_dew_point,
    "wet-bulb": calc_wet_bulb,
    "heat-index": calc_heat_index,
    "start-temp": calc_start_temp,
}

_LABELS = (
    ("air_temp_c", "Air temperature"),
    ("rel_humidity_pct", "Relative humidity"),
    ("dew_point_c", "Dew point"),
    ("frost_point_c", "Frost point"),
    ("pressure_kpa", "Pressure"),
    ("critical_c", "Critical temperature"),
    ("margin_c", "Margin"),
    ("target_wet_bulb_c", "Start when the wet bulb is"),
    ("wet_bulb_c", "Wet bulb"),
    ("heat_index_c", "Heat index"),
    ("start_air_temp_c", "Start sprinklers at air temperature"),
)
_RESULT_KEYS = {"dew-point": "dew_point_c", "wet-bulb": "wet_bulb_c", "heat-index": "heat_index_c",
                "start-temp": "start_air_temp_c"}


def format_result(result: dict) -> str:
    """Short plain-text lines for a calculation result (result line first)."""
    main = _RESULT_KEYS.get(result.get("calculation", ""))
    lines = []
    order = [(k, lab) for k, lab in _LABELS if k == main] + [(k, lab) for k, lab in _LABELS if k != main]
    for key, label in order:
        if key not in result:
            continue
        v = result[key]
        if key.endswith("_c") and key != "margin_c":
            text = f"{v:.1f} °C ({result[key[:-2] + '_f']:.1f} °F)"
        elif key == "margin_c":
            text = f"{v:.1f} °C"
        elif key == "rel_humidity_pct":
            text = f"{v:.0f} %"
        else:
            text = f"{v:.1f} kPa"
        lines.append(f"{label}: {text}")
        if key == main:
            lines.append("")
    if result.get("note"):
        lines.append("Note: " + result["note"][0].upper() + result["note"][1:] + ".")
    if "start_now" in result:
        lines.append("Start now: " + ("yes - the wet bulb is at or below the start value" if result["start_now"]
                                      else "not yet"))
    return "\n".join(lines).rstrip()
