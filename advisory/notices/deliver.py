"""Deliver notices: outbox folder, SMTP e-mail, signed webhook, text messages (queued).

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
    later.  Receivers check it with :func:`verify_signature`.  Without a secret
    nothing is sent (an unsigned notice could be forged).
``sms``
    No text-message gateway is built in: the message (at most 160 GSM
    characters) is written to the outbox as ``<name>.<recipient>.sms.txt``
    with a ``To:`` line, for a gateway or a person to pick up, and logged with
    status ``queued``.

Rules
-----
* Every attempt is a :class:`~advisory.store.schema.Delivery` row (attempt
  number, status ``sent``/``queued``/``failed``, error text).
* A notice already delivered (``sent`` or ``queued``) to a recipient on a
  channel is not delivered again, so re-running a night is safe; ``force=True``
  (``advisory notices resend``) bypasses that rule on purpose.
* A failing channel never stops the others.  Failures that may pass
  (connection refused, time-outs, SMTP 4xx, HTTP 5xx/408/429) are retried in
  rounds with growing pauses (:class:`RetryPolicy`); the pause is shared by all
  pending deliveries, so one dead mail server delays a batch once, not once per
  notice.  Failures that will not pass (no SMTP host or webhook secret, a
  rejected address, HTTP 4xx) are logged once and not retried.
* The rows are added to the caller's session and flushed; the caller commits.
  Commit the notice row *before* delivering, and the deliveries right after, so
  that a crash between sending and committing is as short as possible.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import hashlib
import hmac
import json
import logging
import os
import smtplib
import ssl
import threading
import time
import urllib.error
import urllib.request
from collections import defaultdict
from collections.abc import Callable, Collection, Iterable, Iterator, Sequence
from dataclasses import dataclass, field
from email.headerregistry import Address
from email.message import EmailMessage
from email.utils import formatdate, make_msgid
from pathlib import Path
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from advisory import __version__
from advisory.notices import words as w
from advisory.notices.notice_data import BlockNotice, FarmSummary
from advisory.notices.render import EXTENSIONS, as_notice, render
from advisory.store.schema import Delivery, Notice, Recipient

log = logging.getLogger(__name__)

CHANNELS = ("outbox", "email", "webhook", "sms")
#: Statuses that count as delivered.
DONE = ("sent", "queued")
#: Formats written to the outbox by default.
OUTBOX_FORMATS = ("text", "markdown", "html", "json")

SIGNATURE_HEADER = "X-Advisory-Signature"
TIMESTAMP_HEADER = "X-Advisory-Timestamp"
NOTICE_HEADER = "X-Advisory-Notice"
DELIVERY_HEADER = "X-Advisory-Delivery"
SIGNATURE_PREFIX = "hmac-sha256="


@dataclass(frozen=True)
class RetryPolicy:
    """How often and how patiently to retry.

    Attributes
    ----------
    attempts : int
        Attempts per delivery in one call (1 = no retry).
    first_delay_s : float
        Pause after the first round [s]; each later pause is ``factor`` times longer.
    factor : float
    max_delay_s : float
        Longest pause [s].
    """

    attempts: int = 3
    first_delay_s: float = 5.0
    factor: float = 4.0
    max_delay_s: float = 120.0

    def delay_s(self, round_index: int) -> float:
        return min(self.first_delay_s * self.factor ** round_index, self.max_delay_s)


def _sleep(seconds: float) -> None:
    """The pause between retry rounds unless the caller gives one."""
    time.sleep(seconds)


class PermanentError(Exception):
    """A failure that retrying will not fix (bad configuration, a rejected address)."""


# --------------------------------------------------------------------------------------------------
# Webhook signatures
# --------------------------------------------------------------------------------------------------

def sign(secret: str, timestamp: str | int, body: bytes) -> str:
    """The signature header value for a body sent at ``timestamp`` (Unix seconds)."""
    mac = hmac.new(secret.encode("utf-8"), f"{timestamp}.".encode("ascii") + body, hashlib.sha256)
    return SIGNATURE_PREFIX + mac.hexdigest()


def verify_signature(secret: str, body: bytes, signature: str | None, timestamp: str | None, *,
                     max_age_s: float | None = 300.0, now: float | None = None) -> bool:
    """Check a webhook delivery (for receivers and tests).

    Parameters
    ----------
    secret : str
        The shared secret.
    body : bytes
        The raw request body, exactly as received.
    signature, timestamp : str
        Values of the ``X-Advisory-Signature`` and ``X-Advisory-Timestamp`` headers.
    max_age_s : float or None
        Reject deliveries older (or further in the future) than this [s]; None to skip the check.
    now : float, optional
        Current Unix time (default: the clock).

    Returns
    -------
    bool
        True when the signature matches (compared in constant time) and the time is fresh.
    """
    if not signature or not timestamp or not secret:
        return False
    try:
        ts = int(timestamp)
    except ValueError:
        return False
    if max_age_s is not None:
        now = time.time() if now is None else now
        if abs(now - ts) > max_age_s:
            return False
    return hmac.compare_digest(sign(secret, timestamp, body), signature.strip())


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


def outbox_base(outbox: Path, n: BlockNotice | FarmSummary, key: str | None = None) -> Path:
    """Folder and file stem of a notice in the outbox (add ``.txt``, ``.html`` ...).

    ``key`` is the stored notice's key (``Notice.key``; default the composed
    notice's own key): its hash keeps every stored notice in its own files.
    """
    return Path(_base(str(outbox), n, key))


def _base(outbox: str, n: BlockNotice | FarmSummary, key: str | None = None) -> str:
    """:func:`outbox_base` as a string."""
    return _stem(outbox, key or n.key, n.farm, n.block if isinstance(n, BlockNotice) else None, n.kind,
                 n.revision, n.night)


def _stem(outbox: str, key: str, farm: str, block: str | None, kind: str, revision: int, night: str) -> str:
    """:func:`_base` from the notice's parts (``block`` None for a farm summary)."""
    h = hashlib.sha256(key.encode("utf-8")).hexdigest()[:8]
    who = "farm-summary" if block is None else w.slug(block, 40, "block")
    stem = f"{w.slug(farm, 24, 'farm')}_{who}_{w.slug(kind, 8)}_r{revision}_{h}"
    return os.path.join(_night_folder(outbox, night), stem)


