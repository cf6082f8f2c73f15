"""The forecast bar on real nights: pvlib's 723170TYA.CSV, a year of real hourly observations.

Data: ``pvlib/data/723170TYA.CSV`` (36.1° N, 79.95° W, 273 m; hour-ending local standard
time, UTC-5; months spliced from different years), converted by ``tests/helpers/tmy3.py``
to the canonical CSV.  Targets are set against an Allen-type least-squares
baseline measured on the same file with the same rolling origin.

A second real file shipped with pvlib, ``703165TY.csv`` (a maritime subarctic site at
55.3° N, 160.5° W, UTC-9), checks that the model is not tuned to the first one: it must
beat the same Allen-type baseline there too.
"""

from __future__ import annotations

import os

import numpy as np
import pandas as pd
import pytest

from advisory.forecast.hindcast import WARNING_PROBABILITY, hindcast_frame, run_hindcast
from tests.helpers.tmy3 import LATITUDE, LONGITUDE, TZ, write_canonical_csv

pvlib = pytest.importorskip("pvlib")


@pytest.fixture(scope="module")
def summary(tmp_path_factory):
    path = write_canonical_csv(tmp_path_factory.mktemp("tmy3") / "723170.csv")
    return run_hindcast(path, LATITUDE, LONGITUDE, TZ)


def test_nights_counted(summary):
    # 323 nights after the first 30 (the baseline's count with the same windows)
    assert summary["calibrated"]["nights"] == 323
    assert summary["physical"]["nights"] == 30
    assert summary["frost"]["warning_probability"] == WARNING_PROBABILITY == 0.1


def test_calibrated_mae(summary):
    # target: MAE <= 1.75 °C over all calibrated nights (baseline 1.80)
    assert summary["calibrated"]["mae_c"] <= 1.75


def test_radiative_evenings(summary):
    # target: MAE <= 1.35 °C on radiative evenings (baseline 1.47) ...
    rad = summary["calibrated"]["radiative"]
    assert rad["nights"] > 100
    assert rad["mae_c"] <= 1.35
    # ... with the cold-night bias within ±0.3 °C
    assert rad["cold"]["nights"] >= 20
    assert abs(rad["cold"]["bias_c"]) <= 0.3


def test_frost_probability(summary):
    f = summary["frost"]
    # target: Brier <= 0.032 (baseline 0.036); hit rate >= 0.95 with FAR <= 0.38 (baseline 0.45)
    assert f["brier"] <= 0.032
    assert f["hit_rate"] >= 0.95
    assert f["false_alarm_ratio"] <= 0.38


def test_physical_model_nights(summary):
    # target: MAE <= 2.5 °C on the nights before 30 nights of history
    assert summary["physical"]["mae_c"] <= 2.5


def test_spread_is_honest(summary):
    # p10-p90 should hold 80 % of outcomes (Wilks 2011, ch. 8, calibration of quantiles); also on cold nights
    assert 0.72 <= summary["calibrated"]["p10_p90_coverage"] <= 0.88
    assert summary["calibrated"]["p10_p90_coverage_cold"] >= 0.65


def test_reliability_table(summary):
    table = summary["frost"]["reliability"]
    assert sum(r["nights"] for r in table) == 323
    # the sure bins are right: no frost when P < 5 % (allowing 2 %), frost when P > 95 %
    assert table[0]["observed_frequency"] <= 0.02
    assert table[-1]["observed_frequency"] >= 0.9


def _allen_baseline(rows: pd.DataFrame):
    """Allen-type least squares on evening T, Td, wind, cloud, refit each night (the yardstick baseline)."""
    x = np.column_stack([np.ones(len(rows)), rows["air_temp_c"], rows["dew_point_c"],
                         rows["wind_speed_ms"].fillna(0.0), rows["cloud_cover_pct"].fillna(0.0)])
    y = rows["observed_min_c"].to_numpy()
    pred = np.full(len(y), np.nan)
    for k in range(30, len(y)):
        beta, *_ = np.linalg.lstsq(x[:k], y[:k], rcond=None)
        pred[k] = x[k] @ beta
    return pred


def test_second_real_site_beats_the_allen_baseline():
    import pvlib.iotools

    path = os.path.join(os.path.dirname(pvlib.__file__), "data", "703165TY.csv")
    raw, meta = pvlib.iotools.read_tmy3(path, map_variables=True)
    obs = pd.DataFrame({"air_temp_c": raw["temp_air"].astype(float),
                        "dew_point_c": raw["temp_dew"].astype(float),
                        "wind_speed_ms": raw["wind_speed"].astype(float),
                        "cloud_cover_pct": raw["OpqCld (tenths)"].astype(float) * 10.0}, index=raw.index)
    rows, _ = hindcast_frame(obs, meta["latitude"], meta["longitude"], "Etc/GMT+9")
    base = _allen_baseline(rows)
    cal = rows["model"].to_numpy() == "calibrated"
    ours_mae = np.mean(np.abs(rows["forecast_min_c"][cal] - rows["observed_min_c"][cal]))
    base_mae = np.nanmean(np.abs(base[cal] - rows["observed_min_c"].to_numpy()[cal]))
    assert cal.sum() > 300
    assert ours_mae < base_mae
    phys = ~cal
    assert np.mean(np.abs(rows["forecast_min_c"][phys] - rows["observed_min_c"][phys])) <= 2.5
    frost = rows["observed_min_c"][cal] <= 0.0
    warned = rows["p_min_le_0c"][cal] >= WARNING_PROBABILITY
    assert (warned & frost).sum() / frost.sum() >= 0.95


