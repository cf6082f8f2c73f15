"""Physical model of nocturnal cooling for blocks without a history.

Brunt's analysis of a ground surface losing net long-wave radiation ``R`` at a
constant rate gives a temperature falling with the square root of time [1]_::

    T(t) = T_ss - b sqrt(t - t_ss),      b = 2 R / (sqrt(pi) mu)

where ``t_ss`` is sunset and ``mu = sqrt(k rho c)`` the thermal admittance
(effusivity) of the ground-air system [J m-2 K-1 s-1/2].  Here

* ``R`` is the net long-wave loss at the reference time: Brutsaert's clear-sky
  emissivity [2]_ with the Unsworth & Monteith cloud correction [3]_
  (:mod:`advisory.physics.radiation`);
* ``mu = 1500 J m-2 K-1 s-1/2``, the admittance of a moist mineral soil
  (tabulated values for moist sandy and clay soils span about 1000-2500 [4]_,
  from memory, unverified); screen-level air follows the surface because the
  nocturnal boundary layer couples them;
* wind damps the cooling by mixing warmer air from above: ``b`` is divided by
  ``1 + u / u_c`` with ``u_c = 10 m/s`` (a 10-m wind of 10 m/s halves the
  radiative drop; a judgement, from memory, unverified);
* once the air reaches its dew point, dew or frost deposition releases latent
  heat: of every joule lost only the share ``gamma / (Delta + gamma)`` still
  cools the air -- the equilibrium partition of Slatyer & McIlroy [5]_, with
  ``Delta`` the slope of the saturation vapour pressure curve at the dew point
  (FAO-56 eq. 13 [6]_) and ``gamma`` the psychrometric constant (FAO-56 eq. 8).

The forecast is anchored on the observed temperature at the reference time:
the drop after it is ``b (sqrt(h_ss + t) - sqrt(h_ss))`` with ``h_ss`` the
hours from sunset to the reference time.  The minimum is taken 30 minutes after
sunrise (common practice: net radiation stays negative until the sun is a few
degrees up).  After the minimum the curve warms linearly at 1.5 K/h on a clear
morning, less under cloud (common practice, from memory, unverified).

All functions are pure and vectorised over blocks.

References
----------
.. [1] Brunt, D. (1941) Physical and Dynamical Meteorology, 2nd ed., Cambridge
   University Press.
.. [2] Brutsaert, W. (1975) Water Resources Research 11, 742-744.
.. [3] Unsworth, M. H. & Monteith, J. L. (1975) Q. J. R. Meteorol. Soc. 101, 13-24.
.. [4] Oke, T. R. (1987) Boundary Layer Climates, 2nd ed., Routledge, table 2.1.
.. [5] Slatyer, R. O. & McIlroy, I. C. (1961) Practical Microclimatology, CSIRO/UNESCO.
.. [6] Allen, R. G. et al. (1998) FAO Irrigation and Drainage Paper 56.
.. [7] Snyder, R. L. & de Melo-Abreu, J. P. (2005) Frost Protection: fundamentals,
   practice and economics, Vol. 1. FAO Environment and Natural Resources Series 10
   (square-root-of-time cooling from sunset to sunrise).
"""

from __future__ import annotations

import numpy as np

from advisory.physics.arrays import asfloat as _a
from advisory.physics.moisture import STANDARD_PRESSURE_KPA, psychrometric_constant_kpa_per_c
from advisory.physics.radiation import net_longwave_loss_w_m2

__all__ = [
    "THERMAL_ADMITTANCE", "WIND_DAMPING_SCALE_MS", "MINIMUM_LAG_H", "MORNING_WARMING_K_PER_H",
    "CURVE_END_AFTER_SUNRISE_H", "brunt_coefficient", "latent_share", "drop_after_reference",
    "physical_minimum", "PhysicalNight", "physical_night", "curve_fraction", "hours_to_fraction",
]

