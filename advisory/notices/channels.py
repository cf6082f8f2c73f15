"""The channels of a delivery: outbox folder, SMTP e-mail, signed webhook, text messages (queued).

Channels
--------
``outbox``
    Always, once per notice (not per recipient): one file per format in
    ``<outbox>/<night>/``: ``.txt``, ``.md``, ``.html``, ``.json`` and, when a
    chart is drawn, ``.png`` (the HTML file shows it); a farm summary adds the
    crew run sheet as ``.runsheet.csv``.  File names are built
    from ASCII slugs of the farm and block names plus a hash of the notice key,
    so any block name is safe and two notices never share a file.
``email``
    SMTP with STARTTLS when configured (``settings.smtp.starttls``), login when
    a user is set.  One message per recipient: ``multipart/alternative`` with
    the plain text and a ``multipart/related`` HTML part that carries the chart
    PNG by Content-ID.  The password comes from :mod:`advisory.settings` only;
    it is never stored, logged or written into an error message.
``webhook``
    HTTP POST of the notice JSON.  Header ``X-Advisory-Timestamp`` holds the
    Unix time of sending; ``X-Advisory-Signature`` holds
    ``hmac-sha256=<hex>``, the HMAC-SHA256 with the shared secret
    (``ADVISORY_WEBHOOK_SECRET``) over ``<timestamp>.`` followed by the raw
    body bytes, so neither the body nor the time can be changed or replayed
    later.  Receivers check it with
    :func:`~advisory.notices.signing.verify_signature`.  Without a secret
    nothing is sent (an unsigned notice could be forged).
``sms``
    No text-message gateway is built in: the message (at most 160 GSM
    characters) is written to the outbox as ``<name>.<recipient>.sms.txt``
    with a ``To:`` line, for a gateway or a person to pick up, and logged with
    status ``queued``.

Each notice is rendered once for all its channels (:class:`_Rendered`).  A failure that
retrying will not fix raises :class:`PermanentError`; one that may pass raises another error
(``ConnectionError``).  Error texts never carry the SMTP password or the webhook secret
(:func:`_scrub`).
"""

from __future__ import annotations

import contextlib
import dataclasses
import hashlib
import json
import logging
import os
import smtplib
import ssl
import time
import urllib.error
import urllib.request
from collections.abc import Callable, Sequence
from email.headerregistry import Address
from email.message import EmailMessage
from email.utils import formatdate, make_msgid
from typing import Any

from advisory import __version__
from advisory.notices import words as w
from advisory.notices.notice_data import BlockNotice, FarmSummary
from advisory.notices.outbox_files import (
    STAGED_EXTENSIONS,
    _base,
    _folder,
    _publish,
    _summary_parts,
    _write,
    outbox_base,
)
from advisory.notices.render import EXTENSIONS, as_notice, render
from advisory.notices.signing import DELIVERY_HEADER, NOTICE_HEADER, SIGNATURE_HEADER, TIMESTAMP_HEADER, sign
from advisory.store.schema import Notice, Recipient

#: The delivery's one logger, whichever of its modules writes (the demo quiets it by this name).
log = logging.getLogger("advisory.notices.deliver")


class PermanentError(Exception):
    """A failure that retrying will not fix (bad configuration, a rejected address)."""


# --------------------------------------------------------------------------------------------------
# Rendering once per notice
# --------------------------------------------------------------------------------------------------

class _Rendered:
    """Renderings of one notice, made on first use."""

    def __init__(self, notice_row: Notice):
        self.row = notice_row
        self.n: BlockNotice | FarmSummary = as_notice(notice_row.full_content)
        self._cache: dict[str, Any] = {}
        self._cid: str | None = None

    @property
    def cid(self) -> str:
        """Content-ID of the chart in an e-mail (made on first use)."""
        if self._cid is None:
            self._cid = make_msgid(idstring="chart", domain="advisory.local")[1:-1]
        return self._cid

    def get(self, fmt: str, chart_src: str | None = None) -> str:
        k = (fmt, chart_src)
        if k not in self._cache:
            self._cache[k] = render(self.n, fmt, chart_src=chart_src)
        return self._cache[k]

    def png(self) -> bytes | None:
        if "png" not in self._cache:
            png = None
            if isinstance(self.n, BlockNotice) and self.n.chart is not None and self.n.data.get("curve"):
                try:
                    png = _chart_for(self.n)
                except Exception as exc:  # a chart must never stop a notice
                    log.warning("chart for notice %s failed: %s", self.row.key, exc)
            self._cache["png"] = png
        return self._cache["png"]


