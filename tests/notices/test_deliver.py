"""Delivery with fake transports: outbox files, text messages, webhook signing, e-mail structure, the log."""

from __future__ import annotations

import email
import email.policy
import json
import logging
import urllib.error
from pathlib import Path

import pytest
from sqlalchemy import func, select

from advisory.errors import InputError
from advisory.notices import channels
from advisory.notices.channels import build_email
from advisory.notices.deliver import RetryPolicy, deliver_notice, delivery_summary
from advisory.notices.outbox_files import outbox_base
from advisory.notices.signing import sign, verify_signature
from advisory.store.schema import Delivery, Recipient
from tests.notices import samples
from tests.notices.conftest import PASSWORD, SECRET, store_notice, with_smtp


class FakeResponse:
    def __init__(self, status=200):
        self.status = status

    def read(self, n=-1):
        return b""

    def __enter__(self):
        return self

    def __exit__(self, *a):
        return False


class FakeUrlopen:
    """Records requests; answers with the given HTTP codes in turn (then 200)."""

    def __init__(self, codes=()):
        self.codes = list(codes)
        self.requests = []

    def __call__(self, req, timeout=None):
        self.requests.append(req)
        code = self.codes.pop(0) if self.codes else 200
        if code >= 400:
            raise urllib.error.HTTPError(req.full_url, code, "no", {}, None)
        return FakeResponse(code)


class FakeSMTP:
    """An smtplib.SMTP stand-in that records what a session did."""

    sessions: list[FakeSMTP] = []
    fail_with: Exception | None = None

    def __init__(self, host, port, timeout=None):
        self.host, self.port, self.calls, self.sent = host, port, [], []
        FakeSMTP.sessions.append(self)

    def ehlo(self):
        self.calls.append("ehlo")

    def starttls(self, context=None):
        self.calls.append("starttls")

    def login(self, user, password):
        self.calls.append(("login", user, password))
        if FakeSMTP.fail_with:
            raise FakeSMTP.fail_with

    def send_message(self, msg, from_addr=None, to_addrs=None):
        self.sent.append((msg, from_addr, to_addrs))

    def quit(self):
        self.calls.append("quit")


@pytest.fixture(autouse=True)
def _reset_fake():
    FakeSMTP.sessions = []
    FakeSMTP.fail_with = None


def recipients_of(block):
    return list(block.recipients)


def test_outbox_and_text_messages(farm_db, settings):
    sleeps = []
    with farm_db.transaction() as s:
        row, block = store_notice(s)
        made = deliver_notice(s, row, recipients_of(block), settings, sleep=sleeps.append)
        by = {(d.channel, d.recipient_id): d for d in made}
        outbox = by[("outbox", None)]
        assert outbox.status == "sent" and outbox.attempt == 1
        base = outbox_base(settings.outbox, channels._Rendered(row).n)
        for ext in ("txt", "md", "html", "json", "png"):
            assert base.with_name(f"{base.name}.{ext}").exists(), ext
        html = base.with_name(base.name + ".html").read_text()
        assert f'src="{base.name}.png"' in html           # the outbox HTML shows the chart beside it
        sms = [d for d in made if d.channel == "sms"]
        assert {d.status for d in sms} == {"queued"} and len(sms) == 2   # both Creek Bing recipients
        files = sorted(base.parent.glob("*.sms.txt"))
        assert len(files) == 2
        body = files[0].read_text()
        assert body.startswith("To: +1-555-01") and len(body.split("\n\n", 1)[1].strip()) <= 160
        # e-mail without an SMTP host: one failed attempt, not retried
        mail = [d for d in made if d.channel == "email"]
        assert len(mail) == 1 and mail[0].status == "failed" and "no SMTP host" in mail[0].error
        assert sleeps == []
        assert s.scalar(select(Delivery).where(Delivery.id == outbox.id)) is not None


def test_rerun_sends_nothing_twice_and_resend_forces(farm_db, settings):
    with farm_db.transaction() as s:
        row, block = store_notice(s)
        first = deliver_notice(s, row, recipients_of(block), settings, sleep=lambda _: None, channels=["outbox", "sms"])
        assert len(first) == 3
        again = deliver_notice(s, row, recipients_of(block), settings, sleep=lambda _: None,
                               channels=["outbox", "sms"])
        assert again == []
        forced = deliver_notice(s, row, recipients_of(block), settings, sleep=lambda _: None,
                                channels=["sms"], force=True)
        assert len(forced) == 2 and {d.attempt for d in forced} == {2}
        rows = s.scalars(select(Delivery).where(Delivery.notice_id == row.id)).all()
        assert delivery_summary(rows) == {"outbox": "sent", "sms": "queued"}


def test_unknown_channel_is_an_input_error(farm_db, settings):
    with farm_db.transaction() as s:
        row, block = store_notice(s)
        with pytest.raises(InputError):
            deliver_notice(s, row, recipients_of(block), settings, channels=["pigeon"])


