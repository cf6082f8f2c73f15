"""Atmospheric moisture: vapour pressure, dew and frost point, relative humidity, wet bulb.

All functions are pure and vectorised: they accept scalars or numpy arrays (and
pandas objects through numpy broadcasting) and return numpy arrays or floats.

Conventions
-----------
* Relative humidity is taken **with respect to liquid water at all temperatures**,
  as meteorological hygrometers report it (WMO No. 8, common practice).  So
  :func:`dew_point_c_from_rh` and :func:`rel_humidity_pct_from_dew_point` use the
  Magnus form over water, also below 0 °C.
* Over ice: :func:`frost_point_c` gives the temperature at which the air's vapour
  would saturate over ice (hoar frost forms on buds there).  Below 0 °C it is
  above the dew point.
* Wet-bulb temperature (:func:`wet_bulb_c`) solves the ASHRAE psychrometric
  balance, with a wet bulb over liquid water at or above 0 °C and an ice bulb
  below, as ASHRAE Handbook - Fundamentals (2017, ch. 1, eqs. 33 and 35) does.

References
----------
.. [1] Alduchov, O. A. & Eskridge, R. E. (1996) Improved Magnus form approximation
   of saturation vapor pressure. J. Appl. Meteor. 35, 601-609.  (AERK over water:
   6.1094, 17.625, 243.04; AERKi over ice: 6.1121, 22.587, 273.86.)
.. [2] ASHRAE (2017) Handbook - Fundamentals, chapter 1, Psychrometrics.
.. [3] Allen, R. G. et al. (1998) Crop evapotranspiration. FAO Irrigation and
   Drainage Paper 56, eq. 7 (pressure from elevation), eq. 8 (psychrometric
   constant), eq. 11 (saturation vapour pressure).
.. [4] Stull, R. (2011) Wet-bulb temperature from relative humidity and air
   temperature. J. Appl. Meteor. Climatol. 50, 2267-2269.
"""

from __future__ import annotations

import numpy as np

from advisory.physics.arrays import asfloat as _asfloat
from advisory.physics.arrays import out as _out

# Alduchov & Eskridge (1996) [1] coefficients; pressures in kPa.
_A_WATER_KPA, _B_WATER, _C_WATER_C = 0.61094, 17.625, 243.04
_A_ICE_KPA, _B_ICE, _C_ICE_C = 0.61121, 22.587, 273.86

#: Standard sea-level pressure [kPa].
STANDARD_PRESSURE_KPA = 101.325
#: Ratio of the molecular masses of water and dry air [-] (ASHRAE [2]).
_EPSILON = 0.621945




def saturation_vapour_pressure_kpa(temp_c, over_ice=False):
    """Saturation vapour pressure by the Magnus form of Alduchov & Eskridge (1996).

    Parameters
    ----------
    temp_c : array_like
        Temperature [°C].
    over_ice : bool or array_like of bool, default False
        Saturation over a plane ice surface instead of liquid water.

    Returns
    -------
    e_s : float or ndarray
        Saturation vapour pressure [kPa].

    References
    ----------
    .. [1] Alduchov & Eskridge (1996), AERK and AERKi.
    """
    t = _asfloat(temp_c)
    if type(over_ice) is bool:  # one surface for all: only its curve
        if over_ice:
            return _out(_A_ICE_KPA * np.exp(_B_ICE * t / (t + _C_ICE_C)))
        return _out(_A_WATER_KPA * np.exp(_B_WATER * t / (t + _C_WATER_C)))
    water = _A_WATER_KPA * np.exp(_B_WATER * t / (t + _C_WATER_C))
    ice = _A_ICE_KPA * np.exp(_B_ICE * t / (t + _C_ICE_C))
    return _out(np.where(np.asarray(over_ice, dtype=bool), ice, water))


def vapour_pressure_kpa_from_dew_point(dew_point_c):
    """Actual vapour pressure from the dew point (over water) [kPa].

    Parameters
    ----------
    dew_point_c : array_like
        Dew point [°C].

    Returns
    -------
    e_a : float or ndarray
        Vapour pressure [kPa].
    """
    return saturation_vapour_pressure_kpa(dew_point_c)


def dew_point_c_from_vapour_pressure(vapour_pressure_kpa):
    """Dew point over liquid water from vapour pressure, inverting AERK [1].

    Parameters
    ----------
    vapour_pressure_kpa : array_like
        Vapour pressure [kPa], > 0.

    Returns
    -------
    dew_point_c : float or ndarray
        Dew point [°C].
    """
    g = np.log(_asfloat(vapour_pressure_kpa) / _A_WATER_KPA)
    return _out(_C_WATER_C * g / (_B_WATER - g))


