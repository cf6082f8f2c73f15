"""Real e-mail: deliver to an aiosmtpd server on 127.0.0.1 and read the message back."""

from __future__ import annotations

import email
import email.policy
import shutil
import ssl
import subprocess

import pytest
from aiosmtpd.controller import Controller
from aiosmtpd.smtp import AuthResult, LoginPassword

from advisory.notices.deliver import deliver_notice
from tests.notices.conftest import PASSWORD, free_port, store_notice, with_smtp


class Collector:
    def __init__(self):
        self.envelopes = []

    async def handle_DATA(self, server, session, envelope):
        self.envelopes.append(envelope)
        return "250 OK"


class Logins:
    def __init__(self):
        self.seen = []

    def __call__(self, server, session, envelope, mechanism, auth_data):
        ok = isinstance(auth_data, LoginPassword) and auth_data.password == PASSWORD.encode()
        self.seen.append((mechanism, bool(session.ssl), ok))
        return AuthResult(success=ok)


@pytest.fixture
def smtp_server():
    handler = Collector()
    controller = Controller(handler, hostname="127.0.0.1", port=free_port(), ready_timeout=10)
    controller.start()
    try:
        yield controller, handler
    finally:
        controller.stop()


def test_real_smtp_message(farm_db, settings, smtp_server):
    controller, handler = smtp_server
    cfg = with_smtp(settings, controller.port, starttls=False)
    with farm_db.transaction() as s:
        row, block = store_notice(s)
        made = deliver_notice(s, row, list(block.recipients), cfg, channels=["email"], sleep=lambda _: None,
                              timeout_s=10)
        subject, key = row.subject, row.key
    assert [d.status for d in made] == ["sent"]
    assert len(handler.envelopes) == 1
    env = handler.envelopes[0]
    assert env.mail_from == "frost@quillback.example"
    assert env.rcpt_tos == ["odalys@quillback.example"]
    msg = email.message_from_bytes(env.content, policy=email.policy.default)
    assert msg["Subject"] == subject
    assert msg["X-Advisory-Notice"] == key
    text = msg.get_body(preferencelist=("plain",)).get_content()
    html = msg.get_body(preferencelist=("html",)).get_content()
    assert text.startswith("PROTECT - Creek Bing")
    assert "Start over-tree sprinklers at 01:50 PDT" in text
    assert "<!DOCTYPE html>" in html and "Creek Bing" in html
    images = [p for p in msg.walk() if p.get_content_type() == "image/png"]
    assert len(images) == 1
    png = images[0].get_content()
    assert png.startswith(b"\x89PNG")
    cid = images[0]["Content-ID"].strip("<>")
    assert f'src="cid:{cid}"' in html


@pytest.mark.skipif(shutil.which("openssl") is None, reason="openssl is needed to make a test certificate")
def test_real_smtp_starttls_and_login(farm_db, settings, tmp_path):
    cert, key = tmp_path / "cert.pem", tmp_path / "key.pem"
    subprocess.run(["openssl", "req", "-x509", "-newkey", "rsa:2048", "-nodes", "-keyout", str(key), "-out",
                    str(cert), "-days", "1", "-subj", "/CN=127.0.0.1", "-addext", "subjectAltName=IP:127.0.0.1"],
                   check=True, capture_output=True, timeout=60)
    server_ctx = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
    server_ctx.load_cert_chain(cert, key)
    handler, logins = Collector(), Logins()
    controller = Controller(handler, hostname="127.0.0.1", port=free_port(), ready_timeout=10,
                            tls_context=server_ctx, require_starttls=True, authenticator=logins,
                            auth_require_tls=True)
    controller.start()
    try:
        cfg = with_smtp(settings, controller.port, starttls=True, user="frost", password=PASSWORD)
        client_ctx = ssl.create_default_context(cafile=str(cert))
        with farm_db.transaction() as s:
            row, block = store_notice(s)
            made = deliver_notice(s, row, list(block.recipients), cfg, channels=["email"], ssl_context=client_ctx,
                                  sleep=lambda _: None, timeout_s=10)
        assert [d.status for d in made] == ["sent"]
        assert len(handler.envelopes) == 1
        assert logins.seen and all(tls and ok for _, tls, ok in logins.seen)   # logged in over TLS only
        # without trusting the test certificate the client refuses the server: nothing sent, no retries
        with farm_db.transaction() as s:
            row, block = store_notice(s, revision=1)
            made = deliver_notice(s, row, list(block.recipients), cfg, channels=["email"], sleep=lambda _: None,
                                  timeout_s=10)
        assert [(d.status, d.attempt) for d in made] == [("failed", 1)]    # a trust problem is not retried
        assert "certificate not trusted" in made[0].error
        assert len(handler.envelopes) == 1
    finally:
        controller.stop()
