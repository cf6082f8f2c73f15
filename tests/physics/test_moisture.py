"""Tests for advisory.physics.moisture: against psychrolib (ASHRAE), MetPy and FAO-56.

Tolerances
----------
* Dew point vs psychrolib (over water, dew point >= 0 °C): 0.05 K.  psychrolib
  inverts the Hyland-Wexler saturation formula, we invert the Magnus form of
  Alduchov & Eskridge (1996); the two differ by at most ~0.25 % in pressure up
  to 45 °C, and with d(ln e)/dT ~ 6 %/K that is at most ~0.04 K in dew point.
* Frost point vs psychrolib (over ice, below 0 °C): 0.02 K, the same argument
  with the ice formulas (differences below ~0.1 %).
* Dew point vs MetPy: 0.06 K.  MetPy's ``dewpoint`` inverts Bolton's (1980)
  Magnus coefficients (6.112 hPa, 17.67, 243.5 °C), which differ from
  Alduchov & Eskridge's by up to ~0.3 % in pressure over -30..40 °C.
* Saturation pressure vs FAO-56 eq. 11 (Tetens): 0.3 %.
"""

import numpy as np
import psychrolib
import pytest
from metpy.calc import dewpoint
from metpy.units import units

from advisory.physics import moisture as m

psychrolib.SetUnitSystem(psychrolib.SI)

RH_GRID = np.array([5, 10, 20, 30, 40, 50, 60, 70, 80, 90, 95, 99, 100.0])


def test_dew_point_matches_psychrolib_over_water():
    # Source: psychrolib GetTDewPointFromRelHum (ASHRAE Handbook - Fundamentals 2017, ch. 1).
    worst = 0.0
    for t in np.arange(0.5, 45.0, 0.5):
        for rh in RH_GRID:
            td = m.dew_point_c_from_rh(t, rh)
            if td < 0.5:
                continue  # psychrolib's dew point is over ice below 0 °C
            worst = max(worst, abs(td - psychrolib.GetTDewPointFromRelHum(float(t), rh / 100.0)))
    assert worst <= 0.05


def test_frost_point_matches_psychrolib_over_ice():
    # Source: psychrolib GetTDewPointFromVapPres below 0 °C solves over ice (ASHRAE 2017 ch. 1).
    for td in np.arange(-40.0, -0.1, 0.5):
        e_pa = float(m.saturation_vapour_pressure_kpa(td)) * 1000.0
        ref = psychrolib.GetTDewPointFromVapPres(-0.01, e_pa)
        assert m.frost_point_c(td) == pytest.approx(ref, abs=0.02)


def test_dew_point_matches_metpy_over_grid():
    # Source: MetPy metpy.calc.dewpoint (Bolton 1980), from the same vapour pressure.
    t, rh = np.meshgrid(np.arange(-30.0, 40.1, 1.0), RH_GRID)
    ours = m.dew_point_c_from_rh(t, rh)
    e = m.saturation_vapour_pressure_kpa(ours) * units.kPa
    ref = dewpoint(e).to("degC").m
    assert np.max(np.abs(ours - ref)) <= 0.06


def test_saturation_vapour_pressure_vs_psychrolib():
    # Source: psychrolib GetSatVapPres (Hyland & Wexler; ice below 0 °C).
    for t in np.arange(-30.0, 45.0, 1.0):
        ours = m.saturation_vapour_pressure_kpa(t, over_ice=t < 0) * 1000.0
        assert ours == pytest.approx(psychrolib.GetSatVapPres(float(t)), rel=0.003)


def test_saturation_vapour_pressure_fao56_example():
    # FAO-56 Example 3 (eq. 11): e°(24.5 °C) = 3.075 kPa, e°(15 °C) = 1.705 kPa (from memory, unverified).
    np.testing.assert_allclose(m.saturation_vapour_pressure_kpa([24.5, 15.0]), [3.075, 1.705], rtol=0.003)


def test_pressure_and_psychrometric_constant_fao56_example():
    # FAO-56 Example 2: z = 1800 m -> P = 81.8 kPa, gamma = 0.054 kPa/°C (from memory, unverified).
    p = m.pressure_kpa_from_elevation(1800.0)
    assert p == pytest.approx(81.8, abs=0.05)
    assert m.psychrometric_constant_kpa_per_c(p) == pytest.approx(0.054, abs=0.0005)


def test_rh_dew_point_round_trip_and_shapes():
    t = np.linspace(-20, 40, 61)[:, None]
    rh = RH_GRID[None, :]
    td = m.dew_point_c_from_rh(t, rh)
    assert td.shape == (61, len(RH_GRID))
    np.testing.assert_allclose(m.rel_humidity_pct_from_dew_point(t, td), np.broadcast_to(rh, td.shape),
                               rtol=1e-10)
    assert isinstance(m.dew_point_c_from_rh(10.0, 50.0), float)


def test_frost_point_above_dew_point_below_zero():
    td = np.array([-20.0, -5.0, -0.5, 0.0, 5.0])
    fp = m.frost_point_c(td)
    assert np.all(fp[:3] > td[:3]) and np.all(fp[3:] == td[3:])


def test_wet_bulb_between_dew_point_and_air():
    t, rh = np.meshgrid(np.arange(-15.0, 40.1, 2.5), RH_GRID)
    td = m.dew_point_c_from_rh(t, rh)
    wb = m.wet_bulb_c(t, td)
    assert np.all(wb <= t + 1e-9) and np.all(wb >= td - 1e-9)
    np.testing.assert_allclose(m.wet_bulb_c(t, t), t, atol=1e-6)  # saturated air


def test_wet_bulb_does_not_depend_on_the_search_path():
    # The ASHRAE water- and ice-bulb equations both have a root near 0 °C in dry air: the ice root is
    # returned, whatever the dew point used as the lower search bound (a fix to this module).
    t, rh = 9.5, 5.0
    td = m.dew_point_c_from_rh(t, rh)
    a = m.wet_bulb_c(t, td)
    e = m.saturation_vapour_pressure_kpa(td)
    b = m.wet_bulb_c(np.array([t, t]), np.array([td, td]))
    assert a < 0.0 and np.all(b == a)
    # The answer balances the ice-bulb equation (ASHRAE 2017 eq. 35).
    w = 0.621945 * e / (101.325 - e)
    es = m.saturation_vapour_pressure_kpa(a, over_ice=True)
    ws = 0.621945 * es / (101.325 - es)
    w_ice = ((2830.0 - 0.24 * a) * ws - 1.006 * (t - a)) / (2830.0 + 1.86 * t - 2.1 * a)
    assert w_ice == pytest.approx(w, rel=1e-6)


def test_wet_bulb_lower_at_altitude():
    # Lower pressure -> larger psychrometric depression (FAO-56 eq. 8: gamma proportional to P).
    assert m.wet_bulb_c(10.0, 0.0, 80.0) < m.wet_bulb_c(10.0, 0.0, 101.325)


def test_stull_scalar_and_array():
    assert isinstance(m.wet_bulb_stull_c(20.0, 50.0), float)
    assert m.wet_bulb_stull_c(np.array([20.0, 10.0]), 50.0).shape == (2,)