def dew_point_c_from_rh(air_temp_c, rel_humidity_pct):
    """Dew point from air temperature and relative humidity (Magnus, over water).

    Relative humidity is taken with respect to water at all temperatures (WMO
    convention), so the result is a dew point, not a frost point, below 0 °C.

    Parameters
    ----------
    air_temp_c : array_like
        Air temperature [°C].
    rel_humidity_pct : array_like
        Relative humidity [%], in (0, 100].

    Returns
    -------
    dew_point_c : float or ndarray
        Dew point [°C].

    References
    ----------
    .. [1] Alduchov & Eskridge (1996).
    """
    t = _asfloat(air_temp_c)
    rh = _asfloat(rel_humidity_pct)
    g = np.log(rh / 100.0) + _B_WATER * t / (t + _C_WATER_C)
    return _out(_C_WATER_C * g / (_B_WATER - g))


def rel_humidity_pct_from_dew_point(air_temp_c, dew_point_c):
    """Relative humidity (with respect to water) from air temperature and dew point.

    Parameters
    ----------
    air_temp_c : array_like
        Air temperature [°C].
    dew_point_c : array_like
        Dew point [°C].

    Returns
    -------
    rel_humidity_pct : float or ndarray
        Relative humidity [%].  Not clipped: a dew point above the air
        temperature gives more than 100 %.
    """
    return _out(100.0 * _asfloat(saturation_vapour_pressure_kpa(dew_point_c))
                / _asfloat(saturation_vapour_pressure_kpa(air_temp_c)))


def frost_point_c(dew_point_c):
    """Frost point: the temperature at which the air's vapour saturates over ice.

    Parameters
    ----------
    dew_point_c : array_like
        Dew point over water [°C].

    Returns
    -------
    frost_point_c : float or ndarray
        Frost point [°C].  Where the dew point is at or above 0 °C the dew point
        itself is returned (no ice surface).

    References
    ----------
    .. [1] Alduchov & Eskridge (1996), AERKi inverted.
    """
    td = _asfloat(dew_point_c)
    e = _asfloat(saturation_vapour_pressure_kpa(td))
    g = np.log(e / _A_ICE_KPA)
    tf = _C_ICE_C * g / (_B_ICE - g)
    return _out(np.where(td >= 0.0, td, tf))


def pressure_kpa_from_elevation(elevation_m):
    """Mean atmospheric pressure at an elevation, FAO-56 eq. 7.

    Parameters
    ----------
    elevation_m : array_like
        Elevation above sea level [m].

    Returns
    -------
    pressure_kpa : float or ndarray
        Atmospheric pressure [kPa].

    References
    ----------
    .. [3] Allen et al. (1998) FAO-56, eq. 7.
    """
    z = _asfloat(elevation_m)
    return _out(101.3 * ((293.0 - 0.0065 * z) / 293.0) ** 5.26)


def humidity_ratio_from_vapour_pressure(vapour_pressure_kpa, pressure_kpa=STANDARD_PRESSURE_KPA):
    """Humidity ratio (mixing ratio) [kg water / kg dry air], ASHRAE eq. 20."""
    e = _asfloat(vapour_pressure_kpa)
    return _out(_EPSILON * e / (_asfloat(pressure_kpa) - e))


def _wet_bulb_humidity_ratio(wet_bulb_c, air_temp_c, pressure_kpa, ice):
    """Humidity ratio implied by a trial wet bulb, ASHRAE (2017) eq. 33 (water) or 35 (ice)."""
    tw = wet_bulb_c
    t = air_temp_c
    es = np.asarray(saturation_vapour_pressure_kpa(tw, over_ice=ice))
    ws = _EPSILON * es / (pressure_kpa - es)
    if ice is True:
        return ((2830.0 - 0.24 * tw) * ws - 1.006 * (t - tw)) / (2830.0 + 1.86 * t - 2.1 * tw)
    water_w = ((2501.0 - 2.326 * tw) * ws - 1.006 * (t - tw)) / (2501.0 + 1.86 * t - 4.186 * tw)
    if ice is False:
        return water_w
    ice_w = ((2830.0 - 0.24 * tw) * ws - 1.006 * (t - tw)) / (2830.0 + 1.86 * t - 2.1 * tw)
    return np.where(ice, ice_w, water_w)