def _night_folder(outbox: str, night: str) -> str:
    """The outbox folder of a night's notices (the address of an outbox delivery)."""
    return os.path.join(outbox, w.slug(night, 10, "undated"))


def _put(path: str | Path, data: bytes) -> None:
    with open(path, "wb") as fh:
        fh.write(data)


def _write(path: str | Path, data: bytes) -> None:
    """Write a file whole or not at all (a temporary name, then an atomic rename); the folder must exist."""
    head, name = os.path.split(str(path))
    tmp = os.path.join(head, f".{name}.{os.getpid()}-{threading.get_ident()}.tmp")
    try:
        try:
            _put(tmp, data)
        except FileNotFoundError:  # the folder was removed since this process made it
            _FOLDERS.discard(head)
            _folder(head)
            _put(tmp, data)
        os.replace(tmp, path)
    except BaseException:
        with _suppress():
            os.unlink(tmp)
        raise


# --------------------------------------------------------------------------------------------------
# Outbox files written ahead of delivery ("staged")
# --------------------------------------------------------------------------------------------------

#: Ending of a staged outbox file's hidden name.
STAGED_SUFFIX = ".staged"
#: A staged file older than this [s] was left by a run that stopped; the next staging removes it.
STALE_STAGED_S = 3600.0


def staged_path(path: str, token: str) -> str:
    """The hidden name under which ``path`` is staged by the run with ``token``."""
    head, name = os.path.split(path)
    return os.path.join(head, f".{name}.{token}{STAGED_SUFFIX}")


#: Outbox formats of a block notice written ahead: those at hand without rendering (the JSON
#: joined from bytes, the short text); the others take templates (and the HTML the chart, which
#: depends on how each notice goes out), rendered by the delivery's writers in parallel.
STAGED_FORMATS = ("json", "sms")
STAGED_EXTENSIONS = frozenset(EXTENSIONS[f] for f in STAGED_FORMATS)


def stageable(formats: Sequence[str]) -> tuple[str, ...]:
    """The outbox formats of a block notice that are written ahead (see :data:`STAGED_FORMATS`)."""
    return tuple(f for f in formats if f in STAGED_FORMATS)


#: A block notice as handed to the writer of files written ahead (:func:`stage_item`): plain values,
#: quick to send to another process.
StageItem = tuple  # (key, farm, block, kind, revision, night, short text, JSON file or where it is)


def stage_item(key: str, n: BlockNotice, json_file: Any) -> StageItem:
    """What :func:`staged_block_files` needs of a block notice: its stored key (``Notice.key``),
    the parts of its file names, its short text, and its JSON file (the bytes, or where they are
    in memory shared with the writer: see :func:`stage_outbox`)."""
    return (key, n.farm, n.block, n.kind, n.revision, n.night, n.sms, json_file)


def staged_block_files(outbox: str | Path, items: Iterable[StageItem], formats: Sequence[str], token: str
                       ) -> Iterator[tuple[str, Any, str]]:
    """The hidden names and contents of block notices' outbox files written ahead, and whose they are
    (the notice's key).

    A large run has another process write these while it stores the notices: the files
    may not be published before the notices are stored (a stop in between would leave files
    for notices that were never stored, and the next run would store and send them again), so
    they wait under hidden names (:func:`staged_path`) until the writer moves them to their own
    names after the commit (:func:`publish_staged`); the delivery moves or writes whatever is
    left (:func:`_send_outbox` with ``staged``).

    Parameters
    ----------
    outbox : path
    items : iterable of StageItem
        Each block notice (:func:`stage_item`).
    formats : sequence of str
        The outbox formats (only those of :func:`stageable` are written ahead).
    token : str
        The run's own mark in the hidden names, so that a run only ever publishes its own files.
    """
    outbox = str(outbox)
    formats = stageable(formats)
    for key, farm, block, kind, revision, night, sms, json_data in items:
        base = _stem(outbox, key, farm, block, kind, revision, night)
        for fmt in formats:
            data = json_data if fmt == "json" else sms.encode("utf-8")
            yield staged_path(f"{base}.{EXTENSIONS[fmt]}", token), data, key


def _summary_parts(n: FarmSummary, formats: Sequence[str], render_fmt: Callable[[str], str]
                   ) -> list[tuple[str, Callable[[], str]]]:
    """A farm summary's outbox files: (ending of the name, its text when asked), each format
    and the run sheet."""
    parts: list[tuple[str, Callable[[], str]]] = [
        (f".{EXTENSIONS[fmt]}", lambda fmt=fmt: render_fmt(fmt)) for fmt in formats]
    if n.runsheet.get("csv"):
        parts.append((".runsheet.csv", lambda: n.runsheet["csv"]))
    return parts


def staged_summary_files(outbox: str | Path, summaries: Sequence[tuple[str, FarmSummary]], token: str
                         ) -> list[tuple[str, bytes, str]]:
    """The hidden names and contents of farm summaries' outbox files written ahead (all of them,
    rendered: see :func:`staged_block_files`), and whose they are; ``summaries`` are (stored key, summary)."""
    out = []
    for key, n in summaries:
        base = _base(str(outbox), n, key)
        out += [(staged_path(base + end, token), text().encode("utf-8"), key)
                for end, text in _summary_parts(n, OUTBOX_FORMATS, lambda fmt, n=n: render(n, fmt))]
    return out


