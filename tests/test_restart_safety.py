"""Restart and fault safety: SIGKILL at random points of a run, then restart; the real scheduler."""

from __future__ import annotations

import datetime as dt
import os
import random
import signal
import subprocess
import sys
import time

from sqlalchemy import func, select, text

from advisory import schedule
from advisory.store.schema import Forecast, Notice
from tests.helpers.deliveries import delivered_twice, without_outbox_file

NIGHT = dt.date(2026, 4, 8)


def _invariants(db):
    with db.transaction() as s:
        per_block = s.execute(select(Forecast.block_id, func.count()).where(
            Forecast.night == NIGHT, Forecast.revision == 0).group_by(Forecast.block_id)).all()
        notices = s.scalar(select(func.count()).select_from(Notice))
        # no notice delivered twice to the same recipient on the same channel
        dup = delivered_twice(s)
        undelivered = without_outbox_file(s)
        if s.get_bind().dialect.name == "sqlite":
            fk = s.execute(text("PRAGMA foreign_key_check")).all()
            integrity = s.execute(text("PRAGMA integrity_check")).scalar()
        else:  # the server enforces foreign keys on every write and keeps its files whole itself
            fk, integrity = [], "ok"
    return per_block, notices, dup, undelivered, fk, integrity


def test_sigkill_twenty_times_then_restart(spring_db, quiet_channels, tmp_path):
    rng = random.Random(20260408)
    env = {**os.environ, "ADVISORY_OUTBOX": str(quiet_channels), "ADVISORY_HOME": str(tmp_path / "home")}
    cmd = [sys.executable, "-m", "advisory.cli", "--db", spring_db.url, "night", "run", "--date", NIGHT.isoformat(),
           "--allow-past"]
    spring_db.dispose()
    killed = 0
    for _ in range(20):
        proc = subprocess.Popen(cmd, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        time.sleep(rng.uniform(0.3, 6.0))
        if proc.poll() is None:
            proc.send_signal(signal.SIGKILL)
            killed += 1
        proc.wait(timeout=60)
        per_block, _n, dup, _u, fk, integrity = _invariants(spring_db)
        assert integrity == "ok" and fk == [] and dup == []
        assert all(c == 1 for _b, c in per_block)       # never two evening forecasts for a block
    assert killed >= 5                                     # the kills really interrupted runs
    done = subprocess.run(cmd, env=env, capture_output=True, text=True, timeout=120)
    # 3: stored and delivered to the outbox, but the agent has only e-mail and a webhook, neither set up here
    assert done.returncode == 3, done.stderr
    assert "undelivered: " in done.stderr
    per_block, notices, dup, undelivered, fk, integrity = _invariants(spring_db)
    assert len(per_block) == 6 and all(c == 1 for _b, c in per_block)   # no lost forecast
    assert notices >= 7                                                 # six blocks and a summary
    assert dup == [] and fk == [] and integrity == "ok"
    assert undelivered == 0                                             # everything reached the outbox


def test_real_scheduler_runs_a_night_on_a_compressed_clock(spring_db, quiet_channels):
    """APScheduler waking the run claims kept in the database, seconds per hour of night."""
    n = schedule.rehearse(spring_db, NIGHT, seconds_per_hour=0.5, echo=lambda *_: None)
    with spring_db.transaction() as s:
        revisions = s.execute(select(Forecast.block_id, func.count()).where(Forecast.night == NIGHT)
                              .group_by(Forecast.block_id)).all()
        morning = s.scalar(text("SELECT COUNT(*) FROM verifications"))
        jobs_left = s.scalar(text("SELECT COUNT(*) FROM run_claims WHERE state <> 'done'"))
    assert n >= 3                                   # evening, updates, morning
    assert len(revisions) == 6
    assert all(c == n - 1 for _b, c in revisions)   # one forecast per block per evening/update run
    assert morning == 6                             # the morning step verified every block
    assert jobs_left == 0
    # running the same night again does nothing new
    again = schedule.rehearse(spring_db, NIGHT, seconds_per_hour=0.2, echo=lambda *_: None)
    assert again == n
    with spring_db.transaction() as s:
        assert s.execute(select(func.count()).select_from(Forecast)).scalar() == sum(c for _b, c in revisions)