#: Effective thermal admittance of the ground-air system [J m-2 K-1 s-1/2].
THERMAL_ADMITTANCE = 1500.0
#: Wind speed that halves the radiative cooling [m s-1].
WIND_DAMPING_SCALE_MS = 10.0
#: The minimum comes this long after sunrise [h].
MINIMUM_LAG_H = 0.5
#: Warming rate after the minimum on a clear morning [K h-1].
MORNING_WARMING_K_PER_H = 1.5
#: The hourly curve ends this long after sunrise [h].
CURVE_END_AFTER_SUNRISE_H = 2.0



def _calm(wind_speed_ms):
    w = _a(wind_speed_ms)
    return np.where(np.isfinite(w), np.maximum(w, 0.0), 0.0)


def _clear(cloud_cover_pct):
    c = _a(cloud_cover_pct)
    return np.where(np.isfinite(c), np.clip(c, 0.0, 100.0), 0.0)


def brunt_coefficient(air_temp_c, dew_point_c, wind_speed_ms=0.0, cloud_cover_pct=0.0, *,
                      admittance=THERMAL_ADMITTANCE, wind_scale_ms=WIND_DAMPING_SCALE_MS):
    """Brunt's cooling coefficient ``b`` of ``T = T0 - b sqrt(t)``.

    Parameters
    ----------
    air_temp_c, dew_point_c : array_like
        Air temperature and dew point at the reference time [°C].
    wind_speed_ms : array_like, default 0
        Wind speed [m s-1]; NaN is taken as calm.
    cloud_cover_pct : array_like, default 0
        Cloud cover [%]; NaN is taken as clear.
    admittance : float
        Thermal admittance of the ground-air system [J m-2 K-1 s-1/2].
    wind_scale_ms : float
        Wind speed that halves the cooling [m s-1].

    Returns
    -------
    b : ndarray
        Cooling coefficient [K h-1/2] (>= 0).

    References
    ----------
    .. [1] Brunt (1941); [2] Brutsaert (1975); [3] Unsworth & Monteith (1975).
    """
    loss = np.maximum(_a(net_longwave_loss_w_m2(air_temp_c, dew_point_c, _clear(cloud_cover_pct))), 0.0)
    b_si = 2.0 * loss / (np.sqrt(np.pi) * admittance)  # K s-1/2
    return b_si * 60.0 / (1.0 + _calm(wind_speed_ms) / wind_scale_ms)  # sqrt(3600 s) = 60


def latent_share(dew_point_c, pressure_kpa=STANDARD_PRESSURE_KPA):
    """Share of the heat loss that still cools the air once dew or frost forms.

    ``gamma / (Delta + gamma)`` with ``Delta`` the slope of the saturation vapour
    pressure curve at the dew point (FAO-56 eq. 13) and ``gamma`` the
    psychrometric constant (FAO-56 eq. 8).

    Parameters
    ----------
    dew_point_c : array_like
        Dew point [°C].
    pressure_kpa : array_like, default 101.325
        Air pressure [kPa].

    Returns
    -------
    share : ndarray
        Dimensionless, about 0.7 at -10 °C, 0.6 at 0 °C and 0.4 at 15 °C.
    """
    td = _a(dew_point_c)
    es = 0.6108 * np.exp(17.27 * td / (td + 237.3))
    delta = 4098.0 * es / (td + 237.3) ** 2
    gamma = _a(psychrometric_constant_kpa_per_c(pressure_kpa))
    return gamma / (delta + gamma)


