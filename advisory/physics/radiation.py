"""Long-wave radiation near the ground at night: sky emissivity and net long-wave loss.

All functions are pure and vectorised (scalars or numpy arrays in, floats or arrays
out).  Sign convention: a *loss* is positive (energy leaving the surface).

References
----------
.. [1] Brutsaert, W. (1975) On a derivable formula for long-wave radiation from
   clear skies. Water Resources Research 11, 742-744.
.. [2] Unsworth, M. H. & Monteith, J. L. (1975) Long-wave radiation at the ground
   I. Angular distribution of incoming radiation. Q. J. R. Meteorol. Soc. 101,
   13-24; in the form given by Campbell, G. S. & Norman, J. M. (1998) An
   Introduction to Environmental Biophysics, 2nd ed., Springer (eq. 10.12).
.. [3] Allen, R. G., Pereira, L. S., Raes, D. & Smith, M. (1998) Crop
   evapotranspiration. FAO Irrigation and Drainage Paper 56, eq. 39 and
   Example 11.
.. [4] CODATA 2018 recommended value of the Stefan-Boltzmann constant (exact in
   the 2019 SI).
"""

from __future__ import annotations

import numpy as np

from advisory.physics.arrays import asfloat as _a
from advisory.physics.arrays import out as _out
from advisory.physics.moisture import vapour_pressure_kpa_from_dew_point

__all__ = [
    "STEFAN_BOLTZMANN_W_M2_K4", "STEFAN_BOLTZMANN_MJ_M2_K4_DAY", "ZERO_CELSIUS_K",
    "CLOUD_EMISSION_FACTOR", "SURFACE_EMISSIVITY",
    "blackbody_emittance_w_m2", "clear_sky_emissivity_brutsaert", "cloudy_sky_emissivity",
    "sky_emissivity", "downwelling_longwave_w_m2", "net_longwave_loss_w_m2",
    "fao56_net_longwave_mj_m2_day",
]

#: Stefan-Boltzmann constant [W m-2 K-4] (CODATA 2018 [4]).
STEFAN_BOLTZMANN_W_M2_K4 = 5.670374419e-8
#: Stefan-Boltzmann constant as FAO-56 gives it [MJ m-2 K-4 day-1] ([3], eq. 39).
STEFAN_BOLTZMANN_MJ_M2_K4_DAY = 4.903e-9
#: 0 °C in kelvin.
ZERO_CELSIUS_K = 273.15
#: Share of the clear-sky window that an overcast of low/mid cloud fills [-] ([2]).
CLOUD_EMISSION_FACTOR = 0.84
#: Long-wave emissivity of grass, soil and orchard floor [-] (common practice: 0.95-0.99).
SURFACE_EMISSIVITY = 0.98




def blackbody_emittance_w_m2(temp_c, emissivity=1.0):
    """Radiant emittance of a grey body, ``emissivity * sigma * T**4``.

    Parameters
    ----------
    temp_c : array_like
        Temperature [°C].
    emissivity : array_like, default 1.0
        Emissivity [-].

    Returns
    -------
    emittance : float or ndarray
        Emitted flux density [W m-2].
    """
    tk = _a(temp_c) + ZERO_CELSIUS_K
    return _out(_a(emissivity) * STEFAN_BOLTZMANN_W_M2_K4 * tk**4)


def clear_sky_emissivity_brutsaert(air_temp_c, vapour_pressure_kpa):
    """Effective emissivity of a cloudless sky, Brutsaert (1975).

    ``eps = 1.24 * (e_a / T_a) ** (1/7)`` with ``e_a`` in hPa and ``T_a`` in K,
    derived for a standard atmosphere from screen-level vapour pressure and
    temperature [1]_.

    Parameters
    ----------
    air_temp_c : array_like
        Screen-level air temperature [°C].
    vapour_pressure_kpa : array_like
        Screen-level vapour pressure [kPa].

    Returns
    -------
    emissivity : float or ndarray
        Clear-sky emissivity [-], about 0.6-0.9.
    """
    e_hpa = np.maximum(_a(vapour_pressure_kpa), 1e-6) * 10.0
    tk = _a(air_temp_c) + ZERO_CELSIUS_K
    return _out(1.24 * (e_hpa / tk) ** (1.0 / 7.0))


def cloudy_sky_emissivity(clear_sky_emissivity, cloud_cover_pct, cloud_factor=CLOUD_EMISSION_FACTOR):
    """Sky emissivity under partial cloud, Unsworth & Monteith (1975).

    ``eps = (1 - f c) eps_clear + f c`` with ``c`` the cloud fraction and
    ``f = 0.84`` [2]_: cloud fills most of the atmospheric window and radiates
    close to the screen-level temperature.

    Parameters
    ----------
    clear_sky_emissivity : array_like
        Emissivity of the cloudless sky [-].
    cloud_cover_pct : array_like
        Cloud cover [%]; opaque (low and middle) cloud is meant.
    cloud_factor : float, default 0.84
        ``f`` above [-].

    Returns
    -------
    emissivity : float or ndarray
        All-sky emissivity [-], at most 1.
    """
    c = np.clip(_a(cloud_cover_pct) / 100.0, 0.0, 1.0)
    eps = (1.0 - cloud_factor * c) * _a(clear_sky_emissivity) + cloud_factor * c
    return _out(np.minimum(eps, 1.0))


