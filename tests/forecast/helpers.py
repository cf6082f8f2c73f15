"""Synthetic evening states and histories for unit tests of the forecast models.

The numbers only exercise the code's logic (a known linear relation to recover, a
known noise to measure); they are not used as expected values of any physical fact.
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd


def states_frame(n=3, air=(10.0, 5.0, 2.0), dew=(0.0, -2.0, 1.0), wind=(1.0, 4.0, 0.5),
                 cloud=(0.0, 90.0, 20.0), start="2024-04-10 01:40"):
    """Evening states of n blocks (one night), the columns evening_states() gives."""
    ref = pd.date_range(start, periods=n, freq="min", tz="UTC")
    air, dew, wind, cloud = (np.resize(np.asarray(v, float), n) for v in (air, dew, wind, cloud))
    return pd.DataFrame({
        "station": [f"S{i}" for i in range(n)],
        "night": [dt.date(2024, 4, 9)] * n,
        "status": ["ok"] * n,
        "reason": [None] * n,
        "assumed": [()] * n,
        "sunset": ref - pd.Timedelta(hours=2),
        "sunrise": ref + pd.Timedelta(hours=9.5),
        "reference_time": ref,
        "hours_since_sunset": 2.0,
        "hours_to_sunrise": 9.5,
        "air_temp_c": air,
        "dew_point_c": dew,
        "wind_speed_ms": wind,
        "cloud_cover_pct": cloud,
        "upper_air_temp_c": np.nan,
        "sunset_air_temp_c": air + 2.0,
        "cooling_since_sunset_c": 2.0,
        "dew_point_change_3h_c": 0.0,
    })


def history_frame(n, seed=0, noisy_cloud=True):
    """n verified nights following a known linear law, noisier on cloudy evenings."""
    rng = np.random.default_rng(seed)
    air = rng.uniform(-2, 20, n)
    dew = air - rng.uniform(1, 12, n)
    wind = rng.uniform(0, 6, n)
    cloud = rng.choice([0.0, 10.0, 50.0, 90.0, 100.0], n)
    hours = rng.uniform(7, 12, n)
    cool = rng.uniform(0, 4, n)
    sd = np.where(cloud >= 50, 2.5, 0.5) if noisy_cloud else np.full(n, 1.0)
    truth = air - (3.0 + 0.4 * (air - dew) - 0.4 * wind - 0.03 * cloud + 0.5 * cool)
    observed = truth + rng.normal(0, 1, n) * sd
    ref = pd.date_range("2020-01-01 02:00", periods=n, freq="D", tz="UTC")
    return pd.DataFrame({
        "night": (ref - pd.Timedelta(days=1)).date,
        "reference_time": ref,
        "sunrise": ref + pd.to_timedelta(hours, unit="h"),
        "air_temp_c": air, "dew_point_c": dew, "wind_speed_ms": wind, "cloud_cover_pct": cloud,
        "cooling_since_sunset_c": cool, "dew_point_change_3h_c": 0.0,
        "hours_since_sunset": 2.0, "hours_to_sunrise": hours,
        "observed_min_c": observed, "truth_c": truth,
    })