def stage_outbox(files: Iterable[tuple[str, Any, str]], swept: set[str] | None = None,
                 written: list[tuple[str, str]] | None = None, arena=None) -> int:
    """Write outbox files ahead under their hidden names (:func:`staged_block_files`); how many.

    Folders are made as needed; in each folder met for the first time (``swept`` keeps
    them across calls) the staged files a stopped run left behind are removed first
    (:data:`STALE_STAGED_S`).  ``files`` are (hidden name, contents, notice key); the
    contents are bytes, or where they are in ``arena`` (:class:`advisory.forking.Arena`).
    ``written`` gets (notice key, hidden name) of each file (for :func:`publish_staged`).
    """
    swept = set() if swept is None else swept
    count = 0
    for path, data, key in files:
        head = os.path.dirname(path)
        if head not in swept:
            swept.add(head)
            _folder(head)
            discard_staged(head, older_than_s=STALE_STAGED_S)
        _put(path, arena.view(data) if isinstance(data, tuple) else data)
        if written is not None:
            written.append((key, path))
        count += 1
    return count


def publish_staged(written: list[tuple[str, str]], token: str) -> set[str]:
    """Move files written ahead (``written``: notice key and hidden name) to their own names, once
    their notices are stored; the keys of the notices all of whose files are now published.

    A file that cannot be moved leaves its notice out (the delivery then writes that notice's files
    itself).
    """
    mark = f".{token}{STAGED_SUFFIX}"
    done: set[str] = set()
    failed: set[str] = set()
    for key, path in written:
        head, hidden = os.path.split(path)
        try:
            os.replace(path, os.path.join(head, hidden[1:-len(mark)]))
            done.add(key)
        except OSError as exc:
            log.warning("outbox file written ahead not published (%s): %s", exc, path)
            failed.add(key)
    return done - failed


def discard_staged(folder: str | Path, token: str | None = None, *, older_than_s: float | None = None) -> int:
    """Remove staged files from an outbox folder: a run's own (``token``) or any older than ``older_than_s``."""
    now = time.time()
    removed = 0
    mark = None if token is None else f".{token}{STAGED_SUFFIX}"
    try:
        entries = list(os.scandir(folder))
    except FileNotFoundError:
        return 0
    for e in entries:
        if not e.name.endswith(STAGED_SUFFIX) or (mark is not None and not e.name.endswith(mark)):
            continue
        with _suppress():
            if older_than_s is None or now - e.stat().st_mtime > older_than_s:
                os.unlink(e.path)
                removed += 1
    return removed


def _publish(path: str, token: str | None) -> bool:
    """Move the run's staged file for ``path`` to its own name; False when none was staged."""
    if not token:
        return False
    try:
        os.replace(staged_path(path, token), path)
        return True
    except FileNotFoundError:
        return False


class _suppress:
    def __enter__(self):
        return self

    def __exit__(self, *exc):
        return True


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


#: Outbox folders this process has made (or found) already.
_FOLDERS: set[str] = set()


def _folder(path: str | Path) -> None:
    """Make ``path`` (and its parents) unless this process did so already."""
    key = str(path)
    if key not in _FOLDERS:
        os.makedirs(key, exist_ok=True)
        if len(_FOLDERS) > 4096:
            _FOLDERS.clear()
        _FOLDERS.add(key)


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
                raise PermanentError(f"SMTP server {cfg.host}:{cfg.port} does not offer STARTTLS; for a plain "
                                     f"local relay set ADVISORY_SMTP_TLS=none, or set {_TLS_HINT}")
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
            with _suppress():
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


# --------------------------------------------------------------------------------------------------
# The delivery loop
# --------------------------------------------------------------------------------------------------

class Attempt:
    """One delivery attempt as made and stored (a ``Delivery`` row, without the ORM's bookkeeping)."""

    __slots__ = ("notice_id", "recipient_id", "channel", "address", "attempt", "status", "attempted_at", "error",
                 "id")

    def __init__(self, notice_id: int, recipient_id: int | None, channel: str, address: str, attempt: int,
                 status: str, attempted_at: dt.datetime, error: str = "", id: int | None = None):
        self.notice_id, self.recipient_id, self.channel, self.address = notice_id, recipient_id, channel, address
        self.attempt, self.status, self.attempted_at, self.error, self.id = attempt, status, attempted_at, error, id

    def __repr__(self) -> str:
        return (f"Attempt(notice {self.notice_id}, recipient {self.recipient_id}, {self.channel}, "
                f"attempt {self.attempt}: {self.status})")


@dataclass
class _Job:
    rendered: _Rendered
    channel: str
    recipient: Recipient | None
    address: str
    attempt: int
    send: Callable[[], str] = field(repr=False, default=None)
    #: Work of an outbox job (see :func:`_outbox_weight`).
    weight: int = 1


def _existing(session: Session, notice_ids: list[int]) -> dict[tuple[int, int | None, str], tuple[int, bool]]:
    """(notice, recipient, channel) -> (attempts so far, delivered?)."""
    out: dict[tuple[int, int | None, str], tuple[int, bool]] = {}
    if not notice_ids:
        return out
    rows = session.execute(select(Delivery.notice_id, Delivery.recipient_id, Delivery.channel, Delivery.status)
                           .where(Delivery.notice_id.in_(notice_ids)))
    for nid, rid, ch, status in rows:
        n, done = out.get((nid, rid, ch), (0, False))
        out[(nid, rid, ch)] = (n + 1, done or status in DONE)
    return out


