"""Unit tests for advisory.forecast.calibration."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from advisory.forecast import calibration as cal
from advisory.forecast.cooling import physical_night
from advisory.forecast.result import CALIBRATED, LEVELS, PHYSICAL
from tests.forecast.helpers import history_frame, states_frame


def test_too_little_history_uses_the_physical_model():
    c = cal.fit_calibration(history_frame(12))
    assert c.model == PHYSICAL and c.training_nights == 12
    assert set(c.physical_spread_c) == {"radiative", "other"}
    empty = cal.fit_calibration(history_frame(0))
    assert empty.model == PHYSICAL and empty.training_nights == 0
    assert empty.physical_spread_c == cal.PHYSICAL_SPREAD_C


def test_calibrated_model_recovers_a_linear_law():
    hist = history_frame(600, seed=1)
    c = cal.fit_calibration(hist)
    assert c.model == CALIBRATED and c.training_nights == 600
    test = history_frame(200, seed=2)
    fc = cal.forecast_night(test, c)
    assert (fc.model == CALIBRATED).all()
    assert np.median(np.abs(fc.p50 - test["truth_c"])) < 0.4


def test_spread_is_wider_on_cloudy_windy_evenings():
    c = cal.fit_calibration(history_frame(600, seed=1))
    st = states_frame(2, air=(10.0, 10.0), dew=(0.0, 0.0), wind=(1.0, 1.0), cloud=(0.0, 100.0))
    fc = cal.forecast_night(st, c)
    width = fc.p90 - fc.p10
    assert width[1] > 2.5 * width[0]


def test_leave_one_out_residuals_are_exact():
    hist = history_frame(45, seed=3)
    c = cal.fit_calibration(hist)
    x = cal.predictor_matrix(hist)
    y = hist["observed_min_c"].to_numpy()
    n = len(y)
    w = 0.5 ** ((n - 1 - np.arange(n)) / cal.HALF_LIFE_NIGHTS)
    w = w / w.mean()
    z = np.column_stack([np.ones(n), (x - c.center) / c.scale])
    lam = cal.PRIOR_NIGHTS * np.eye(z.shape[1])
    brute = []
    for i in range(n):
        keep = np.arange(n) != i
        zk, wk = z[keep], w[keep]
        beta = np.linalg.solve(zk.T @ (zk * wk[:, None]) + lam, zk.T @ (wk * y[keep]) + lam @ c.prior_coef)
        brute.append(y[i] - z[i] @ beta)
    np.testing.assert_allclose(np.sort(brute), c.residual_c, atol=1e-8)


def test_shrinkage_toward_the_physical_model_fades_with_history():
    hist = history_frame(900, seed=4)
    share = []
    for n in (30, 120, 900):
        c = cal.fit_calibration(hist.iloc[:n])
        free = cal.fit_calibration(hist.iloc[:n], prior_nights=1e-9)
        # how far the fit sits from the unshrunk one, as a share of the way to the prior
        share.append(np.linalg.norm(c.coef - free.coef) / np.linalg.norm(c.prior_coef - free.coef))
    assert share[0] > share[1] > share[2]
    assert share[0] > 0.3 and share[2] < 0.1


def test_prior_is_the_linearised_physical_model():
    hist = history_frame(200, seed=5)
    c = cal.fit_calibration(hist)
    x = cal.predictor_matrix(hist)
    z = np.column_stack([np.ones(len(x)), (x - c.center) / c.scale])
    phys = physical_night(hist).minimum_c
    # the linearisation reproduces the physical model closely over the same evenings
    assert np.sqrt(np.mean((z @ c.prior_coef - phys) ** 2)) < 1.0


def test_recent_nights_weigh_more():
    c = cal.fit_calibration(history_frame(400, seed=6))
    assert c.residual_weight.max() == pytest.approx(1.0)
    assert c.residual_weight.min() == pytest.approx(0.5 ** (399 / 365))


def test_only_the_most_recent_nights_are_used():
    c = cal.fit_calibration(history_frame(60, seed=7), max_nights=40)
    assert c.training_nights == 40


def test_rows_without_observation_are_ignored_and_order_is_by_time():
    hist = history_frame(50, seed=8)
    hist.loc[3, "observed_min_c"] = np.nan
    shuffled = hist.sample(frac=1.0, random_state=1)
    a = cal.fit_calibration(hist)
    b = cal.fit_calibration(shuffled)
    assert a.training_nights == 49
    np.testing.assert_allclose(a.coef, b.coef)
    assert a.last_night == str(hist["night"].iloc[-1])


def test_round_trip_through_json():
    c = cal.fit_calibration(history_frame(100, seed=9))
    text = json.dumps(c.to_dict())
    back = cal.Calibration.from_dict(json.loads(text))
    st = states_frame(3)
    np.testing.assert_allclose(cal.forecast_night(st, c).quantiles_c, cal.forecast_night(st, back).quantiles_c)
    phys = cal.fit_calibration(history_frame(10, seed=9))
    back = cal.Calibration.from_dict(json.loads(json.dumps(phys.to_dict())))
    assert back.model == PHYSICAL and back.physical_spread_c == phys.physical_spread_c


def test_from_dict_refuses_damaged_data():
    d = cal.fit_calibration(history_frame(100, seed=9)).to_dict()
    with pytest.raises(ValueError):
        cal.Calibration.from_dict({**d, "version": 99})
    with pytest.raises(ValueError):
        cal.Calibration.from_dict({**d, "coef": d["coef"][:-1]})
    with pytest.raises(ValueError):
        cal.Calibration.from_dict({**d, "predictors": ["air_temp_c"]})
    bad = json.loads(json.dumps(d))
    bad["residuals"]["weight"] = bad["residuals"]["weight"][:-1]
    with pytest.raises(ValueError):
        cal.Calibration.from_dict(bad)


def test_mixed_calibrations_vectorised_equal_one_by_one():
    c1 = cal.fit_calibration(history_frame(100, seed=10))
    c2 = cal.fit_calibration(history_frame(300, seed=11))
    c3 = cal.fit_calibration(history_frame(10, seed=12))
    st = states_frame(5, air=(10, 5, 2, 8, 0), dew=(0, -2, 1, 3, -6), wind=(1, 4, 0.5, 2, 0),
                      cloud=(0, 90, 20, 50, 0))
    cals = [c1, c2, None, c3, c1]
    together = cal.forecast_night(st, cals)
    for i, c in enumerate(cals):
        alone = cal.forecast_night(st.iloc[[i]], c)
        np.testing.assert_allclose(together.quantiles_c[i], alone.quantiles_c[0])
    assert list(together.model) == [CALIBRATED, CALIBRATED, PHYSICAL, PHYSICAL, CALIBRATED]
    assert list(together.training_nights) == [100, 300, 0, 10, 100]
    by_station = cal.forecast_night(st, {"S0": c1, "S1": c2, "S4": c1})
    np.testing.assert_allclose(by_station.quantiles_c[[0, 1, 4]], together.quantiles_c[[0, 1, 4]])
    assert by_station.model[2] == PHYSICAL
    with pytest.raises(ValueError):
        cal.forecast_night(st, [c1, c2])


def test_physical_model_spread_is_normal_by_regime():
    st = states_frame(2, air=(10.0, 10.0), dew=(0.0, 0.0), wind=(1.0, 6.0), cloud=(0.0, 0.0))
    fc = cal.forecast_night(st)
    phys = physical_night(st).minimum_c
    np.testing.assert_allclose(fc.p50, phys)
    z90 = 1.2815515655446004  # standard normal 90 % quantile
    np.testing.assert_allclose(fc.p90 - fc.p50, [z90 * 2.5, z90 * 3.5], rtol=1e-6)


def test_missing_cooling_since_sunset_uses_the_training_mean():
    c = cal.fit_calibration(history_frame(100, seed=13))
    st = states_frame(1)
    st_missing = st.assign(cooling_since_sunset_c=np.nan)
    st_filled = st.assign(cooling_since_sunset_c=c.fill["cooling_since_sunset_c"])
    np.testing.assert_allclose(cal.forecast_night(st_missing, c).quantiles_c,
                               cal.forecast_night(st_filled, c).quantiles_c)


def test_no_forecast_rows_stay_empty():
    st = states_frame(2)
    st.loc[1, ["status", "reason", "air_temp_c"]] = ["no_forecast", "Air temperature is stale.", np.nan]
    fc = cal.forecast_night(st, cal.fit_calibration(history_frame(100, seed=14)))
    assert list(fc.status) == ["ok", "no_forecast"]
    assert fc.reason[1] == "Air temperature is stale."
    assert np.isnan(fc.quantiles_c[1]).all() and fc.model[1] == ""


def test_is_radiative():
    assert list(cal.is_radiative([30, 31, 0, np.nan], [3, 0, 3.1, np.nan])) == [True, False, False, True]


def test_predictor_matrix_fills():
    st = states_frame(1).assign(wind_speed_ms=np.nan, cloud_cover_pct=np.nan, dew_point_change_3h_c=np.nan)
    x = cal.predictor_matrix(st)
    row = dict(zip(cal.PREDICTORS, x[0], strict=True))
    assert row["wind_speed_ms"] == 0 and row["cloud_cover_pct"] == 0 and row["dew_point_change_3h_c"] == 0
    assert row["brunt_time_factor"] == pytest.approx(np.sqrt(2 + 9.5 + 0.5) - np.sqrt(2))
    assert isinstance(pd.DataFrame(x, columns=list(cal.PREDICTORS)), pd.DataFrame)


def test_forecast_blocks_in_one_call():
    import datetime as dt

    idx = pd.date_range("2024-04-10 12:00", periods=30, freq="h", tz="UTC")
    obs = pd.DataFrame({"air_temp_c": np.linspace(20, 5, 30), "dew_point_c": 0.0, "wind_speed_ms": 1.0,
                        "cloud_cover_pct": 0.0}, index=idx)
    fc, states = cal.forecast_blocks({"S": obs}, [36.1, 36.2], [-79.9, -80.0], dt.date(2024, 4, 10),
                                     "America/New_York", station=["S", "S"], block=["a", "b"])
    assert list(fc.status) == ["ok", "ok"] and list(fc.block) == ["a", "b"]
    assert len(states) == 2 and (fc.reference_time == pd.DatetimeIndex(states["reference_time"])).all()
    assert np.all(fc.p50 < states["air_temp_c"].to_numpy())


# --------------------------------------------------------------------------- recalibration from the PIT
def test_uniform_pit_leaves_the_forecast_nearly_unchanged():
    u = (np.arange(400) + 0.5) / 400
    levels = cal.pit_levels(np.random.default_rng(3).permutation(u))
    np.testing.assert_allclose(levels, LEVELS, atol=0.01)


def test_an_overconfident_record_widens_both_tails():
    # outcomes fall in the outer tenths far more often than a calibrated forecast allows
    rng = np.random.default_rng(4)
    u = np.where(rng.random(400) < 0.5, rng.uniform(0.0, 0.1, 400), rng.uniform(0.9, 1.0, 400))
    levels = cal.pit_levels(u)
    at = dict(zip(np.round(LEVELS, 4), levels, strict=True))
    assert at[0.1] < 0.06 and at[0.9] > 0.94


def test_a_timid_record_narrows_only_the_warm_side():
    # outcomes bunch in the middle: the range was too wide; the cold tail is still never narrowed
    u = np.random.default_rng(5).uniform(0.3, 0.7, 400)
    levels = cal.pit_levels(u)
    below = LEVELS < 0.5
    assert np.all(levels[below] <= LEVELS[below] + 1e-12)
    at = dict(zip(np.round(LEVELS, 4), levels, strict=True))
    assert at[0.9] < 0.8
    assert np.all(np.diff(levels) >= 0)


def test_too_few_pit_values_give_no_map():
    assert len(cal.pit_levels([0.2, 0.5, np.nan])) == 0


def test_recalibrate_table_reads_the_raw_table_at_the_mapped_levels():
    q = np.tile(np.linspace(-5.0, 5.0, len(LEVELS)), (2, 1))
    np.testing.assert_allclose(cal.recalibrate_table(q, LEVELS), q)
    shifted = cal.recalibrate_table(q, np.clip(LEVELS - 0.005, LEVELS[0], None))
    assert np.all(shifted <= q + 1e-12)


def test_fitted_calibration_carries_its_pit_map_through_json():
    c = cal.fit_calibration(history_frame(200, seed=6))
    assert c.model == CALIBRATED
    assert len(c.pit_levels) == len(LEVELS) and c.pit_nights == 200 - cal.MIN_NIGHTS
    back = cal.Calibration.from_dict(json.loads(json.dumps(c.to_dict())))
    np.testing.assert_allclose(back.pit_levels, c.pit_levels)
    st = history_frame(5, seed=7)
    np.testing.assert_allclose(cal.forecast_night(st, back).p10, cal.forecast_night(st, c).p10)
    # a calibration stored before the map existed still loads, and forecasts without one
    old = c.to_dict()
    del old["pit_levels"], old["pit_nights"]
    assert len(cal.Calibration.from_dict(old).pit_levels) == 0
    with pytest.raises(ValueError):
        cal.Calibration.from_dict({**c.to_dict(), "pit_levels": [0.5, 0.4]})


def test_the_pit_map_changes_the_forecast_it_is_fitted_with():
    c = cal.fit_calibration(history_frame(200, seed=6))
    raw = cal.Calibration.from_dict({**c.to_dict(), "pit_levels": [], "pit_nights": 0})
    st = history_frame(5, seed=7)
    a, b = cal.forecast_night(st, c), cal.forecast_night(st, raw)
    assert np.all(a.p10 <= b.p10 + 1e-9)  # the cold tail is never narrowed
