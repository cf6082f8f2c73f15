"""Several hosts share one night on one PostgreSQL database: three `serve --rehearse` processes, 300 blocks
on 3 farms, a host SIGKILLed five times at random points (and started again); every run is done once."""

from __future__ import annotations

import datetime as dt
import os
import random
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
from sqlalchemy import func, select

from advisory import schedule
from advisory.store.db import Database
from advisory.store.schema import Forecast, Notice, RunClaim, RunRecord, Verification
from tests.helpers.deliveries import delivered_twice, without_outbox_file

NIGHT = dt.date(2026, 4, 8)
FARMS, BLOCKS_PER_FARM = 3, 100
READINGS = Path(__file__).resolve().parents[1] / "demo-farm" / "stations" / "QR-BENCH-spring.csv"


def write_region(folder: Path, farms: int = FARMS, per_farm: int = BLOCKS_PER_FARM) -> list[Path]:
    """Invented farm files (``farms`` farms of ``per_farm`` blocks on two stations each) and their readings.

    The farms lie a few kilometres apart (their runs fall at different minutes); every station
    reads the demo farm's spring week.
    """
    folder.mkdir(parents=True, exist_ok=True)
    files = []
    crops = [("apple", "Gala", "full pink"), ("sweet cherry", "Bing", "first bloom"),
             ("pear", "Bartlett", "first white")]
    for f in range(farms):
        lon = -120.31 + 0.35 * f
        lines = [f'[farm]\nname = "Larkspur Bench {f + 1}"\ntimezone = "America/Los_Angeles"\n',
                 f'[[recipients]]\nname = "Manager {f + 1}"\nrole = "orchard manager"\n']
        for s in range(2):
            lines.append(f'[[stations]]\nid = "LB{f + 1}-S{s + 1}"\nlatitude = 46.42\nlongitude = {lon:.4f}\n'
                         f'elevation_m = {340 + 10 * s}\n')
            shutil.copyfile(READINGS, folder / f"LB{f + 1}-S{s + 1}.csv")
        for b in range(per_farm):
            crop, variety, stage = crops[b % 3]
            lines.append(f'[[blocks]]\nname = "Row {b + 1:03d}"\nstation = "LB{f + 1}-S{b % 2 + 1}"\n'
                         f'latitude = 46.42\nlongitude = {lon:.4f}\nelevation_m = {330 + b % 40}\n'
                         f'area_ha = 2.0\ncrop = "{crop}"\nvariety = "{variety}"\nstage = "{stage}"\n'
                         f'stage_date = 2026-04-05\n')
        path = folder / f"farm-{f + 1}.toml"
        path.write_text("\n".join(lines))
        files.append(path)
    return files


def _import_region(db, folder: Path) -> None:
    from advisory.ingest.farm_file import import_farm_file
    from advisory.ingest.observations import import_file

    for path in write_region(folder):
        import_farm_file(db, path)
    for csv in sorted(folder.glob("*.csv")):
        import_file(db, csv.stem, csv)


def _env(tmp_path, outbox):
    env = {**os.environ, "ADVISORY_OUTBOX": str(outbox), "ADVISORY_HOME": str(tmp_path / "home"),
           "ADVISORY_WORKERS": "1"}
    for k in ("ADVISORY_SMTP_HOST", "ADVISORY_WEBHOOK_SECRET", "ADVISORY_DB", "ADVISORY_SETTINGS"):
        env.pop(k, None)
    return env


def _holders(db) -> list[int]:
    """Process ids of the hosts holding a run right now."""
    with db.transaction() as s:
        hosts = s.scalars(select(RunClaim.host).where(RunClaim.state == "running")).all()
    return [int(h.split(":")[1]) for h in hosts if h]


@pytest.mark.postgresql_only(reason="several hosts share a night through a database server (row locks, "
                                    "SKIP LOCKED, advisory locks); one SQLite file is for one host")