def deliver_notices(session: Session, batch: Iterable[tuple[Notice, Sequence[Recipient]]], settings, *,
                    sleep: Callable[[float], Any] | None = None, channels: Iterable[str] | None = None,
                    force: bool = False, retry: RetryPolicy = RetryPolicy(),
                    outbox_formats: Sequence[str] = OUTBOX_FORMATS, outbox_chart: bool | str = "auto",
                    outbox_options: Callable[[Any], tuple[Sequence[str], bool | str]] | None = None,
                    staged: str | None = None, published: Collection[str] = frozenset(),
                    smtp_factory=smtplib.SMTP, ssl_context: ssl.SSLContext | None = None,
                    urlopen=urllib.request.urlopen, clock: Callable[[], float] = time.time,
                    timeout_s: float = 20.0) -> list[Attempt]:
    """Deliver several notices, sharing the retry pauses.

    Parameters
    ----------
    session : sqlalchemy.orm.Session
        Delivery rows are added here and flushed; the caller commits.
    batch : iterable of (Notice, list of Recipient)
        Each stored notice (with ``id`` and ``content``) and who gets it.
    settings : advisory.settings.Settings
        ``outbox``, ``smtp`` and ``webhook_secret``.
    sleep : callable, optional
        Pause between retry rounds (default :func:`time.sleep`; inject a no-op in tests).
    channels : iterable of str, optional
        Only these channels (of :data:`CHANNELS`); default all.
    force : bool
        Deliver even where already delivered (resend).
    retry : RetryPolicy
    outbox_formats : sequence of str
        Formats written to the outbox (see :data:`advisory.notices.render.EXTENSIONS`).
    outbox_chart : bool or "auto"
        Draw the chart PNG into the outbox: always, never, or ("auto") when the
        notice is at "stand by" or worse or goes out by e-mail in this call.
    outbox_options : callable, optional
        ``outbox_options(notice_row) -> (formats, chart)``: per notice, in place of
        ``outbox_formats`` and ``outbox_chart`` (one call for a batch whose notices
        get different outbox forms).
    staged : str, optional
        The token of outbox files written ahead (:func:`stage_outbox`): such a file is
        moved to its own name instead of being written again.
    published : collection of str
        Keys of notices whose outbox files written ahead are already at their own names
        (:func:`publish_staged`): nothing is left to write for them, unless they are to get
        more than was written ahead (a chart, or formats of their own).
    smtp_factory, ssl_context, urlopen, clock, timeout_s
        Injection points for tests and special set-ups.

    Returns
    -------
    list of Attempt
        The attempts made by this call, as stored (``Delivery`` rows; already-delivered pairs are
        skipped silently).
    """
    wanted = set(CHANNELS if channels is None else channels)
    unknown = wanted - set(CHANNELS)
    if unknown:
        from advisory.errors import InputError

        raise InputError(f"unknown channel {', '.join(sorted(unknown))} (choose from {', '.join(CHANNELS)})",
                         field="--channel")
    batch = [(row, list(recips)) for row, recips in batch]
    existing = _existing(session, [row.id for row, _ in batch])
    jobs: list[_Job] = []

    def job(r: _Rendered, channel: str, recipient: Recipient | None, address: str) -> _Job | None:
        key = (r.row.id, None if recipient is None else recipient.id, channel)
        count, done = existing.get(key, (0, False))
        if done and not force:
            return None
        return _Job(r, channel, recipient, address, count)

    box = str(Path(settings.outbox))
    for row, recips in batch:
        r = _Rendered(row)
        by_mail = "email" in wanted and any((rc.channels or {}).get("email") for rc in recips)
        if "outbox" in wanted:
            j = job(r, "outbox", None, box)
            if j:
                formats, chart_opt = outbox_options(row) if outbox_options else (outbox_formats, outbox_chart)
                rank_ok = isinstance(r.n, BlockNotice) and r.n.status == "ok" and r.n.level_rank >= 2
                chart = chart_opt is True or (chart_opt == "auto" and (rank_ok or by_mail))
                if row.key in published and _written_ahead(r.n, formats, chart):
                    j.address, j.weight = _night_folder(box, r.n.night), 0  # in place: nothing to send
                else:
                    j.send = (lambda r=r, chart=chart, formats=formats: _send_outbox(r, settings, formats, chart,
                                                                                    staged))
                    j.weight = _outbox_weight(r.n, formats, chart, staged)
                jobs.append(j)
        for rc in recips:
            ch_map = rc.channels or {}
            for ch in ("email", "webhook", "sms"):
                addr = ch_map.get(ch)
                if not addr or ch not in wanted:
                    continue
                addr = str(addr)
                j = job(r, ch, rc, addr)
                if not j:
                    continue
                if ch == "email":
                    j.send = (lambda r=r, rc=rc, addr=addr: _send_email(
                        r, settings, rc, addr, smtp_factory=smtp_factory, ssl_context=ssl_context,
                        timeout_s=timeout_s))
                elif ch == "webhook":
                    j.send = (lambda r=r, rc=rc, addr=addr: _send_webhook(
                        r, settings, rc, addr, urlopen=urlopen, clock=clock, timeout_s=timeout_s,
                        delivery_id=f"{r.row.id}-{rc.id}"))
                else:
                    j.send = (lambda r=r, rc=rc, addr=addr: _send_sms(r, settings, rc, addr))
                jobs.append(j)
            for ch in ch_map:
                if ch not in CHANNELS:
                    log.warning("recipient %s: channel %r is not supported; skipped", rc.name, ch)

    made: list[Attempt] = []
    pending = jobs
    attempts = max(1, int(retry.attempts))
    for round_index in range(attempts):
        again: list[_Job] = []
        outcomes = _attempt_all(pending, settings)
        for j, (status, error, address, retry_it) in zip(pending, outcomes, strict=True):
            if retry_it:
                again.append(j)
            d = Attempt(j.rendered.row.id, None if j.recipient is None else j.recipient.id, j.channel,
                        str(address)[:500], j.attempt, status, dt.datetime.now(dt.UTC), error)
            made.append(d)
            who = "outbox" if j.recipient is None else j.recipient.name
            if status == "failed":
                log.warning("notice %s -> %s by %s, attempt %d failed: %s", j.rendered.row.key, who, j.channel,
                            j.attempt, error)
            else:
                log.info("notice %s -> %s by %s: %s", j.rendered.row.key, who, j.channel, status)
        pending = again
        if not pending or round_index == attempts - 1:
            break
        (sleep or _sleep)(retry.delay_s(round_index))
    _insert_deliveries(session, made)
    return made


