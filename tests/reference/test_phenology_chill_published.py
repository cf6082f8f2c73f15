"""Degree-days and chill against hand computations, published values and the piedmont TMY3 year."""

from __future__ import annotations

import numpy as np
import pytest

from advisory.crops import chill, phenology

pytest.importorskip("pvlib")

from tests.helpers.tmy3 import tmy3_frame  # noqa: E402


def test_single_sine_against_its_closed_form_and_a_numerical_sine():
    # Baskerville & Emin (1969), Ecology 50, 514-517: area of a sine day above the base.
    # Hand computation: 0..20 °C with base 10 -> amplitude/pi = 10/pi.
    assert np.isclose(phenology.degree_days_single_sine(0.0, 20.0, 10.0), 10.0 / np.pi)
    assert phenology.degree_days_single_sine(12.0, 20.0, 10.0) == 6.0  # wholly above: mean - base
    assert phenology.degree_days_single_sine(0.0, 8.0, 10.0) == 0.0
    x = np.linspace(0, 2 * np.pi, 200001)
    for lo, hi, base in ((2.0, 18.0, 6.1), (-3.0, 11.0, 4.0)):
        sine = 0.5 * (lo + hi) + 0.5 * (hi - lo) * np.sin(x)
        numeric = np.trapezoid(np.clip(sine - base, 0, None), x) / (2 * np.pi)
        assert np.isclose(phenology.degree_days_single_sine(lo, hi, base), numeric, atol=1e-4)


def test_tmy3_degree_days_equal_a_hand_sum_of_the_hourly_file():
    # pvlib's 723170TYA.CSV (hourly, hour-ending): hand computation with pandas, one hour per row.
    f = tmy3_frame()
    t = f["air_temp_c"]
    hand = (t - 6.1).clip(lower=0).sum() / 24.0
    gdd, hours, _ = phenology.degree_days_from_readings(f.index, t.to_numpy(), 6.1)
    # Months are spliced from different years, so a few boundaries are not one hour apart; allow 0.5 %.
    assert gdd[0] == pytest.approx(hand, rel=5e-3)
    assert hours[0] == pytest.approx(8760, abs=30)
    # Daily single-sine from the same file's daily extremes agrees with the hourly sum within 5 %
    # (common practice: the sine method tracks hourly integration closely for whole seasons).
    day = np.arange(len(t)) // 24
    tmin = t.groupby(day).min().to_numpy()
    tmax = t.groupby(day).max().to_numpy()
    assert phenology.degree_days_single_sine(tmin, tmax, 6.1).sum() == pytest.approx(hand, rel=0.05)


def test_apple_bloom_from_the_piedmont_year_falls_in_april():
    # Apple full bloom in the North Carolina piedmont (36 °N) comes in early to mid April
    # (common practice; NC State Extension apple production calendars, from memory).
    f = tmy3_frame()
    t = f["air_temp_c"].to_numpy()
    ch = phenology.stage_table()["apple"]
    start = 59 * 24  # the table's biofix, 1 March (the file's rows are 1 Jan 01:00 onwards)
    cum = np.cumsum(np.clip(t[start:] - ch.base_c, 0, None)) / 24.0
    bloom = ch.gdd_mean_c[ch.stages.index("full bloom")]
    row = start + int(np.argmax(cum >= bloom))
    assert f.index[row].month == 4
    est = phenology.expected_stage(["apple"], [cum[row - start]])
    assert phenology.stage_name("apple", int(est.expected_idx[0])) == "full bloom"


def test_utah_weights_as_published():
    # Richardson, Seeley & Walker (1974) HortScience 9, 331-332, weights by band (as tabulated in °F by
    # the BiTWeather model summary: 34/36/48/54/60/65 °F); mid-band temperatures get the published weights.
    mids_f = [30, 35, 42, 51, 57, 62.5, 70]
    weights = [0, 0.5, 1, 0.5, 0, -0.5, -1]
    mids_c = [(x - 32) / 1.8 for x in mids_f]
    assert list(chill.utah_units_per_hour(mids_c)) == weights


def test_dynamic_model_optimum_and_rate_at_constant_temperature():
    # Fishman, Erez & Couvillon (1987): chill is most effective near 6-8 °C, nil near 14 °C and above,
    # and about one portion per 28-30 h at the optimum (Erez & Fishman spreadsheet behaviour, from memory).
    temps = np.arange(-2.0, 17.0, 1.0)
    portions = np.array([chill.dynamic_chill_portions(np.full(1000, x))[0] for x in temps])
    assert 5.0 <= temps[np.argmax(portions)] <= 9.0
    assert portions[temps == 14.0][0] < 0.5 and portions[temps == 16.0][0] == 0.0
    hours_per_portion = 1000 / portions.max()
    assert 25 <= hours_per_portion <= 33


def test_tmy3_winter_chill_is_in_the_range_for_the_piedmont():
    # Piedmont North Carolina collects roughly 800-1400 Utah chill units and 50-80 portions from
    # October to mid-February in a normal winter (common practice; from memory).
    f = tmy3_frame()
    t = f["air_temp_c"]
    winter = np.r_[t[t.index.month >= 10].to_numpy(), t[(t.index.month <= 2)].to_numpy()]
    utah, _ = chill.utah_chill_units(winter)
    portions = chill.dynamic_chill_portions(winter)
    assert 600 <= utah[0] <= 1800
    assert 40 <= portions[0] <= 100
