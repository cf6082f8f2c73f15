"""Human heat stress: heat index and an estimated wet-bulb globe temperature.

All functions are pure and vectorised: scalars or numpy arrays in, floats or
arrays out (NaN propagates).

Heat index
----------
:func:`heat_index_f` follows the procedure of the US National Weather Service
as its heat-index page states it [2]_ (and as Anderson et al. [3]_ draw it in
their Fig. 3):

1. Compute the simple formula ``0.5 * (T + 61 + 1.2 (T - 68) + 0.094 RH)``
   (consistent with Steadman's [1]_ tables) and average it with ``T``.
2. If that average is below 80 °F, the simple formula is the heat index.
3. Otherwise use the Rothfusz (1990) regression [4]_ and apply the published
   adjustments: subtract ``(13 - RH)/4 * sqrt((17 - |T - 95|)/17)`` when
   RH < 13 % and 80 <= T <= 112 °F; add ``(RH - 85)/10 * (87 - T)/5`` when
   RH > 85 % and 80 <= T <= 87 °F.

At or below 40 °F the air temperature itself is returned, as MetPy does (the
heat index has no meaning in the cold and the simple formula is not meant for
it).  The heat index is a shade value for a person in light wind; full sun can
add up to about 8 °C (15 °F) [2]_.

Wet-bulb globe temperature (WBGT) estimate
------------------------------------------
A true WBGT needs a natural wet bulb and a black globe.  Weather stations have
neither, so this module estimates it:

* :func:`wbgt_simplified_c` -- the approximation the Australian Bureau of
  Meteorology publishes [5]_ (from the American College of Sports Medicine,
  1984 [6]_): ``WBGT = 0.567 Ta + 0.393 e + 3.94`` with ``e`` the vapour
  pressure [hPa] by the Bureau's own Magnus form.  **Limits** (stated by the
  source): it approximates WBGT for average daytime conditions in full sun
  with moderately high radiation and light wind; it ignores actual sun and
  wind, so it overstates WBGT in cloud, wind, shade and at night, and can
  understate it in strong sun with calm air.
* :func:`wbgt_shade_c` -- the ISO 7243 two-term (no globe load) form
  ``0.7 Tnw + 0.3 Ta`` [7]_ with the natural wet bulb taken as the
  psychrometric wet bulb (ASHRAE balance, :func:`advisory.physics.moisture.wet_bulb_c`).
  That is the natural wet bulb's ventilated limit; in still air the natural
  wet bulb reads higher, so this can understate shade WBGT by about a degree.
* :func:`wbgt_estimate_c` -- the value this tool uses hour by hour: the shade
  form plus ``sun_fraction`` times the (non-negative) excess of the full-sun
  form over it.  ``sun_fraction`` is 1 for an hour in full sun, 0 at night or
  in full shade; the linear blend between the two published forms is this
  tool's own choice, not a published method.

References
----------
.. [1] Steadman, R. G. (1979) The assessment of sultriness. Part I. J. Appl.
   Meteor. 18, 861-873.
.. [2] US National Weather Service, Weather Prediction Center: "The Heat Index
   Equation" (heat-index procedure, simple formula, adjustments).
.. [3] Anderson, G. B., Bell, M. L. & Peng, R. D. (2013) Methods to calculate
   the heat index as an exposure metric in environmental health research.
   Environ. Health Perspect. 121, 1111-1119.
.. [4] Rothfusz, L. P. (1990) The heat index "equation". NWS Southern Region
   Technical Attachment SR 90-23.
.. [5] Australian Bureau of Meteorology: "About the WBGT and Apparent
   Temperature indices" (Thermal comfort observations).
.. [6] American College of Sports Medicine (1984) Prevention of thermal injuries
   during distance running: position stand. Med. J. Aust. 141, 876-879.
.. [7] ISO 7243:2017 Ergonomics of the thermal environment - Assessment of heat
   stress using the WBGT index.
"""

from __future__ import annotations

import numpy as np

from advisory.physics.arrays import asfloat as _asfloat
from advisory.physics.arrays import out as _out
from advisory.physics.moisture import STANDARD_PRESSURE_KPA, wet_bulb_c

__all__ = [
    "c_to_f",
    "f_to_c",
    "heat_index_c",
    "heat_index_f",
    "vapour_pressure_hpa_bom",
    "wbgt_estimate_c",
    "wbgt_shade_c",
    "wbgt_simplified_c",
]