def _written_ahead(n: BlockNotice | FarmSummary, formats: Sequence[str], chart: bool) -> bool:
    """Whether the files written ahead for a notice are all it gets in the outbox: every format of
    a farm summary; a block notice's short text and JSON (:data:`STAGED_FORMATS`), without a chart."""
    if isinstance(n, FarmSummary):
        return set(formats) == set(OUTBOX_FORMATS)
    return not chart and set(formats) <= set(STAGED_FORMATS)


def _attempt(j: _Job, settings) -> tuple[str, str, str, bool, int]:
    """One delivery attempt: (status, error, address, retry?, attempt number)."""
    attempt = j.attempt + 1
    if j.send is None:  # an outbox delivery whose files were published already (see deliver_notices)
        return "sent", "", j.address, False, attempt
    try:
        address = j.send() or j.address
        return ("queued" if j.channel == "sms" else "sent"), "", address, False, attempt
    except PermanentError as exc:
        return "failed", _scrub(str(exc), settings), j.address, False, attempt
    except Exception as exc:
        return "failed", _scrub(f"{type(exc).__name__}: {exc}", settings), j.address, True, attempt


#: A delivery with at least this many outbox files to write shares the writing among
#: ``settings.workers`` processes (see :func:`_attempt_all`).
FORK_OUTBOX_FROM = 1000


def _outbox_weight(n: BlockNotice | FarmSummary, formats: Sequence[str], chart: bool, staged: str | None) -> int:
    """Rough work of writing a notice to the outbox: one per block notice, one per row of a farm
    summary; none for a notice whose every file was written ahead (``staged``; see :func:`_written_ahead`)."""
    if staged and _written_ahead(n, formats, chart):
        return 0
    return max(1, len(n.rows)) if isinstance(n, FarmSummary) else 1


def _attempt_all(jobs: list[_Job], settings) -> list[tuple[str, str, str, bool]]:
    """One attempt for each job (its attempt count raised), results in the order of the jobs.

    The outbox files of a large batch (:data:`FORK_OUTBOX_FROM` block notices or farm-summary
    rows or more) are rendered
    and written by ``settings.workers`` processes at once (:func:`advisory.forking.fork_map`),
    each its own consecutive share; file names never clash (each notice has its own) and
    a write is atomic, so a share done again after a worker died changes nothing.  Files
    written ahead weigh nothing: they are only renamed.  Mail,
    webhooks and text messages always go from this process, in order.
    """
    from advisory import forking

    out: list[tuple | None] = [None] * len(jobs)
    boxed = [k for k, j in enumerate(jobs) if j.channel == "outbox"]
    workers = int(getattr(settings, "workers", 1) or 1)
    weight = {k: jobs[k].weight for k in boxed}
    if workers > 1 and len(boxed) > 1 and sum(weight.values()) >= FORK_OUTBOX_FROM and forking.can_fork():
        log.info("writing %d outbox notices with %d processes", len(boxed), workers)
        # heaviest first, dealt out like cards: each share gets its part of the large farm summaries
        heavy_first = sorted(boxed, key=lambda k: -weight[k])
        dealt = [k for s in range(workers) for k in heavy_first[s::workers]]
        results = forking.fork_map(lambda j: _attempt(j, settings), [jobs[k] for k in dealt], workers)
        for k, res in zip(dealt, results, strict=True):
            out[k] = res
    for k, j in enumerate(jobs):
        if out[k] is None:
            out[k] = _attempt(j, settings)
    for j, res in zip(jobs, out, strict=True):
        j.attempt = res[4]
    return [res[:4] for res in out]


_DELIVERY_COLUMNS = ("notice_id", "recipient_id", "channel", "address", "attempt", "status", "attempted_at", "error")


def _insert_deliveries(session: Session, rows: list[Attempt]) -> None:
    """Write the attempts in bulk (:func:`advisory.store.bulk.insert_rows`) and give each row its new id.

    The rows stay outside the session (nothing else changes them); what the caller
    added before is flushed first.  A notice, recipient, channel and attempt number
    identify an attempt.
    """
    from advisory.store import bulk

    session.flush()
    ids = bulk.insert_rows(session, Delivery, [{c: getattr(d, c) for c in _DELIVERY_COLUMNS} for d in rows],
                           key=("notice_id", "recipient_id", "channel", "attempt"))
    for d, new_id in zip(rows, ids, strict=True):
        d.id = new_id


def save_notice(session: Session, notice: BlockNotice | FarmSummary, *, farm_id: int, block_id: int | None = None,
                forecast_id: int | None = None) -> tuple[Notice, bool]:
    """Store a composed notice once: get the row with its key, or add it.

    Returns
    -------
    (Notice, bool)
        The row (flushed, with an id) and whether it was created now.  A rerun
        finds the existing row, so delivering it again skips whatever was
        already delivered.
    """
    row = session.scalar(select(Notice).where(Notice.key == notice.key))
    if row is not None:
        return row, False
    row = Notice(key=notice.key, farm_id=farm_id, block_id=block_id, forecast_id=forecast_id, kind=notice.kind,
                 night=dt.date.fromisoformat(notice.night), revision=notice.revision, is_update=notice.is_update,
                 level=(notice.level or "")[:20], subject=notice.subject[:300], content=notice.to_dict())
    session.add(row)
    session.flush()
    return row, True


def deliver_notice(session: Session, notice_row: Notice, recipients: Sequence[Recipient], settings, *,
                   sleep: Callable[[float], Any] | None = None, **kw) -> list[Attempt]:
    """Deliver one stored notice to its recipients (see :func:`deliver_notices` for the options)."""
    return deliver_notices(session, [(notice_row, recipients)], settings, sleep=sleep, **kw)


