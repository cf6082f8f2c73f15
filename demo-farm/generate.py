"""Regenerate the demo farm's station files, deterministically.

The demo farm, its people and its places are invented.  The weather is
synthetic but follows the physics the tool models, so that the demo has
something to show:

* daytime: a sine rise from the minimum just after sunrise to the maximum about
  three hours after solar noon;
* night: Brunt-like square-root-of-time cooling from sunset towards the
  minimum at sunrise, deeper on clear calm nights, shallow under cloud;
* dew point nearly conserved through a day, never above the air temperature;
* a tower sensor at 10 m that is warmer than the 1.5 m sensor on clear calm
  nights (an inversion) and slightly cooler by day;
* a spring week (two radiation-frost nights) and a summer week (a heat spell);
* two sensor faults for the quality-control report: a stuck humidity sensor and
  one temperature spike.

Station ``QR-BENCH`` writes the canonical CSV (UTC offsets, °C, m/s).  Station
``QR-CREEK`` writes a logger export (naive local times, °F, mph, RH) read
through the column map in ``farm.toml``.

Run ``python demo-farm/generate.py`` to rewrite the files in ``demo-farm/stations``.
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd
from astral import LocationInfo
from astral.sun import sun

HERE = Path(__file__).resolve().parent
TZ = ZoneInfo("America/Los_Angeles")
LAT, LON = 46.42, -120.31
STEP_MIN = 15

#: Day-by-day weather: (local date, min °C, max °C, night cloud %, night wind m/s, dew point °C).
#: The minimum is that of the morning that *ends* the night before.
SPRING = [
    ("2026-04-06", 4.0, 17.0, 80, 3.5, 3.0),
    ("2026-04-07", 3.0, 15.0, 60, 2.5, 1.5),
    ("2026-04-08", -0.5, 13.0, 10, 1.0, -5.0),
    ("2026-04-09", -3.4, 12.0, 5, 0.6, -7.0),   # radiation frost at dawn
    ("2026-04-10", 1.0, 15.0, 40, 2.0, -2.0),
    ("2026-04-11", -2.6, 13.5, 5, 0.8, -6.5),   # radiation frost at dawn
    ("2026-04-12", 3.5, 18.0, 70, 3.0, 2.0),
    ("2026-04-13", 5.0, 19.0, 85, 4.0, 4.0),
]
SUMMER = [
    ("2026-07-13", 14.0, 30.0, 10, 2.0, 9.0),
    ("2026-07-14", 15.0, 33.0, 5, 1.5, 10.0),
    ("2026-07-15", 17.0, 36.5, 5, 1.5, 11.0),
    ("2026-07-16", 19.0, 39.0, 0, 1.2, 12.0),   # heat spell
    ("2026-07-17", 20.0, 40.5, 0, 1.0, 13.0),   # heat spell
    ("2026-07-18", 19.0, 37.0, 10, 2.0, 11.0),
    ("2026-07-19", 16.0, 32.0, 30, 3.0, 9.0),
    ("2026-07-20", 14.0, 29.0, 40, 3.0, 8.0),
]


def _sun(day: dt.date) -> dict:
    loc = LocationInfo("demo", "demo", "America/Los_Angeles", LAT, LON)
    return sun(loc.observer, date=day, tzinfo=TZ)


def _series(days: list[tuple], rng: np.random.Generator, offset_c: float) -> pd.DataFrame:
    """Synthetic readings every STEP_MIN minutes over the given days."""
    rows = []
    t = None
    parsed = [(dt.date.fromisoformat(d), tmin + offset_c, tmax + offset_c, cloud, wind, td + offset_c * 0.5)
              for d, tmin, tmax, cloud, wind, td in days]
    for k in range(len(parsed) - 1):
        day, tmin, tmax, _c0, _w0, td = parsed[k]
        nxt_day, nxt_min, _nmax, cloud, wind, nxt_td = parsed[k + 1]
        s0, s1 = _sun(day), _sun(nxt_day)
        rise, noon, set_ = s0["sunrise"], s0["noon"], s0["sunset"]
        t_max_time = noon + dt.timedelta(hours=3)
        if t is None:  # the series starts at local midnight; later days continue where the last ended
            t = dt.datetime.combine(day, dt.time(0), TZ)
        end = s1["sunrise"]
        # temperature at sunset from the afternoon sine
        set_frac = (set_ - t_max_time) / (set_ + dt.timedelta(hours=9) - t_max_time)
        t_set = tmax - (tmax - tmin) * 0.35 * np.sin(np.pi / 2 * set_frac)
        night_len_h = (s1["sunrise"] - set_).total_seconds() / 3600
        while t < end:
            if t < rise:  # only before the first sunrise of the series
                hours_to_rise = (rise - t).total_seconds() / 3600
                temp = tmin + 0.3 * hours_to_rise
                c, w, dew = 50.0, 2.0, td
            elif t <= t_max_time:
                frac = (t - rise) / (t_max_time - rise)
                temp = tmin + (tmax - tmin) * np.sin(np.pi / 2 * frac)
                c, w, dew = 20.0, 2.5 + 2.0 * frac, td
            elif t <= set_:
                frac = (t - t_max_time) / (set_ + dt.timedelta(hours=9) - t_max_time)
                temp = tmax - (tmax - tmin) * 0.35 * np.sin(np.pi / 2 * frac)
                c, w, dew = 20.0, 3.0, td
            else:
                h = (t - set_).total_seconds() / 3600
                # square-root-of-time cooling from sunset to the next minimum at sunrise
                temp = t_set - (t_set - nxt_min) * np.sqrt(min(h, night_len_h) / night_len_h)
                c, w, dew = float(cloud), float(wind), td + (nxt_td - td) * min(h / night_len_h, 1.0)
            temp += rng.normal(0, 0.15)
            dew = min(dew + rng.normal(0, 0.2), temp - 0.3)
            night = t > set_ or t < rise
            clear_calm = night and c <= 30 and w <= 2
            upper = temp + (2.5 if clear_calm else 0.3 if night else -0.15) + rng.normal(0, 0.1)
            rows.append((t, temp, dew, max(0.0, w + rng.normal(0, 0.3)),
                         float(np.clip(c + rng.normal(0, 5), 0, 100)), upper))
            t += dt.timedelta(minutes=STEP_MIN)
    df = pd.DataFrame(rows, columns=["time", "air_temp_c", "dew_point_c", "wind_speed_ms", "cloud_cover_pct",
                                     "upper_air_temp_c"])
    return df


def write_bench(df: pd.DataFrame, path: Path) -> None:
    out = pd.DataFrame({
        "time": [t.astimezone(dt.UTC).isoformat().replace("+00:00", "Z") for t in df["time"]],
        "air_temp_c": df["air_temp_c"].round(2),
        "dew_point_c": df["dew_point_c"].round(2),
        "wind_speed_ms": df["wind_speed_ms"].round(2),
        "cloud_cover_pct": df["cloud_cover_pct"].round(0),
        "upper_air_temp_c": df["upper_air_temp_c"].round(2),
    })
    out.to_csv(path, index=False)


def write_creek(df: pd.DataFrame, path: Path) -> None:
    from advisory.physics.moisture import rel_humidity_pct_from_dew_point

    rh = np.clip(rel_humidity_pct_from_dew_point(df["air_temp_c"].to_numpy(), df["dew_point_c"].to_numpy()),
                 1, 100)
    out = pd.DataFrame({
        "Timestamp": [t.strftime("%Y-%m-%d %H:%M") for t in df["time"]],
        "Temp_F": (df["air_temp_c"] * 9 / 5 + 32).round(1),
        "RH_%": np.round(rh, 0),
        "Wind_mph": (df["wind_speed_ms"] / 0.44704).round(1),
    })
    return out


#: Before the spring week: the creek logger's late-March file, air temperature only (its humidity
#: and wind sensors were not yet back from their winter check).  The heat in it is what moves a
#: block's buds past the stage recorded at the end of March.
MARCH_DAYS = ("2026-03-27", "2026-04-06")  # [first day, day the spring file starts)


def write_creek_march(path: Path) -> None:
    """Hourly creek readings from MARCH_DAYS[0] up to the spring file's first reading: a plain daily
    cycle (about 2 °C before dawn, 14 °C mid-afternoon), air temperature only."""
    rng = np.random.default_rng(20260327)
    t = dt.datetime.combine(dt.date.fromisoformat(MARCH_DAYS[0]), dt.time(0), TZ)
    end = dt.datetime.combine(dt.date.fromisoformat(MARCH_DAYS[1]), dt.time(0), TZ)
    rows = []
    while t < end:
        temp = 8.0 + 6.0 * np.sin(2 * np.pi * (t.hour - 9) / 24) + rng.normal(0, 0.15)
        rows.append((t.strftime("%Y-%m-%d %H:%M"), round(temp * 9 / 5 + 32, 1)))
        t += dt.timedelta(hours=1)
    pd.DataFrame({"Timestamp": [r[0] for r in rows], "Temp_F": [r[1] for r in rows], "RH_%": "",
                  "Wind_mph": ""}).to_csv(path, index=False)


def main() -> None:
    out_dir = HERE / "stations"
    out_dir.mkdir(exist_ok=True)
    for season, days in (("spring", SPRING), ("summer", SUMMER)):
        rng = np.random.default_rng(20260406 if season == "spring" else 20260713)
        bench = _series(days, rng, offset_c=0.0)
        creek = _series(days, rng, offset_c=-0.8)  # the creek bottom is a cold-air pocket
        if season == "spring":
            # sensor faults for the QC report: one spike and a stuck humidity sensor
            i = bench.index[bench["time"] == dt.datetime(2026, 4, 7, 13, 0, tzinfo=TZ)][0]
            bench.loc[i, "air_temp_c"] += 14.0
        write_bench(bench, out_dir / f"QR-BENCH-{season}.csv")
        table = write_creek(creek, out_dir / f"QR-CREEK-{season}.csv")
        if season == "spring":
            stuck = (creek["time"] >= dt.datetime(2026, 4, 12, 9, 0, tzinfo=TZ)) & \
                    (creek["time"] < dt.datetime(2026, 4, 12, 17, 0, tzinfo=TZ))
            table.loc[stuck.to_numpy(), "RH_%"] = 63.0
        table.to_csv(out_dir / f"QR-CREEK-{season}.csv", index=False)
    write_creek_march(out_dir / "QR-CREEK-march.csv")
    print(f"wrote station files to {out_dir}")


if __name__ == "__main__":
    main()
