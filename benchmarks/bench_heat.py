"""Speed and memory of the daytime heat path for many blocks at once.

Daytime curve (drawn through each block's morning reading, as the heat note
draws it), humidity from a conserved dew point, crop heat
(sunburn hours, cooling run and water) and crew heat (heat index, WBGT estimate,
levels, safer hours) for N invented blocks over one local day, hourly.

    .venv/bin/python benchmarks/bench_heat.py [--blocks 10000] [--step-minutes 60]
"""

from __future__ import annotations

import argparse
import time
import tracemalloc

import numpy as np
import pandas as pd

from advisory.forecast import dayshape, daytime
from advisory.risk import heat as heat_risk


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--blocks", type=int, default=10_000)
    ap.add_argument("--step-minutes", type=int, default=60)
    args = ap.parse_args(argv)
    n = args.blocks
    rng = np.random.default_rng(42)
    tz = "America/Los_Angeles"
    day = "2025-07-14"
    times = daytime.local_day_hours(day, tz, args.step_minutes)
    mid = pd.Timestamp(day).tz_localize(tz)
    sunrise = daytime.to_hours(mid) + 5.5 + rng.uniform(-0.3, 0.3, n)
    sunset = sunrise + 15.0
    noon = 0.5 * (sunrise + sunset)
    tmin = rng.uniform(12, 20, n)
    tmax = tmin + rng.uniform(10, 20, n)
    min_rh = rng.uniform(15, 45, n)
    crops = rng.choice(["apple", "grape", "cherry"], n)
    cooling = rng.random(n) < 0.3
    anchor_t = sunrise + 2.0                          # the morning reading, sunrise + 2 h
    anchor_c = tmin + rng.uniform(3, 7, n)
    cloud = rng.uniform(0, 100, n)

    def run():
        t0 = time.perf_counter()
        temp = dayshape.anchored_temperature_c(times, tmin, tmax, sunrise, sunset, noon, anchor_t, anchor_c,
                                               next_min_temp_c=tmin + 1, max_so_far_c=anchor_c,
                                               cloud_cover_pct=cloud)
        dew = np.asarray(daytime.dew_point_from_min_rh_c(tmax, min_rh))
        rh = daytime.hourly_rel_humidity_pct(temp, dew[:, None])
        t1 = time.perf_counter()
        crop = heat_risk.crop_heat(times, temp, crops, sunrise=sunrise, sunset=sunset, dew_point_c=dew,
                                   has_cooling=cooling, cooling_rate_mm_h=2.5, area_ha=4.0)
        t2 = time.perf_counter()
        crew = heat_risk.crew_heat(times, temp, dew[:, None], sunrise=sunrise, sunset=sunset)
        t3 = time.perf_counter()
        return (t0, t1, t2, t3), crop, crew, rh

    (t0, t1, t2, t3), crop, crew, rh = run()          # timing, untraced
    tracemalloc.start()                               # memory, in a second traced pass
    run()
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    print(f"blocks {n}, values per block {len(times)}")
    print(f"curve + humidity  {t1 - t0:7.3f} s")
    print(f"crop heat         {t2 - t1:7.3f} s")
    print(f"crew heat         {t3 - t2:7.3f} s")
    print(f"total             {t3 - t0:7.3f} s   peak traced memory {peak / 2**20:.1f} MiB")
    print(f"levels: crop {np.bincount(crop.level, minlength=4)}, crew {np.bincount(crew.day_level, minlength=4)};"
          f" mean RH {np.nanmean(rh):.0f} %")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