def drop_after_reference(b, hours_since_sunset, hours_after_reference, air_temp_c, dew_point_c,
                         pressure_kpa=STANDARD_PRESSURE_KPA):
    """Temperature fall after the reference time, with the slow-down below the dew point.

    Parameters
    ----------
    b : array_like
        Brunt coefficient [K h-1/2].
    hours_since_sunset : array_like
        Hours from sunset to the reference time (> 0) [h].
    hours_after_reference : array_like
        Hours after the reference time (>= 0) [h]; broadcasts against the rest
        (e.g. shape (H, 1) against blocks of shape (N,)).
    air_temp_c, dew_point_c : array_like
        Air temperature and dew point at the reference time [°C].
    pressure_kpa : array_like, default 101.325
        Air pressure [kPa].

    Returns
    -------
    drop : ndarray
        Fall below the reference temperature [K] (>= 0).
    """
    h0 = np.maximum(_a(hours_since_sunset), 0.0)
    t = np.maximum(_a(hours_after_reference), 0.0)
    dry = _a(b) * (np.sqrt(h0 + t) - np.sqrt(h0))
    room = np.maximum(_a(air_temp_c) - _a(dew_point_c), 0.0)
    share = latent_share(dew_point_c, pressure_kpa)
    return np.where(dry <= room, dry, room + (dry - room) * share)


def physical_minimum(air_temp_c, dew_point_c, wind_speed_ms, cloud_cover_pct, hours_since_sunset,
                     hours_to_sunrise, *, minimum_lag_h=MINIMUM_LAG_H, pressure_kpa=STANDARD_PRESSURE_KPA):
    """Night minimum by the physical model (no site history needed).

    Parameters
    ----------
    air_temp_c, dew_point_c : array_like
        Air temperature and dew point at the reference time [°C].
    wind_speed_ms : array_like
        Wind speed at the reference time [m s-1]; NaN is taken as calm.
    cloud_cover_pct : array_like
        Cloud cover at the reference time [%]; NaN is taken as clear.
    hours_since_sunset : array_like
        Sunset to reference time [h].
    hours_to_sunrise : array_like
        Reference time to sunrise [h].
    minimum_lag_h : float, default 0.5
        The minimum comes this long after sunrise [h].
    pressure_kpa : array_like, default 101.325
        Air pressure [kPa].

    Returns
    -------
    minimum_c : ndarray
        Forecast minimum air temperature [°C].
    """
    b = brunt_coefficient(air_temp_c, dew_point_c, wind_speed_ms, cloud_cover_pct)
    drop = drop_after_reference(b, hours_since_sunset, _a(hours_to_sunrise) + minimum_lag_h, air_temp_c,
                                dew_point_c, pressure_kpa)
    return _a(air_temp_c) - drop


class PhysicalNight:
    """Physical-model quantities of N blocks for one night (arrays of shape (N,)).

    Attributes
    ----------
    b : Brunt coefficient [K h-1/2]; ``minimum_c`` : physical minimum [°C];
    hours_to_minimum : reference time to the minimum [h]; ``warming_k_per_h`` :
    warming rate after the minimum [K h-1]; plus the inputs.
    """

    def __init__(self, air_temp_c, dew_point_c, wind_speed_ms, cloud_cover_pct, hours_since_sunset,
                 hours_to_sunrise, minimum_lag_h=MINIMUM_LAG_H, pressure_kpa=STANDARD_PRESSURE_KPA):
        self.air_temp_c = _a(air_temp_c)
        self.dew_point_c = _a(dew_point_c)
        self.wind_speed_ms = _calm(wind_speed_ms)
        self.cloud_cover_pct = _clear(cloud_cover_pct)
        self.hours_since_sunset = np.maximum(_a(hours_since_sunset), 1e-3)
        self.hours_to_minimum = np.maximum(_a(hours_to_sunrise) + minimum_lag_h, 0.0)
        self.pressure_kpa = pressure_kpa
        self.b = brunt_coefficient(self.air_temp_c, self.dew_point_c, self.wind_speed_ms,
                                   self.cloud_cover_pct)
        self.total_drop = drop_after_reference(self.b, self.hours_since_sunset, self.hours_to_minimum,
                                               self.air_temp_c, self.dew_point_c, pressure_kpa)
        self.minimum_c = self.air_temp_c - self.total_drop
        self.warming_k_per_h = MORNING_WARMING_K_PER_H * (1.0 - 0.75 * self.cloud_cover_pct / 100.0)

    def __len__(self) -> int:
        return len(self.air_temp_c)

    def subset(self, idx) -> PhysicalNight:
        """The same quantities for a subset of blocks (index array or boolean mask)."""
        out = object.__new__(PhysicalNight)
        for name, value in vars(self).items():
            is_block_array = isinstance(value, np.ndarray) and value.ndim >= 1 and len(value) == len(self)
            setattr(out, name, value[idx] if is_block_array else value)
        return out


