"""The delivery queue: failed deliveries are retried until they succeed or their deadline passes,
never sent twice; past the deadline the fallback recipients get an 'undelivered' note."""

from __future__ import annotations

import datetime as dt
import json

import pytest
from sqlalchemy import select

from advisory import cli
from advisory.notices import retry_queue
from advisory.notices.deliver import RetryPolicy, deliver_notice
from advisory.notices.receiver import SmtpReceiver, WebhookReceiver
from advisory.notices.retry_queue import retry_failed, undelivered
from advisory.store.schema import Delivery, Recipient
from tests.notices.conftest import SECRET, free_port, store_notice, with_smtp

ONE = RetryPolicy(attempts=1)


def _now() -> dt.datetime:
    return dt.datetime.now(dt.UTC)


@pytest.fixture
def open_deadline(monkeypatch):
    """Every notice still worth delivering for a day (the samples' nights are long past)."""
    monkeypatch.setattr(retry_queue, "deadline_utc", lambda *a, **k: _now() + dt.timedelta(days=1))


def _point_wren_at(s, url: str) -> Recipient:
    wren = s.scalar(select(Recipient).where(Recipient.name == "Wren Okonkwo-Hale"))
    wren.channels = {**wren.channels, "webhook": url}
    return wren


def test_smtp_refuses_then_accepts_each_mail_once(farm_db, settings, open_deadline):
    with SmtpReceiver(refuse=True) as mail:
        cfg = with_smtp(settings, mail.port, tls="none")
        with farm_db.transaction() as s:
            row, block = store_notice(s, block_name="Bench Gala")
            made = deliver_notice(s, row, list(block.recipients), cfg, channels=["email"], retry=ONE,
                                  timeout_s=10)
            nid = row.id
        assert [d.status for d in made] == ["failed", "failed"] and "451" in made[0].error
        with farm_db.transaction() as s:
            assert len(undelivered(s, [nid])) == 2
            assert retry_failed(s, cfg, now=_now(), timeout_s=10).retried == []   # its pause is not over
        mail.refuse = False
        with farm_db.transaction() as s:
            report = retry_failed(s, cfg, now=_now() + dt.timedelta(minutes=2), timeout_s=10)
        assert sorted(a.status for a in report.retried) == ["sent", "sent"]
        assert len(mail.messages) == 2
        with farm_db.transaction() as s:   # delivered: later passes send nothing again
            assert retry_failed(s, cfg, now=_now() + dt.timedelta(hours=3), timeout_s=10).retried == []
            assert retry_failed(s, cfg, attempted_before=_now() + dt.timedelta(hours=3)).retried == []
            assert undelivered(s, [nid]) == []
        assert len(mail.messages) == 2


def test_webhook_down_then_up_is_retried_once_delivered(farm_db, settings, open_deadline):
    port = free_port()
    url = f"http://127.0.0.1:{port}/advisory"
    with farm_db.transaction() as s:
        wren = _point_wren_at(s, url)
        row, _ = store_notice(s, block_name="Bench Gala")
        made = deliver_notice(s, row, [wren], settings, channels=["webhook"], retry=ONE, timeout_s=5)
    assert [d.status for d in made] == ["failed"] and "cannot reach" in made[0].error
    with WebhookReceiver(SECRET, port=port) as hook:
        for minutes in (2, 30, 240):
            with farm_db.transaction() as s:
                retry_failed(s, settings, now=_now() + dt.timedelta(minutes=minutes), timeout_s=5)
        assert len(hook.received.verified) == 1 and hook.received.rejected == 0
    with farm_db.transaction() as s:
        statuses = [d.status for d in s.scalars(select(Delivery).where(Delivery.channel == "webhook")
                                                .order_by(Delivery.attempt))]
    assert statuses == ["failed", "sent"]


