"""Unit tests for advisory.forecast.dayshape (the day's curve drawn through the morning reading)."""

import json

import numpy as np
import pandas as pd
import pytest

from advisory.forecast import dayshape as ds

SR, NOON, SS = 6.0, 12.5, 19.0   # hours on a plain axis
TA = 8.0                         # the morning reading
SHAPE = ds.DayShape(max_lag_h=3.0, rise_exponent=1.5, sunset_fall_fraction=0.4, fall_exponent=1.0)


def _curve(times, tn=10.0, tx=30.0, ta=TA, temp_a=14.0, **kw):
    kw.setdefault("shapes", SHAPE)
    return ds.anchored_temperature_c(times, tn, tx, SR, SS, NOON, ta, temp_a, **kw)


def test_passes_through_minimum_reading_maximum_and_sunset_temperature():
    tp = 12.0
    y = _curve(np.array([SR, TA, NOON + 3.0, SS, SR + 24.0]), next_min_temp_c=tp)
    to = 30.0 - 0.4 * (30.0 - tp)        # Cesaraccio et al. (2001) sunset temperature
    np.testing.assert_allclose(y, [10.0, 14.0, 30.0, to, tp], atol=1e-9)


def test_rise_and_fall_exponents():
    t_max = NOON + 3.0
    mid_rise = TA + 0.5 * (t_max - TA)
    mid_fall = t_max + 0.5 * (SS - t_max)
    y = _curve(np.array([mid_rise, mid_fall]), next_min_temp_c=10.0,
               shapes=ds.DayShape(3.0, 1.0, 0.5, 1.0))
    # straight rise from 14 to 30, straight fall from 30 to 30 - 0.5 * 20 = 20
    np.testing.assert_allclose(y, [22.0, 25.0])
    steep = _curve(np.array([mid_rise]), shapes=ds.DayShape(3.0, 2.0, 0.5, 1.0))[0]
    assert steep == pytest.approx(14.0 + 16.0 * 0.75)


def test_continuous_everywhere_and_maximum_is_the_given_one():
    eps = 1e-7
    for junction in (SR, TA, NOON + 3.0, SS, SR + 24.0):
        y = _curve(np.array([junction - eps, junction + eps]), next_min_temp_c=8.0, prev_sunset_temp_c=20.0,
                   prev_sunset=SS - 24.0)
        assert abs(y[1] - y[0]) < 1e-2
    t = np.linspace(SR - 12, SR + 24, 36 * 600 + 1)
    y = _curve(t, next_min_temp_c=8.0)
    day = (t >= SR) & (t <= SS)
    assert y[day].max() == pytest.approx(30.0, abs=1e-3)
    assert t[day][np.argmax(y[day])] == pytest.approx(NOON + 3.0, abs=0.01)


def test_peak_kept_after_the_reading_and_before_sunset():
    t = np.linspace(SR, SS, 5001)
    late = _curve(t, shapes=ds.DayShape(9.0, 1.5, 0.4, 1.0))
    assert t[np.argmax(late)] <= SS - 0.05 * (SS - SR) + 0.01
    # A reading after the lagged maximum: the peak comes at least half an hour after the reading.
    y = _curve(t, ta=15.0, temp_a=25.0, shapes=ds.DayShape(0.5, 1.5, 0.4, 1.0))
    assert t[np.argmax(y)] == pytest.approx(15.5, abs=0.01)


def test_maximum_already_read_limits_the_afternoon():
    t = np.linspace(SR, SS, 2001)
    y = _curve(t, tx=20.0, temp_a=15.0, max_so_far_c=20.0, shapes=ds.DayShapes(SHAPE, SHAPE, SHAPE, SHAPE, 1.0))
    assert y[t > TA].max() == pytest.approx(16.0, abs=1e-3)
    # Not read yet: the afternoon climbs to the maximum.
    y = _curve(t, tx=20.0, temp_a=15.0, max_so_far_c=17.0)
    assert y.max() == pytest.approx(20.0, abs=1e-3)


