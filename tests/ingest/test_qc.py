"""Quality-control tests of advisory.ingest.qc, one behaviour at a time."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from advisory.ingest import qc

T0 = 1_711_929_600  # 2024-04-01T00:00Z


def times(n: int, step_s: int = 300) -> np.ndarray:
    return T0 + np.arange(n, dtype=np.int64) * step_s


def flags(values: dict, step_s: int = 300, n: int | None = None, **cfg) -> dict:
    n = n or len(next(iter(values.values())))
    config = qc.QcConfig(**cfg) if cfg else qc.DEFAULT_CONFIG
    return qc.qc_arrays(times(n, step_s), {k: np.asarray(v, dtype=float) for k, v in values.items()}, config)


def ramp(n: int, start: float = 5.0, step: float = 0.05) -> np.ndarray:
    return start + step * np.arange(n)


def test_clean_series_has_no_flags():
    out = flags({"air_temp_c": ramp(100), "dew_point_c": ramp(100) - 4, "wind_speed_ms": 1 + np.arange(100) % 3})
    assert all(not f.any() for f in out.values())


@pytest.mark.parametrize("col, bad, good", [
    ("air_temp_c", [-80.1, 60.1], [-80.0, 60.0]),  # Zahumenský (2004) gross-error limits, from memory
    ("dew_point_c", [35.1], [35.0]),
    ("rel_humidity_pct", [0.0, 105.1], [0.5, 105.0]),
    ("wind_speed_ms", [-0.1, 75.1], [0.0, 75.0]),
    ("cloud_cover_pct", [-1, 101], [0, 100]),
])
def test_range(col, bad, good):
    x = np.array(bad + good)
    t = T0 + np.arange(len(x)) * 13 * 3600  # far apart: no neighbour tests
    f = qc.qc_arrays(t, {col: x})[qc.QC_COLUMNS[col]]
    assert list(f) == [qc.RANGE] * len(bad) + [0] * len(good)


def test_missing_values_have_no_flags():
    f = flags({"air_temp_c": [np.nan, 5, np.nan]})["air_temp_qc"]
    assert list(f) == [0, 0, 0]


def test_spike_uses_the_wmo_tolerance_for_the_time_step():
    # Hourly readings: tolerance 4 °C (WMO-No. 305, VI.21).
    base = ramp(10, 5.0, 0.01)
    up = base.copy()
    up[5] += 4.5
    assert flags({"air_temp_c": up}, step_s=3600)["air_temp_qc"][5] == qc.SPIKE
    small = base.copy()
    small[5] += 3.9
    assert not flags({"air_temp_c": small}, step_s=3600)["air_temp_qc"].any()
    # Three hours apart the tolerance is 9 °C: a 6 °C excursion passes.
    wide = base.copy()
    wide[5] += 6.0
    assert not flags({"air_temp_c": wide}, step_s=3 * 3600)["air_temp_qc"].any()
    # More than 12 h apart nothing is compared.
    far = base.copy()
    far[5] += 30.0
    assert not flags({"air_temp_c": far}, step_s=13 * 3600)["air_temp_qc"].any()


def test_spike_on_the_value_only_not_its_neighbours():
    x = ramp(20)
    x[10] = 25.0
    f = flags({"air_temp_c": x})["air_temp_qc"]
    assert list(np.flatnonzero(f)) == [10] and f[10] == qc.SPIKE


def test_monotonic_morning_warming_is_not_a_spike_nor_a_step():
    # 6 °C per hour for three hours (real on clear mornings; see test_tmy3_import).
    x = np.r_[ramp(12, 5.0, 0.0), 5.0 + 0.5 * np.arange(1, 37), ramp(12, 23.0, 0.0)]
    assert not flags({"air_temp_c": x})["air_temp_qc"].any()


def test_step_flags_the_reading_after_a_lasting_jump():
    x = np.r_[ramp(10, 5.0, 0.0), ramp(10, 16.5, 0.0)]  # 11.5 °C jump that stays
    f = flags({"air_temp_c": x})["air_temp_qc"]
    assert list(np.flatnonzero(f)) == [10] and f[10] == qc.STEP


def test_range_failures_are_skipped_by_neighbour_tests():
    x = ramp(10)
    x[4] = -9999.0  # a logger's missing-value code
    f = flags({"air_temp_c": x})["air_temp_qc"]
    assert list(f) == [0, 0, 0, 0, qc.RANGE, 0, 0, 0, 0, 0]


def test_stuck_sensor_needs_six_hours_and_four_readings():
    x = ramp(200)
    x[20:93] = 7.7  # 73 readings at 5 min: exactly 6 h from first to last
    f = flags({"air_temp_c": x})["air_temp_qc"]
    assert set(np.flatnonzero(f)) == set(range(20, 93))
    assert (f[20:93] == qc.STUCK).all()
    y = ramp(200)
    y[20:92] = 7.7  # 5 h 55 min
    assert not flags({"air_temp_c": y})["air_temp_qc"].any()
    # Hourly data: three equal readings span only 2 h.
    z = np.r_[1.0, 2.0, 2.0, 2.0, 3.0]
    assert not flags({"air_temp_c": z}, step_s=3600)["air_temp_qc"].any()


def test_stuck_exemptions_calm_wind_and_saturated_humidity():
    n = 120
    wind = np.zeros(n)
    rh = np.full(n, 99.0)
    air = ramp(n, 2.0, 0.01)
    out = flags({"wind_speed_ms": wind, "rel_humidity_pct": rh, "air_temp_c": air})
    assert not out["wind_speed_qc"].any() and not out["rel_humidity_qc"].any()
    stuck_wind = flags({"wind_speed_ms": np.full(n, 2.3)})["wind_speed_qc"]
    assert (stuck_wind == qc.STUCK).all()
    assert not flags({"cloud_cover_pct": np.full(n, 100.0)})["cloud_cover_qc"].any()


def test_dew_point_above_air_temperature():
    air = np.array([10.0, 10.01, 10.02, 10.03])
    dew = np.array([10.0, 10.5, 10.6, 12.0])
    rh = np.array([100.0, 103.0, 104.0, 113.0])
    t = T0 + np.arange(4) * 13 * 3600
    out = qc.qc_arrays(t, {"air_temp_c": air, "dew_point_c": dew, "rel_humidity_pct": rh})
    assert list(out["dew_point_qc"]) == [0, 0, qc.DEW_ABOVE_AIR, qc.RANGE | qc.DEW_ABOVE_AIR]
    # The moisture pair shares flags: RH 113 % is out of range, so its dew point is flagged too.
    assert list(out["rel_humidity_qc"]) == list(out["dew_point_qc"])
    assert not out["air_temp_qc"].any()


def test_apply_qc_on_a_frame():
    idx = pd.date_range("2024-04-01", periods=30, freq="5min", tz="UTC")
    frame = pd.DataFrame({"air_temp_c": ramp(30)}, index=idx)
    frame.iloc[15, 0] = 40.0
    out = qc.apply_qc(frame)
    assert out["air_temp_qc"].iloc[15] == qc.SPIKE
    assert set(qc.QC_COLUMNS.values()) <= set(out.columns)
    with pytest.raises(ValueError, match="sorted"):
        qc.apply_qc(frame.iloc[::-1])
    with pytest.raises(ValueError, match="aware"):
        qc.apply_qc(frame.tz_localize(None))


def test_gaps():
    t = np.r_[times(10), T0 + 3000 + 3600 + np.arange(5) * 300]  # one hour missing after the 10th reading
    g = qc.find_gaps(t)
    assert len(g) == 1
    assert g["duration_s"].iloc[0] == 3900 and g["missing"].iloc[0] == 12
    assert g["start_utc"].iloc[0] == pd.Timestamp(T0 + 2700, unit="s", tz="UTC")
    assert qc.find_gaps(times(10)).empty
    assert qc.find_gaps(times(1)).empty


def test_flag_names():
    assert qc.flag_names(qc.SPIKE | qc.STUCK) == ["spike", "stuck"]
    assert qc.flag_names(0) == []