def delivery_summary(rows: Iterable[Delivery]) -> dict[str, str]:
    """``channel -> status`` of the latest attempt per recipient, for listings ("sent", "failed", "2/3 delivered")."""
    latest: dict[tuple[int | None, str], Delivery] = {}
    for d in rows:
        k = (d.recipient_id, d.channel)
        if k not in latest or (d.attempt, d.id or 0) > (latest[k].attempt, latest[k].id or 0):
            latest[k] = d
    out: dict[str, list[str]] = {}
    for (_rid, ch), d in latest.items():
        out.setdefault(ch, []).append(d.status)
    summary = {}
    for ch, v in out.items():
        if len(set(v)) == 1:
            summary[ch] = v[0]
        else:
            summary[ch] = f"{sum(s in DONE for s in v)}/{len(v)} delivered"
    return summary


# --------------------------------------------------------------------------------------------------
# The queue of deliveries that failed: retries, deadlines, "undelivered" notes
# --------------------------------------------------------------------------------------------------

#: Status of a delivery given up at its notice's deadline (see :func:`deadline_utc`).
EXPIRED = "expired"
#: Channel prefix of an "undelivered" note to a fallback recipient ("fallback-email", ...).
FALLBACK = "fallback-"
#: Channels that reach a person (the outbox is a folder, not a person).
PERSON_CHANNELS = ("email", "webhook", "sms")


@dataclass(frozen=True)
class QueuePolicy:
    """Pauses between the queue's retries of a failed delivery.

    The ``n``-th retry waits ``first_delay_s * factor ** (n - 1)`` seconds after the last
    attempt, at most ``max_delay_s``, until the notice's deadline (:func:`deadline_utc`).
    """

    first_delay_s: float = 60.0
    factor: float = 2.0
    max_delay_s: float = 600.0

    def delay_s(self, attempts: int) -> float:
        return min(self.first_delay_s * self.factor ** max(0, attempts - 1), self.max_delay_s)


def deadline_utc(kind: str, night: dt.date, tz: str, places: Sequence[tuple[float, float]]) -> dt.datetime:
    """When a notice is no longer worth delivering [UTC].

    A frost notice (``frost``, ``frost-summary``) is worthless after sunrise: the sunrise that
    ends its night at its block (a farm summary: the latest sunrise among ``places``; where the
    sun does not rise, local noon of the next day).  A heat note is worth delivering until the
    end of its day (local midnight).

    Parameters
    ----------
    kind : str
        The notice's kind.
    night : date
        Local date of the evening (heat: of the day).
    tz : str
        IANA zone of the farm.
    places : sequence of (latitude, longitude)
        The block's place, or the farm's blocks' places [degrees].
    """
    from zoneinfo import ZoneInfo

    from advisory.physics import sun

    zone = ZoneInfo(tz)
    next_day = dt.datetime.combine(night + dt.timedelta(days=1), dt.time(0), zone)
    if not kind.startswith("frost"):
        return next_day.astimezone(dt.UTC)
    rises = []
    for lat, lon in places:
        st = sun.sun_times(lat, lon, night, tz)
        if st.sunrise is not None:
            rises.append(st.sunrise.astimezone(dt.UTC))
    return max(rises) if rises else (next_day + dt.timedelta(hours=12)).astimezone(dt.UTC)


@dataclass
class QueueItem:
    """A notice that did not reach a recipient on a channel (yet)."""

    notice_id: int
    notice_key: str
    recipient_id: int | None
    recipient: str
    channel: str
    address: str
    attempts: int
    status: str
    error: str
    last_at: dt.datetime
    deadline: dt.datetime | None = None

    def line(self) -> str:
        """One line: what did not go where, and why."""
        when = f"; given up at its deadline {self.deadline:%Y-%m-%d %H:%MZ}" if self.status == EXPIRED and \
            self.deadline else ""
        return (f"undelivered: notice {self.notice_key} -> {self.recipient} by {self.channel} ({self.address}) "
                f"after {self.attempts} attempt(s): {self.error or 'no reason recorded'}{when}")


@dataclass
class QueueReport:
    """What :func:`retry_failed` did."""

    retried: list[Attempt] = field(default_factory=list)
    expired: list[QueueItem] = field(default_factory=list)
    fallback: list[Attempt] = field(default_factory=list)
    waiting: list[QueueItem] = field(default_factory=list)

    def text(self) -> str:
        ok = sum(a.status in DONE for a in self.retried)
        lines = [f"retried {len(self.retried)} deliveries: {ok} delivered, {len(self.retried) - ok} failed again; "
                 f"{len(self.waiting)} waiting for a later retry; {len(self.expired)} given up at their deadline"
                 + (f" ({sum(a.status in DONE for a in self.fallback)} 'undelivered' note(s) sent)"
                    if self.expired else "")]
        lines += [f"  {it.line()}" for it in self.expired]
        return "\n".join(lines)


def _names(session: Session, ids: Iterable[int | None]) -> dict[int, str]:
    ids = sorted({i for i in ids if i is not None})
    out: dict[int, str] = {}
    for k in range(0, len(ids), 500):
        out.update(dict(session.execute(select(Recipient.id, Recipient.name).where(Recipient.id.in_(ids[k:k + 500])))
                        .all()))
    return out


