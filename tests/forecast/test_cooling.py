"""Unit tests for advisory.forecast.cooling (the physical model)."""

from __future__ import annotations

import numpy as np
import pytest

from advisory.forecast import cooling
from advisory.physics.radiation import net_longwave_loss_w_m2


def test_brunt_coefficient_formula():
    # b = 2 R / (sqrt(pi) mu), converted from K s^-1/2 to K h^-1/2 (x60)
    r = net_longwave_loss_w_m2(5.0, -3.0, 0.0)
    expected = 2 * r / (np.sqrt(np.pi) * cooling.THERMAL_ADMITTANCE) * 60
    assert cooling.brunt_coefficient(5.0, -3.0, 0.0, 0.0) == pytest.approx(expected)


def test_cloud_and_wind_reduce_cooling():
    clear = cooling.brunt_coefficient(5.0, -3.0, 0.0, 0.0)
    assert cooling.brunt_coefficient(5.0, -3.0, 0.0, 100.0) < 0.3 * clear
    windy = cooling.brunt_coefficient(5.0, -3.0, cooling.WIND_DAMPING_SCALE_MS, 0.0)
    assert windy == pytest.approx(clear / 2)


def test_missing_wind_and_cloud_are_calm_and_clear():
    assert cooling.brunt_coefficient(5.0, -3.0, np.nan, np.nan) == pytest.approx(
        cooling.brunt_coefficient(5.0, -3.0, 0.0, 0.0))


def test_latent_share_values():
    # gamma / (Delta + gamma) with FAO-56 eq. 13 and eq. 8 at sea level
    delta0 = 4098 * 0.6108 / 237.3**2
    gamma = 0.665e-3 * 101.325
    assert cooling.latent_share(0.0) == pytest.approx(gamma / (delta0 + gamma))
    assert cooling.latent_share(-10.0) > cooling.latent_share(0.0) > cooling.latent_share(15.0)


def test_square_root_of_time():
    b, h0 = 1.0, 2.0
    d = cooling.drop_after_reference(b, h0, np.array([0.0, 2.0, 7.0]), 20.0, -30.0)
    np.testing.assert_allclose(d, [0.0, 2.0 - np.sqrt(2.0), 3.0 - np.sqrt(2.0)])


def test_dew_point_slows_cooling():
    dry = cooling.drop_after_reference(2.0, 2.0, 8.0, 10.0, -20.0)
    humid = cooling.drop_after_reference(2.0, 2.0, 8.0, 10.0, 8.0)
    assert humid < dry
    # up to the dew point the fall is the same
    assert cooling.drop_after_reference(2.0, 2.0, 0.5, 10.0, 8.0) == pytest.approx(
        cooling.drop_after_reference(2.0, 2.0, 0.5, 10.0, -20.0))
    # below it, the extra fall is scaled by the latent share
    room = 2.0
    extra = dry - room
    assert humid == pytest.approx(room + extra * cooling.latent_share(8.0))


def test_physical_minimum_behaviour():
    short = cooling.physical_minimum(5.0, -5.0, 1.0, 0.0, 2.0, 6.0)
    long = cooling.physical_minimum(5.0, -5.0, 1.0, 0.0, 2.0, 12.0)
    cloudy = cooling.physical_minimum(5.0, -5.0, 1.0, 100.0, 2.0, 12.0)
    assert long < short < 5.0
    assert long < cloudy < 5.0
    # common practice: clear calm spring nights (11 h) cool some 4-10 K from two hours after sunset
    spring = cooling.physical_minimum(5.0, -5.0, 1.0, 0.0, 2.0, 9.0)
    assert 4.0 < 5.0 - spring < 10.0


def test_curve_fraction_and_inverse():
    night = cooling.PhysicalNight([5.0, 10.0, 10.0], [-5.0, 9.0, 10.0], [1.0, 0.0, 0.0], [0.0, 0.0, 100.0],
                                  [2.0, 2.0, 2.0], [10.0, 10.0, 10.0])
    hours = np.linspace(0, 12, 49)[:, None]
    frac = cooling.curve_fraction(night, hours)
    assert frac.shape == (49, 3)
    assert np.all(np.diff(frac, axis=0) >= -1e-12)
    np.testing.assert_allclose(frac[0], 0.0)
    np.testing.assert_allclose(frac[-1], 1.0)
    for s in (0.1, 0.5, 0.9):
        h = cooling.hours_to_fraction(night, np.full(3, s))
        back = cooling.curve_fraction(night, h[None, :])[0]
        np.testing.assert_allclose(back, s, atol=1e-9)
    assert np.all(cooling.hours_to_fraction(night, np.ones(3)) <= night.hours_to_minimum + 1e-12)


def test_physical_night_subset():
    night = cooling.PhysicalNight([5.0, 10.0, 2.0], [-5.0, 9.0, 0.0], [1.0, 0.0, 3.0], [0.0, 0.0, 100.0],
                                  [2.0, 2.0, 2.0], [10.0, 9.0, 8.0])
    sub = night.subset(np.array([2, 0]))
    assert len(sub) == 2 and len(night) == 3
    np.testing.assert_allclose(sub.minimum_c, night.minimum_c[[2, 0]])
    np.testing.assert_allclose(sub.b, night.b[[2, 0]])
    assert sub.pressure_kpa == night.pressure_kpa