def physical_night(states) -> PhysicalNight:
    """:class:`PhysicalNight` from an evening-state frame (see :mod:`advisory.forecast.evening`)."""
    return PhysicalNight(states["air_temp_c"].to_numpy(float), states["dew_point_c"].to_numpy(float),
                         states["wind_speed_ms"].to_numpy(float), states["cloud_cover_pct"].to_numpy(float),
                         states["hours_since_sunset"].to_numpy(float),
                         states["hours_to_sunrise"].to_numpy(float))


def curve_fraction(night: PhysicalNight, hours_after_reference):
    """Shape of the night curve: share of the reference-to-minimum fall reached by a time.

    ``0`` at the reference time rising to ``1`` at the minimum (square root of
    time, slowed below the dew point); after the minimum the value is not a
    share but is returned as ``1`` -- the warming branch is added by the
    caller from ``warming_k_per_h``.

    Parameters
    ----------
    night : PhysicalNight
    hours_after_reference : array_like
        Shape (H, N) or (H, 1) [h].

    Returns
    -------
    fraction : ndarray
        Shape (H, N), in [0, 1].
    """
    t = np.clip(_a(hours_after_reference), 0.0, night.hours_to_minimum)
    drop = drop_after_reference(night.b, night.hours_since_sunset, t, night.air_temp_c, night.dew_point_c,
                                night.pressure_kpa)
    total = night.total_drop
    # a calm, saturated or warming night has no drop: use the plain square-root shape
    h0 = night.hours_since_sunset
    with np.errstate(invalid="ignore", divide="ignore"):
        sqrt_shape = (np.sqrt(h0 + t) - np.sqrt(h0)) / np.maximum(np.sqrt(h0 + night.hours_to_minimum)
                                                                  - np.sqrt(h0), 1e-9)
        frac = np.where(total > 1e-6, drop / np.where(total > 1e-6, total, 1.0), sqrt_shape)
    return np.clip(frac, 0.0, 1.0)


def hours_to_fraction(night: PhysicalNight, fraction):
    """Inverse of :func:`curve_fraction`: hours after the reference time to reach a share of the fall.

    Exact inversion of the square-root law and its slowed branch below the dew
    point, so crossing times need no time grid.

    Parameters
    ----------
    night : PhysicalNight
    fraction : array_like (N,)
        Share of the reference-to-minimum fall, in [0, 1].

    Returns
    -------
    hours : ndarray (N,)
        In [0, ``night.hours_to_minimum``].
    """
    s = np.clip(_a(fraction), 0.0, 1.0)
    h0 = night.hours_since_sunset
    tm = night.hours_to_minimum
    sq0 = np.sqrt(h0)
    target = s * night.total_drop
    room = np.maximum(night.air_temp_c - night.dew_point_c, 0.0)
    share = latent_share(night.dew_point_c, night.pressure_kpa)
    dry = np.where(target <= room, target, room + (target - room) / np.maximum(share, 1e-6))
    b = night.b
    with np.errstate(invalid="ignore", divide="ignore"):
        t_phys = (dry / np.where(b > 0, b, 1.0) + sq0) ** 2 - h0
        t_shape = (s * (np.sqrt(h0 + tm) - sq0) + sq0) ** 2 - h0
    t = np.where(night.total_drop > 1e-6, t_phys, t_shape)
    return np.clip(t, 0.0, tm)
