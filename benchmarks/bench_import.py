"""Benchmark: import of a 1,000,000-row observation file into SQLite, QC included.

Generates a synthetic station file of 5-minute readings (about 9.5 years;
times in ISO 8601 with the local UTC offset, which changes twice a year; air
temperature and relative humidity, so the dew point is derived; wind and cloud
cover; a few spikes and a stuck stretch so QC has work), then measures, each in
a fresh process:

* ``ours``: ``advisory.ingest.observations.import_file`` into a migrated SQLite
  database: parse, convert, derive, QC, merge, insert, commit;
* ``floor``: ``pandas.read_csv`` of the same file (and ``pandas.to_datetime``
  of its time column, so that the rows are the same: integer seconds) plus a
  raw ``sqlite3`` ``executemany`` of the same rows into the same table of a
  migrated database, committed.

It prints wall time and peak resident memory of each, and the ratio.  Targets:
at most 10 s, at most 1 GiB peak, within 3x of the floor.

Usage::

    .venv/bin/python benchmarks/bench_import.py [--rows 1000000] [--keep DIR]
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
STATION = "BENCH-1"
ZONE = "America/New_York"


def generate(path: Path, rows: int, seed: int = 7) -> None:
    """Write the synthetic file (vectorised; a few seconds for a million rows)."""
    import numpy as np
    import pandas as pd

    rng = np.random.default_rng(seed)
    t = pd.date_range("2015-01-01", periods=rows, freq="5min", tz="UTC")
    local = t.tz_convert(ZONE)
    hours = local.hour.to_numpy() + local.minute.to_numpy() / 60.0
    doy = local.day_of_year.to_numpy()
    annual = 12.0 - 10.0 * np.cos(2 * np.pi * (doy - 20) / 365.25)
    diurnal = 6.0 * np.sin(2 * np.pi * (hours - 9.0) / 24.0)  # warmest mid-afternoon
    weather = pd.Series(rng.normal(0.0, 0.03, rows)).cumsum()
    weather -= weather.rolling(4000, min_periods=1).mean()
    air = np.round(annual + diurnal + weather.to_numpy(), 1)
    rh = np.clip(np.round(65.0 - 3.0 * diurnal + pd.Series(rng.normal(0, 0.3, rows)).cumsum().rolling(
        288, min_periods=1).mean().to_numpy() % 10.0), 15, 100)
    wind = np.round(np.abs(2.5 + 1.5 * np.sin(2 * np.pi * hours / 24.0) + rng.normal(0, 0.4, rows)), 1)
    cloud = np.round(rng.uniform(0, 8, rows)).astype(int) * 12.5
    # Faults for QC to find, every 100,000 rows: a spike, and a stuck stretch of 8 hours.
    for k in range(5_000, rows - 1_200, 100_000):
        air[k] += 15.0
        air[k + 1000:k + 1096] = air[k + 1000]
    # ISO 8601 with the local offset, e.g. 2015-01-01T00:00:00-05:00 (no per-row Python formatting).
    wall = np.datetime_as_string(local.tz_localize(None).to_numpy().astype("datetime64[s]"), unit="s")
    offset_h = ((local.tz_localize(None) - t.tz_localize(None)) / pd.Timedelta(hours=1)).to_numpy().astype(int)
    suffix = np.where(offset_h < 0, "-", "+").astype(object) + pd.Series(np.abs(offset_h)).map(
        "{:02d}:00".format).to_numpy(dtype=object)
    stamp = wall.astype(object) + suffix
    df = pd.DataFrame({"time": stamp, "air_temp_c": air, "rel_humidity_pct": rh, "wind_speed_ms": wind,
                       "cloud_cover_pct": cloud})
    df.to_csv(path, index=False)


def _setup_db(url: str) -> None:
    sys.path.insert(0, str(ROOT))
    from advisory.store.db import Database, upgrade
    from advisory.store.schema import Farm, Station

    upgrade(url)
    db = Database(url)
    with db.transaction() as s:
        farm = Farm(name="Benchmark farm", timezone=ZONE)
        s.add(farm)
        s.flush()
        s.add(Station(code=STATION, farm_id=farm.id, name="synthetic", latitude=36.0, longitude=-80.0,
                      elevation_m=250.0, timezone=ZONE, column_map={}))
    db.dispose()


def _peak_mib() -> float:
    """Peak resident memory of this process [MiB].

    ``VmHWM`` from /proc (Linux) is reset at exec, unlike ``ru_maxrss`` which a
    child inherits from its parent; fall back to ``ru_maxrss`` elsewhere.
    """
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024.0
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # Linux: KiB


def _cpu_s() -> float:
    """CPU time (user + system) of this process so far [s]."""
    r = resource.getrusage(resource.RUSAGE_SELF)
    return r.ru_utime + r.ru_stime


def child_ours(csv_path: str, url: str) -> dict:
    sys.path.insert(0, str(ROOT))
    import pandas  # noqa: F401  (import cost is not part of the measurement)

    from advisory.ingest.observations import import_file
    from advisory.store.db import Database

    db = Database(url)
    base = _peak_mib()
    c0 = _cpu_s()
    t0 = time.perf_counter()
    summary = import_file(db, STATION, csv_path)
    seconds = time.perf_counter() - t0
    cpu = _cpu_s() - c0
    peak = _peak_mib()
    # The same file again: parsed, matched against the stored rows, nothing written.
    t1 = time.perf_counter()
    again = import_file(db, STATION, csv_path)
    reimport_s = time.perf_counter() - t1
    assert again.already_imported and again.rows_added == 0
    db.dispose()
    flags = {c: {k: v for k, v in by.items() if v and k != "values"} for c, by in summary.flags.items()}
    return {"seconds": seconds, "cpu_s": cpu, "peak_mib": peak, "baseline_mib": base,
            "rows_added": summary.rows_added, "reimport_s": reimport_s, "reimport_peak_mib": _peak_mib(),
            "flags": {c: f for c, f in flags.items() if f}}


def child_floor(csv_path: str, url: str) -> dict:
    import sqlite3

    import pandas as pd

    db_file = url.removeprefix("sqlite:///")
    base = _peak_mib()
    c0 = _cpu_s()
    t0 = time.perf_counter()
    df = pd.read_csv(csv_path)
    # The same rows as stored: whole seconds since the epoch, by pandas' own ISO 8601 parser.
    seconds = (pd.to_datetime(df["time"], format="ISO8601", utc=True) - pd.Timestamp(0, tz="UTC")) // pd.Timedelta(
        seconds=1)
    conn = sqlite3.connect(db_file)
    conn.execute("PRAGMA journal_mode=WAL")
    conn.execute("PRAGMA synchronous=NORMAL")
    station_id = conn.execute("SELECT id FROM stations WHERE code = ?", (STATION,)).fetchone()[0]
    n = len(df)
    cols = ["air_temp_c", "dew_point_c", "rel_humidity_pct", "wind_speed_ms", "cloud_cover_pct",
            "upper_air_temp_c"]
    zero = [0] * n
    none = [None] * n
    values = [df[c].tolist() if c in df else none for c in cols]
    rows = zip([station_id] * n, seconds.tolist(), *values, *([zero] * 6), none, strict=True)
    conn.executemany(
        "INSERT INTO observations (station_id, time_utc, air_temp_c, dew_point_c, rel_humidity_pct, "
        "wind_speed_ms, cloud_cover_pct, upper_air_temp_c, air_temp_qc, dew_point_qc, rel_humidity_qc, "
        "wind_speed_qc, cloud_cover_qc, upper_air_temp_qc, import_id) "
        "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)", rows)
    conn.commit()
    seconds = time.perf_counter() - t0
    cpu = _cpu_s() - c0
    conn.close()
    return {"seconds": seconds, "cpu_s": cpu, "peak_mib": _peak_mib(), "baseline_mib": base, "rows_added": n}


def run_child(kind: str, csv_path: Path, workdir: Path) -> dict:
    db_path = workdir / f"{kind}.sqlite"
    for suffix in ("", "-wal", "-shm"):
        Path(str(db_path) + suffix).unlink(missing_ok=True)
    url = f"sqlite:///{db_path}"
    _setup_db(url)
    out = subprocess.run([sys.executable, __file__, "--child", kind, str(csv_path), url],
                         capture_output=True, text=True, check=False)
    if out.returncode != 0:
        raise SystemExit(f"{kind} failed:\n{out.stderr}")
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--keep", metavar="DIR", help="work in DIR and keep the files")
    ap.add_argument("--repeat", type=int, default=1, help="runs of each (the best is reported)")
    ap.add_argument("--child", nargs=3, metavar=("KIND", "CSV", "URL"), help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        kind, csv_path, url = args.child
        result = child_ours(csv_path, url) if kind == "ours" else child_floor(csv_path, url)
        print(json.dumps(result))
        return 0

    tmp = None
    if args.keep:
        workdir = Path(args.keep)
        workdir.mkdir(parents=True, exist_ok=True)
    else:
        tmp = tempfile.TemporaryDirectory(prefix="bench-import-")
        workdir = Path(tmp.name)
    csv_path = workdir / f"synthetic-{args.rows}.csv"
    if not csv_path.exists():
        t0 = time.perf_counter()
        generate(csv_path, args.rows)
        print(f"generated {csv_path.name}: {args.rows:,} rows, {csv_path.stat().st_size / 2**20:.0f} MiB "
              f"in {time.perf_counter() - t0:.1f} s")
    ours_runs, floor_runs = [], []
    for _ in range(args.repeat):  # interleaved, so that load on a shared machine hits both alike
        ours_runs.append(run_child("ours", csv_path, workdir))
        floor_runs.append(run_child("floor", csv_path, workdir))
    ours = min(ours_runs, key=lambda r: r["seconds"])
    floor = min(floor_runs, key=lambda r: r["seconds"])
    ratio = ours["seconds"] / floor["seconds"]
    cpu_ratio = ours["cpu_s"] / floor["cpu_s"]
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    print(f"machine: {os.cpu_count()} CPUs, Python {sys.version.split()[0]}, load average {load:.1f}; "
          f"best of {args.repeat}")
    print(f"ours : {ours['seconds']:6.2f} s wall, {ours['cpu_s']:6.2f} s CPU, peak RSS {ours['peak_mib']:5.0f} MiB "
          f"(before import {ours['baseline_mib']:.0f} MiB), {ours['rows_added']:,} rows stored")
    print(f"floor: {floor['seconds']:6.2f} s wall, {floor['cpu_s']:6.2f} s CPU, peak RSS {floor['peak_mib']:5.0f} MiB "
          "(pandas.read_csv + to_datetime + sqlite3 executemany)")
    print(f"ratio ours/floor: {ratio:.2f}x wall, {cpu_ratio:.2f}x CPU")
    print(f"same file again (nothing new, nothing written): {ours['reimport_s']:.2f} s wall, "
          f"peak RSS {ours['reimport_peak_mib']:.0f} MiB")
    if args.repeat > 1:
        print("all runs, wall s: ours " + ", ".join(f"{r['seconds']:.2f}" for r in ours_runs)
              + "; floor " + ", ".join(f"{r['seconds']:.2f}" for r in floor_runs))
    print(f"QC flags found: {ours['flags']}")
    ok = ours["seconds"] <= 10.0 and ours["peak_mib"] <= 1024.0 and ratio <= 3.0
    print("targets (<= 10 s, <= 1024 MiB, <= 3x floor): " + ("met" if ok else "NOT met"))
    if not ok and ours["cpu_s"] <= 10.0 and ours["peak_mib"] <= 1024.0 and cpu_ratio <= 3.0:
        print("  (met on CPU time: wall time here includes waiting for a busy machine)")
    if tmp is not None:
        tmp.cleanup()
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
