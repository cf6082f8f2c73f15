"""Unit tests for advisory.physics.heat (heat index and WBGT estimates)."""

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from advisory.physics import heat


def test_scalars_in_scalars_out():
    assert isinstance(heat.heat_index_c(30.0, 50.0), float)
    assert isinstance(heat.wbgt_simplified_c(30.0, 50.0), float)
    assert isinstance(heat.wbgt_estimate_c(30.0, 18.0, 0.5), float)


def test_vectorised_shapes():
    t = np.full((4, 24), 33.0)
    rh = np.linspace(20, 90, 24)
    assert heat.heat_index_c(t, rh).shape == (4, 24)
    assert heat.wbgt_estimate_c(t, np.full((4, 1), 18.0), np.ones((4, 24))).shape == (4, 24)


def test_nan_propagates():
    out = heat.heat_index_c(np.array([30.0, np.nan]), np.array([np.nan, 50.0]))
    assert np.isnan(out).all()


def test_simple_formula_below_80f():
    # NWS procedure: when the simple formula averaged with T is below 80 °F the simple formula is used.
    t, rh = 75.0, 50.0
    simple = 0.5 * (t + 61.0 + (t - 68.0) * 1.2 + rh * 0.094)
    assert heat.heat_index_f(t, rh) == pytest.approx(simple)


def test_cold_returns_air_temperature():
    assert heat.heat_index_f(35.0, 80.0) == 35.0


def test_low_humidity_adjustment_lowers_index():
    # RH < 13 % and 80-112 °F: NWS subtracts an adjustment, so the result is below the bare regression.
    t, rh = 100.0, 8.0
    bare = (-42.379 + 2.04901523 * t + 10.14333127 * rh - 0.22475541 * t * rh - 6.83783e-3 * t * t
            - 5.481717e-2 * rh * rh + 1.22874e-3 * t * t * rh + 8.5282e-4 * t * rh * rh
            - 1.99e-6 * t * t * rh * rh)
    adj = (13 - rh) / 4 * np.sqrt((17 - abs(t - 95)) / 17)
    assert heat.heat_index_f(t, rh) == pytest.approx(bare - adj)


def test_high_humidity_adjustment_raises_index():
    t, rh = 84.0, 95.0
    bare = (-42.379 + 2.04901523 * t + 10.14333127 * rh - 0.22475541 * t * rh - 6.83783e-3 * t * t
            - 5.481717e-2 * rh * rh + 1.22874e-3 * t * t * rh + 8.5282e-4 * t * rh * rh
            - 1.99e-6 * t * t * rh * rh)
    assert heat.heat_index_f(t, rh) == pytest.approx(bare + (rh - 85) / 10 * (87 - t) / 5)


@given(st.floats(27, 45), st.floats(40, 99))
def test_heat_index_rises_with_humidity(t, rh):
    assert heat.heat_index_c(t, rh + 1.0) >= heat.heat_index_c(t, rh) - 1e-9


def test_unit_round_trip():
    assert heat.f_to_c(heat.c_to_f(31.4)) == pytest.approx(31.4)


def test_shade_wbgt_below_sun_wbgt_on_a_hot_day():
    shade = heat.wbgt_shade_c(34.0, 18.0)
    sun = heat.wbgt_estimate_c(34.0, 18.0, 1.0)
    assert shade < sun
    assert heat.wbgt_estimate_c(34.0, 18.0, 0.0) == pytest.approx(shade)
    half = heat.wbgt_estimate_c(34.0, 18.0, 0.5)
    assert half == pytest.approx(0.5 * (shade + sun))


def test_shade_wbgt_between_wet_bulb_and_air():
    t, td = 30.0, 20.0
    w = heat.wbgt_shade_c(t, td)
    assert td < w < t


def test_sun_fraction_clipped():
    assert heat.wbgt_estimate_c(30.0, 15.0, 3.0) == pytest.approx(heat.wbgt_estimate_c(30.0, 15.0, 1.0))
