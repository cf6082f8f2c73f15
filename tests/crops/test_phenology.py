"""Degree-days, the expected stage and the stale-stage sentence."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd

from advisory.crops import phenology, thresholds


def test_every_stage_row_names_a_known_stage_and_a_source():
    for crop, ch in phenology.stage_table().items():
        assert list(ch.stages) == [s for s in thresholds.stages_for(crop) if s in ch.stages]
        assert np.all(np.diff(ch.gdd_mean_c) > 0)
        assert all(src for src in ch.sources)


def test_readings_integrate_over_their_intervals_and_gaps_count_as_missing():
    times = pd.date_range("2026-04-01", periods=6, freq="h", tz="UTC")
    temp = np.array([[16.0, 16.0, np.nan, 16.0, 4.0, 16.0]])
    gdd, hours, first = phenology.degree_days_from_readings(times, temp, 10.0)
    # 4 valid hours above base (6 °C each, 1 h), one hour below base -> 24 °C-hours = 1 °C-day
    assert np.isclose(gdd[0], 4 * 6 / 24)
    assert hours[0] == 5.0
    assert first[0] == np.datetime64("2026-04-01T00:00", "ns")
    # a window starting at 03:00 counts only the last three readings
    g2, h2, _ = phenology.degree_days_from_readings(times, temp, 10.0,
                                                    since_utc=np.array(["2026-04-01T03:00"], "datetime64[ns]"))
    assert np.isclose(g2[0], 2 * 6 / 24) and h2[0] == 3.0
    # 15-minute readings give the same sum as hourly ones for a constant temperature
    t15 = pd.date_range("2026-04-01", periods=96, freq="15min", tz="UTC")
    g3, h3, _ = phenology.degree_days_from_readings(t15, np.full((1, 96), 15.0), 5.0)
    assert np.isclose(g3[0], 10.0) and np.isclose(h3[0], 24.0)


def test_upper_threshold_cuts_off_horizontally():
    times = pd.date_range("2026-07-01", periods=24, freq="h", tz="UTC")
    g, _, _ = phenology.degree_days_from_readings(times, np.full((1, 24), 35.0), 10.0, 30.0)
    assert np.isclose(g[0], 20.0)


def test_expected_stage_and_its_range():
    ch = phenology.stage_table()["apple"]
    heat = ch.gdd_mean_c[3] + 1.0  # just past tight cluster
    est = phenology.expected_stage(["apple", "tart_cherry"], [heat, 100.0])
    assert est.expected_idx[0] == 3
    assert est.early_idx[0] <= 3 <= est.late_idx[0]
    assert est.expected_idx[1] == -2  # crop not covered
    assert phenology.stage_name("apple", -1) == "before silver tip"


def test_expected_from_recorded_never_goes_back_and_moves_with_heat():
    ch = phenology.stage_table()["sweet_cherry"]
    gap = ch.gdd_mean_c[7] - ch.gdd_mean_c[6]  # first bloom -> full bloom
    est = phenology.expected_from_recorded(["sweet_cherry"] * 2, ["first bloom"] * 2, [0.0, gap + 0.1])
    assert list(est.expected_idx) == [6, 7]


def test_stale_stage_sentence():
    day = dt.date(2026, 4, 4)
    assert phenology.stale_stage_sentence("first bloom", day, 6, "first bloom", 6) is None
    assert phenology.stale_stage_sentence("first bloom", day, 6, "full bloom", 7) == (
        "stage recorded first bloom on 2026-04-04; heat since suggests full bloom; check the buds")
    assert phenology.stale_stage_sentence("first bloom", day, 6, None, -2) is None


def test_biofix_by_hemisphere_and_farm_override():
    assert phenology.biofix_date(dt.date(2026, 4, 10), 46.0) == dt.date(2026, 1, 1)
    assert phenology.biofix_date(dt.date(2026, 4, 10), -35.0) == dt.date(2025, 7, 1)
    assert phenology.biofix_date(dt.date(2026, 4, 10), 46.0, None, "apple") == dt.date(2026, 3, 1)
    assert phenology.biofix_date(dt.date(2026, 2, 10), 46.0, None, "apple") == dt.date(2025, 3, 1)
    assert phenology.biofix_date(dt.date(2026, 10, 10), -35.0, None, "apple") == dt.date(2026, 9, 1)
    assert phenology.biofix_date(dt.date(2026, 4, 10), 46.0, "02-15", "apple") == dt.date(2026, 2, 15)
