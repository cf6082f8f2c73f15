"""Benchmark: import of a 1,000,000-row observation file into PostgreSQL, QC included.

The same synthetic station file as ``bench_import.py`` (5-minute readings, local UTC offsets, derived dew
point, faults for QC).  Measured in the same run, each in a fresh process, on one server:

* ``ours``: ``advisory.ingest.observations.import_file`` into a migrated database: parse, convert,
  derive, QC, merge, binary COPY of the new rows, commit;
* ``floor``: ``pandas.read_csv`` of the same file (and ``pandas.to_datetime`` of its time column, so
  that the rows are the same: integer seconds) plus a bare psycopg ``COPY ... FROM STDIN`` of the same
  rows (``Copy.write_row``) into a scratch table made ``LIKE observations INCLUDING ALL`` (same
  columns, same primary key), committed.  The COPY alone is printed too.

It prints the wall time of each and the ratio (target: within 2x of the floor).

The server is ``ADVISORY_TEST_DB`` when set (a database there that may create others); otherwise a
throw-away cluster started by ``.ci/pg-cluster`` in a temporary folder and stopped at the end.

Usage::

    .venv/bin/python benchmarks/bench_pg_import.py [--rows 1000000] [--repeat 1]
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
import uuid
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "benchmarks"))

from bench_import import STATION, ZONE, _cpu_s, generate  # noqa: E402

COLS = ["station_id", "time_utc", "air_temp_c", "dew_point_c", "rel_humidity_pct", "wind_speed_ms",
        "cloud_cover_pct", "upper_air_temp_c", "air_temp_qc", "dew_point_qc", "rel_humidity_qc",
        "wind_speed_qc", "cloud_cover_qc", "upper_air_temp_qc", "import_id"]


def _setup_db(url: str) -> None:
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


def child_ours(csv_path: str, url: str) -> dict:
    import pandas  # noqa: F401  (import cost is not part of the measurement)

    from advisory.ingest.observations import import_file
    from advisory.store.db import Database

    db = Database(url)
    c0 = _cpu_s()
    t0 = time.perf_counter()
    summary = import_file(db, STATION, csv_path)
    seconds = time.perf_counter() - t0
    cpu = _cpu_s() - c0
    t1 = time.perf_counter()
    again = import_file(db, STATION, csv_path)  # the same file: matched, nothing written
    reimport_s = time.perf_counter() - t1
    assert again.already_imported and again.rows_added == 0
    with db.transaction() as s:
        from sqlalchemy import text

        stored = s.execute(text("SELECT COUNT(*) FROM observations")).scalar_one()
    db.dispose()
    return {"seconds": seconds, "cpu_s": cpu, "rows_added": summary.rows_added, "stored": stored,
            "reimport_s": reimport_s}


def child_floor(csv_path: str, url: str) -> dict:
    import pandas as pd
    import psycopg
    from sqlalchemy.engine import make_url

    u = make_url(url)
    conninfo = {"dbname": u.database, "user": u.username, "password": u.password,
                "host": u.host or u.query.get("host"), "port": u.port or u.query.get("port")}
    c0 = _cpu_s()
    t0 = time.perf_counter()
    df = pd.read_csv(csv_path)
    seconds = (pd.to_datetime(df["time"], format="ISO8601", utc=True) - pd.Timestamp(0, tz="UTC")) // pd.Timedelta(
        seconds=1)
    n = len(df)
    none = [None] * n
    zero = [0] * n
    values = [df[c].tolist() if c in df else none for c in COLS[2:8]]
    with psycopg.connect(**{k: v for k, v in conninfo.items() if v is not None}) as conn:
        station_id = conn.execute("SELECT id FROM stations WHERE code = %s", (STATION,)).fetchone()[0]
        conn.execute("CREATE TABLE scratch_observations (LIKE observations INCLUDING ALL)")
        rows = zip([station_id] * n, seconds.tolist(), *values, *([zero] * 6), none, strict=True)
        t_copy = time.perf_counter()
        with conn.cursor() as cur, cur.copy(f"COPY scratch_observations ({', '.join(COLS)}) FROM STDIN") as copy:
            for row in rows:
                copy.write_row(row)
        conn.commit()
        copy_s = time.perf_counter() - t_copy
        stored = conn.execute("SELECT COUNT(*) FROM scratch_observations").fetchone()[0]
    total = time.perf_counter() - t0
    return {"seconds": total, "cpu_s": _cpu_s() - c0, "copy_s": copy_s, "rows_added": n, "stored": stored}


class Server:
    """The benchmark's PostgreSQL server: ADVISORY_TEST_DB, or a throw-away cluster of .ci/pg-cluster."""

    def __init__(self):
        self.folder = None
        url = os.environ.get("ADVISORY_TEST_DB")
        if not url:
            self.folder = tempfile.mkdtemp(prefix="bench-pg-")
            url = subprocess.run(["bash", str(ROOT / ".ci" / "pg-cluster"), "start", self.folder],
                                 check=True, capture_output=True, text=True).stdout.strip().splitlines()[-1]
        from sqlalchemy import create_engine
        from sqlalchemy.engine import make_url

        self.admin = make_url(url)
        self.engine = create_engine(self.admin, isolation_level="AUTOCOMMIT")

    def new_database(self) -> str:
        from sqlalchemy import text

        name = f"bench_{uuid.uuid4().hex[:12]}"
        with self.engine.connect() as conn:
            conn.execute(text(f'CREATE DATABASE "{name}"'))
        return self.admin.set(database=name).render_as_string(hide_password=False)

    def drop(self, url: str) -> None:
        from sqlalchemy import text
        from sqlalchemy.engine import make_url

        with self.engine.connect() as conn:
            conn.execute(text(f'DROP DATABASE IF EXISTS "{make_url(url).database}" WITH (FORCE)'))

    def close(self) -> None:
        self.engine.dispose()
        if self.folder:
            subprocess.run(["bash", str(ROOT / ".ci" / "pg-cluster"), "stop", self.folder], check=False)