_CHARTS: dict[str, bytes | None] = {}


def _chart_for(n: BlockNotice) -> bytes | None:
    """The notice's chart, drawn once per process for the same picture (resends, several channels)."""
    from advisory.notices.charts import chart_png

    spec = json.dumps([n.block, n.units, n.farm_tz, n.kind, dataclasses.asdict(n.chart), n.data.get("curve")],
                      sort_keys=True, default=str)
    key = hashlib.sha256(spec.encode("utf-8")).hexdigest()
    if key not in _CHARTS:
        if len(_CHARTS) >= 64:
            _CHARTS.pop(next(iter(_CHARTS)))
        _CHARTS[key] = chart_png(n)
    return _CHARTS[key]


# --------------------------------------------------------------------------------------------------
# Channels
# --------------------------------------------------------------------------------------------------

def _scrub(text: str, settings) -> str:
    """Error text for the log and the database: never the SMTP password or the webhook secret.

    Neither is ever put into a message on purpose; this catches a library
    quoting one back.  (Secrets shorter than 6 characters are not searched for,
    as they would match ordinary words; such secrets are too weak anyway.)
    """
    for secret in (getattr(getattr(settings, "smtp", None), "password", None),
                   getattr(settings, "webhook_secret", None)):
        if secret and len(secret) >= 6:
            text = text.replace(secret, "***")
    return text[:2000]



def _send_outbox(r: _Rendered, settings, formats: Sequence[str], chart: bool, staged: str | None = None) -> str:
    base = _base(str(settings.outbox), r.n, r.row.key)
    head, name = os.path.split(base)
    _folder(head)
    png = r.png() if chart else None
    if png:
        _write(base + ".png", png)
    if isinstance(r.n, FarmSummary):
        parts = _summary_parts(r.n, formats, r.get)
    else:
        chart_src = name + ".png" if png else None  # (only the HTML shows the chart)
        parts = [(f".{EXTENSIONS[fmt]}", lambda fmt=fmt: r.get(fmt, chart_src if fmt == "html" else None))
                 for fmt in formats]
    for end, text in parts:
        path = base + end
        # a file written ahead by this run (see stage_outbox) is only moved to its name
        ahead = staged and (isinstance(r.n, FarmSummary) or end[1:] in STAGED_EXTENSIONS)
        if not (ahead and _publish(path, staged)):
            _write(path, text().encode("utf-8"))
    return head


def _send_sms(r: _Rendered, settings, recipient: Recipient, number: str) -> str:
    base = outbox_base(settings.outbox, r.n, r.row.key)
    who = f"{w.slug(recipient.name, 24, 'recipient')}-{recipient.id}"
    path = base.with_name(f"{base.name}.{who}.sms.txt")
    path.parent.mkdir(parents=True, exist_ok=True)
    _write(path, f"To: {number}\n\n{r.get('sms')}\n".encode())
    log.info("text message for %s queued in the outbox (no gateway configured): %s", recipient.name, path)
    return str(path)