def test_outbox_names_are_safe_for_any_block_name(tmp_path):
    from advisory.notices.compose import compose_block

    for name in ("<script>alert(1)</script>", "../../etc/passwd", "Bloc Été / Nord", "CON", "", "ブロック"):
        n = compose_block(samples.frost_assessment(block=name))
        base = outbox_base(tmp_path / "outbox", n)
        assert base.parent.parent == tmp_path / "outbox"
        assert base.name.isascii()
        assert all(c.isalnum() or c in "-_." for c in base.name), base.name
    a = outbox_base(tmp_path, compose_block(samples.frost_assessment(block="<b>", block_id=7)))
    b = outbox_base(tmp_path, compose_block(samples.frost_assessment(block="b", block_id=8)))
    assert a.name.split("_")[1] == b.name.split("_")[1] == "b"
    assert a != b   # same slug, different notices: the key hash keeps them apart


def _wren(s):
    return s.scalar(select(Recipient).where(Recipient.name == "Wren Okonkwo-Hale"))


def test_webhook_is_signed(farm_db, settings):
    fake = FakeUrlopen()
    with farm_db.transaction() as s:
        row, _ = store_notice(s, block_name="Bench Gala")
        made = deliver_notice(s, row, [_wren(s)], settings, channels=["webhook"], urlopen=fake,
                              clock=lambda: 1775536800.0)
        assert [d.status for d in made] == ["sent"]
        req = fake.requests[0]
        headers = {k.lower(): v for k, v in req.header_items()}
        assert req.get_method() == "POST" and req.full_url == "http://127.0.0.1:8765/advisory"
        assert headers["x-advisory-timestamp"] == "1775536800"
        assert verify_signature(SECRET, req.data, headers["x-advisory-signature"], headers["x-advisory-timestamp"],
                                now=1775536810.0)
        assert json.loads(req.data)["key"] == row.key
        assert headers["x-advisory-notice"] == row.key


def test_webhook_retries_server_errors_with_backoff(farm_db, settings):
    fake = FakeUrlopen(codes=[503, 500])
    sleeps = []
    with farm_db.transaction() as s:
        row, _ = store_notice(s, block_name="Bench Gala")
        made = deliver_notice(s, row, [_wren(s)], settings, channels=["webhook"], urlopen=fake,
                              sleep=sleeps.append, retry=RetryPolicy(attempts=3, first_delay_s=2, factor=3))
    assert [(d.attempt, d.status) for d in made] == [(1, "failed"), (2, "failed"), (3, "sent")]
    assert "HTTP 503" in made[0].error
    assert sleeps == [2, 6]


def test_webhook_client_errors_and_missing_secret_are_not_retried(farm_db, settings):
    import dataclasses

    sleeps = []
    with farm_db.transaction() as s:
        row, _ = store_notice(s, block_name="Bench Gala")
        made = deliver_notice(s, row, [_wren(s)], settings, channels=["webhook"], urlopen=FakeUrlopen([404]),
                              sleep=sleeps.append)
        assert [(d.attempt, d.status) for d in made] == [(1, "failed")] and "HTTP 404" in made[0].error
        fake = FakeUrlopen()
        made = deliver_notice(s, row, [_wren(s)], dataclasses.replace(settings, webhook_secret=None),
                              channels=["webhook"], urlopen=fake, sleep=sleeps.append)
        assert made[0].status == "failed" and "unsigned" in made[0].error and made[0].attempt == 2
        assert fake.requests == [] and sleeps == []


def test_verify_signature_rejects_tampering():
    body = b'{"a": 1}'
    sig = sign(SECRET, "1000", body)
    assert verify_signature(SECRET, body, sig, "1000", now=1000)
    assert not verify_signature(SECRET, body + b" ", sig, "1000", now=1000)
    assert not verify_signature("other", body, sig, "1000", now=1000)
    assert not verify_signature(SECRET, body, sig, "1001", now=1000)          # the time is signed too
    assert not verify_signature(SECRET, body, sig, "1000", now=1000 + 3600)   # too old
    assert verify_signature(SECRET, body, sig, "1000", max_age_s=None, now=10**10)
    assert not verify_signature(SECRET, body, None, "1000")
    assert not verify_signature(SECRET, body, sig, "soon")


def test_email_uses_starttls_and_login_when_configured(farm_db, settings):
    cfg = with_smtp(settings, 2525, starttls=True, user="frost", password=PASSWORD)
    with farm_db.transaction() as s:
        row, block = store_notice(s)
        made = deliver_notice(s, row, recipients_of(block), cfg, channels=["email"], smtp_factory=FakeSMTP)
    assert [d.status for d in made] == ["sent"]
    sess = FakeSMTP.sessions[0]
    assert (sess.host, sess.port) == ("127.0.0.1", 2525)
    assert sess.calls[:4] == ["ehlo", "starttls", "ehlo", ("login", "frost", PASSWORD)]
    msg, sender, to = sess.sent[0]
    assert sender == "frost@quillback.example" and to == ["odalys@quillback.example"]