def test_past_the_deadline_the_agent_is_told(farm_db_url, farm_db, settings, monkeypatch, capsys):
    port = free_port()
    with farm_db.transaction() as s:
        _point_wren_at(s, f"http://127.0.0.1:{port}/advisory")
        row, block = store_notice(s, block_name="Bench Gala")
        deliver_notice(s, row, list(block.recipients), settings, channels=["email", "webhook"], retry=ONE,
                       timeout_s=5)
        nid, key = row.id, row.key
    monkeypatch.setattr(retry_queue, "deadline_utc", lambda *a, **k: _now() - dt.timedelta(minutes=1))
    with WebhookReceiver(SECRET, port=port) as hook, farm_db.transaction() as s:
        report = retry_failed(s, settings, now=_now(), timeout_s=5)
    assert report.retried == []                                        # too late: not sent any more
    assert sorted((it.recipient, it.channel) for it in report.expired) == [
        ("Odalys Brenneman", "email"), ("Wren Okonkwo-Hale", "email"), ("Wren Okonkwo-Hale", "webhook")]
    # the extension agent (the farm file names no fallback) gets one short note, on the channels that work
    assert [(a.channel, a.status) for a in report.fallback] == [("fallback-email", "failed"),
                                                                 ("fallback-webhook", "sent")]
    note = hook.received.verified[0]
    assert note["type"] == "undelivered" and note["notice"] == key and len(note["missed"]) == 3
    files = list((settings.outbox).rglob("*.undelivered.txt"))
    assert len(files) == 1 and "Odalys Brenneman by email" in files[0].read_text()
    with farm_db.transaction() as s:                                   # given up once, told once
        again = retry_failed(s, settings, now=_now(), timeout_s=5)
        assert again.retried == [] and again.expired == [] and again.fallback == []
        assert {it.status for it in undelivered(s, [nid])} == {retry_queue.EXPIRED}
    assert cli.main(["--db", farm_db_url, "notices", "list", "--undelivered"]) == 0
    out = capsys.readouterr().out
    assert out.count("given up") == 3 and "undelivered note: email failed, webhook sent" in out


def test_fallback_recipients_from_the_farm_file(farm_db, settings):
    from advisory.store.schema import Farm

    with farm_db.transaction() as s:
        farm = s.scalar(select(Farm))
        farm.settings = {**farm.settings, "fallback_recipients": ["Tobiah Marchetti"]}
        s.flush()
        assert [r.name for r in retry_queue.fallback_recipients(s, farm.id)] == ["Tobiah Marchetti"]
        farm.settings = {k: v for k, v in farm.settings.items() if k != "fallback_recipients"}
        s.flush()
        assert [r.name for r in retry_queue.fallback_recipients(s, farm.id)] == ["Wren Okonkwo-Hale"]


def test_deadlines_per_kind():
    night = dt.date(2026, 4, 8)
    frost = retry_queue.deadline_utc("frost", night, "America/Los_Angeles", [(46.42, -120.31)])
    assert dt.datetime(2026, 4, 9, 13, 0, tzinfo=dt.UTC) < frost < dt.datetime(2026, 4, 9, 13, 40, tzinfo=dt.UTC)
    heat = retry_queue.deadline_utc("heat", dt.date(2026, 7, 16), "America/Los_Angeles", [(46.42, -120.31)])
    assert heat == dt.datetime(2026, 7, 17, 7, 0, tzinfo=dt.UTC)                 # local midnight (PDT)


def test_resend_and_show_take_the_key(farm_db_url, farm_db, capsys):
    with farm_db.transaction() as s:
        row, _ = store_notice(s)
        key = row.key
    assert cli.main(["--db", farm_db_url, "notices", "show", key, "--format", "json"]) == 0
    assert json.loads(capsys.readouterr().out)["key"] == key
    assert cli.main(["--db", farm_db_url, "notices", "resend", key, "--channel", "sms"]) == 0
    assert "queued" in capsys.readouterr().out
    assert cli.main(["--db", farm_db_url, "notices", "resend", "frost:nope"]) == 2
    assert "no notice with key 'frost:nope'" in capsys.readouterr().err