def build_email(r: _Rendered | Notice, settings, recipient: Recipient, address: str) -> EmailMessage:
    """The e-mail of a stored notice for one recipient: text + HTML alternatives, chart inline by Content-ID."""
    if isinstance(r, Notice):
        r = _Rendered(r)
    n = r.n
    msg = EmailMessage()
    msg["Subject"] = " ".join(n.subject.split())
    msg["From"] = settings.smtp.sender
    try:
        msg["To"] = Address(display_name=" ".join(recipient.name.split()), addr_spec=address.strip())
    except Exception as exc:
        raise PermanentError(f"not a usable e-mail address: {address!r} ({exc})") from None
    msg["Date"] = formatdate(usegmt=True)
    domain = settings.smtp.sender.rpartition("@")[2] or "advisory.local"
    msg["Message-ID"] = make_msgid(idstring=f"n{r.row.id}", domain=domain.strip("> ") or "advisory.local")
    msg[NOTICE_HEADER] = n.key
    msg.set_content(r.get("text"))
    png = r.png() if isinstance(n, BlockNotice) else None
    msg.add_alternative(r.get("html", f"cid:{r.cid}" if png else None), subtype="html")
    if png:
        msg.get_payload()[1].add_related(png, maintype="image", subtype="png", cid=f"<{r.cid}>",
                                         filename="chart.png", disposition="inline")
    return msg


def _send_email(r: _Rendered, settings, recipient: Recipient, address: str, *, smtp_factory, ssl_context,
                timeout_s: float) -> str:
    if not settings.smtp.host:
        raise PermanentError("no SMTP host set (ADVISORY_SMTP_HOST or [smtp] host in the settings file)")
    return smtp_send(settings, build_email(r, settings, recipient, address), address, smtp_factory=smtp_factory,
                     ssl_context=ssl_context, timeout_s=timeout_s)


#: What to set for each way of securing the mail connection (for error messages).
_TLS_HINT = ("ADVISORY_SMTP_TLS (or [smtp] tls): starttls, implicit (port 465) or none (a plain local relay, "
             "port 25)")


def smtp_send(settings, msg: EmailMessage, address: str, *, smtp_factory=smtplib.SMTP,
              ssl_context: ssl.SSLContext | None = None, timeout_s: float = 20.0) -> str:
    """Send one message to ``address`` through the configured SMTP server.

    The connection is secured as ``settings.smtp.tls_mode`` says: ``starttls`` (plain
    connection upgraded with STARTTLS), ``implicit`` (TLS from the start, usually port 465)
    or ``none`` (a local relay).  Errors that a setting fixes name the setting.
    """
    cfg = settings.smtp
    mode = getattr(cfg, "tls_mode", "starttls" if getattr(cfg, "starttls", True) else "none")
    if not cfg.host:
        raise PermanentError("no SMTP host set (ADVISORY_SMTP_HOST or [smtp] host in the settings file)")
    context = ssl_context or ssl.create_default_context()
    try:
        if mode == "implicit":
            factory = smtp_factory if smtp_factory is not smtplib.SMTP else smtplib.SMTP_SSL
            smtp = (factory(cfg.host, int(cfg.port), timeout=timeout_s, context=context)
                    if factory is smtplib.SMTP_SSL else factory(cfg.host, int(cfg.port), timeout=timeout_s))
        else:
            smtp = smtp_factory(cfg.host, int(cfg.port), timeout=timeout_s)
    except ssl.SSLCertVerificationError as exc:
        raise PermanentError(f"SMTP server {cfg.host} certificate not trusted: {exc.verify_message}") from None
    except ssl.SSLError as exc:
        raise PermanentError(f"SMTP server {cfg.host}:{cfg.port} did not answer in TLS ({exc.reason}); "
                             f"check {_TLS_HINT}") from None
    except (OSError, smtplib.SMTPException) as exc:
        raise ConnectionError(f"cannot reach SMTP server {cfg.host}:{cfg.port}: {type(exc).__name__}: {exc} "
                              "(ADVISORY_SMTP_HOST, ADVISORY_SMTP_PORT)") from None
    try:
        smtp.ehlo()
        if mode == "starttls":
            if hasattr(smtp, "has_extn") and not smtp.has_extn("starttls"):
                raise PermanentError(f"SMTP server {cfg.host}:{cfg.port} does not offer STARTTLS: for a plain "
                                     "local relay set ADVISORY_SMTP_TLS=none (or [smtp] tls = \"none\"), for "
                                     "a server on port 465 ADVISORY_SMTP_TLS=implicit")
            try:
                smtp.starttls(context=context)
            except ssl.SSLCertVerificationError as exc:
                raise PermanentError(f"SMTP server {cfg.host} certificate not trusted: {exc.verify_message}") \
                    from None
            smtp.ehlo()
        if cfg.user:
            smtp.login(cfg.user, cfg.password or "")
        smtp.send_message(msg, from_addr=cfg.sender, to_addrs=[address.strip()])
    except smtplib.SMTPNotSupportedError as exc:
        raise PermanentError(f"SMTP server {cfg.host} does not support {exc}; check {_TLS_HINT}") from None
    except smtplib.SMTPAuthenticationError as exc:
        raise PermanentError(f"SMTP login refused for user {cfg.user!r}: {exc.smtp_code} "
                             "(ADVISORY_SMTP_USER, ADVISORY_SMTP_PASSWORD)") from None
    except smtplib.SMTPRecipientsRefused as exc:
        codes = {a: c for a, (c, _m) in exc.recipients.items()}
        if all(400 <= c < 500 for c in codes.values()):
            raise ConnectionError(f"recipient deferred by the server: {codes}") from None
        raise PermanentError(f"recipient refused by the server: {codes}") from None
    except smtplib.SMTPResponseException as exc:
        text = f"SMTP {exc.smtp_code}: {exc.smtp_error!r}"
        if exc.smtp_code in (530, 538) or b"tls" in (exc.smtp_error or b"").lower():
            text += f"; check {_TLS_HINT}"
        if 400 <= exc.smtp_code < 500:
            raise ConnectionError(text) from None
        raise PermanentError(text) from None
    finally:
        try:
            smtp.quit()
        except Exception:
            with contextlib.suppress(Exception):
                smtp.close()
    return address