def open_deliveries(session: Session, notice_ids: Collection[int] | None = None, *,
                    include_outbox: bool = True) -> list[QueueItem]:
    """Every (notice, recipient, channel) whose attempts all failed: the latest attempt of each
    (status ``failed``, still queued for a retry, or ``expired``, given up at its deadline).

    ``notice_ids`` limits the search (default: every notice with a failed attempt).
    """
    from advisory.store.schema import Delivery as D

    q = select(D.notice_id).where(D.status.in_(("failed", EXPIRED)))
    if notice_ids is not None:
        ids = sorted(set(notice_ids))
        if not ids:
            return []
        q = q.where(D.notice_id.in_(ids))
    failing = sorted(set(session.scalars(q.distinct())))
    latest: dict[tuple, D] = {}
    done: set[tuple] = set()
    for k in range(0, len(failing), 500):
        for d in session.scalars(select(D).where(D.notice_id.in_(failing[k:k + 500]))):
            if d.channel.startswith(FALLBACK) or (d.channel == "outbox" and not include_outbox):
                continue
            key = (d.notice_id, d.recipient_id, d.channel)
            if d.status in DONE:
                done.add(key)
            if key not in latest or (d.attempt, d.id or 0) > (latest[key].attempt, latest[key].id or 0):
                latest[key] = d
    keys = {n for n, _r, _c in latest}
    notice_keys = {}
    for k in range(0, len(keys), 500):
        chunk = sorted(keys)[k:k + 500]
        notice_keys.update(dict(session.execute(select(Notice.id, Notice.key).where(Notice.id.in_(chunk))).all()))
    names = _names(session, (r for _n, r, _c in latest))
    out = []
    for key, d in sorted(latest.items(), key=lambda kv: (kv[0][0], kv[0][1] or 0, kv[0][2])):
        if key in done or d.status not in ("failed", EXPIRED):
            continue
        who = "outbox" if d.recipient_id is None else names.get(d.recipient_id, f"recipient {d.recipient_id}")
        out.append(QueueItem(d.notice_id, notice_keys.get(d.notice_id, str(d.notice_id)), d.recipient_id, who,
                             d.channel, d.address, d.attempt, d.status, d.error, d.attempted_at))
    return out


def undelivered(session: Session, notice_ids: Collection[int] | None = None) -> list[QueueItem]:
    """The notices that reached a recipient on none of the recipient's channels: each failed
    channel of each such recipient (the outbox too, when its files could not be written).

    A recipient reached on one channel (an e-mail refused, the text message queued) is reached.
    """
    items = open_deliveries(session, notice_ids)
    if not items:
        return []
    from advisory.store.schema import Delivery as D

    ids = sorted({it.notice_id for it in items})
    reached: set[tuple[int, int | None]] = set()
    for k in range(0, len(ids), 500):
        for nid, rid in session.execute(select(D.notice_id, D.recipient_id).where(
                D.notice_id.in_(ids[k:k + 500]), D.status.in_(DONE), D.channel.in_(PERSON_CHANNELS))):
            reached.add((nid, rid))
    return [it for it in items if it.recipient_id is None or (it.notice_id, it.recipient_id) not in reached]


def _deadlines(session: Session, notice_ids: Collection[int]) -> dict[int, dt.datetime]:
    from advisory.store.schema import Block, Farm

    out = {}
    places: dict[int, list[tuple[float, float]]] = {}
    for nid in sorted(set(notice_ids)):
        n = session.get(Notice, nid)
        if n is None:
            continue
        farm = session.get(Farm, n.farm_id)
        if n.block_id is not None:
            b = session.get(Block, n.block_id)
            where = [(b.latitude, b.longitude)]
        else:
            if n.farm_id not in places:
                places[n.farm_id] = [tuple(x) for x in session.execute(
                    select(Block.latitude, Block.longitude).where(Block.farm_id == n.farm_id,
                                                                  Block.active.is_(True))).all()]
            where = places[n.farm_id]
        out[nid] = deadline_utc(n.kind, n.night, farm.timezone, where)
    return out


def retry_failed(session: Session, settings, *, now: dt.datetime | None = None,
                 notice_ids: Collection[int] | None = None, policy: QueuePolicy = QueuePolicy(),
                 attempted_before: dt.datetime | None = None, **kw) -> QueueReport:
    """Work the queue of failed deliveries once: retry those due, give up those past their deadline.

    A failed delivery (notice, recipient, channel; never one delivered already, so nothing
    goes out twice) is retried once it has waited its pause (:class:`QueuePolicy`), or, with
    ``attempted_before``, as soon as its last attempt is older than that instant (a night run
    by hand retries at once what an earlier run left).  Past the notice's deadline
    (:func:`deadline_utc`) it is given up (an ``expired`` row) and the farm's fallback
    recipients get a short "undelivered" note (:func:`send_undelivered_notes`).

    Rows are added to ``session``; the caller commits.  ``kw`` goes to :func:`deliver_notices`
    (injection points for tests).
    """
    now = (now or dt.datetime.now(dt.UTC)).astimezone(dt.UTC)
    report = QueueReport()
    items = [it for it in open_deliveries(session, notice_ids) if it.status == "failed"]
    if not items:
        return report
    deadlines = _deadlines(session, {it.notice_id for it in items})
    due: dict[tuple[int, str], list[QueueItem]] = defaultdict(list)
    gone: list[QueueItem] = []
    for it in items:
        it.deadline = deadlines.get(it.notice_id)
        if attempted_before is not None and it.last_at >= attempted_before:
            report.waiting.append(it)  # just tried by the caller's run: the queue takes it from here
        elif it.deadline is not None and now >= it.deadline:
            gone.append(it)
        elif (attempted_before is not None and it.last_at < attempted_before) or \
                now >= it.last_at + dt.timedelta(seconds=policy.delay_s(it.attempts)):
            due[(it.notice_id, it.channel)].append(it)
        else:
            report.waiting.append(it)
    for (nid, channel), group in sorted(due.items()):
        n = session.get(Notice, nid)
        recips = [session.get(Recipient, it.recipient_id) for it in group if it.recipient_id is not None]
        if channel == "outbox":
            batch = [(n, [])]
        else:
            recips = [r for r in recips if r is not None]
            if not recips:
                continue
            batch = [(n, recips)]
        kw.setdefault("retry", RetryPolicy(attempts=1))
        report.retried += deliver_notices(session, batch, settings, channels=[channel], **kw)
    if gone:
        expired = [Attempt(it.notice_id, it.recipient_id, it.channel, it.address[:500], it.attempts + 1, EXPIRED,
                           now, f"not delivered by its deadline {it.deadline:%Y-%m-%d %H:%MZ}; last error: "
                                f"{it.error}"[:2000]) for it in gone]
        _insert_deliveries(session, expired)
        for it in gone:
            it.status, it.attempts = EXPIRED, it.attempts + 1
        report.expired = gone
        report.fallback = send_undelivered_notes(session, settings, gone, now=now, **{
            k: v for k, v in kw.items() if k in ("smtp_factory", "ssl_context", "urlopen", "clock", "timeout_s")})
    return report


