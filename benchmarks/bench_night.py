"""Benchmark: one evening run for 10,000 blocks on 200 stations, and the planner.

Builds, in a temporary SQLite database (or with ``--db-url`` a new database on a PostgreSQL server), an invented (seeded) set-up: a few farms
in several time zones (one in the southern hemisphere), ``--stations`` stations
with a day and a half of 15-minute readings each ending a few hours after
sunset (a clear, calm, dry evening: a radiation-frost night, so that many
blocks need protection; a few stations fall silent in the afternoon so that
their blocks get the "station silent" notice), and ``--blocks`` active blocks
on them with varied crops, stages, protection equipment and recipients.  Half
of the stations carry a fitted calibration (invented history), the others use
the physical model.

Then, each in a fresh process (so that the peak resident memory is the run's
own), it measures:

* ``evening``: :func:`advisory.runs.frost_night.run_night` end to end -- load blocks,
  load observations, sun and evening state, forecast, risk and plan, compose,
  store (one transaction), delivery to the outbox (the only channel: the
  recipients have no e-mail, webhook or text-message address) -- with the
  pipeline's per-stage breakdown, the wall time, the processor time of the run's
  process and of its forked copies, the processor time the host took from this
  virtual machine meanwhile (``steal``: a slow run with much of it was slowed
  by the host), and the peak RSS of the run's process; with
  ``--tree-memory``, also the peak proportional set size (PSS) of
  it and its forked copies together, sampled every 100 ms from ``/proc`` (a page
  shared after a fork counts once; reading it slows the run, so time without it);
* ``rerun``: the same run again (everything is already done: nothing stored
  or delivered twice);
* ``update``: an update through the night two hours later (revision 1;
  notices only where the change is material);
* ``planner``: :func:`advisory.schedule.plan` for all blocks over one day.

Targets: evening run at most 10 s and at most 1 GiB peak on
this machine; planner at most 5 s.

The outbox is written as the settings say (``ADVISORY_OUTBOX_FORMATS`` and
``ADVISORY_OUTBOX_CHARTS``, see :mod:`advisory.settings`); ``--outbox full``
forces every format and the charts ("auto"), ``--outbox lean`` JSON and the
short text per block, ``--outbox json`` one JSON file per block (the short text
is inside it), both with charts only for notices that go out by e-mail (none
here); farm summaries always get every format.

Where the outbox lives matters: on an ext4 file system without a journal (this
machine's disk), the kernel skips the inodes freed in the last few minutes when
it makes a new file (``recently_deleted`` in its inode allocator), so a run made
within minutes of deleting another run's 10,000 files (this script deletes its
temporary folder at the end) pays seconds of processor time for its own files.
Space runs on disk apart, or keep their folders (``--keep``) until the
measurements are done; ``TMPDIR=/dev/shm`` measures with the outbox in memory.

``--history-nights N`` first stores N earlier nights for every block (a
forecast, its notice and outbox delivery, the morning verification), as in the
middle of a season; ``--runs`` picks the measurements.

Usage::

    .venv/bin/python benchmarks/bench_night.py [--blocks 10000] [--stations 200] [--seed 11]
        [--outbox settings|lean|json|full] [--history-nights 0] [--runs evening,rerun,update,planner]
        [--keep DIR] [--profile FILE.prof] [--tree-memory] [--db-url URL|test]

On PostgreSQL: ``bash .ci/pg-cluster run .venv/bin/python benchmarks/bench_night.py --db-url test``.
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

NIGHT = dt.date(2026, 4, 8)
#: (farm name, zone, latitude, longitude, units) -- invented farms at plausible fruit-growing places.
FARMS = (
    ("Sagebrush Terrace Fruit", "America/Los_Angeles", 46.5, -120.4, "metric"),
    ("Cold Hollow Cooperative", "America/Los_Angeles", 38.3, -122.3, "imperial"),
    ("Mesa Verdant Orchards", "America/Denver", 39.1, -108.5, "imperial"),
    ("Lakeshore Bluff Growers", "America/Detroit", 42.9, -86.1, "imperial"),
    ("Ridgeline Stonefruit", "America/New_York", 40.0, -77.2, "metric"),
    ("Southern Terraces", "Australia/Hobart", -42.8, 147.1, "metric"),
)
EQUIPMENT = (
    [("wind_machine", {"count": 2, "hectares_each": 4.0})],
    [("overtree_sprinkler", {"rate_mm_h": 3.8, "water_supply_m3": 4000.0})],
    [("undertree_sprinkler", {"rate_mm_h": 2.5})],
    [("heater", {"count_per_ha": 80.0, "fuel_l_per_h_each": 1.9})],
    [("wind_machine", {"count": 1}), ("heater", {"count_per_ha": 40.0})],
    [],
)


# ------------------------------------------------------------------------------------------ building

def _calibration_params(rng):
    """A calibration fitted on an invented history of 60 nights (for half of the stations)."""
    import numpy as np
    import pandas as pd

    from advisory.forecast import calibration as calib

    n = 60
    air = rng.uniform(-2, 12, n)
    dew = air - rng.uniform(1, 9, n)
    wind = rng.uniform(0, 4, n)
    cloud = rng.uniform(0, 100, n)
    cooling = rng.uniform(0, 6, n)
    hist = pd.DataFrame({
        "night": pd.date_range("2025-03-01", periods=n, freq="D").date,
        "air_temp_c": air, "dew_point_c": dew, "wind_speed_ms": wind, "cloud_cover_pct": cloud,
        "cooling_since_sunset_c": cooling, "dew_point_change_3h_c": rng.normal(0, 1, n),
        "hours_since_sunset": np.full(n, 2.0), "hours_to_sunrise": rng.uniform(8, 11, n),
        "observed_min_c": 0.5 * air + 0.4 * dew - 0.02 * cloud + rng.normal(0, 1.0, n) - 1.0,
    })
    return calib.fit_calibration(hist).to_dict()


def _readings(rng, sunset_utc, n_stations: int, silent: set[int]):
    """15-minute readings, a day and a half per station, ending 6 h after its sunset (one array pass)."""
    import numpy as np

    step = 15 * 60
    per = 36 * 4
    end = (sunset_utc // step) * step + 6 * 3600            # (S,) epoch seconds
    t = end[:, None] - step * np.arange(per)[::-1][None, :]  # (S, per)
    h = (t - sunset_utc[:, None]) / 3600.0                   # hours since sunset
    t_sunset = rng.uniform(6.0, 10.0, n_stations)[:, None]
    amp = rng.uniform(6.0, 9.0, n_stations)[:, None]
    day = t_sunset + amp * (np.cos(2 * np.pi * (h + 3.0) / 24.0) - np.cos(2 * np.pi * 3.0 / 24.0))
    rate = rng.uniform(2.4, 3.6, n_stations)[:, None]        # Brunt-like cooling [K h^-0.5]
    air = np.where(h > 0, t_sunset - rate * np.sqrt(np.maximum(h, 0.0)), day)
    air = air + rng.normal(0, 0.15, air.shape)
    dew = rng.uniform(-7.0, -2.0, n_stations)[:, None] + rng.normal(0, 0.2, air.shape)
    dew = np.minimum(dew, air - 0.3)
    wind = np.abs(rng.uniform(0.3, 1.8, n_stations)[:, None] + rng.normal(0, 0.3, air.shape))
    cloud = np.clip(rng.uniform(0, 12, n_stations)[:, None] + rng.normal(0, 3, air.shape), 0, 100)
    tower = rng.random(n_stations) < 0.5
    upper = air + np.clip(h, 0, 6) * rng.uniform(0.4, 0.8, n_stations)[:, None]
    upper = np.where(tower[:, None], upper, np.nan)
    keep = np.ones(air.shape, bool)
    for s in silent:  # silent since 3 h before sunset
        keep[s] = h[s] < -3.0
    return t, air, dew, wind, cloud, upper, keep


def build(url: str, n_blocks: int, n_stations: int, seed: int, history_nights: int = 0) -> dict:
    """Create the schema and the invented farms, stations, readings and blocks (bulk inserts).

    ``history_nights`` earlier nights get, for every active block, a stored forecast, its notice,
    the notice's outbox delivery and the morning verification (as in the middle of a season).
    """
    import numpy as np
    from sqlalchemy import insert

    from advisory.crops import thresholds as th
    from advisory.physics import sun
    from advisory.store.db import Database, upgrade
    from advisory.store.schema import (
        Block,
        BlockRecipient,
        Calibration,
        Equipment,
        Farm,
        Observation,
        Recipient,
        Station,
    )

    rng = np.random.default_rng(seed)
    upgrade(url)
    db = Database(url)
    now = dt.datetime(2026, 4, 1, tzinfo=dt.UTC)
    farm_of_station = np.arange(n_stations) % len(FARMS)
    s_lat = np.array([FARMS[f][2] for f in farm_of_station]) + rng.uniform(-0.3, 0.3, n_stations)
    s_lon = np.array([FARMS[f][3] for f in farm_of_station]) + rng.uniform(-0.3, 0.3, n_stations)
    s_tz = np.array([FARMS[f][1] for f in farm_of_station], dtype=object)
    s_elev = rng.uniform(100, 1500, n_stations)
    table = sun.sun_times_batch(s_lat, s_lon, NIGHT, s_tz)
    sunset = table["sunset"].astype("int64").to_numpy() // 10**9
    silent = set(rng.choice(n_stations, size=max(1, n_stations // 100), replace=False).tolist())
    t, air, dew, wind, cloud, upper, keep = _readings(rng, sunset, n_stations, silent)
    stages = th.table()[["crop", "stage"]].drop_duplicates().to_numpy()
    with db.transaction() as s:
        s.execute(insert(Farm), [
            {"id": i + 1, "name": f[0], "timezone": f[1], "units": f[4], "created_at": now, "updated_at": now,
             "settings": {"start_margin_c": 1.0} if i % 2 else {}} for i, f in enumerate(FARMS)])
        recips = []
        for i in range(len(FARMS)):
            for k, role in enumerate(("orchard manager", "crew lead", "extension agent")):
                recips.append({"id": len(recips) + 1, "farm_id": i + 1, "name": f"Person {i + 1}-{k + 1}",
                               "role": role, "channels": {}})
        s.execute(insert(Recipient), recips)
        s.execute(insert(Station), [
            {"id": j + 1, "code": f"ST-{j + 1:04d}", "farm_id": int(farm_of_station[j]) + 1,
             "name": f"Station {j + 1}", "latitude": float(s_lat[j]), "longitude": float(s_lon[j]),
             "elevation_m": float(s_elev[j]), "timezone": s_tz[j], "temp_sensor_height_m": 1.5,
             "upper_sensor_height_m": None if np.isnan(upper[j, 0]) else 10.0, "wind_sensor_height_m": 2.0,
             "column_map": {}} for j in range(n_stations)])
        s.execute(insert(Calibration), [
            {"station_id": j + 1, "kind": "night_min", "fitted_at": now, "training_nights": 60,
             "params": _calibration_params(rng)} for j in range(0, n_stations, 2)])
        sid = np.broadcast_to(np.arange(1, n_stations + 1)[:, None], t.shape)[keep]

        def col(a):
            return [None if np.isnan(x) else round(float(x), 2) for x in a[keep]]

        obs_cols = {"station_id": sid.tolist(), "time_utc": t[keep].astype(int).tolist(), "air_temp_c": col(air),
                    "dew_point_c": col(dew), "wind_speed_ms": col(wind), "cloud_cover_pct": col(cloud),
                    "upper_air_temp_c": col(upper)}
        rows = [dict(zip(obs_cols, v, strict=True)) for v in zip(*obs_cols.values(), strict=True)]
        s.execute(insert(Observation.__table__), rows)
        b_station = rng.integers(0, n_stations, n_blocks)
        b_farm = farm_of_station[b_station]
        pick = rng.integers(0, len(stages), n_blocks)
        blocks, equipment, links = [], [], []
        for i in range(n_blocks):
            j = int(b_station[i])
            crop, stage = stages[pick[i]]
            blocks.append({
                "id": i + 1, "farm_id": int(b_farm[i]) + 1, "station_id": j + 1, "name": f"Block {i + 1:05d}",
                "latitude": float(s_lat[j] + rng.uniform(-0.02, 0.02)),
                "longitude": float(s_lon[j] + rng.uniform(-0.02, 0.02)),
                "elevation_m": float(s_elev[j] + rng.uniform(-20, 20)), "area_ha": float(rng.uniform(0.5, 12)),
                "crop": crop, "variety": None, "stage": stage, "stage_date": NIGHT - dt.timedelta(days=3),
                "reference_offset_min": int(rng.choice([120, 120, 120, 90, 150])), "active": bool(i % 97),
                "settings": {"start_margin_c": 1.5} if i % 10 == 0 else {}})
            for kind, params in EQUIPMENT[i % len(EQUIPMENT)]:
                equipment.append({"block_id": i + 1, "kind": kind, "params": params})
            first = int(b_farm[i]) * 3 + 1
            for k in range(1 + i % 3):
                links.append({"block_id": i + 1, "recipient_id": first + k})
        s.execute(insert(Block), blocks)
        s.execute(insert(Equipment), equipment)
        s.execute(insert(BlockRecipient), links)
        if history_nights:
            _history(s, [b for b in blocks if b["active"]], history_nights, rng, now)
    db.dispose()
    return {"stations": n_stations, "blocks": n_blocks, "active_blocks": sum(b["active"] for b in blocks),
            "readings": int(keep.sum()), "silent_stations": len(silent), "farms": len(FARMS),
            "history_nights": history_nights}


def _history(s, blocks: list[dict], nights: int, rng, now: dt.datetime) -> None:
    """Past nights: forecast, notice, outbox delivery and verification per block and night (small payloads)."""
    from sqlalchemy import func, insert, select

    from advisory.store.schema import Delivery, Forecast, Notice, Verification

    fid = (s.scalar(select(func.max(Forecast.id))) or 0) + 1
    nid = (s.scalar(select(func.max(Notice.id))) or 0) + 1
    for k in range(nights, 0, -1):
        night = NIGHT - dt.timedelta(days=k)
        made = now + dt.timedelta(days=k)
        fc, nt, dl, vf = [], [], [], []
        p50 = rng.normal(0.0, 2.5, len(blocks))
        obs = p50 + rng.normal(0.0, 1.2, len(blocks))
        for b, f, o in zip(blocks, p50.tolist(), obs.tolist(), strict=True):
            fc.append({"id": fid, "block_id": b["id"], "kind": "frost", "night": night, "revision": 0,
                       "created_at": made, "status": "ok", "reason": "", "model": "physical", "training_nights": 0,
                       "min_p10_c": f - 1.5, "min_p50_c": f, "min_p90_c": f + 1.2, "level": "slight",
                       "payload": {}})
            nt.append({"id": nid, "key": f"frost:bench:{b['id']}:{night}:r0", "farm_id": b["farm_id"],
                       "block_id": b["id"], "forecast_id": fid, "kind": "frost", "night": night, "revision": 0,
                       "is_update": False, "level": "slight", "subject": "past night", "created_at": made,
                       "content": {}})
            dl.append({"notice_id": nid, "recipient_id": None, "channel": "outbox", "address": "outbox",
                       "attempt": 1, "status": "sent", "attempted_at": made, "error": ""})
            vf.append({"forecast_id": fid, "block_id": b["id"], "kind": "frost", "night": night, "observed_c": o,
                       "forecast_c": f, "error_c": f - o, "verified_at": made, "detail": {}})
            fid += 1
            nid += 1
        for model, rows in ((Forecast, fc), (Notice, nt), (Delivery, dl), (Verification, vf)):
            s.execute(insert(model.__table__), rows)


# ------------------------------------------------------------------------------------------ measuring

def _peak_mib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def child(args) -> None:
    """One measurement in this fresh process; prints one JSON line."""
    from advisory import settings as settings_mod
    from advisory.store.db import Database

    os.environ["ADVISORY_OUTBOX"] = args.outbox_dir
    if args.outbox in ("lean", "json"):
        os.environ["ADVISORY_OUTBOX_FORMATS"] = "json,sms" if args.outbox == "lean" else "json"
        os.environ["ADVISORY_OUTBOX_CHARTS"] = "email"
    elif args.outbox == "full":
        os.environ["ADVISORY_OUTBOX_FORMATS"] = "text,markdown,html,json"
        os.environ["ADVISORY_OUTBOX_CHARTS"] = "auto"
    out: dict = {"what": args.child}
    base = _peak_mib()
    if args.child == "planner":
        from advisory import schedule

        db = Database(args.db)
        t0 = time.perf_counter()
        clocks = schedule.load_block_clocks(db)
        t1 = time.perf_counter()
        start = dt.datetime.combine(NIGHT, dt.time(12), dt.UTC)
        runs = schedule.plan(clocks, start, start + dt.timedelta(days=1))
        t2 = time.perf_counter()
        out.update(load_s=t1 - t0, plan_s=t2 - t1, runs=len(runs), blocks=len(clocks),
                   kinds={k: sum(r.kind == k for r in runs) for k in schedule.KINDS})
    else:
        from sqlalchemy import func, select

        from advisory.runs import frost_night
        from advisory.store.schema import Delivery, Forecast, Notice

        db = Database(args.db)
        settings = settings_mod.load(args.db)
        base = _peak_mib()
        update = args.child == "update"
        now = dt.datetime.combine(NIGHT + dt.timedelta(days=1), dt.time(12), dt.UTC)
        as_of = None
        if update:  # two hours after the latest evening reference time of the benchmark's farms
            with db.transaction() as s:
                as_of = s.scalar(select(func.max(Forecast.reference_time))) + dt.timedelta(hours=2)
        prof = None
        if args.profile:
            import cProfile

            prof = cProfile.Profile()
            prof.enable()
        cpu0 = _cpu_s()
        t0 = time.perf_counter()
        res = frost_night.run_night(db, NIGHT, now=as_of or now, update=update, settings=settings,
                                 sleep=lambda s: None)
        wall = time.perf_counter() - t0
        cpu1 = _cpu_s()
        out.update(cpu_s=cpu1[0] - cpu0[0], copies_cpu_s=cpu1[1] - cpu0[1])
        if prof is not None:
            prof.disable()
            prof.dump_stats(args.profile)
        with db.transaction() as s:
            counts = {name: s.scalar(select(func.count()).select_from(model))
                      for name, model in (("forecasts", Forecast), ("notices", Notice), ("deliveries", Delivery))}
        files = sum(len(f) for _, _, f in os.walk(args.outbox_dir))
        out.update(wall_s=wall, stages=res.timings, assessed=len(res.assessments), skipped=len(res.skipped),
                   notices=len(res.notices), deliveries=res.deliveries, counts=counts, outbox_files=files,
                   levels=_levels(res.assessments), outbox_mib=_du(args.outbox_dir))
    out.update(peak_rss_mib=_peak_mib(), start_rss_mib=base)
    print(json.dumps(out, default=str))


def _cpu_s() -> tuple[float, float]:
    """Processor time [s] (user + system) of this process, and of its forked copies that have ended."""
    me, kids = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
    return me.ru_utime + me.ru_stime, kids.ru_utime + kids.ru_stime


def _steal_s() -> float | None:
    """Processor time the hypervisor gave this machine's virtual processors to others since boot [s]
    (``steal`` in ``/proc/stat``; None where it cannot be read).  Much of it during a run means a run
    slowed down by the host, not by the code."""
    try:
        with open("/proc/stat") as fh:
            fields = fh.readline().split()
        return int(fields[8]) / os.sysconf("SC_CLK_TCK")
    except (OSError, IndexError, ValueError):
        return None


def _levels(assessments) -> dict:
    out: dict[str, int] = {}
    for a in assessments:
        k = a.level or a.status
        out[k] = out.get(k, 0) + 1
    out["needs protection"] = sum(bool((a.details or {}).get("needs_protection")) for a in assessments)
    return out


def _du(path: str) -> float:
    return sum(f.stat().st_size for f in Path(path).rglob("*") if f.is_file()) / 2**20


def _run_child(what: str, args, db_url: str, outbox: Path, profile: str | None = None) -> dict:
    cmd = [sys.executable, __file__, "--child", what, "--db", db_url, "--outbox-dir", str(outbox),
           "--outbox", args.outbox]
    if profile:
        cmd += ["--profile", profile]
    os.sync()  # the set-up's (or the previous run's) writes reach the disk first, not during this run
    steal0 = _steal_s()
    with tempfile.TemporaryFile("w+") as out, tempfile.TemporaryFile("w+") as err:
        proc = subprocess.Popen(cmd, stdout=out, stderr=err, text=True)
        peak_pss = None
        while proc.poll() is None:
            if args.tree_memory:  # the run's processes together: the run's own and its forked copies
                peak_pss = max(peak_pss or 0.0, _tree_pss_mib(proc.pid))
            time.sleep(0.1)
        out.seek(0)
        err.seek(0)
        if proc.returncode:
            sys.stderr.write(err.read())
            raise SystemExit(f"{what} failed (exit {proc.returncode})")
        res = json.loads(out.read().strip().splitlines()[-1])
    res["peak_tree_pss_mib"] = peak_pss
    steal1 = _steal_s()
    res["steal_s"] = None if steal0 is None or steal1 is None else steal1 - steal0
    return res


def _tree_pss_mib(pid: int) -> float:
    """Proportional set size of a process and its descendants [MiB] (pages shared after a fork
    count once in all), from ``/proc``; 0 where that cannot be read."""
    total, todo = 0.0, [pid]
    while todo:
        p = todo.pop()
        try:
            with open(f"/proc/{p}/smaps_rollup") as fh:
                for line in fh:
                    if line.startswith("Pss:"):
                        total += float(line.split()[1]) / 1024.0
                        break
            with open(f"/proc/{p}/task/{p}/children") as fh:
                todo += [int(c) for c in fh.read().split()]
        except (OSError, ValueError):
            continue
    return total


STAGES = ("load blocks", "load observations", "sun+evening state", "forecast", "risk/plan", "compose",
          "wait for workers", "compose summaries", "hand over to the outbox writer", "store forecasts", "store notices", "commit",
          "wait for outbox writer", "outbox delivery", "outbox files written ahead")


def _print_run(r: dict) -> None:
    st = r["stages"]
    tree = (f"; with its forked copies, peak PSS {r['peak_tree_pss_mib']:.0f} MiB"
            if r.get("peak_tree_pss_mib") is not None else "")
    print(f"  {r['what']}: {r['wall_s']:.2f} s wall, peak RSS {r['peak_rss_mib']:.0f} MiB "
          f"(process at start {r['start_rss_mib']:.0f} MiB{tree}); assessed {r['assessed']}, "
          f"skipped {r['skipped']}, notices {r['notices']}, deliveries {r['deliveries']}")
    if r.get("cpu_s") is not None:
        steal = (f"; taken by the host (steal, whole machine): {r['steal_s']:.2f} s"
                 if r.get("steal_s") is not None else "")
        print(f"    processor time: {r['cpu_s']:.2f} s in the run's process, {r['copies_cpu_s']:.2f} s in its "
              f"forked copies{steal}")
    shown = set()
    for k in STAGES:
        if k in st:
            print(f"    {k:<30} {st[k]:7.2f} s")
            shown.add(k)
    for k, v in st.items():
        if k not in shown and v >= 0.005:
            print(f"    {k:<30} {v:7.2f} s")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--blocks", type=int, default=10_000)
    ap.add_argument("--stations", type=int, default=200)
    ap.add_argument("--seed", type=int, default=11)
    ap.add_argument("--history-nights", type=int, default=0,
                    help="earlier nights already stored per block (forecast, notice, delivery, verification)")
    ap.add_argument("--outbox", choices=("settings", "lean", "json", "full"), default="settings")
    ap.add_argument("--runs", default="evening,rerun,update,planner",
                    help="which measurements, comma-separated (default: evening,rerun,update,planner)")
    ap.add_argument("--keep", help="keep the database and outbox in this folder")
    ap.add_argument("--tree-memory", action="store_true",
                    help="also sample the memory of the run and its forked copies together (slows the run)")
    ap.add_argument("--profile", help="write a cProfile of the evening run to this file")
    ap.add_argument("--db-url", metavar="URL",
                    help="build in a new database on this PostgreSQL server (the URL of any database there; "
                         "'test' for $ADVISORY_TEST_DB), dropped afterwards; default a temporary SQLite file")
    ap.add_argument("--child", help=argparse.SUPPRESS)
    ap.add_argument("--db", help=argparse.SUPPRESS)
    ap.add_argument("--outbox-dir", help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        child(args)
        return
    work = Path(args.keep) if args.keep else Path(tempfile.mkdtemp(prefix="bench-night-"))
    work.mkdir(parents=True, exist_ok=True)
    db_path = work / "bench.sqlite"
    for p in (db_path, work / "bench.sqlite-wal", work / "bench.sqlite-shm"):
        p.unlink(missing_ok=True)
    shutil.rmtree(work / "outbox", ignore_errors=True)
    url = f"sqlite:///{db_path}"
    server = None
    if args.db_url:
        server = args.db_url if args.db_url != "test" else os.environ.get("ADVISORY_TEST_DB")
        if not server:
            raise SystemExit("--db-url test: ADVISORY_TEST_DB is not set (bash .ci/pg-cluster run ...)")
        url = _server_database(server, f"bench_night_{os.getpid()}", create=True)
    try:
        t0 = time.perf_counter()
        info = build(url, args.blocks, args.stations, args.seed, args.history_nights)
        print(f"built in {time.perf_counter() - t0:.1f} s: {json.dumps(info)}  (night {NIGHT}, outbox mode "
              f"{args.outbox})")
        outbox = work / "outbox"
        runs = [r.strip() for r in args.runs.split(",") if r.strip()]
        verdict = []
        if "evening" in runs:
            ev = _run_child("evening", args, url, outbox, args.profile)
            _print_run(ev)
            print(f"    levels: {json.dumps(ev['levels'])}")
            print(f"    rows: {json.dumps(ev['counts'])}; outbox: {ev['outbox_files']} files, "
                  f"{ev['outbox_mib']:.1f} MiB")
            ok = ev["wall_s"] <= 10.0 and max(ev["peak_rss_mib"], ev["peak_tree_pss_mib"] or 0) <= 1024.0
            verdict.append(f"evening run <= 10 s and <= 1 GiB: {'met' if ok else 'NOT met'}")
        for what in ("rerun", "update"):
            if what in runs:
                _print_run(_run_child(what, args, url, outbox))
        if "planner" in runs:
            pl = _run_child("planner", args, url, outbox)
            print(f"  planner: plan {pl['plan_s']:.2f} s for {pl['blocks']} blocks over one day "
                  f"({pl['runs']} runs: {json.dumps(pl['kinds'])}); loading the block clocks {pl['load_s']:.2f} s; "
                  f"peak RSS {pl['peak_rss_mib']:.0f} MiB")
            verdict.append(f"planner <= 5 s: {'met' if pl['plan_s'] <= 5.0 else 'NOT met'}")
        print("targets: " + "; ".join(verdict))
    finally:
        if server is not None and not args.keep:
            _server_database(server, f"bench_night_{os.getpid()}", create=False)
        if not args.keep:
            shutil.rmtree(work, ignore_errors=True)


def _server_database(server_url: str, name: str, *, create: bool) -> str:
    """Create (or drop) the database ``name`` on the server of ``server_url``; its URL."""
    from sqlalchemy import create_engine, text
    from sqlalchemy.engine import make_url

    u = make_url(server_url)
    if u.drivername == "postgresql":
        u = u.set(drivername="postgresql+psycopg")
    admin = create_engine(u.set(database="postgres"), isolation_level="AUTOCOMMIT")
    try:
        with admin.connect() as c:
            c.execute(text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
            if create:
                c.execute(text(f'CREATE DATABASE "{name}"'))
    finally:
        admin.dispose()
    return u.set(database=name).render_as_string(hide_password=False)


if __name__ == "__main__":
    main()
