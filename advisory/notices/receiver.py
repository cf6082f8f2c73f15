"""A minimal webhook receiver that checks the HMAC signature of each delivery.

For the demo and for anyone wiring another system to advisory: it listens on a
local address, verifies every POST with
:func:`advisory.notices.signing.verify_signature` and keeps what it received.
Not a production server.
"""

from __future__ import annotations

import json
import threading
from dataclasses import dataclass, field
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer

from advisory.notices.signing import SIGNATURE_HEADER, TIMESTAMP_HEADER, verify_signature


@dataclass
class Received:
    verified: list[dict] = field(default_factory=list)
    rejected: int = 0


class WebhookReceiver:
    """Run ``with WebhookReceiver(secret, port=8765) as r: ...``; ``r.received`` holds the results."""

    def __init__(self, secret: str, host: str = "127.0.0.1", port: int = 0):
        self.secret = secret
        self.received = Received()
        outer = self

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self):  # noqa: N802 (http.server's name)
                length = int(self.headers.get("Content-Length") or 0)
                body = self.rfile.read(min(length, 10_000_000))
                ok = verify_signature(outer.secret, body, self.headers.get(SIGNATURE_HEADER),
                                      self.headers.get(TIMESTAMP_HEADER))
                if ok:
                    try:
                        outer.received.verified.append(json.loads(body))
                    except ValueError:
                        ok = False
                if not ok:
                    outer.received.rejected += 1
                self.send_response(200 if ok else 401)
                self.end_headers()

            def log_message(self, *args):  # quiet
                pass

        self.server = ThreadingHTTPServer((host, port), Handler)
        self.url = f"http://{host}:{self.server.server_address[1]}"
        self._thread = threading.Thread(target=self.server.serve_forever, daemon=True)

    def __enter__(self) -> WebhookReceiver:
        self._thread.start()
        return self

    def __exit__(self, *exc) -> None:
        self.server.shutdown()
        self.server.server_close()


class SmtpReceiver:
    """A local SMTP server (aiosmtpd) that keeps every message it gets: for the demo and for tests.

    Run ``with SmtpReceiver() as r: ...``; ``r.port`` is where it listens, ``r.messages`` holds
    ``(mail_from, rcpt_tos, raw bytes)`` of each message.  Plain SMTP (``ADVISORY_SMTP_TLS=none``);
    ``refuse=True`` answers every message with a temporary failure (451), to show a refusing server.
    Not a production server.
    """

    def __init__(self, host: str = "127.0.0.1", port: int = 0, *, refuse: bool = False):
        from aiosmtpd.controller import Controller

        self.host = host
        self.refuse = refuse
        self.messages: list[tuple[str, list[str], bytes]] = []
        outer = self

        class Handler:
            async def handle_DATA(self, server, session, envelope):  # noqa: N802 (aiosmtpd's name)
                if outer.refuse:
                    return "451 Requested action aborted: try again later"
                outer.messages.append((envelope.mail_from, list(envelope.rcpt_tos), envelope.content))
                return "250 OK"

        if not port:
            import socket

            with socket.socket() as sock:
                sock.bind((host, 0))
                port = sock.getsockname()[1]
        self.port = port
        self._controller = Controller(Handler(), hostname=host, port=port, ready_timeout=10)

    def __enter__(self) -> SmtpReceiver:
        self._controller.start()
        return self

    def __exit__(self, *exc) -> None:
        self._controller.stop()