def c_to_f(temp_c):
    """Degrees Celsius to Fahrenheit."""
    return _out(_asfloat(temp_c) * 9.0 / 5.0 + 32.0)


def f_to_c(temp_f):
    """Degrees Fahrenheit to Celsius."""
    return _out((_asfloat(temp_f) - 32.0) * 5.0 / 9.0)


def heat_index_f(air_temp_f, rel_humidity_pct):
    """Heat index by the NWS procedure (Rothfusz regression with adjustments) [°F].

    Parameters
    ----------
    air_temp_f : array_like
        Air temperature [°F].
    rel_humidity_pct : array_like
        Relative humidity [%], 0-100.

    Returns
    -------
    heat_index_f : float or ndarray
        Heat index [°F].  NaN where an input is NaN.

    Notes
    -----
    See the module docstring for the full procedure.  The Rothfusz regression
    reproduces Steadman's table within about ±1.3 °F [2]_; it is not valid far
    outside the temperatures and humidities Steadman considered.

    References
    ----------
    .. [1] Steadman (1979).  .. [2] NWS WPC heat-index equation page.
    .. [4] Rothfusz (1990).
    """
    t, rh = np.broadcast_arrays(_asfloat(air_temp_f), _asfloat(rel_humidity_pct))
    simple = 0.5 * (t + 61.0 + (t - 68.0) * 1.2 + rh * 0.094)
    full = (-42.379 + 2.04901523 * t + 10.14333127 * rh - 0.22475541 * t * rh
            - 6.83783e-3 * t * t - 5.481717e-2 * rh * rh + 1.22874e-3 * t * t * rh
            + 8.5282e-4 * t * rh * rh - 1.99e-6 * t * t * rh * rh)
    with np.errstate(invalid="ignore"):
        dry = (rh < 13.0) & (t >= 80.0) & (t <= 112.0)
        dry_adj = (13.0 - rh) / 4.0 * np.sqrt(np.clip((17.0 - np.abs(t - 95.0)) / 17.0, 0.0, None))
        humid = (rh > 85.0) & (t >= 80.0) & (t <= 87.0)
        humid_adj = (rh - 85.0) / 10.0 * (87.0 - t) / 5.0
        full = full - np.where(dry, dry_adj, 0.0) + np.where(humid, humid_adj, 0.0)
        use_full = 0.5 * (simple + t) >= 80.0
        hi = np.where(use_full, full, simple)
        hi = np.where(t <= 40.0, t, hi)
    hi = np.where(np.isnan(t) | np.isnan(rh), np.nan, hi)
    return _out(hi)


def heat_index_c(air_temp_c, rel_humidity_pct):
    """Heat index by the NWS procedure, in degrees Celsius.

    Converts to Fahrenheit, applies :func:`heat_index_f` (the regression is
    defined in °F) and converts back.

    Parameters
    ----------
    air_temp_c : array_like
        Air temperature [°C].
    rel_humidity_pct : array_like
        Relative humidity [%], 0-100.

    Returns
    -------
    heat_index_c : float or ndarray
        Heat index [°C].

    References
    ----------
    .. [2] NWS WPC heat-index equation page.  .. [4] Rothfusz (1990).
    """
    return f_to_c(heat_index_f(c_to_f(air_temp_c), rel_humidity_pct))


def vapour_pressure_hpa_bom(air_temp_c, rel_humidity_pct):
    """Vapour pressure by the Magnus form the Bureau of Meteorology prints with its WBGT [hPa].

    ``e = RH/100 * 6.105 * exp(17.27 T / (237.7 + T))``.  Kept separate from
    :mod:`advisory.physics.moisture` so that :func:`wbgt_simplified_c` is
    exactly the published formula; the two Magnus forms differ by well under
    1 % at summer temperatures.

    Parameters
    ----------
    air_temp_c : array_like
        Air temperature [°C].
    rel_humidity_pct : array_like
        Relative humidity [%].

    Returns
    -------
    e_hpa : float or ndarray
        Vapour pressure [hPa].

    References
    ----------
    .. [5] Bureau of Meteorology, thermal comfort observations.
    """
    t = _asfloat(air_temp_c)
    return _out(_asfloat(rel_humidity_pct) / 100.0 * 6.105 * np.exp(17.27 * t / (237.7 + t)))


