"""Deliver notices: the attempts on every channel, their retries and their log.

Where the parts are
-------------------
* the channels (outbox files, e-mail, webhook, text messages): :mod:`advisory.notices.channels`;
* webhook signatures and the ``X-Advisory-*`` headers: :mod:`advisory.notices.signing`;
* outbox file names and files written ahead (staged): :mod:`advisory.notices.outbox_files`;
* the durable queue of failed deliveries (retries, deadlines, "undelivered" notes):
  :mod:`advisory.notices.retry_queue`.

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

import datetime as dt
import logging
import smtplib
import ssl
import time
import urllib.request
from collections.abc import Callable, Collection, Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from advisory.notices.channels import (
    PermanentError,
    _Rendered,
    _scrub,
    _send_email,
    _send_outbox,
    _send_sms,
    _send_webhook,
)
from advisory.notices.notice_data import BlockNotice, FarmSummary
from advisory.notices.outbox_files import OUTBOX_FORMATS, STAGED_FORMATS, _night_folder
from advisory.store.schema import Delivery, Notice, Recipient

log = logging.getLogger(__name__)

CHANNELS = ("outbox", "email", "webhook", "sms")
#: Statuses that count as delivered.
DONE = ("sent", "queued")


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
        The token of outbox files written ahead (:func:`~advisory.notices.outbox_files.stage_outbox`):
        such a file is moved to its own name instead of being written again.
    published : collection of str
        Keys of notices whose outbox files written ahead are already at their own names
        (:func:`~advisory.notices.outbox_files.publish_staged`): nothing is left to write for them,
        unless they are to get more than was written ahead (a chart, or formats of their own).
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
    a farm summary; a block notice's short text and JSON
    (:data:`~advisory.notices.outbox_files.STAGED_FORMATS`), without a chart."""
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
