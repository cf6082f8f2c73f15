"""Real webhook: an HTTP server on 127.0.0.1 receives the JSON and checks the HMAC signature."""

from __future__ import annotations

import dataclasses
import json
import threading
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer

import pytest
from sqlalchemy import select

from advisory.notices.deliver import deliver_notice
from advisory.notices.signing import SIGNATURE_HEADER, TIMESTAMP_HEADER, verify_signature
from advisory.store.schema import Recipient
from tests.notices.conftest import SECRET, store_notice


class Receiver(BaseHTTPRequestHandler):
    """Accepts a delivery only with a valid signature (as a farm's receiving system would)."""

    received: list = []

    def do_POST(self):
        n = int(self.headers.get("Content-Length", "0"))
        body = self.rfile.read(min(n, 10_000_000))
        ok = verify_signature(SECRET, body, self.headers.get(SIGNATURE_HEADER), self.headers.get(TIMESTAMP_HEADER))
        type(self).received.append({"path": self.path, "ok": ok, "body": body,
                                    "content_type": self.headers.get("Content-Type")})
        self.send_response(204 if ok else 401)
        self.end_headers()

    def log_message(self, *args):
        pass


@pytest.fixture
def receiver():
    Receiver.received = []
    server = ThreadingHTTPServer(("127.0.0.1", 0), Receiver)
    server.timeout = 5
    t = threading.Thread(target=server.serve_forever, kwargs={"poll_interval": 0.05}, daemon=True)
    t.start()
    try:
        yield f"http://127.0.0.1:{server.server_address[1]}/advisory"
    finally:
        server.shutdown()
        server.server_close()
        t.join(timeout=5)


def _point_wren_at(s, url):
    wren = s.scalar(select(Recipient).where(Recipient.name == "Wren Okonkwo-Hale"))
    wren.channels = {**wren.channels, "webhook": url}
    return wren


def test_webhook_received_and_verified(farm_db, settings, receiver):
    with farm_db.transaction() as s:
        wren = _point_wren_at(s, receiver)
        row, _ = store_notice(s, block_name="Bench Gala")
        made = deliver_notice(s, row, [wren], settings, channels=["webhook"], sleep=lambda _: None, timeout_s=10)
        key = row.key
    assert [d.status for d in made] == ["sent"]
    assert len(Receiver.received) == 1
    got = Receiver.received[0]
    assert got["ok"] and got["path"] == "/advisory"
    assert got["content_type"].startswith("application/json")
    doc = json.loads(got["body"])
    assert doc["key"] == key and doc["type"] == "block"
    assert doc["data"]["p50_c"] == -2.8


def test_wrong_secret_is_refused_by_the_receiver(farm_db, settings, receiver):
    bad = dataclasses.replace(settings, webhook_secret="not-the-shared-secret")
    with farm_db.transaction() as s:
        wren = _point_wren_at(s, receiver)
        row, _ = store_notice(s, block_name="Bench Gala")
        made = deliver_notice(s, row, [wren], bad, channels=["webhook"], sleep=lambda _: None, timeout_s=10)
    assert [(d.status, d.attempt) for d in made] == [("failed", 1)]   # 401: not retried
    assert "HTTP 401" in made[0].error
    assert [r["ok"] for r in Receiver.received] == [False]