def run_child(kind: str, csv_path: Path, server: Server) -> dict:
    url = server.new_database()
    try:
        _setup_db(url)
        out = subprocess.run([sys.executable, __file__, "--child", kind, str(csv_path), url],
                             capture_output=True, text=True, check=False)
        if out.returncode != 0:
            raise SystemExit(f"{kind} failed:\n{out.stderr}")
        return json.loads(out.stdout.strip().splitlines()[-1])
    finally:
        server.drop(url)


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--repeat", type=int, default=1, help="runs of each (the best is reported)")
    ap.add_argument("--child", nargs=3, metavar=("KIND", "CSV", "URL"), help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        kind, csv_path, url = args.child
        print(json.dumps(child_ours(csv_path, url) if kind == "ours" else child_floor(csv_path, url)))
        return 0

    with tempfile.TemporaryDirectory(prefix="bench-pg-import-") as tmp:
        csv_path = Path(tmp) / f"synthetic-{args.rows}.csv"
        t0 = time.perf_counter()
        generate(csv_path, args.rows)
        print(f"generated {csv_path.name}: {args.rows:,} rows, {csv_path.stat().st_size / 2**20:.0f} MiB "
              f"in {time.perf_counter() - t0:.1f} s")
        server = Server()
        try:
            ours_runs, floor_runs = [], []
            for _ in range(args.repeat):  # interleaved, so that load on a shared machine hits both alike
                ours_runs.append(run_child("ours", csv_path, server))
                floor_runs.append(run_child("floor", csv_path, server))
        finally:
            server.close()
    ours = min(ours_runs, key=lambda r: r["seconds"])
    floor = min(floor_runs, key=lambda r: r["seconds"])
    assert ours["stored"] == ours["rows_added"] == floor["stored"] == args.rows, (ours, floor)
    ratio = ours["seconds"] / floor["seconds"]
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    print(f"machine: {os.cpu_count()} CPUs, Python {sys.version.split()[0]}, load average {load:.1f}; "
          f"best of {args.repeat}")
    print(f"ours : {ours['seconds']:6.2f} s wall, {ours['cpu_s']:6.2f} s CPU, {ours['rows_added']:,} rows stored "
          "(parse, QC, merge, binary COPY, commit)")
    print(f"floor: {floor['seconds']:6.2f} s wall, {floor['cpu_s']:6.2f} s CPU "
          f"(pandas.read_csv + to_datetime + psycopg COPY write_row; the COPY alone {floor['copy_s']:.2f} s)")
    print(f"ratio ours/floor: {ratio:.2f}x wall; ours/COPY alone: {ours['seconds'] / floor['copy_s']:.2f}x")
    print(f"same file again (nothing new, nothing written): {ours['reimport_s']:.2f} s wall")
    if args.repeat > 1:
        print("all runs, wall s: ours " + ", ".join(f"{r['seconds']:.2f}" for r in ours_runs)
              + "; floor " + ", ".join(f"{r['seconds']:.2f}" for r in floor_runs))
    ok = ratio <= 2.0
    print("target (<= 2x floor): " + ("met" if ok else "NOT met"))
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