def test_no_reading_rises_from_the_minimum_at_sunrise():
    t = np.linspace(SR, SS, 2001)
    y = _curve(t, ta=np.nan, temp_a=np.nan)
    assert y[0] == pytest.approx(10.0)
    assert y.max() == pytest.approx(30.0, abs=1e-3)
    assert np.all(np.isfinite(y))


def test_observed_hours_are_shown_up_to_the_reading():
    t = np.arange(24.0)
    obs = np.full(24, np.nan)
    obs[:9] = np.arange(9.0)
    obs[12] = 99.0                                       # after the reading: not shown
    y = _curve(t, observed_c=obs)
    np.testing.assert_allclose(y[:9], np.arange(9.0))
    assert y[12] != 99.0
    np.testing.assert_allclose(y[9:], _curve(t)[9:])


def test_cloud_class_chooses_the_shape():
    clear = ds.DayShape(4.0, 1.5, 0.4, 1.0)
    cloudy = ds.DayShape(1.0, 1.5, 0.4, 1.0)
    shapes = ds.DayShapes(any_sky=SHAPE, clear=clear, broken=SHAPE, overcast=cloudy)
    t = np.linspace(SR, SS, 5001)
    y = ds.anchored_temperature_c(t, np.full(4, 10.0), np.full(4, 30.0), np.full(4, SR), np.full(4, SS),
                                  np.full(4, NOON), np.full(4, TA), np.full(4, 14.0),
                                  cloud_cover_pct=np.array([0.0, 50.0, 100.0, np.nan]), shapes=shapes)
    assert y.shape == (4, len(t))
    peaks = t[np.argmax(y, axis=1)] - NOON
    np.testing.assert_allclose(peaks, [4.0, 3.0, 1.0, 3.0], atol=0.01)


def test_vectorised_days_by_blocks_match_single_days():
    rng = np.random.default_rng(3)
    tn = rng.uniform(5, 15, (3, 5))
    tx = tn + rng.uniform(5, 15, (3, 5))
    ta = tn + 2.0
    full = lambda v: np.full((3, 5), v)   # noqa: E731
    times = np.arange(24.0)
    out = ds.anchored_temperature_c(times, tn, tx, full(SR), full(SS), full(NOON), full(TA), ta,
                                    cloud_cover_pct=full(10.0), shapes=ds.DEFAULT_SHAPES)
    assert out.shape == (3, 5, 24)
    one = ds.anchored_temperature_c(times, tn[1, 2], tx[1, 2], SR, SS, NOON, TA, ta[1, 2], cloud_cover_pct=10.0,
                                    shapes=ds.DEFAULT_SHAPES)
    np.testing.assert_allclose(out[1, 2], one)


def test_aware_times_are_accepted():
    day = pd.Timestamp("2024-07-01", tz="UTC")
    h = lambda x: day + pd.Timedelta(hours=x)   # noqa: E731
    times = pd.date_range(day, periods=24, freq="h")
    a = ds.anchored_temperature_c(times, 10.0, 30.0, h(SR), h(SS), h(NOON), h(TA), 14.0, shapes=SHAPE)
    b = _curve(np.arange(24.0))
    np.testing.assert_allclose(a, b)


def test_polar_days_fall_back_to_the_cosine():
    t = np.arange(0, 24.0, 0.25)
    y = ds.anchored_temperature_c(t, 2.0, 8.0, np.nan, np.nan, 12.0, 10.0, 4.0)
    assert y.max() == pytest.approx(8.0, abs=0.01)
    assert 12.0 <= t[np.argmax(y)] <= 17.0


def test_shapes_round_trip_through_json():
    again = ds.DayShapes.from_dict(json.loads(json.dumps(ds.DEFAULT_SHAPES.to_dict())))
    assert again == ds.DEFAULT_SHAPES