def wbgt_simplified_c(air_temp_c, rel_humidity_pct):
    """Full-sun WBGT estimate by the Bureau of Meteorology approximation [°C].

    ``WBGT = 0.567 Ta + 0.393 e + 3.94`` with ``e`` from
    :func:`vapour_pressure_hpa_bom`.

    Parameters
    ----------
    air_temp_c : array_like
        Air temperature [°C].
    rel_humidity_pct : array_like
        Relative humidity [%].

    Returns
    -------
    wbgt_c : float or ndarray
        Estimated WBGT [°C] for average daytime conditions in full sun,
        moderately high radiation and light wind.

    Notes
    -----
    The source states its limits: no account of actual radiation or wind.  It
    overstates WBGT under cloud, in wind, in shade and at night; it can
    understate it in strong sun with still air.  Use :func:`wbgt_estimate_c`
    for hours that are not in full sun.

    References
    ----------
    .. [5] Bureau of Meteorology, "About the WBGT and Apparent Temperature indices".
    .. [6] American College of Sports Medicine (1984).
    """
    t = _asfloat(air_temp_c)
    e = _asfloat(vapour_pressure_hpa_bom(t, rel_humidity_pct))
    return _out(0.567 * t + 0.393 * e + 3.94)


def wbgt_shade_c(air_temp_c, dew_point_c, pressure_kpa=STANDARD_PRESSURE_KPA):
    """Shade (no radiant load) WBGT estimate, ``0.7 Tw + 0.3 Ta`` [°C].

    The ISO 7243 formula for no solar load, with the natural wet bulb replaced
    by the psychrometric wet bulb from the ASHRAE balance.

    Parameters
    ----------
    air_temp_c : array_like
        Air temperature [°C].
    dew_point_c : array_like
        Dew point [°C].
    pressure_kpa : array_like, default 101.325
        Station pressure [kPa].

    Returns
    -------
    wbgt_c : float or ndarray
        Estimated shade WBGT [°C].

    Notes
    -----
    The psychrometric wet bulb is the ventilated limit of the natural wet bulb;
    in still air the natural wet bulb is warmer, so this may understate shade
    WBGT by about 1 °C.

    References
    ----------
    .. [7] ISO 7243:2017.
    """
    t = _asfloat(air_temp_c)
    tw = _asfloat(wet_bulb_c(t, dew_point_c, pressure_kpa))
    return _out(0.7 * tw + 0.3 * t)


def wbgt_estimate_c(air_temp_c, dew_point_c, sun_fraction=1.0, pressure_kpa=STANDARD_PRESSURE_KPA):
    """Hourly WBGT estimate between shade and full sun [°C].

    ``shade + sun_fraction * max(full_sun - shade, 0)`` with ``shade`` from
    :func:`wbgt_shade_c` and ``full_sun`` from :func:`wbgt_simplified_c`.

    Parameters
    ----------
    air_temp_c : array_like
        Air temperature [°C].
    dew_point_c : array_like
        Dew point [°C] (clipped to the air temperature).
    sun_fraction : array_like, default 1.0
        0 (night, full shade or overcast) to 1 (full sun), clipped to [0, 1].
        A caller may use e.g. 1 for daylight hours, scaled down by cloud.
    pressure_kpa : array_like, default 101.325
        Station pressure [kPa].

    Returns
    -------
    wbgt_c : float or ndarray
        Estimated WBGT [°C].

    Notes
    -----
    The blend is this tool's own interpolation between two published forms,
    not a published method.  It inherits both forms' limits (see the module
    docstring); treat it as a screening estimate, not a measurement.
    """
    t = _asfloat(air_temp_c)
    td = np.minimum(_asfloat(dew_point_c), t)
    e_ratio = 100.0 * _asfloat(vapour_pressure_hpa_bom(td, 100.0)) / _asfloat(vapour_pressure_hpa_bom(t, 100.0))
    sun = _asfloat(wbgt_simplified_c(t, e_ratio))
    t, td, sun, f, p = np.broadcast_arrays(t, td, sun, np.clip(_asfloat(sun_fraction), 0.0, 1.0),
                                           _asfloat(pressure_kpa))
    out = sun.copy()
    # In full sun the result is the full-sun form itself: it exceeds the shade form by at least
    # 4 °C for every air temperature from -10 to 50 °C and dew point up to it, so the wet bulb
    # (the costly part) is solved only for hours not in full sun.
    part = f < 1.0
    if np.any(part):
        shade = _asfloat(wbgt_shade_c(t[part], td[part], p[part]))
        out[part] = shade + f[part] * np.maximum(sun[part] - shade, 0.0)
    return _out(out)
