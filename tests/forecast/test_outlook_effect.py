"""What a night outlook changes in the frost forecast (advisory.forecast.outlook_effect)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from advisory.forecast import outlook_effect as oe
from advisory.forecast.cooling import PhysicalNight


def _night(cloud=80.0, wind=4.0, n=1):
    return PhysicalNight(np.full(n, 8.0), np.full(n, 1.0), np.full(n, wind), np.full(n, cloud), np.full(n, 2.0),
                         np.full(n, 9.0))


def test_clearing_and_calming_lower_the_physical_minimum():
    night = _night()
    change = oe.physical_change_c(night, [10.0], [1.0])
    assert change[0] < -0.5
    assert oe.physical_change_c(night, [np.nan], [np.nan])[0] == 0.0
    # cloud coming in warms
    assert oe.physical_change_c(_night(cloud=0.0, wind=1.0), [100.0], [np.nan])[0] > 0.3


def test_default_shift_is_half_and_bounded_more_tightly_on_the_warm_side():
    d = oe.outlook_delta_c(np.array([-1.0, -10.0, 10.0]), np.array([None, None, None], dtype=object))
    np.testing.assert_allclose(d, [-0.5, -oe.DEFAULT_COLDER_MAX_C, oe.DEFAULT_WARMER_MAX_C])
    fitted = oe.outlook_delta_c(np.array([-1.0, -10.0]), np.array([0.9, 0.9], dtype=object))
    np.testing.assert_allclose(fitted, [-0.9, -oe.FITTED_MAX_C])


def test_weight_is_learned_from_the_stations_own_nights():
    rng = np.random.default_rng(1)
    change = rng.normal(0, 1.5, 120)
    assert oe.fit_outlook_weight(change[:10], change[:10])[0] is None  # too few nights: the default
    w, n = oe.fit_outlook_weight(change, change + rng.normal(0, 0.5, 120))
    assert n == 120 and w == pytest.approx(1.0, abs=0.1)
    w0, _ = oe.fit_outlook_weight(change, rng.normal(0, 1.0, 120))
    assert w0 < 0.35


def test_means_over_the_window_and_after_midnight():
    idx = pd.date_range("2026-04-09T03:00Z", periods=12, freq="h")  # 20:00 to 07:00 PDT
    hours = pd.DataFrame({"sky_cover_pct": [90.0] * 4 + [10.0] * 8, "wind_speed_ms": 2.0,
                          "air_temp_c": np.linspace(6, -2, 12)}, index=idx)
    m = oe.outlook_means(hours, idx[1], idx[10], "America/Los_Angeles")
    assert m.hours == 10
    assert m.late_sky_cover_pct == pytest.approx(10.0)
    assert m.low_c == pytest.approx(np.linspace(6, -2, 12)[10])
    assert oe.outlook_means(None, idx[0], idx[5], "UTC").hours == 0
    text = oe.outlook_reason(m, 90.0, 2.0, -0.8, fitted=False)
    assert "expects clearing after midnight" in text and "lowered 0.8 °C" in text


def test_no_outlook_no_change():
    states = pd.DataFrame({"air_temp_c": [8.0], "dew_point_c": [1.0], "wind_speed_ms": [3.0],
                           "cloud_cover_pct": [50.0], "hours_since_sunset": [2.0], "hours_to_sunrise": [9.0]})
    delta, notes = oe.outlook_shifts(states, [oe.NightOutlookMeans()], [None])
    assert delta[0] == 0.0 and notes == [None]
