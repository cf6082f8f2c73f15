"""Unit tests for advisory.forecast.result (the NightForecast container)."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from advisory.forecast import calibration as cal
from advisory.forecast.result import LEVELS, NightForecast, table_prob_below, table_quantile
from tests.forecast.helpers import history_frame, states_frame


@pytest.fixture(scope="module")
def forecast() -> NightForecast:
    c = cal.fit_calibration(history_frame(300, seed=21))
    st = states_frame(4, air=(10.0, 5.0, 2.0, 8.0), dew=(0.0, -2.0, 1.0, 2.0), wind=(1.0, 4.0, 0.5, 2.0),
                      cloud=(0.0, 90.0, 20.0, 10.0))
    st.loc[3, ["status", "reason", "air_temp_c"]] = ["no_forecast", "No air temperature reading.", np.nan]
    return cal.forecast_night(st, [c, c, None, c], block=["north", "south", "east", "west"])


def test_levels():
    assert LEVELS[0] == 0.001 and LEVELS[-1] == 0.999
    assert np.all(np.diff(LEVELS) > 0)


def test_quantiles_are_ordered(forecast):
    q = forecast.quantiles_c[forecast.ok]
    assert np.all(np.diff(q, axis=1) >= -1e-12)
    assert np.all(forecast.p10[:3] <= forecast.p50[:3]) and np.all(forecast.p50[:3] <= forecast.p90[:3])
    with pytest.raises(ValueError):
        forecast.quantile(0.0)


def test_probability_inverts_quantile(forecast):
    for q in (0.02, 0.1, 0.37, 0.5, 0.9, 0.98):
        p = forecast.prob_below(forecast.quantile(q))
        np.testing.assert_allclose(p[:3], q, atol=1e-9)
        assert np.isnan(p[3])


def test_probability_thresholds(forecast):
    p = forecast.prob_below(np.array([-100.0, 100.0, 0.0, 0.0]))
    assert p[0] == 0.0 and p[1] == 1.0 and 0.0 <= p[2] <= 1.0 and np.isnan(p[3])
    # monotone in the threshold
    xs = np.linspace(-10, 15, 26)
    ps = np.array([forecast.prob_below(x)[:3] for x in xs])
    assert np.all(np.diff(ps, axis=0) >= 0)


def test_table_functions_match_methods(forecast):
    np.testing.assert_allclose(table_quantile(forecast.quantiles_c, 0.3)[:3], forecast.quantile(0.3)[:3])
    np.testing.assert_allclose(table_prob_below(forecast.quantiles_c, 1.0)[:3], forecast.prob_below(1.0)[:3])


def test_no_forecast_row(forecast):
    assert list(forecast.status) == ["ok", "ok", "ok", "no_forecast"]
    assert forecast.reason[3] == "No air temperature reading." and forecast.reason[0] is None
    assert list(forecast.model) == ["calibrated", "calibrated", "physical", ""]
    assert np.isnan(forecast.p50[3])


def test_curve_shape(forecast):
    times, temps = forecast.curve()
    assert times.shape == temps.shape and times.shape[1] == 4
    ref = forecast.reference_time.tz_convert(None).to_numpy()
    end = (forecast.sunrise + pd.Timedelta(hours=2)).tz_convert(None).to_numpy()
    for i in range(3):
        col_t = times[:, i][~np.isnat(times[:, i])]
        col_v = temps[:, i][np.isfinite(temps[:, i])]
        assert col_t[0] == ref[i] and col_t[-1] == end[i]
        assert np.all(np.diff(col_t) > np.timedelta64(0))
        # interior points fall on whole hours
        assert all(pd.Timestamp(t).minute == 0 and pd.Timestamp(t).second == 0 for t in col_t[1:-1])
        assert col_v[0] == pytest.approx(forecast.reference_temp_c[i])
        # the coldest hourly point is within the hour around the minimum and not below p50
        k = int(np.argmin(col_v))
        assert abs(col_t[k] - forecast.minimum_time.tz_convert(None)[i].to_datetime64()) <= np.timedelta64(1, "h")
        assert col_v.min() >= forecast.p50[i] - 1e-9
        # after the minimum the air warms
        assert col_v[-1] > col_v[k]
    assert np.isnat(times[:, 3]).all() and np.isnan(temps[:, 3]).all()


def test_cold_side_curve_is_colder(forecast):
    _, t50 = forecast.curve(0.5)
    _, t10 = forecast.curve(0.1)
    ok = np.isfinite(t50) & np.isfinite(t10)
    assert np.all(t10[ok] <= t50[ok] + 1e-9)


def test_crossing_time(forecast):
    x = forecast.p50 + 1.0
    cross = forecast.crossing_time(x)
    assert cross[:3].notna().all() and pd.isna(cross[3])
    # the curve at the crossing time is the threshold
    hours = ((cross - forecast.reference_time).total_seconds() / 3600).to_numpy()
    vals = forecast._curve_values(np.nan_to_num(hours)[None, :], 0.5)[0]
    np.testing.assert_allclose(vals[:3], x[:3], atol=1e-6)
    assert (cross[:3] > forecast.reference_time[:3]).all()
    assert (cross[:3] <= forecast.minimum_time[:3]).all()
    # a cautious start (p10 curve) comes earlier
    assert (forecast.crossing_time(x, q=0.1)[:3] <= cross[:3]).all()
    # never reached / already below
    never = forecast.crossing_time(forecast.p50 - 0.5)
    assert never[:3].isna().all()
    already = forecast.crossing_time(forecast.reference_temp_c + 1.0)
    assert (already[:3] == forecast.reference_time[:3]).all()


def test_tables_are_json_friendly(forecast):
    frame = forecast.to_frame()
    assert list(frame["block"]) == ["north", "south", "east", "west"]
    assert {"forecast_min_c", "forecast_p10_c", "forecast_p90_c", "model", "training_nights"} <= set(frame)
    row = forecast.row(0)
    json.dumps(row)
    assert row["model"] == "calibrated" and row["training_nights"] == 300
    assert row["reference_time"].endswith("+00:00")
    assert forecast.row(3)["forecast_min_c"] is None
    assert len(forecast) == 4
