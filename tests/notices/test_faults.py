"""Faults: the mail server is down; the outbox and the webhook still get through; reruns send nothing twice."""

from __future__ import annotations

import email
import email.policy

from aiosmtpd.controller import Controller
from sqlalchemy import func, select

from advisory.notices.deliver import RetryPolicy, deliver_notice
from advisory.store.schema import Delivery, Recipient
from tests.notices.conftest import free_port, store_notice, with_smtp
from tests.notices.test_smtp_real import Collector
from tests.notices.test_webhook_real import Receiver, receiver  # noqa: F401  (fixture)


def _everyone(s):
    return list(s.scalars(select(Recipient).order_by(Recipient.id)))


def test_smtp_down_then_back(farm_db, settings, receiver):  # noqa: F811
    port = free_port()                  # nothing listens here: connection refused
    cfg = with_smtp(settings, port, starttls=False)
    sleeps = []
    with farm_db.transaction() as s:
        wren = s.scalar(select(Recipient).where(Recipient.name == "Wren Okonkwo-Hale"))
        wren.channels = {**wren.channels, "webhook": receiver}
        row, _ = store_notice(s, block_name="Bench Gala")
        notice_id = row.id
        made = deliver_notice(s, row, _everyone(s), cfg, sleep=sleeps.append, timeout_s=5,
                              retry=RetryPolicy(attempts=3, first_delay_s=1.0, factor=2.0))
    mail = [d for d in made if d.channel == "email"]
    # two recipients with e-mail, three attempts each, all refused and logged
    assert len(mail) == 6 and {d.status for d in mail} == {"failed"}
    assert sorted(d.attempt for d in mail) == [1, 1, 2, 2, 3, 3]
    assert all("cannot reach SMTP server" in d.error for d in mail)
    assert sleeps == [1.0, 2.0]          # one shared pause per round, growing
    others = {(d.channel, d.status) for d in made if d.channel != "email"}
    assert others == {("outbox", "sent"), ("webhook", "sent"), ("sms", "queued")}
    assert len(Receiver.received) == 1 and Receiver.received[0]["ok"]

    # Rerun while the server is still down: only e-mail is tried again; nothing else is sent twice.
    with farm_db.transaction() as s:
        row = s.get(type(row), notice_id)
        again = deliver_notice(s, row, _everyone(s), cfg, sleep=lambda _: None, timeout_s=5,
                               retry=RetryPolicy(attempts=1))
    assert {d.channel for d in again} == {"email"} and [d.attempt for d in again] == [4, 4]
    assert len(Receiver.received) == 1

    # The server comes back: the rerun delivers each e-mail once; a further rerun sends nothing at all.
    handler = Collector()
    controller = Controller(handler, hostname="127.0.0.1", port=port, ready_timeout=10)
    controller.start()
    try:
        with farm_db.transaction() as s:
            row = s.get(type(row), notice_id)
            third = deliver_notice(s, row, _everyone(s), cfg, sleep=lambda _: None, timeout_s=10)
        assert [(d.channel, d.status) for d in third] == [("email", "sent"), ("email", "sent")]
        assert sorted(e.rcpt_tos[0] for e in handler.envelopes) == ["odalys@quillback.example",
                                                                   "wren.oh@county-extension.example"]
        with farm_db.transaction() as s:
            row = s.get(type(row), notice_id)
            assert deliver_notice(s, row, _everyone(s), cfg, sleep=lambda _: None, timeout_s=10) == []
        assert len(handler.envelopes) == 2 and len(Receiver.received) == 1
        msg = email.message_from_bytes(handler.envelopes[0].content, policy=email.policy.default)
        assert "Bench Gala" in msg["Subject"]
    finally:
        controller.stop()
    with farm_db.transaction() as s:
        sent = s.scalar(select(func.count()).select_from(Delivery)
                        .where(Delivery.notice_id == notice_id, Delivery.status.in_(("sent", "queued"))))
    assert sent == 1 + 1 + 2 + 2   # outbox, webhook, two text messages, two e-mails: each exactly once


def test_crash_between_rounds_leaves_a_consistent_log(farm_db, settings):
    """An exception in the caller's transaction after delivery rolls the log back with it."""
    try:
        with farm_db.transaction() as s:
            row, block = store_notice(s)
            deliver_notice(s, row, list(block.recipients), settings, channels=["outbox"])
            raise RuntimeError("crash before commit")
    except RuntimeError:
        pass
    with farm_db.transaction() as s:
        assert s.scalar(select(func.count()).select_from(Delivery)) == 0