def _send_webhook(r: _Rendered, settings, recipient: Recipient, url: str, *, urlopen, clock,
                  timeout_s: float, delivery_id: str) -> str:
    return post_signed(settings, url, r.get("json").encode("utf-8"), r.n.key, delivery_id, urlopen=urlopen,
                       clock=clock, timeout_s=timeout_s)


def post_signed(settings, url: str, body: bytes, notice_key: str, delivery_id: str, *,
                urlopen=urllib.request.urlopen, clock: Callable[[], float] = time.time,
                timeout_s: float = 20.0) -> str:
    """POST a JSON body to a webhook, signed (see the module's notes); the URL, or an error."""
    if not url.lower().startswith(("http://", "https://")):
        raise PermanentError(f"webhook address must start with http:// or https://: {url!r}")
    secret = settings.webhook_secret
    if not secret:
        raise PermanentError("no webhook secret set (ADVISORY_WEBHOOK_SECRET or [webhook] secret in the "
                             "settings file); refusing to send an unsigned notice")
    ts = str(int(clock()))
    req = urllib.request.Request(url, data=body, method="POST", headers={
        "Content-Type": "application/json; charset=utf-8",
        "User-Agent": f"advisory/{__version__}",
        TIMESTAMP_HEADER: ts,
        SIGNATURE_HEADER: sign(secret, ts, body),
        NOTICE_HEADER: notice_key,
        DELIVERY_HEADER: delivery_id,
    })
    try:
        with urlopen(req, timeout=timeout_s) as resp:
            status = getattr(resp, "status", 200)
            resp.read(1024)
    except urllib.error.HTTPError as exc:
        if exc.code in (408, 429) or exc.code >= 500:
            raise ConnectionError(f"HTTP {exc.code} from {url}") from None
        raise PermanentError(f"HTTP {exc.code} from {url}") from None
    except (TimeoutError, urllib.error.URLError, OSError) as exc:
        reason = getattr(exc, "reason", exc)
        raise ConnectionError(f"cannot reach {url}: {reason}") from None
    if not 200 <= status < 300:
        raise ConnectionError(f"HTTP {status} from {url}")
    return url
