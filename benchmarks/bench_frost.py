"""Speed and memory of the frost damage model and plans for many blocks at once.

Usage: .venv/bin/python benchmarks/bench_frost.py [N_BLOCKS]

Builds N invented blocks (default 1000) on a shared 15-minute grid of 16 hours,
with a callable CDF for the minimum (the slower path), and times
:func:`advisory.risk.frost.plan_night` and the run-sheet rendering.
"""

from __future__ import annotations

import sys
import time
import tracemalloc
from datetime import date

import numpy as np
import pandas as pd

from advisory.crops import thresholds as th
from advisory.risk import damage, frost_data
from advisory.risk import frost as fr
from advisory.risk import runsheet as rs


def build(n: int, seed: int = 0):
    rng = np.random.default_rng(seed)
    times = pd.date_range("2024-04-10 02:00", periods=16 * 4 + 1, freq="15min", tz="UTC")
    h = np.arange(len(times)) / 4.0
    t_eve = rng.uniform(3, 9, n)[:, None]
    t_min = rng.uniform(-5, 2, n)[:, None]
    cool = t_eve - (t_eve - t_min) * np.sqrt(np.minimum(h, 10) / 10)
    air = cool + np.where(h > 10, (h - 10) * 2.5, 0.0)
    dew = (t_min - rng.uniform(0, 6, n)[:, None]) * np.ones_like(air)
    sunrise = np.full(n, np.datetime64("2024-04-10T12:10", "ns"))
    curves = frost_data.NightCurves(times, air, dew, rng.uniform(0, 3, (n, 1)), sunrise)
    p50 = t_min[:, 0]
    base = damage.MinTempForecast(p50 - 1.5, p50, p50 + 1.0)
    fc = damage.MinTempForecast(base.p10_c, base.p50_c, base.p90_c, cdf=base.cdf_at)
    tab = th.table()
    rows = tab.sample(n, replace=True, random_state=seed).reset_index(drop=True)
    kinds = [[{"kind": "overtree_sprinkler", "rate_mm_h": 4.0}], [{"kind": "wind_machine"}, {"kind": "heater"}],
             [{"kind": "heater", "fuel_l_per_h_per_ha": 80}], []]
    blocks = [frost_data.BlockSetup(f"B{i}", r.crop, r.stage, r.t10_c, r.t90_c, 3.0, equipment=kinds[i % 4],
                            upper_inversion_c=2.0 if i % 3 else None, cloud_cover_pct=10.0)
              for i, r in enumerate(rows.itertuples())]
    return blocks, curves, fc


def main() -> None:
    n = int(sys.argv[1]) if len(sys.argv) > 1 else 1000
    blocks, curves, fc = build(n)
    t0 = time.perf_counter()
    risks = fr.plan_night(blocks, curves, fc)
    t1 = time.perf_counter()
    sheet = rs.build_run_sheet("Bench", date(2024, 4, 9), "America/Denver", risks)
    text, md, csv = rs.render_text(sheet), rs.render_markdown(sheet), rs.render_csv(sheet)
    t2 = time.perf_counter()
    tracemalloc.start()  # a second, traced run for the memory peak (tracing slows it down)
    fr.plan_night(blocks, curves, fc)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    print(f"blocks={n} plan_night={t1 - t0:.2f}s run_sheet={t2 - t1:.2f}s peak_traced={peak / 2**20:.0f} MiB "
          f"rows={len(sheet.rows)} chars={len(text) + len(md) + len(csv)}")

if __name__ == "__main__":
    main()