def test_smtp_password_never_logged_or_stored(farm_db, settings, caplog):
    import smtplib

    cfg = with_smtp(settings, 2525, user="frost", password=PASSWORD)
    FakeSMTP.fail_with = smtplib.SMTPAuthenticationError(535, f"bad credentials {PASSWORD}".encode())
    caplog.set_level(logging.DEBUG)
    with farm_db.transaction() as s:
        row, block = store_notice(s)
        made = deliver_notice(s, row, recipients_of(block), cfg, channels=["email"], smtp_factory=FakeSMTP,
                              sleep=lambda _: None)
        assert [d.status for d in made] == ["failed"]           # a refused login is not retried
        errors = " ".join(d.error for d in s.scalars(select(Delivery)))
    assert PASSWORD not in errors and PASSWORD not in caplog.text
    assert "535" in errors

    FakeSMTP.fail_with = OSError(f"network trouble while sending {PASSWORD}")
    with farm_db.transaction() as s:
        row, block = store_notice(s, revision=1)
        made = deliver_notice(s, row, recipients_of(block), cfg, channels=["email"], smtp_factory=FakeSMTP,
                              sleep=lambda _: None)
        assert len(made) == 3 and all(PASSWORD not in d.error for d in made)
    assert PASSWORD not in caplog.text


def test_email_structure(farm_db, settings):
    with farm_db.transaction() as s:
        row, block = store_notice(s)
        r = channels._Rendered(row)
        odalys = next(x for x in block.recipients if x.name == "Odalys Brenneman")
        msg = build_email(r, with_smtp(settings, 25), odalys, "odalys@quillback.example")
    parsed = email.message_from_bytes(msg.as_bytes(), policy=email.policy.default)
    assert parsed.get_content_type() == "multipart/alternative"
    text, related = parsed.get_payload()
    assert text.get_content_type() == "text/plain"
    assert related.get_content_type() == "multipart/related"
    html, image = related.get_payload()
    assert html.get_content_type() == "text/html" and image.get_content_type() == "image/png"
    cid = image["Content-ID"].strip("<>")
    assert f"cid:{cid}" in html.get_content()
    assert parsed["Subject"] == row.subject
    assert parsed["To"].addresses[0].display_name == "Odalys Brenneman"
    assert parsed["X-Advisory-Notice"] == row.key


def test_names_cannot_inject_mail_headers(farm_db, settings):
    with farm_db.transaction() as s:
        row, block = store_notice(s, samples.frost_assessment(block="Evil\r\nBcc: victim@example.com",
                                                              farm="Quillback Ridge Orchards"))
        msg = build_email(channels._Rendered(row), with_smtp(settings, 25), block.recipients[0],
                          "odalys@quillback.example")
    parsed = email.message_from_bytes(msg.as_bytes(), policy=email.policy.default)
    assert parsed["Bcc"] is None
    assert parsed["Subject"].startswith("[Protect] Evil Bcc: victim@example.com: low")
    assert b"\nBcc:" not in msg.as_bytes()


def test_bad_address_is_a_permanent_failure(farm_db, settings):
    with farm_db.transaction() as s:
        row, block = store_notice(s)
        odalys = next(x for x in block.recipients if x.name == "Odalys Brenneman")
        odalys.channels = {"email": "not an address <<>>"}
        made = deliver_notice(s, row, [odalys], with_smtp(settings, 25), channels=["email"],
                              smtp_factory=FakeSMTP, sleep=lambda _: None)
    assert [d.status for d in made] == ["failed"] and "not a usable e-mail address" in made[0].error


def test_farm_summary_delivers_to_outbox(farm_db, settings):
    from advisory.notices.farm_summary import compose_farm
    from advisory.store.schema import Farm, Notice

    with farm_db.transaction() as s:
        farm = s.scalar(select(Farm))
        summ = compose_farm([samples.frost_assessment(farm=farm.name), samples.quiet_assessment(farm=farm.name)])
        row = Notice(key=summ.key, farm_id=farm.id, block_id=None, kind="frost", night=samples.NIGHT,
                     revision=0, level=summ.level, subject=summ.subject, content=summ.to_dict())
        s.add(row)
        s.flush()
        made = deliver_notice(s, row, [], settings)
    assert [(d.channel, d.status) for d in made] == [("outbox", "sent")]
    base = outbox_base(settings.outbox, summ)
    assert "farm-summary" in base.name
    assert Path(str(base) + ".txt").read_text().startswith("QUILLBACK RIDGE ORCHARDS")
    assert Path(str(base) + ".runsheet.csv").read_text().startswith("order,block,")
    assert not Path(str(base) + ".png").exists()


def test_save_notice_is_get_or_create(farm_db):
    from advisory.notices.compose import compose_block
    from advisory.notices.deliver import save_notice
    from advisory.store.schema import Block, Notice

    with farm_db.transaction() as s:
        block = s.scalar(select(Block).where(Block.name == "Creek Bing"))
        n = compose_block(samples.frost_assessment(block_id=block.id, block=block.name))
        row, created = save_notice(s, n, farm_id=block.farm_id, block_id=block.id)
        assert created and row.id and row.content["key"] == n.key and row.level == "serious"
        again, created = save_notice(s, n, farm_id=block.farm_id, block_id=block.id)
        assert not created and again.id == row.id
        assert s.scalar(select(func.count()).select_from(Notice)) == 1
