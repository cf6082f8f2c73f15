"""The WBGT estimate against its source, the Australian Bureau of Meteorology approximation.

Source: Bureau of Meteorology, "About the WBGT and Apparent Temperature indices"
(thermal comfort observations), which prints

    WBGT = 0.567 Ta + 0.393 e + 3.94,   e = RH/100 * 6.105 * exp(17.27 Ta / (237.7 + Ta))

and states its limits (average daytime conditions, moderately high radiation,
light wind).  The page gives the formula rather than a table, so the worked
values below are worked step by step from the printed formula (from memory of
the page, unverified; the same coefficients are quoted independently by, e.g.,
the R package varunayan's documentation of its ``wbgt_simple``).  Each row
shows the intermediate values so a reader can redo it by hand.
"""

import numpy as np
import psychrolib
import pytest

from advisory.physics import heat
from advisory.physics.moisture import dew_point_c_from_rh

psychrolib.SetUnitSystem(psychrolib.SI)

# (Ta °C, RH %, exponent 17.27 Ta/(237.7+Ta), e hPa, WBGT °C) -- worked from the printed formula.
WORKED = [
    (30.0, 50.0, 1.93538, 21.1436, 29.2594),   # 0.567*30 + 0.393*21.1436 + 3.94
    (35.0, 40.0, 2.21654, 22.4066, 32.5908),   # 0.567*35 + 0.393*22.4066 + 3.94
    (25.0, 80.0, 1.64351, 25.2664, 28.0447),   # 0.567*25 + 0.393*25.2664 + 3.94
    (40.0, 20.0, 2.48758, 14.6912, 32.3936),   # 0.567*40 + 0.393*14.6912 + 3.94
]


@pytest.mark.parametrize(("ta", "rh", "_x", "e_hpa", "wbgt"), WORKED)
def test_worked_values(ta, rh, _x, e_hpa, wbgt):
    assert heat.vapour_pressure_hpa_bom(ta, rh) == pytest.approx(e_hpa, abs=1e-3)
    assert heat.wbgt_simplified_c(ta, rh) == pytest.approx(wbgt, abs=1e-3)


def test_vapour_pressure_agrees_with_ashrae():
    # Reference library: psychrolib (ASHRAE Handbook - Fundamentals) saturation vapour pressure.
    # The Bureau's Magnus form agrees with it within 1 % at summer temperatures (0.3-0.5 % measured).
    for ta in (20.0, 30.0, 40.0):
        ours = heat.vapour_pressure_hpa_bom(ta, 100.0)
        ashrae = psychrolib.GetSatVapPres(ta) / 100.0
        assert ours == pytest.approx(ashrae, rel=1e-2)


def test_full_sun_estimate_uses_the_source_formula():
    # wbgt_estimate_c in full sun is the source formula whenever that exceeds the shade form.
    ta, rh = 33.0, 45.0
    td = dew_point_c_from_rh(ta, rh)
    assert heat.wbgt_estimate_c(ta, td, 1.0) == pytest.approx(heat.wbgt_simplified_c(ta, rh), abs=0.02)


def test_source_limits_respected_in_shade():
    # The source's stated limit: the formula assumes sun, so in shade/at night it overstates.
    # Our shade form must lie below it on a hot day (ISO 7243 no-globe form, common practice).
    ta = np.array([28.0, 32.0, 36.0])
    td = np.array([15.0, 18.0, 20.0])
    rh = 100 * np.exp(17.625 * td / (243.04 + td)) / np.exp(17.625 * ta / (243.04 + ta))
    assert np.all(heat.wbgt_shade_c(ta, td) < heat.wbgt_simplified_c(ta, rh))