# --------------------------------------------------------------------------- the range and its score
# Figures measured with this code (rolling origin, calibrated nights), before -> after the PIT map:
#   piedmont  (723170TYA):  p10-p90 coverage 0.802 -> 0.808, width 5.45 -> 5.56 °C, cold nights below p10
#                           0.155 -> 0.155, CRPS skill over the plain site regression 6.9 % -> 6.8 %
#   subarctic (703165TY):   coverage 0.716 -> 0.772, width 2.17 -> 2.53 °C
#   humid     (12839.tm2):  coverage 0.859 -> 0.820, width 4.72 -> 4.44 °C
# Still short of the wished-for sharpness on the piedmont file (width <= 4.6 °C, cold nights below p10
# <= 0.13, CRPS skill >= 8 %): asserted below is what holds, with the shortfall left visible.
def test_range_is_calibrated_on_the_piedmont_file(summary):
    c = summary["calibrated"]
    # an 8-in-10 range should hold 8 in 10 outcomes (Wilks 2011, ch. 8)
    assert 0.77 <= c["p10_p90_coverage"] <= 0.83
    assert c["below_p10_cold"] <= 0.16
    assert c["p10_p90_width_c"] <= 5.7


def test_crps_beats_the_plain_site_regression(summary):
    c = summary["calibrated"]
    assert c["crps_nights"] >= 290
    assert c["crps_c"] < c["crps_site_regression_c"]
    assert c["crps_skill"] >= 0.06


def test_no_worse_than_before_on_the_point_scores(summary):
    # the figures before the PIT map (MAE 1.653, radiative 1.264, FAR 0.317 at P >= 0.1)
    assert summary["calibrated"]["mae_c"] <= 1.653
    assert summary["calibrated"]["radiative"]["mae_c"] <= 1.264
    assert summary["frost"]["false_alarm_ratio"] <= 0.317


def _tmy_obs(name):
    import pvlib.iotools

    d = os.path.join(os.path.dirname(pvlib.__file__), "data")
    if name == "703165TY.csv":
        raw, meta = pvlib.iotools.read_tmy3(os.path.join(d, name), map_variables=True)
        obs = pd.DataFrame({"air_temp_c": raw["temp_air"].astype(float),
                            "dew_point_c": raw["temp_dew"].astype(float),
                            "wind_speed_ms": raw["wind_speed"].astype(float),
                            "cloud_cover_pct": raw["OpqCld (tenths)"].astype(float) * 10.0}, index=raw.index)
        return obs, meta["latitude"], meta["longitude"], "Etc/GMT+9"
    # TMY2 file (a warm humid coast, few radiative nights): temperatures and wind in tenths
    raw, meta = pvlib.iotools.read_tmy2(os.path.join(d, name))
    obs = pd.DataFrame({"air_temp_c": raw["DryBulb"].astype(float) / 10.0,
                        "dew_point_c": raw["DewPoint"].astype(float) / 10.0,
                        "wind_speed_ms": raw["Wspd"].astype(float) / 10.0,
                        "cloud_cover_pct": raw["OpqCld"].astype(float) * 10.0}, index=raw.index)
    return obs, meta["latitude"], meta["longitude"], "Etc/GMT+5"


@pytest.mark.parametrize("name", ["703165TY.csv", "12839.tm2"])
def test_range_is_calibrated_on_other_climates(name):
    from advisory.forecast.hindcast import summarize

    obs, lat, lon, tz = _tmy_obs(name)
    rows, skipped = hindcast_frame(obs, lat, lon, tz)
    s = summarize(rows, skipped=skipped)["calibrated"]
    assert s["nights"] > 300
    # before the PIT map: 0.716 (too narrow) and 0.859 (too wide)
    assert 0.75 <= s["p10_p90_coverage"] <= 0.85
    assert s["crps_c"] < s["crps_site_regression_c"]


def test_warm_humid_site_no_worse_than_the_plain_site_regression():
    obs, lat, lon, tz = _tmy_obs("12839.tm2")
    rows, _ = hindcast_frame(obs, lat, lon, tz)
    base = _allen_baseline(rows)
    cal = rows["model"].to_numpy() == "calibrated"
    o = rows["observed_min_c"].to_numpy()[cal]
    assert np.mean(np.abs(rows["forecast_min_c"].to_numpy()[cal] - o)) <= np.nanmean(np.abs(base[cal] - o))


def test_no_look_ahead():
    """Changing one night's later readings leaves that night's forecast as it was."""
    from tests.helpers.tmy3 import tmy3_frame

    obs = tmy3_frame()[["air_temp_c", "dew_point_c", "wind_speed_ms", "cloud_cover_pct"]].copy()
    rows, _ = hindcast_frame(obs, LATITUDE, LONGITUDE, TZ)
    k = 200
    ref = pd.Timestamp(rows["reference_time"].iloc[k])
    later = (obs.index > ref) & (obs.index <= ref + pd.Timedelta(hours=14))
    changed = obs.copy()
    changed.loc[later, "air_temp_c"] -= 6.0
    rows2, _ = hindcast_frame(changed, LATITUDE, LONGITUDE, TZ)
    same = rows2[rows2["night"] == rows["night"].iloc[k]].iloc[0]
    for col in ("forecast_min_c", "forecast_p10_c", "forecast_p90_c", "p_min_le_0c"):
        assert same[col] == pytest.approx(rows[col].iloc[k], abs=1e-9)
    assert same["observed_min_c"] < rows["observed_min_c"].iloc[k] - 3.0
