"""Unit tests for advisory.physics.radiation."""

from __future__ import annotations

import numpy as np
import pytest

from advisory.physics import radiation as rad


def test_blackbody_emittance_at_0c():
    # sigma * 273.15**4 = 315.66 W m-2 (arithmetic from the CODATA constant)
    assert rad.blackbody_emittance_w_m2(0.0) == pytest.approx(315.66, abs=0.01)
    assert rad.blackbody_emittance_w_m2(0.0, 0.5) == pytest.approx(157.83, abs=0.01)


def test_brutsaert_formula_and_range():
    eps = rad.clear_sky_emissivity_brutsaert(20.0, 1.4)
    assert eps == pytest.approx(1.24 * (14.0 / 293.15) ** (1 / 7), rel=1e-12)
    grid_t, grid_td = np.meshgrid(np.arange(-15, 31, 5.0), np.arange(-25, 26, 5.0))
    ok = grid_td <= grid_t
    e = rad.sky_emissivity(grid_t[ok], grid_td[ok])
    assert np.all((e > 0.5) & (e < 0.95))  # common practice: clear skies about 0.5-0.9


def test_moister_air_emits_more():
    assert rad.sky_emissivity(10.0, 8.0) > rad.sky_emissivity(10.0, -5.0)


def test_cloud_correction_monotone_and_bounded():
    c = np.linspace(0, 100, 11)
    e = rad.cloudy_sky_emissivity(0.7, c)
    assert np.all(np.diff(e) > 0)
    assert e[0] == pytest.approx(0.7)
    assert e[-1] == pytest.approx(0.16 * 0.7 + 0.84)
    assert np.all(rad.cloudy_sky_emissivity(0.99, [150.0, 100.0]) <= 1.0)


def test_net_loss_clear_vs_overcast():
    clear = rad.net_longwave_loss_w_m2(5.0, -3.0, 0.0)
    overcast = rad.net_longwave_loss_w_m2(5.0, -3.0, 100.0)
    # common practice: clear calm nights lose 60-110 W m-2, overcast ones a fraction of that
    assert 60 < clear < 120
    assert 0 < overcast < 0.3 * clear


def test_net_loss_with_cold_surface_is_smaller():
    warm = rad.net_longwave_loss_w_m2(5.0, -3.0, 0.0)
    cold = rad.net_longwave_loss_w_m2(5.0, -3.0, 0.0, surface_temp_c=0.0)
    assert cold < warm


def test_vectorised_shapes():
    t = np.array([0.0, 5.0, 10.0])
    out = rad.net_longwave_loss_w_m2(t, t - 5, [0, 50, 100])
    assert out.shape == (3,)
    assert isinstance(rad.net_longwave_loss_w_m2(1.0, 0.0), float)
