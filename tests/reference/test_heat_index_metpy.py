"""Heat index against MetPy and the published NWS heat-index table.

MetPy's ``heat_index`` implements the same NWS procedure (Rothfusz 1990 with the
NWS adjustments); over 27-45 °C and 40-100 % RH both must use the regression
branch, so they should agree to rounding.

The NWS heat-index chart (NOAA/NWS, "Heat Index" table of air temperature [°F]
against relative humidity [%]) prints whole degrees F; the Rothfusz regression
reproduces it within about ±1.3 °F (NWS WPC heat-index equation page), so each
table point is checked to within 1.5 °F.  Points are taken where no NWS
adjustment applies to the regression (RH 40-85 %): at 80 °F and 100 % the
high-humidity adjustment lifts the regression to 89 °F against the chart's 87,
a known gap between the equation page and the chart.
"""

import numpy as np
import pytest
from metpy.calc import heat_index as metpy_heat_index
from metpy.units import units

from advisory.physics import heat


def test_matches_metpy_over_summer_range():
    # Source: MetPy 1.x metpy.calc.heat_index (reference library).
    t = np.linspace(27.0, 45.0, 73)
    rh = np.linspace(40.0, 100.0, 61)
    tt, rr = np.meshgrid(t, rh)
    ours = heat.heat_index_c(tt, rr)
    ref = metpy_heat_index(tt * units.degC, rr * units.percent, mask_undefined=False).to("degC").m
    np.testing.assert_allclose(ours, ref, atol=1e-6)


def test_matches_metpy_in_fahrenheit_docstring_example():
    # Source: MetPy's own docstring example, heat_index(90 degF, 90 %) = 121.901204 degF.
    assert heat.heat_index_f(90.0, 90.0) == pytest.approx(121.901204, abs=1e-5)


# Source: NWS heat-index chart (air temperature °F, RH %, heat index °F), e.g. as reproduced by
# NOAA/NWS heat safety pages; also the chart's own worked example 88 °F at 60 % -> 95 °F.
NWS_TABLE = [
    (80, 40, 80), (80, 60, 82), (84, 60, 88), (86, 90, 105), (88, 60, 95),
    (90, 40, 91), (90, 60, 100), (90, 80, 113), (94, 70, 119), (96, 65, 121),
    (100, 40, 109), (100, 60, 129), (104, 55, 137), (110, 40, 136),
]


@pytest.mark.parametrize(("t_f", "rh", "expected_f"), NWS_TABLE)
def test_nws_table_points(t_f, rh, expected_f):
    assert heat.heat_index_f(t_f, rh) == pytest.approx(expected_f, abs=1.5)