def sky_emissivity(air_temp_c, dew_point_c, cloud_cover_pct=0.0):
    """All-sky emissivity from screen temperature, dew point and cloud cover.

    Brutsaert's clear sky [1]_ corrected for cloud after Unsworth & Monteith [2]_.

    Parameters
    ----------
    air_temp_c : array_like
        Air temperature [°C].
    dew_point_c : array_like
        Dew point [°C].
    cloud_cover_pct : array_like, default 0
        Cloud cover [%].

    Returns
    -------
    emissivity : float or ndarray
        Sky emissivity [-].
    """
    e_a = vapour_pressure_kpa_from_dew_point(dew_point_c)
    return cloudy_sky_emissivity(clear_sky_emissivity_brutsaert(air_temp_c, e_a), cloud_cover_pct)


def downwelling_longwave_w_m2(air_temp_c, dew_point_c, cloud_cover_pct=0.0):
    """Long-wave radiation from the sky onto a horizontal surface.

    Parameters
    ----------
    air_temp_c, dew_point_c : array_like
        Screen-level air temperature and dew point [°C].
    cloud_cover_pct : array_like, default 0
        Cloud cover [%].

    Returns
    -------
    flux : float or ndarray
        Downwelling long-wave flux density [W m-2].
    """
    return _out(_a(sky_emissivity(air_temp_c, dew_point_c, cloud_cover_pct))
                * _a(blackbody_emittance_w_m2(air_temp_c)))


def net_longwave_loss_w_m2(air_temp_c, dew_point_c, cloud_cover_pct=0.0, surface_temp_c=None,
                           surface_emissivity=SURFACE_EMISSIVITY):
    """Net long-wave loss of a surface under the night sky (positive = loss).

    ``L_net = eps_s sigma T_s^4 - eps_s L_down`` (Kirchhoff: the surface absorbs
    the share ``eps_s`` of the sky's radiation).  With the surface at air
    temperature this is ``eps_s sigma T_a^4 (1 - eps_sky)``.

    Parameters
    ----------
    air_temp_c, dew_point_c : array_like
        Screen-level air temperature and dew point [°C].
    cloud_cover_pct : array_like, default 0
        Cloud cover [%].
    surface_temp_c : array_like, optional
        Surface temperature [°C]; defaults to the air temperature.
    surface_emissivity : float, default 0.98
        Surface emissivity [-].

    Returns
    -------
    loss : float or ndarray
        Net long-wave loss [W m-2].

    References
    ----------
    .. [1] Brutsaert (1975); [2] Unsworth & Monteith (1975).
    """
    ts = air_temp_c if surface_temp_c is None else surface_temp_c
    up = _a(blackbody_emittance_w_m2(ts, surface_emissivity))
    down = _a(downwelling_longwave_w_m2(air_temp_c, dew_point_c, cloud_cover_pct))
    return _out(up - _a(surface_emissivity) * down)


def fao56_net_longwave_mj_m2_day(tmax_c, tmin_c, vapour_pressure_kpa, rs_over_rso):
    """Daily net long-wave radiation by FAO-56 eq. 39.

    ``R_nl = sigma (T_max,K^4 + T_min,K^4)/2 (0.34 - 0.14 sqrt(e_a)) (1.35 R_s/R_so - 0.35)``
    with FAO-56's ``sigma = 4.903e-9 MJ m-2 K-4 day-1`` and ``K = °C + 273.16`` [3]_.

    Parameters
    ----------
    tmax_c, tmin_c : array_like
        Daily maximum and minimum air temperature [°C].
    vapour_pressure_kpa : array_like
        Actual vapour pressure [kPa].
    rs_over_rso : array_like
        Relative shortwave radiation ``R_s/R_so`` [-], limited to 1.

    Returns
    -------
    r_nl : float or ndarray
        Net outgoing long-wave radiation [MJ m-2 day-1].
    """
    kmax = _a(tmax_c) + 273.16
    kmin = _a(tmin_c) + 273.16
    sig = STEFAN_BOLTZMANN_MJ_M2_K4_DAY * (kmax**4 + kmin**4) / 2.0
    humid = 0.34 - 0.14 * np.sqrt(_a(vapour_pressure_kpa))
    cloud = 1.35 * np.minimum(_a(rs_over_rso), 1.0) - 0.35
    return _out(sig * humid * cloud)