def fallback_recipients(session: Session, farm_id: int) -> list[Recipient]:
    """Who is told of an undelivered notice: the farm file's ``fallback`` recipients, else the
    farm's recipients whose role names an agent (the extension agent)."""
    from advisory.store.schema import Farm

    farm = session.get(Farm, farm_id)
    recips = list(session.scalars(select(Recipient).where(Recipient.farm_id == farm_id).order_by(Recipient.id)))
    names = (farm.settings or {}).get("fallback_recipients") if farm is not None else None
    if names:
        return [r for r in recips if r.name in set(names)]
    return [r for r in recips if "agent" in (r.role or "").lower()]


def send_undelivered_notes(session: Session, settings, items: Sequence[QueueItem], *,
                           now: dt.datetime | None = None, smtp_factory=smtplib.SMTP,
                           ssl_context: ssl.SSLContext | None = None, urlopen=urllib.request.urlopen,
                           clock: Callable[[], float] = time.time, timeout_s: float = 20.0) -> list[Attempt]:
    """Tell the fallback recipients (:func:`fallback_recipients`) which notices did not reach whom.

    One short note per notice, written to the outbox (``<stem>.undelivered.txt``) and sent once
    on each channel of each fallback recipient (logged as channel ``fallback-<channel>``); a
    channel that failed for the notice itself is still tried (it may work again).
    """
    now = now or dt.datetime.now(dt.UTC)
    by_notice: dict[int, list[QueueItem]] = defaultdict(list)
    for it in items:
        by_notice[it.notice_id].append(it)
    made: list[Attempt] = []
    for nid, group in sorted(by_notice.items()):
        n = session.get(Notice, nid)
        if n is None:
            continue
        sent_before = session.scalar(select(Delivery.id).where(Delivery.notice_id == nid,
                                                               Delivery.channel.like(f"{FALLBACK}%")).limit(1))
        if sent_before is not None:
            continue
        subject = f"UNDELIVERED: {' '.join(n.subject.split())}"[:200]
        lines = [subject, "",
                 f"This notice (night {n.night}, key {n.key}) did not reach these recipients before it stopped "
                 "being useful. Tell them yourself if it still matters, and check the delivery settings "
                 "(see `advisory notices list --undelivered`).", ""]
        lines += [f"- {it.recipient} by {it.channel} ({it.address}): {it.error}" for it in group]
        text = "\n".join(lines) + "\n"
        try:
            base = outbox_base(settings.outbox, as_notice(n.full_content), n.key)
            base.parent.mkdir(parents=True, exist_ok=True)
            _write(str(base) + ".undelivered.txt", text.encode("utf-8"))
        except Exception as exc:  # the note still goes to people
            log.warning("undelivered note for %s not written to the outbox: %s", n.key, exc)
        fallback = fallback_recipients(session, n.farm_id)
        if not fallback:
            log.warning("notice %s undelivered and no fallback recipient (farm file: fallback = [...])", n.key)
        attempt = 0
        for rc in fallback:
            for ch in PERSON_CHANNELS:
                addr = (rc.channels or {}).get(ch)
                if not addr:
                    continue
                attempt += 1
                try:
                    if ch == "email":
                        if not settings.smtp.host:
                            raise PermanentError("no SMTP host set (ADVISORY_SMTP_HOST or [smtp] host)")
                        msg = EmailMessage()
                        msg["Subject"], msg["From"] = subject, settings.smtp.sender
                        msg["To"] = Address(display_name=" ".join(rc.name.split()), addr_spec=str(addr).strip())
                        msg["Date"] = formatdate(usegmt=True)
                        msg[NOTICE_HEADER] = n.key
                        msg.set_content(text)
                        smtp_send(settings, msg, str(addr), smtp_factory=smtp_factory, ssl_context=ssl_context,
                                  timeout_s=timeout_s)
                    elif ch == "webhook":
                        body = json.dumps({"type": "undelivered", "notice": n.key, "night": n.night.isoformat(),
                                           "subject": n.subject,
                                           "missed": [{"recipient": it.recipient, "channel": it.channel,
                                                       "error": it.error} for it in group]}).encode("utf-8")
                        post_signed(settings, str(addr), body, n.key, f"{nid}-{rc.id}-undelivered",
                                    urlopen=urlopen, clock=clock, timeout_s=timeout_s)
                    else:
                        who = f"{w.slug(rc.name, 24, 'recipient')}-{rc.id}"
                        base = outbox_base(settings.outbox, as_notice(n.full_content), n.key)
                        _write(f"{base}.{who}.undelivered.sms.txt",
                               f"To: {addr}\n\n{subject[:150]}\n".encode())
                    status, error = ("queued" if ch == "sms" else "sent"), ""
                except Exception as exc:
                    status, error = "failed", _scrub(f"{type(exc).__name__}: {exc}", settings)
                    log.warning("undelivered note for %s to %s by %s failed: %s", n.key, rc.name, ch, error)
                made.append(Attempt(nid, rc.id, f"{FALLBACK}{ch}", str(addr)[:500], attempt, status, now, error))
    _insert_deliveries(session, made)
    return made
