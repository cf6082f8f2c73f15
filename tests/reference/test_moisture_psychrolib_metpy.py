"""Dew point <-> relative humidity against psychrolib (ASHRAE) and MetPy over a grid.

What the references compute
---------------------------
* psychrolib implements ASHRAE Handbook - Fundamentals (2017) ch. 1: saturation
  pressure by Hyland & Wexler (eqs. 5 and 6), **over ice at and below the
  triple point (0.01 °C)**.  So below freezing its "relative humidity" is with
  respect to ice and its "dew point" is a frost point.  Above freezing it is
  compared directly; below, both sides are brought to the same quantity: the
  vapour pressure psychrolib implies, and the frost point of that vapour
  pressure (ours: AERKi of Alduchov & Eskridge 1996).
* MetPy uses Bolton (1980) over liquid water at all temperatures, as we do, so
  it is compared directly over its stated range.

Tolerances (each derived, not fitted)
-------------------------------------
A relative error ``r`` in saturation vapour pressure moves a dew point by
about ``r / (d ln e_s / dT)``, with ``d ln e_s / dT = b c / (T + c)**2`` of the
Magnus form (0.050 /K at 50 °C, the smallest on our grid).

* AERK against the Wexler/Hyland-Wexler reference: relative error within
  about 0.4 % from -40 to 50 °C (Alduchov & Eskridge 1996; from memory,
  unverified), so 0.004 / 0.050 = 0.08 °C -> **0.1 °C** on dew points, and
  2 x 0.4 % = **0.8 %** (relative) on humidities, a ratio of two pressures.
  AERKi over ice, within about 0.2 % (same source, from memory, unverified),
  with ``d ln e_i / dT`` >= 0.082 /K below 0 °C: **0.03 °C** on frost points.
* Bolton (1980) quotes 0.3 % or better for -35 to 35 °C (as documented for
  NCL's satvpr_water_bolton); with AERK's 0.4 %: 0.7 %, and
  0.007 / 0.055 (at 35 °C) = **0.13 °C** on dew points, **1.4 %** (relative) on
  humidities.

References
----------
.. [1] ASHRAE (2017) Handbook - Fundamentals, ch. 1 (via psychrolib 2.5).
.. [2] Bolton, D. (1980) The computation of equivalent potential temperature.
   Mon. Wea. Rev. 108, 1046-1053, eq. 10 (via MetPy).
.. [3] Alduchov, O. A. & Eskridge, R. E. (1996) J. Appl. Meteor. 35, 601-609.
"""

from __future__ import annotations

import warnings

import numpy as np
import psychrolib
import pytest

from advisory.physics import moisture as m

psychrolib.SetUnitSystem(psychrolib.SI)

AIR = np.arange(-40.0, 50.01, 2.5)
RH = np.array([5.0, 10.0, 20.0, 40.0, 60.0, 80.0, 95.0, 100.0])
T_GRID, RH_GRID = (a.ravel() for a in np.meshgrid(AIR, RH))

_psy_dew = np.vectorize(lambda t, rh: psychrolib.GetTDewPointFromRelHum(t, rh / 100.0))
_psy_rh = np.vectorize(lambda t, td: 100.0 * psychrolib.GetRelHumFromTDewPoint(t, td))
_psy_sat = np.vectorize(psychrolib.GetSatVapPres)
_psy_vap = np.vectorize(lambda t, rh: psychrolib.GetVapPresFromRelHum(t, rh / 100.0))
_psy_dew_from_vap = np.vectorize(psychrolib.GetTDewPointFromVapPres)


def test_saturation_pressure_over_water_and_ice_vs_ashrae():
    warm = np.arange(0.5, 50.01, 0.5)
    cold = np.arange(-40.0, -0.49, 0.5)
    # ASHRAE (2017) eq. 6 (water) and eq. 5 (ice), via psychrolib, in Pa.
    np.testing.assert_allclose(1000 * m.saturation_vapour_pressure_kpa(warm), _psy_sat(warm), rtol=0.004)
    np.testing.assert_allclose(1000 * m.saturation_vapour_pressure_kpa(cold, over_ice=True), _psy_sat(cold),
                               rtol=0.002)


def test_dew_point_from_rh_vs_psychrolib_above_freezing():
    ours = m.dew_point_c_from_rh(T_GRID, RH_GRID)
    ref_ok = T_GRID > 0.01
    ref = _psy_dew(T_GRID[ref_ok], RH_GRID[ref_ok])
    liquid = ref > 0.01  # psychrolib's result is a frost point below the triple point
    np.testing.assert_allclose(ours[ref_ok][liquid], ref[liquid], atol=0.1)


def test_frost_point_vs_psychrolib_below_freezing():
    cold = T_GRID < 0.0
    t, rh = T_GRID[cold], RH_GRID[cold]
    e_pa = _psy_vap(t, rh)  # RH over ice, as ASHRAE defines it below freezing
    ref_frost = _psy_dew_from_vap(t, e_pa)
    ours = m.frost_point_c(m.dew_point_c_from_vapour_pressure(e_pa / 1000.0))
    np.testing.assert_allclose(ours, ref_frost, atol=0.03)


def test_rh_from_dew_point_vs_psychrolib_above_freezing():
    t, td = (a.ravel() for a in np.meshgrid(np.arange(0.5, 50.01, 2.5), np.arange(0.5, 35.01, 2.5)))
    keep = td <= t
    ours = m.rel_humidity_pct_from_dew_point(t[keep], td[keep])
    np.testing.assert_allclose(ours, _psy_rh(t[keep], td[keep]), rtol=0.008)


@pytest.fixture(scope="module")
def metpy():
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        import metpy.calc as mc
        from metpy.units import units
    return mc, units


def test_dew_point_from_rh_vs_metpy(metpy):
    mc, units = metpy
    ok = (T_GRID >= -35.0) & (T_GRID <= 35.0)  # Bolton's stated range
    t, rh = T_GRID[ok], RH_GRID[ok]
    ref = mc.dewpoint_from_relative_humidity(t * units.degC, rh * units.percent).m_as("degC")
    np.testing.assert_allclose(m.dew_point_c_from_rh(t, rh), ref, atol=0.13)


def test_rh_from_dew_point_vs_metpy(metpy):
    mc, units = metpy
    t, td = (a.ravel() for a in np.meshgrid(np.arange(-35.0, 35.01, 2.5), np.arange(-35.0, 35.01, 2.5)))
    keep = td <= t
    ref = mc.relative_humidity_from_dewpoint(t[keep] * units.degC, td[keep] * units.degC).m_as("percent")
    np.testing.assert_allclose(m.rel_humidity_pct_from_dew_point(t[keep], td[keep]), ref, rtol=0.014)