def test_three_hosts_share_a_night_and_take_over_from_a_killed_one(db, tmp_path, quiet_channels, fresh_db_url,
                                                                    monkeypatch):
    _import_region(db, tmp_path / "region")
    runs = schedule.night_runs(schedule.load_block_clocks(db),
                               NIGHT, schedule.PlannerSettings(kinds=(schedule.EVENING, schedule.UPDATE,
                                                                      schedule.MORNING)))
    updates_of: dict[int, int] = {}
    for r in runs:
        if r.kind == schedule.UPDATE:
            for b in r.block_ids:
                updates_of[b] = updates_of.get(b, 0) + 1
    cmd = [sys.executable, "-m", "advisory.cli", "--db", db.url, "serve", "--rehearse", NIGHT.isoformat(),
           "--allow-past", "--seconds-per-hour", "6", "--takeover-after", "3"]
    env = _env(tmp_path, quiet_channels)
    rng = random.Random(20260408)
    logs = tmp_path / "logs"
    logs.mkdir()

    def start(n: int) -> subprocess.Popen:
        return subprocess.Popen(cmd, env=env, stdout=open(logs / f"host-{n}.out", "w"),
                                stderr=subprocess.STDOUT)

    procs = [start(n) for n in range(3)]
    killed: list[subprocess.Popen] = []
    try:
        for k in range(5):
            time.sleep(rng.uniform(2.0, 12.0))
            live = [p for p in procs if p.poll() is None]
            if not live:
                break
            busy = [p for p in live if p.pid in _holders(db)]
            victim = rng.choice(busy or live)   # a host in the middle of a run if one is
            victim.send_signal(signal.SIGKILL)
            victim.wait(timeout=30)
            killed.append(victim)
            procs.append(start(3 + k))
        for p in procs:
            p.wait(timeout=300)
    finally:
        for p in procs:
            if p.poll() is None:
                p.kill()
    out = "\n".join(f.read_text() for f in sorted(logs.iterdir()))
    assert len(killed) == 5, out
    assert all(p.returncode == 0 for p in procs if p not in killed), out

    with db.transaction() as s:
        claims = s.execute(select(RunClaim.kind, RunClaim.state, RunClaim.attempts)).all()
        evening = s.execute(select(Notice.block_id, func.count()).where(
            Notice.block_id.is_not(None), Notice.night == NIGHT, Notice.key.like("frost:%:r0")
        ).group_by(Notice.block_id)).all()
        revisions = s.execute(select(Forecast.block_id, Forecast.revision, func.count()).where(
            Forecast.night == NIGHT).group_by(Forecast.block_id, Forecast.revision)).all()
        dup = delivered_twice(s)
        undelivered = without_outbox_file(s)
        verified = s.execute(select(Verification.forecast_id, func.count()).group_by(Verification.forecast_id)).all()
        unfinished = s.scalar(select(func.count()).select_from(RunRecord).where(RunRecord.status != "finished"))
    assert len(claims) == len(runs) and all(st == "done" for _k, st, _a in claims), (claims, out)
    assert sum(a > 1 for _k, _s, a in claims) >= 1, out       # runs were taken over from killed hosts
    assert unfinished == 0
    # every block: exactly one evening notice, one forecast per run of its own (evening and each update)
    assert len(evening) == FARMS * BLOCKS_PER_FARM and all(c == 1 for _b, c in evening)
    per_block: dict[int, list[int]] = {}
    for b, rev, c in revisions:
        assert c == 1                                         # no revision stored twice
        per_block.setdefault(b, []).append(rev)
    assert len(per_block) == FARMS * BLOCKS_PER_FARM
    assert all(sorted(revs) == list(range(updates_of[b] + 1)) for b, revs in per_block.items())
    # nothing sent twice, nothing missed; every morning check done once
    assert dup == [] and undelivered == 0
    assert len(verified) == FARMS * BLOCKS_PER_FARM and all(c == 1 for _f, c in verified)

    # the notices (evening, the updates the rules sent, the summaries) are those of one host never stopped
    with db.transaction() as s:
        got = set(s.scalars(select(Notice.key).where(Notice.night == NIGHT)))
    ref = Database(fresh_db_url("reference"))
    try:
        _import_region(ref, tmp_path / "region-ref")
        monkeypatch.setenv("ADVISORY_OUTBOX", str(tmp_path / "outbox-ref"))
        schedule.rehearse(ref, NIGHT, seconds_per_hour=0.01, echo=lambda *_: None)
        with ref.transaction() as s:
            want = set(s.scalars(select(Notice.key).where(Notice.night == NIGHT)))
    finally:
        ref.dispose()
    assert got == want
