"""Unit tests for advisory.forecast.hindcast and the ``advisory hindcast`` command."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from advisory.errors import InputError
from advisory.forecast import hindcast as hc


def write(tmp_path, text, name="obs.csv"):
    p = tmp_path / name
    p.write_text(text, encoding="utf-8")
    return p


# ---------------------------------------------------------------- reader
def test_reader_units_and_offsets(tmp_path):
    p = write(tmp_path, "time,air_temp_f,rel_humidity_pct,wind_speed_mph,cloud_cover_pct\n"
                        "2024-04-10T20:00:00-05:00,50,50,10,\n"
                        "2024-04-11T01:00:00Z,32,100,0,80\n")
    df = hc.read_observations_csv(p)
    assert str(df.index.tz) == "UTC"
    assert list(df.index) == [pd.Timestamp("2024-04-11 01:00", tz="UTC")]  # same instant: last row kept
    p = write(tmp_path, "time,air_temp_f,rel_humidity_pct,wind_speed_mph,cloud_cover_pct\n"
                        "2024-04-10T20:00:00-05:00,50,50,10,\n"
                        "2024-04-11T00:00:00Z,32,100,0,80\n")
    df = hc.read_observations_csv(p)
    assert df["air_temp_c"].tolist() == pytest.approx([0.0, 10.0])  # (F - 32) / 1.8, sorted by time
    assert df["wind_speed_ms"].iloc[1] == pytest.approx(4.4704)  # 1 mph = 0.44704 m/s (exact)
    assert np.isnan(df["cloud_cover_pct"].iloc[1])
    assert df["dew_point_c"].iloc[0] == pytest.approx(0.0, abs=1e-9)  # saturated


def test_reader_naive_times_need_a_zone(tmp_path):
    p = write(tmp_path, "time,air_temp_c,dew_point_c\n2024-01-10 20:00,5,1\n")
    with pytest.raises(InputError) as e:
        hc.read_observations_csv(p)
    assert e.value.line == 2 and e.value.field == "time"
    df = hc.read_observations_csv(p, "America/New_York")
    assert df.index[0] == pd.Timestamp("2024-01-11 01:00", tz="UTC")


def test_reader_rejects_missing_local_time(tmp_path):
    p = write(tmp_path, "time,air_temp_c,dew_point_c\n2024-03-10 01:30,5,1\n2024-03-10 02:30,5,1\n")
    with pytest.raises(InputError) as e:
        hc.read_observations_csv(p, "America/New_York")
    assert e.value.line == 3 and "does not exist" in str(e.value)


def test_reader_errors(tmp_path):
    with pytest.raises(InputError):
        hc.read_observations_csv(tmp_path / "none.csv")
    with pytest.raises(InputError) as e:
        hc.read_observations_csv(write(tmp_path, "when,air_temp_c\n1,2\n"))
    assert e.value.field == "time"
    with pytest.raises(InputError) as e:
        hc.read_observations_csv(write(tmp_path, "time,dew_point_c\n2024-01-01T00:00Z,1\n"))
    assert e.value.field == "air_temp_c"
    with pytest.raises(InputError) as e:
        hc.read_observations_csv(write(tmp_path, "time,air_temp_c,dew_point_c\n2024-01-01T00:00Z,warm,1\n"))
    assert e.value.line == 2 and e.value.field == "air_temp_c"
    with pytest.raises(InputError) as e:
        hc.read_observations_csv(write(tmp_path, "time,air_temp_c,dew_point_c\nyesterday,1,1\n"), "UTC")
    assert e.value.line == 2


def test_reader_physical_limits(tmp_path):
    p = write(tmp_path, "time,air_temp_c,dew_point_c,wind_speed_ms\n2024-01-01T00:00Z,99,1,-3\n"
                        "2024-01-01T01:00Z,5,9,2\n")
    df = hc.read_observations_csv(p)
    assert np.isnan(df["air_temp_c"].iloc[0]) and np.isnan(df["wind_speed_ms"].iloc[0])
    assert np.isnan(df["dew_point_c"].iloc[1])  # dew point 4 K above the air


# ---------------------------------------------------------------- windows
def synthetic_station(days=40, gap_day=None):
    """Hourly readings with a plain diurnal wave (exercises the bookkeeping only)."""
    idx = pd.date_range("2023-10-01", periods=24 * days, freq="h", tz="UTC")
    local_h = ((idx.hour - 5) % 24).to_numpy()
    air = 10 + 6 * np.cos((local_h - 15) / 24 * 2 * np.pi) + np.arange(len(idx)) * 0.0
    df = pd.DataFrame({"air_temp_c": air, "dew_point_c": air - 6, "wind_speed_ms": 1.0,
                       "cloud_cover_pct": 0.0}, index=idx)
    if gap_day is not None:
        df = df.drop(df.index[24 * gap_day + 6: 24 * gap_day + 9])  # 3 h missing at night
    return df


def test_rolling_origin_bookkeeping():
    obs = synthetic_station(40, gap_day=20)
    rows, skipped = hc.hindcast_frame(obs, 36.0, -80.0, "Etc/GMT+5")
    assert skipped["window from sunset to sunrise + 1 h not continuous"] >= 1
    assert (rows["model"].iloc[:30] == "physical").all() and (rows["model"].iloc[30:] == "calibrated").all()
    # training nights count the verified nights before each one
    assert list(rows["training_nights"]) == list(range(len(rows)))
    assert rows["night"].is_monotonic_increasing
    # observed minimum is the lowest reading from the reference time to sunrise + 1 h
    assert np.allclose(rows["observed_min_c"], 4.0, atol=0.5)
    assert {"night", "reference_time", "model", "training_nights", "forecast_min_c", "forecast_p10_c",
            "forecast_p90_c", "p_min_le_0c", "observed_min_c"} <= set(rows.columns)


def test_summary_scores_by_hand():
    rows = pd.DataFrame({
        "model": ["physical", "calibrated", "calibrated", "calibrated", "calibrated"],
        "forecast_min_c": [5.0, 1.0, -1.0, 4.0, 0.5],
        "forecast_p10_c": [3.0, -1.0, -3.0, 2.0, -1.0],
        "forecast_p90_c": [7.0, 3.0, 1.0, 6.0, 2.0],
        "p_min_le_0c": [0.0, 0.3, 0.7, 0.0, 0.05],
        "observed_min_c": [4.0, 0.0, -2.0, 5.0, 3.0],
        "radiative": [True, True, False, True, False],
    })
    s = hc.summarize(rows, 0.1)
    c = s["calibrated"]
    assert c["nights"] == 4
    # errors 1, 1, -1, -2.5
    assert c["mae_c"] == pytest.approx(5.5 / 4) and c["bias_c"] == pytest.approx(-1.5 / 4)
    assert c["rmse_c"] == pytest.approx(np.sqrt((1 + 1 + 1 + 6.25) / 4), abs=1e-3)
    assert c["cold"]["nights"] == 2 and c["cold"]["mae_c"] == pytest.approx(1.0)
    assert c["radiative"]["nights"] == 2 and c["radiative"]["cold"]["nights"] == 1
    assert s["physical"]["mae_c"] == pytest.approx(1.0)
    f = s["frost"]
    assert f["events"] == 2  # 0.0 and -2.0
    assert f["brier"] == pytest.approx(((0.3 - 1) ** 2 + (0.7 - 1) ** 2 + 0 + 0.05**2) / 4, abs=1e-4)
    assert (f["hits"], f["misses"], f["false_alarms"]) == (2, 0, 0)
    assert f["hit_rate"] == 1.0 and f["false_alarm_ratio"] == 0.0
    assert sum(r["nights"] for r in f["reliability"]) == 4
    assert c["p10_p90_coverage"] == pytest.approx(0.75)
    text = hc.format_summary(s)
    assert "calibrated nights" in text and "physical-model nights" in text and "reliability" in text


def test_run_hindcast_outputs(tmp_path):
    obs = synthetic_station(36)
    csv = tmp_path / "station.csv"
    out = obs.copy()
    out.insert(0, "time", [t.isoformat() for t in out.index])
    out.to_csv(csv, index=False)
    rows_out, plot = tmp_path / "rows.jsonl", tmp_path / "plot.png"
    s = hc.run_hindcast(csv, 36.0, -80.0, "Etc/GMT+5", rows_out=rows_out, plot=plot)
    lines = rows_out.read_text().splitlines()
    assert len(lines) == s["nights_verified"] > 30
    rec = json.loads(lines[-1])
    assert rec["model"] == "calibrated" and rec["reference_time"].endswith("+00:00")
    assert plot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    json.dumps(s)
    with pytest.raises(InputError):
        hc.run_hindcast(csv, 36.0, -80.0, "Nowhere/Zone")
    with pytest.raises(InputError):
        hc.run_hindcast(csv, 95.0, -80.0, "UTC")


def test_command_line(tmp_path, capsys):
    from advisory.cli import main

    obs = synthetic_station(33)
    csv = tmp_path / "station.csv"
    out = obs.copy()
    out.insert(0, "time", [t.isoformat() for t in out.index])
    out.to_csv(csv, index=False)
    assert main(["hindcast", str(csv), "--lat", "36", "--lon", "-80", "--tz", "Etc/GMT+5"]) == 0
    assert "calibrated nights" in capsys.readouterr().out
    assert main(["hindcast", str(csv), "--lat", "36", "--lon", "-80", "--tz", "Etc/GMT+5", "--json"]) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["nights_verified"] > 30
    assert main(["hindcast", str(tmp_path / "missing.csv"), "--lat", "36", "--lon", "-80",
                 "--tz", "UTC"]) == 2
    assert "file not found" in capsys.readouterr().err


def test_verified_nights_feed_the_calibration():
    from advisory.forecast.calibration import fit_calibration

    obs = synthetic_station(40, gap_day=20)
    rows = hc.verified_nights(obs, 36.0, -80.0, "Etc/GMT+5")
    assert rows["reference_time"].is_monotonic_increasing and np.isfinite(rows["observed_min_c"]).all()
    until = pd.Timestamp("2023-10-15 12:00", tz="UTC")
    early = hc.verified_nights(obs, 36.0, -80.0, "Etc/GMT+5", until=until)
    assert len(early) < len(rows)
    assert (pd.DatetimeIndex(early["sunrise"]) + pd.Timedelta(hours=1) <= until).all()
    assert fit_calibration(rows).training_nights == len(rows)
    cont, mins = hc.verify_windows(obs, rows)
    assert cont.all() and np.allclose(mins, rows["observed_min_c"])
