"""The durable queue of deliveries that failed: retries, deadlines, "undelivered" notes.

A failed delivery (notice, recipient, channel) stays in the delivery log until it is delivered
or given up.  :func:`retry_failed` works the queue once: it retries what has waited its pause
(:class:`QueuePolicy`) and gives up what is past the notice's deadline (:func:`deadline_utc`),
telling the farm's fallback recipients (:func:`send_undelivered_notes`).
:func:`open_deliveries` and :func:`undelivered` list what is left.
"""

from __future__ import annotations

import datetime as dt
import json
import logging
import smtplib
import ssl
import time
import urllib.request
from collections import defaultdict
from collections.abc import Callable, Collection, Iterable, Sequence
from dataclasses import dataclass, field
from email.headerregistry import Address
from email.message import EmailMessage
from email.utils import formatdate

from sqlalchemy import select
from sqlalchemy.orm import Session

from advisory.notices import words as w
from advisory.notices.channels import PermanentError, _scrub, post_signed, smtp_send
from advisory.notices.deliver import DONE, Attempt, RetryPolicy, _insert_deliveries, deliver_notices
from advisory.notices.outbox_files import _write, outbox_base
from advisory.notices.render import as_notice
from advisory.notices.signing import NOTICE_HEADER
from advisory.store.schema import Delivery, Notice, Recipient

#: The delivery's one logger, whichever of its modules writes (the demo quiets it by this name).
log = logging.getLogger("advisory.notices.deliver")

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

    Rows are added to ``session``; the caller commits.  ``kw`` goes to
    :func:`~advisory.notices.deliver.deliver_notices` (injection points for tests).
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
