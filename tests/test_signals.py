"""SIGTERM and SIGINT stop `serve` and `serve --rehearse` cleanly: the running run finishes, nothing is
left half delivered, and serve's retries of failed deliveries go on until then."""

from __future__ import annotations

import datetime as dt
import os
import signal
import subprocess
import sys
import time
from zoneinfo import ZoneInfo

import pytest
from sqlalchemy import func, select

from advisory.store.schema import Delivery, Notice, Recipient, RunRecord

NIGHT = "2026-04-08"


def _env(tmp_path, outbox, **extra):
    env = {**os.environ, "ADVISORY_OUTBOX": str(outbox), "ADVISORY_HOME": str(tmp_path / "home"), **extra}
    for k in ("ADVISORY_SMTP_HOST", "ADVISORY_WEBHOOK_SECRET", "ADVISORY_DB", "ADVISORY_SETTINGS"):
        if k not in extra:
            env.pop(k, None)
    return env


def _wait(pred, timeout_s: float, proc=None) -> bool:
    end = time.monotonic() + timeout_s
    while time.monotonic() < end:
        if pred():
            return True
        if proc is not None and proc.poll() is not None:
            return False
        time.sleep(0.2)
    return False


@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGINT])
def test_rehearsal_stops_cleanly_mid_night(spring_db, quiet_channels, tmp_path, sig):
    url = spring_db.url
    cmd = [sys.executable, "-m", "advisory.cli", "--db", url, "serve", "--rehearse", NIGHT, "--allow-past",
           "--seconds-per-hour", "3"]
    proc = subprocess.Popen(cmd, env=_env(tmp_path, quiet_channels), stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)

    def started():
        with spring_db.transaction() as s:
            return s.scalar(select(func.count()).select_from(RunRecord)) > 0

    try:
        assert _wait(started, 90, proc), proc.communicate(timeout=5)
        proc.send_signal(sig)
        out, err = proc.communicate(timeout=120)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == 0, err                     # not 143 (killed by SIGTERM) nor 130
    assert "stopping after the running run" in out and "stopped by a signal" in out
    with spring_db.transaction() as s:
        runs = s.execute(select(RunRecord.key, RunRecord.status)).all()
        n_notices = s.scalar(select(func.count()).select_from(Notice))
        boxed = s.scalar(select(func.count(func.distinct(Delivery.notice_id))).where(
            Delivery.channel == "outbox", Delivery.status == "sent"))
    assert runs and all(status == "finished" for _k, status in runs), runs   # the running run finished
    assert len(runs) < 10                                                     # and the rest did not start
    assert n_notices > 0 and boxed == n_notices                               # every stored notice delivered
    leftovers = [p for p in quiet_channels.rglob("*") if p.name.endswith((".staged", ".tmp"))]
    assert leftovers == []


def test_serve_retries_failed_deliveries_and_stops_on_sigterm(db, demo_farm, tmp_path):
    from advisory.ingest.farm_file import import_farm_file
    from advisory.notices.receiver import WebhookReceiver
    from tests.notices import samples
    from tests.notices.conftest import SECRET, free_port, store_notice

    import_farm_file(db, demo_farm / "farm.toml")
    farm_db = db
    port = free_port()
    outbox = tmp_path / "outbox"
    tomorrow = dt.datetime.now(ZoneInfo("America/Los_Angeles")).date() + dt.timedelta(days=1)
    with farm_db.transaction() as s:
        wren = s.scalar(select(Recipient).where(Recipient.name == "Wren Okonkwo-Hale"))
        wren.channels = {"webhook": f"http://127.0.0.1:{port}/advisory"}
        row, _ = store_notice(s, samples.heat_assessment(night=tomorrow), block_name="Bench Gala")
        s.add(Delivery(notice_id=row.id, recipient_id=wren.id, channel="webhook", address="x", attempt=1,
                       status="failed", error="cannot reach", attempted_at=dt.datetime.now(dt.UTC)
                       - dt.timedelta(minutes=10)))
        nid, wid, key = row.id, wren.id, row.key
    cmd = [sys.executable, "-m", "advisory.cli", "--db", farm_db.url, "serve", "--retry-every", "1",
           "--planner-every-min", "600", "--stop-after", "120"]
    with WebhookReceiver(SECRET, port=port) as hook:
        proc = subprocess.Popen(cmd, env=_env(tmp_path, outbox, ADVISORY_WEBHOOK_SECRET=SECRET),
                                stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        try:
            def ours():  # (the planner also tells Wren of the evening runs missed while no one served)
                return [n for n in hook.received.verified if n.get("key") == key]

            assert _wait(lambda: len(ours()) >= 1, 60, proc), proc.communicate(timeout=5)
            time.sleep(2.5)                                   # more retry passes: nothing is sent twice
            proc.send_signal(signal.SIGTERM)
            out, err = proc.communicate(timeout=60)
        finally:
            if proc.poll() is None:
                proc.kill()
        assert len(ours()) == 1
    assert proc.returncode == 0, err
    assert "received signal" in out and "scheduler stopped" in out
    with farm_db.transaction() as s:
        got = [d.status for d in s.scalars(select(Delivery).where(
            Delivery.notice_id == nid, Delivery.recipient_id == wid).order_by(Delivery.attempt))]
    assert got == ["failed", "sent"]