def test_morning_anchor_picks_the_first_reading_after_sunrise_plus_two_hours():
    times = np.arange(24.0)[None, :] + np.array([0.0, 24.0, 48.0])[:, None]
    obs = np.tile(np.arange(24.0), (3, 1))
    obs[1, 8] = np.nan                          # day 2: the 08 reading is missing
    obs[2, 7] = 50.0                            # day 3: the warmest reading is before the anchor
    cloud = np.full((3, 24), 40.0)
    a = ds.morning_anchor(times, obs, np.array([5.5, 29.5, 53.5]), cloud_cover_pct=cloud)
    np.testing.assert_allclose(a["anchor_time"], [8.0, 33.0, 56.0])
    np.testing.assert_allclose(a["anchor_temp_c"], [8.0, 9.0, 8.0])
    np.testing.assert_allclose(a["max_so_far_c"], [8.0, 9.0, 50.0])
    np.testing.assert_allclose(a["cloud_cover_pct"], 40.0)
    obs[0, 7:] = np.nan                         # nothing within the tolerance
    a = ds.morning_anchor(times, obs, np.array([5.5, 29.5, 53.5]))
    assert np.isnan(a["anchor_time"][0]) and a["index"][0] == -1


def test_calibration_recovers_the_shape_of_its_own_curves():
    # Days drawn from a known shape are fitted back to it.
    rng = np.random.default_rng(0)
    n = 60
    tn = rng.uniform(5, 15, n)
    tx = tn + rng.uniform(8, 15, n)
    nxt = tn + rng.uniform(-3, 3, n)
    ta = np.full(n, TA)
    temp_a = tn + rng.uniform(1, 4, n)
    truth = ds.DayShape(2.5, 2.0, 0.35, 1.25)
    times = np.arange(24.0)[None, :] + np.zeros((n, 1))
    obs = ds.anchored_temperature_c(times, tn, tx, np.full(n, SR), np.full(n, SS), np.full(n, NOON), ta, temp_a,
                                    next_min_temp_c=nxt, shapes=truth)
    shapes, rmse = ds.calibrate_day_shapes(times, obs, tx, np.full(n, SR), np.full(n, SS), np.full(n, NOON),
                                           ta, temp_a, next_min_temp_c=nxt, min_temp_c=tn)
    assert shapes.any_sky == truth
    assert rmse < 1e-6
    # Too few days: the defaults.
    few, rmse = ds.calibrate_day_shapes(times[:5], obs[:5], tx[:5], np.full(5, SR), np.full(5, SS),
                                        np.full(5, NOON), ta[:5], temp_a[:5])
    assert few == ds.DEFAULT_SHAPES and np.isnan(rmse)


def test_calibration_by_cloud_class_and_spent_rise():
    rng = np.random.default_rng(1)
    n = 90
    tn = rng.uniform(5, 15, n)
    tx = tn + rng.uniform(8, 15, n)
    cloud = np.repeat([10.0, 50.0, 90.0], n // 3)
    ta, temp_a = np.full(n, TA), tn + 2.0
    clear, cloudy = ds.DayShape(4.0, 2.5, 0.3, 1.0), ds.DayShape(1.5, 1.0, 0.5, 0.75)
    truth = ds.DayShapes(any_sky=SHAPE, clear=clear, broken=SHAPE, overcast=cloudy, spent_rise_c=1.5)
    # The last 10 days had their maximum before the reading.
    so_far = np.where(np.arange(n) >= n - 10, tx, temp_a)
    times = np.arange(24.0)[None, :] + np.zeros((n, 1))
    args = (np.full(n, SR), np.full(n, SS), np.full(n, NOON), ta, temp_a)
    obs = ds.anchored_temperature_c(times, tn, tx, *args, max_so_far_c=so_far, cloud_cover_pct=cloud,
                                    shapes=truth)
    shapes, rmse = ds.calibrate_day_shapes(times, obs, tx, *args, min_temp_c=tn, max_so_far_c=so_far,
                                           cloud_cover_pct=cloud)
    assert shapes.clear == clear and shapes.broken == SHAPE and shapes.overcast == cloudy
    assert shapes.spent_rise_c == 1.5
    assert rmse < 1e-6