def _bisect_wet_bulb(lo, hi, t, p, w, ice, iterations=14):
    """Bisection for the wet bulb on one branch (implied humidity ratio rises with the trial),
    finished by one secant step across the last bracket.

    14 halvings of a bracket at most 60 K wide leave at most 0.004 K, over which the
    balance is nearly linear; the secant step then lands within about 1e-6 K.
    """
    for _ in range(iterations):
        mid = 0.5 * (lo + hi)
        too_wet = _wet_bulb_humidity_ratio(mid, t, p, ice) > w
        hi = np.where(too_wet, mid, hi)
        lo = np.where(too_wet, lo, mid)
    f_lo = _wet_bulb_humidity_ratio(lo, t, p, ice) - w
    f_hi = _wet_bulb_humidity_ratio(hi, t, p, ice) - w
    with np.errstate(invalid="ignore", divide="ignore"):
        step = np.where(f_hi != f_lo, f_lo / (f_lo - f_hi), 0.5)
    return lo + np.clip(step, 0.0, 1.0) * (hi - lo)


def wet_bulb_c(air_temp_c, dew_point_c, pressure_kpa=STANDARD_PRESSURE_KPA):
    """Thermodynamic wet-bulb temperature from air temperature and dew point.

    Solves the ASHRAE psychrometric balance (Handbook - Fundamentals 2017, ch. 1,
    eq. 33 for a wet bulb at or above 0 °C, eq. 35 for an ice bulb below) for
    the wet bulb by bisection.  Saturation pressures use the Magnus form of
    Alduchov & Eskridge (1996) over water or ice as the bulb's surface requires.

    The two equations do not meet at 0 °C: in dry air a little above freezing
    both an ice bulb just below 0 °C and a water bulb just above it balance the
    same humidity ratio.  There the ice-bulb solution is returned (each branch
    is solved on its own, the ice branch first), so the result never depends on
    the search path; it is also the colder, safer value for frost work, where
    wetted buds ice over.

    Parameters
    ----------
    air_temp_c : array_like
        Air (dry-bulb) temperature [°C].
    dew_point_c : array_like
        Dew point [°C]; values above the air temperature are clipped to it.
    pressure_kpa : array_like, default 101.325
        Station pressure [kPa] (see :func:`pressure_kpa_from_elevation`).

    Returns
    -------
    wet_bulb_c : float or ndarray
        Wet-bulb temperature [°C], between the dew point and the air temperature.

    References
    ----------
    .. [2] ASHRAE (2017) Handbook - Fundamentals, ch. 1, eqs. 20, 33, 35.
    .. [1] Alduchov & Eskridge (1996).
    """
    t, td, p = np.broadcast_arrays(_asfloat(air_temp_c), _asfloat(dew_point_c), _asfloat(pressure_kpa))
    td = np.minimum(td, t)
    w = _EPSILON * (e := np.asarray(saturation_vapour_pressure_kpa(td))) / (p - e)
    # Ice branch on [dew point, min(air, 0)]: it has a root when the implied ratio
    # at the top of that interval reaches the air's humidity ratio.
    ice_hi = np.minimum(t, 0.0)
    ice_lo = np.minimum(td, ice_hi)
    ice_has_root = _wet_bulb_humidity_ratio(ice_hi, t, p, True) >= w
    tw_ice = _bisect_wet_bulb(ice_lo.astype(float), ice_hi.astype(float), t, p, w, True)
    # Water branch on [max(dew point, 0), air].
    water_lo = np.minimum(np.maximum(td, 0.0), t)
    tw_water = _bisect_wet_bulb(water_lo.astype(float), t.astype(float), t, p, w, False)
    # Below 0 °C air with no ice root is supersaturated over ice: the bulb stays at the air temperature.
    out = np.where(ice_has_root, tw_ice, np.where(t >= 0.0, tw_water, t))
    return _out(out)


def wet_bulb_stull_c(air_temp_c, rel_humidity_pct):
    """Wet-bulb temperature by the empirical fit of Stull (2011).

    Valid at sea-level pressure for RH 5-99 % and air temperature -20 to 50 °C,
    with errors mostly within -1 to +0.65 °C (Stull 2011).  Kept as an
    independent cross-check of :func:`wet_bulb_c`.

    Parameters
    ----------
    air_temp_c : array_like
        Air temperature [°C].
    rel_humidity_pct : array_like
        Relative humidity [%].

    Returns
    -------
    wet_bulb_c : float or ndarray
        Wet-bulb temperature [°C].

    References
    ----------
    .. [4] Stull (2011), eq. 1.
    """
    t = _asfloat(air_temp_c)
    rh = _asfloat(rel_humidity_pct)
    return _out(t * np.arctan(0.151977 * np.sqrt(rh + 8.313659))
                + np.arctan(t + rh) - np.arctan(rh - 1.676331)
                + 0.00391838 * rh ** 1.5 * np.arctan(0.023101 * rh) - 4.686035)


def psychrometric_constant_kpa_per_c(pressure_kpa=STANDARD_PRESSURE_KPA):
    """Psychrometric constant, FAO-56 eq. 8 [kPa/°C]."""
    return _out(0.665e-3 * _asfloat(pressure_kpa))
