"""Utah and Dynamic chill: behaviour of the models."""

from __future__ import annotations

import numpy as np
import pandas as pd

from advisory.crops import chill


def test_utah_bands():
    temps = [0.0, 1.4, 1.5, 2.4, 2.5, 9.1, 9.2, 12.4, 12.5, 15.9, 16.0, 18.0, 18.1, np.nan]
    want = [0, 0, 0.5, 0.5, 1, 1, 0.5, 0.5, 0, 0, -0.5, -0.5, -1, 0]
    assert list(chill.utah_units_per_hour(temps)) == want


def test_utah_sum_and_running_low():
    t = np.r_[np.full(10, 20.0), np.full(30, 5.0)]
    total, low = chill.utah_chill_units(t)
    assert total[0] == 20.0 and low[0] == -10.0


def test_dynamic_portions_are_not_undone_by_warm_hours():
    cold = np.full(500, 6.0)
    p_cold = chill.dynamic_chill_portions(cold)[0]
    run = chill.dynamic_chill_portions(np.r_[cold, np.full(200, 25.0)], cumulative=True)[0]
    assert np.isclose(run[-1], p_cold)  # fixed portions stay
    assert np.all(np.diff(run) >= -1e-12)
    # warm hours inside a portion not yet fixed destroy the intermediate
    cycle = np.tile(np.r_[np.full(12, 6.0), np.full(12, 20.0)], 20)
    assert chill.dynamic_chill_portions(cycle)[0] < 0.25 * chill.dynamic_chill_portions(np.full(480, 6.0))[0]


def test_dynamic_missing_hours_keep_the_intermediate():
    t = np.full(300, 6.0)
    gap = t.copy()
    gap[100:150] = np.nan
    assert np.isclose(chill.dynamic_chill_portions(gap)[0], chill.dynamic_chill_portions(np.r_[t[:250]])[0])


def test_dynamic_vectorised_matches_one_block_at_a_time():
    rng = np.random.default_rng(3)
    t = rng.normal(7, 6, size=(3, 400))
    both = chill.dynamic_chill_portions(t)
    for i in range(3):
        assert np.isclose(both[i], chill.dynamic_chill_portions(t[i])[0])


def test_hourly_grid_means():
    times = pd.date_range("2026-01-01", periods=8, freq="15min", tz="UTC")
    hours, temp = chill.hourly_grid(times, np.arange(8.0), times[0], times[0] + pd.Timedelta(hours=3))
    assert len(hours) == 3
    assert np.allclose(temp[0, :2], [1.5, 5.5]) and np.isnan(temp[0, 2])


def test_requirements_have_sources():
    for req in chill.requirements().values():
        assert req.source and req.utah_cu_low < req.utah_cu_high and req.portions_low < req.portions_high
