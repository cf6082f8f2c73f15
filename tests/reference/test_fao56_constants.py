"""Stefan-Boltzmann constant, net long-wave radiation and vapour pressure as FAO-56 gives them.

Source: Allen, R. G., Pereira, L. S., Raes, D. & Smith, M. (1998) Crop evapotranspiration.
FAO Irrigation and Drainage Paper 56 (chapter 3: eq. 11, eq. 39, Examples 3 and 11).
"""

from __future__ import annotations

import numpy as np
import pytest

from advisory.physics import moisture
from advisory.physics import radiation as rad


def test_stefan_boltzmann_fao56_value():
    # FAO-56 eq. 39: sigma = 4.903e-9 MJ K-4 m-2 day-1
    assert rad.STEFAN_BOLTZMANN_MJ_M2_K4_DAY == 4.903e-9
    # CODATA 2018: 5.670374419e-8 W m-2 K-4; per day in MJ it matches FAO-56 to 0.1 %
    assert rad.STEFAN_BOLTZMANN_W_M2_K4 == 5.670374419e-8
    per_day = rad.STEFAN_BOLTZMANN_W_M2_K4 * 86400 / 1e6
    assert per_day == pytest.approx(rad.STEFAN_BOLTZMANN_MJ_M2_K4_DAY, rel=1e-3)


def test_fao56_example_11_net_longwave():
    # FAO-56 Example 11 (Rio de Janeiro, May): Tmax 25.1 °C, Tmin 19.1 °C, ea 2.1 kPa,
    # Rs 14.5 and Rso 18.8 MJ m-2 day-1 -> sigma Tmax,K^4 = 38.8, sigma Tmin,K^4 = 35.8,
    # Rnl = 3.5 MJ m-2 day-1
    sig = rad.STEFAN_BOLTZMANN_MJ_M2_K4_DAY
    assert sig * (25.1 + 273.16) ** 4 == pytest.approx(38.8, abs=0.05)
    assert sig * (19.1 + 273.16) ** 4 == pytest.approx(35.8, abs=0.05)
    rnl = rad.fao56_net_longwave_mj_m2_day(25.1, 19.1, 2.1, 14.5 / 18.8)
    assert rnl == pytest.approx(3.5, abs=0.05)


def test_blackbody_matches_fao56_sigma_t4():
    # the SI emittance integrated over a day equals FAO-56's sigma T^4 within 0.15 %
    # (FAO-56 uses K = °C + 273.16 and its rounded sigma)
    for t_c, fao_value in ((25.1, 38.8), (19.1, 35.8)):
        per_day = rad.blackbody_emittance_w_m2(t_c) * 86400 / 1e6
        assert per_day == pytest.approx(fao_value, rel=2e-3)


def test_saturation_vapour_pressure_fao56_example_3():
    # FAO-56 Example 3: e°(24.5 °C) = 3.075 kPa, e°(15.0 °C) = 1.705 kPa (eq. 11)
    # moisture uses the Alduchov-Eskridge Magnus form, a slightly different fit: 0.3 %
    assert moisture.saturation_vapour_pressure_kpa(24.5) == pytest.approx(3.075, rel=3e-3)
    assert moisture.saturation_vapour_pressure_kpa(15.0) == pytest.approx(1.705, rel=3e-3)


def test_saturation_vapour_pressure_against_fao56_eq11():
    # FAO-56 eq. 11: e°(T) = 0.6108 exp(17.27 T / (T + 237.3)) [kPa]
    t = np.arange(-10.0, 45.1, 0.5)
    fao = 0.6108 * np.exp(17.27 * t / (t + 237.3))
    ours = moisture.saturation_vapour_pressure_kpa(t)
    np.testing.assert_allclose(ours, fao, rtol=5e-3)


def test_actual_vapour_pressure_from_dew_point_fao56_eq14():
    # FAO-56 eq. 14: e_a = e°(T_dew); with T_dew = 15.0 °C that is 1.705 kPa (Example 3 value)
    assert moisture.vapour_pressure_kpa_from_dew_point(15.0) == pytest.approx(1.705, rel=3e-3)
    # and the Brutsaert sky uses exactly that vapour pressure
    e = rad.sky_emissivity(20.0, 15.0)
    assert e == pytest.approx(1.24 * (moisture.vapour_pressure_kpa_from_dew_point(15.0) * 10 / 293.15)
                              ** (1 / 7))
