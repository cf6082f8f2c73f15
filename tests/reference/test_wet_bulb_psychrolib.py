"""Wet-bulb temperature against psychrolib (ASHRAE Handbook - Fundamentals) and Stull (2011).

Conventions.  advisory.physics.moisture takes relative humidity over *water* at
all temperatures; psychrolib takes it over *ice* below 0 °C (its saturation
pressure switches to ice there).  So the two are compared through the state
both agree on: the vapour pressure from our dew point (Magnus over water) is
turned into a humidity ratio with psychrolib's own function, and psychrolib's
wet bulb is computed from that humidity ratio.

Tolerance 0.03 K.  Both solve the same ASHRAE balance (Handbook 2017 ch. 1 eqs.
33 and 35); they differ only in the saturation vapour pressure formula (Magnus
form of Alduchov & Eskridge 1996 here, Hyland & Wexler in psychrolib), which
differ by less than 0.25 % between -10 and +15 °C; that moves the wet bulb by
under 0.03 K over this range (largest near saturation at the warm end).

Near 0 °C in dry air the ASHRAE water-bulb and ice-bulb equations both have a
root (they do not meet at 0 °C); psychrolib's bisection returns either
depending on its search path, advisory returns the ice-bulb (colder) root.
There the check is that our answer satisfies psychrolib's own balance and is
not warmer than psychrolib's.
"""

import numpy as np
import psychrolib
import pytest

from advisory.physics import moisture

psychrolib.SetUnitSystem(psychrolib.SI)

TEMPS_C = np.arange(-10.0, 15.0001, 1.0)
RH_PCT = np.array([2, 5, 10, 20, 30, 40, 50, 60, 70, 80, 90, 95, 99, 100.0])
PRESSURES_KPA = (101.325, 90.0, 80.0)
TOL_K = 0.03


@pytest.fixture(scope="module")
def grid():
    """Every (pressure, temperature, RH) case with our wet bulb (vectorised) and psychrolib's."""
    p, t, rh = (a.ravel() for a in np.meshgrid(PRESSURES_KPA, TEMPS_C, RH_PCT, indexing="ij"))
    td = moisture.dew_point_c_from_rh(t, rh)
    e_pa = moisture.saturation_vapour_pressure_kpa(td) * 1000.0
    ours = moisture.wet_bulb_c(t, td, p)
    w = np.array([psychrolib.GetHumRatioFromVapPres(e, pp * 1000.0) for e, pp in zip(e_pa, p, strict=True)])
    ref = np.array([psychrolib.GetTWetBulbFromHumRatio(tt, ww, pp * 1000.0)
                    for tt, ww, pp in zip(t, w, p, strict=True)])
    return {"p": p, "t": t, "rh": rh, "w": w, "ours": ours, "ref": ref}


def test_wet_bulb_matches_psychrolib_over_frost_range(grid):
    # Source: psychrolib (ASHRAE Handbook - Fundamentals 2017, ch. 1).
    same_side = (grid["ours"] < 0.0) == (grid["ref"] < 0.0)  # elsewhere: two-root band, checked below
    assert same_side.mean() > 0.95
    assert np.max(np.abs(grid["ours"] - grid["ref"])[same_side]) <= TOL_K


def test_wet_bulb_satisfies_ashrae_balance_everywhere(grid):
    # Our wet bulb, put back into psychrolib's humidity-ratio-from-wet-bulb (ASHRAE eqs. 33/35),
    # reproduces the air's humidity ratio to within the same 0.03 K (expressed as temperature).
    for p, t, rh, w, ours, ref in zip(*(grid[k] for k in ("p", "t", "rh", "w", "ours", "ref")), strict=True):
        if ours >= t - 0.011:
            continue  # (nearly) saturated: nothing to balance
        w_ours = psychrolib.GetHumRatioFromTWetBulb(t, ours, p * 1000.0)
        # Finite-difference slope on the same side of 0 °C as our root.
        step = -0.01 if ours < 0 else 0.01
        slope = abs(psychrolib.GetHumRatioFromTWetBulb(t, ours + step, p * 1000.0) - w_ours) / 0.01
        assert abs(w_ours - w) / slope <= TOL_K, (p, t, rh)
        # In the two-root band near 0 °C our root is the colder one.
        assert ours <= ref + TOL_K, (p, t, rh)


def test_stull_2011_worked_example():
    # Stull (2011), J. Appl. Meteor. Climatol. 50, 2267: T = 20 °C, RH = 50 % -> Tw = 13.7 °C.
    assert moisture.wet_bulb_stull_c(20.0, 50.0) == pytest.approx(13.7, abs=0.05)
    # The ASHRAE solution agrees within Stull's stated accuracy (errors -1 to +0.65 K).
    ours = moisture.wet_bulb_c(20.0, moisture.dew_point_c_from_rh(20.0, 50.0))
    assert -0.65 <= moisture.wet_bulb_stull_c(20.0, 50.0) - ours <= 1.0


def test_stull_fit_within_its_stated_accuracy_over_frost_range():
    # Stull (2011): within -1 K to +0.65 K for RH 5-99 % at sea level (-20..50 °C), except where
    # air is both cold and dry; his fit is for a liquid-water bulb, so compare where ours is one.
    t, rh = np.meshgrid(np.arange(-10.0, 15.1, 1.0), np.arange(5.0, 99.1, 2.0))
    ashrae = moisture.wet_bulb_c(t, moisture.dew_point_c_from_rh(t, rh))
    liquid = ashrae >= 0.0
    d = (moisture.wet_bulb_stull_c(t, rh) - ashrae)[liquid]
    assert liquid.sum() > 300
    assert d.min() >= -1.0 and d.max() <= 0.65
