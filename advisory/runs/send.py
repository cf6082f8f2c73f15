"""Deliver a run's notices after its commit (outbox files, e-mail, webhook, text message) and
find the notices of a night that a crash left undelivered.
"""

from __future__ import annotations

import datetime as dt
from collections import defaultdict
from collections.abc import Collection, Mapping, Sequence

from sqlalchemy import select
from sqlalchemy.orm import Session

from advisory.runs import claims
from advisory.runs.blocks import _chunked
from advisory.runs.save import StoredNotice
from advisory.store.schema import (
    Forecast,
    Notice,
    with_data,
)


def _outbox_plan(batch: list[tuple[Notice, list]], settings, wanted: set[str]) -> list[tuple[list, dict]]:
    """Split a batch by what the outbox gets (see ``outbox_formats`` and ``outbox_charts`` in
    :mod:`advisory.settings`): ``[(part of the batch, keyword arguments for deliver_notices)]``.

    With the default settings (every format; charts "auto") the batch stays whole.  Otherwise the
    farm summaries get every format; a block notice gets the configured formats, and its chart (with
    the HTML that shows it) when the setting asks for one: "always", "never", "email" (the notice goes
    out by e-mail in this run) or "auto" (by e-mail, or at "stand by" or worse).
    """
    from advisory.notices import outbox_files

    full = tuple(outbox_files.OUTBOX_FORMATS)
    formats = tuple(getattr(settings, "outbox_formats", None) or full)
    charts = getattr(settings, "outbox_charts", None) or "auto"
    if formats == full and charts == "auto":
        return [(batch, {})]
    by_mail = "email" in wanted
    summaries, charted, plain = [], [], []
    for n, recips in batch:
        if n.block_id is None:
            summaries.append((n, recips))
            continue
        mailed = by_mail and any((r.channels or {}).get("email") for r in recips)
        content = n.content or {}
        if isinstance(content, dict):
            status, rank = content.get("status"), content.get("level_rank")
        else:
            status, rank = getattr(content, "status", None), getattr(content, "level_rank", None)
        serious = status == "ok" and (rank or 0) >= 2
        draw = charts == "always" or (charts in ("email", "auto") and mailed) or (charts == "auto" and serious)
        (charted if draw else plain).append((n, recips))
    with_html = formats + (() if "html" in formats else ("html",))
    parts = [(summaries, {"outbox_formats": full, "outbox_chart": "auto"}),
             (charted, {"outbox_formats": with_html, "outbox_chart": True}),
             (plain, {"outbox_formats": formats, "outbox_chart": False})]
    return [(part, kw) for part, kw in parts if part]


def _deliver(db, to_send: list[tuple[Notice | StoredNotice, list]], settings, *, sleep=None,
             staged: str | None = None, published: Collection[str] = frozenset()) -> dict[str, int]:
    """Deliver stored notices (as returned by :func:`_pending_notices`) in one transaction.

    The rows are attached to the delivery session as they are (no reload); the outbox is written
    as the settings say (:func:`_outbox_plan`), using the files written ahead with token ``staged``
    (:class:`_Staging`; those of the notices whose keys are in ``published`` are already at their
    own names); the other channels follow in one pass, so that the
    retry pauses are shared by the whole batch.
    """
    from advisory.notices import deliver as deliver_mod

    if not to_send:
        return {}
    kw = {} if sleep is None else {"sleep": sleep}
    if staged:
        kw["staged"] = staged
    if published:
        kw["published"] = published
    counts: dict[str, int] = defaultdict(int)
    with db.transaction() as session:
        claims.lock(session, claims.DELIVERY_LOCK)  # hosts deliver one at a time (nothing sent twice)
        batch = _attached(session, to_send)
        wanted = set(deliver_mod.CHANNELS)
        parts = _outbox_plan(batch, settings, wanted)
        rows = []
        if len(parts) == 1 and not parts[0][1]:
            rows += deliver_mod.deliver_notices(session, batch, settings, **kw)
        else:  # one call for the whole outbox (its writers share all of it), each part in its own form
            form = {id(n): (opts["outbox_formats"], opts["outbox_chart"]) for part, opts in parts for n, _ in part}
            rows += deliver_mod.deliver_notices(session, [x for part, _ in parts for x in part], settings,
                                                channels=("outbox",), outbox_options=lambda n: form[id(n)], **kw)
            addressed = [(n, rs) for n, rs in batch if any(r.channels for r in rs)]
            if addressed:
                rows += deliver_mod.deliver_notices(session, addressed, settings,
                                                    channels=sorted(wanted - {"outbox"}), **kw)
        last = {}  # each delivery's outcome (its last attempt), not each attempt
        for r in rows:
            last[(r.notice_id, r.recipient_id, r.channel)] = r
        for r in last.values():
            counts[f"{r.channel} {r.status}"] += 1
    return dict(counts)


def _attached(session: Session, to_send: list[tuple[Notice, list]]) -> list[tuple[Notice, list]]:
    """The batch, ready for delivery in ``session`` without reloading anything that is at hand.

    Notices and recipients are only read by the delivery.  Notice rows detached from an earlier
    session are re-attached (no query: reading ``full_content`` may load the forecast); recipients
    (only their columns are read) and :class:`StoredNotice` views are used as they are; anything
    else with an ``id`` is loaded in bulk.
    """
    from sqlalchemy import inspect as sa_inspect

    from advisory.store.schema import Recipient

    def usable(obj, model):
        if model is Notice and isinstance(obj, StoredNotice):
            return True
        if not isinstance(obj, model):
            return False
        if model is Recipient:  # the delivery reads only its columns, loaded already (no lazy loads)
            return True
        state = sa_inspect(obj)
        if state.detached and session.identity_map.get(state.key) is None:
            session.add(obj)
        return True

    want_notices = {n.id for n, _ in to_send if not usable(n, Notice)}
    want_recips = {r.id for _, rs in to_send for r in rs if not usable(r, Recipient)}
    notices, recipients = {}, {}
    for chunk in _chunked(sorted(want_notices)):
        notices.update({x.id: x for x in session.scalars(select(Notice).where(Notice.id.in_(chunk)))})
    for chunk in _chunked(sorted(want_recips)):
        recipients.update({x.id: x for x in session.scalars(select(Recipient).where(Recipient.id.in_(chunk)))})
    return [(n if isinstance(n, Notice | StoredNotice) else notices[n.id],
             [r if isinstance(r, Recipient) else recipients[r.id] for r in rs]) for n, rs in to_send]


def _pending_notices(db, night: dt.date, kind_prefix: str, farm_ids: Sequence[int], *,
                     known: Mapping[int, tuple[StoredNotice, list]] | None = None
                     ) -> list[tuple[StoredNotice, list]]:
    """A night's notices with no outbox delivery yet (new ones, or left by a crash before delivery).

    Each comes with its recipients: the block's for a block notice, the farm's for a farm summary
    (read in bulk, ordered by id).  The notices are :class:`StoredNotice` views of the rows;
    ``known`` maps notice ids to ``(StoredNotice, recipients)`` where the caller has them at
    hand (the run that just stored them), so that neither is read back.
    """
    from advisory.store.schema import BlockRecipient, Delivery, Recipient

    out = []
    if not farm_ids:
        return out
    known = known or {}
    with db.transaction() as session:
        delivered = select(Delivery.notice_id).where(Delivery.channel == "outbox", Delivery.status == "sent")
        rows = session.execute(select(Notice.id, Notice.key, Notice.farm_id, Notice.block_id)
                               .where(Notice.night == night, Notice.kind.like(f"{kind_prefix}%"),
                                      Notice.farm_id.in_(list(farm_ids)), Notice.id.not_in(delivered))
                               .order_by(Notice.id)).all()
        left = [r for r in rows if r.id not in known]  # stored by an earlier run that stopped
        contents: dict[int, dict] = {}
        for chunk in _chunked([r.id for r in left]):
            for nid, content, payload in session.execute(
                    select(Notice.id, Notice.content, Forecast.payload)
                    .outerjoin(Forecast, Forecast.id == Notice.forecast_id).where(Notice.id.in_(chunk))):
                contents[nid] = with_data(content, payload)
        by_block: dict[int, list] = defaultdict(list)
        for chunk in _chunked(sorted({r.block_id for r in left if r.block_id is not None})):
            for bid, rc in session.execute(select(BlockRecipient.block_id, Recipient)
                                           .join(Recipient, Recipient.id == BlockRecipient.recipient_id)
                                           .where(BlockRecipient.block_id.in_(chunk))
                                           .order_by(BlockRecipient.block_id, Recipient.id)):
                by_block[bid].append(rc)
        by_farm: dict[int, list] = defaultdict(list)
        summary_farms = sorted({r.farm_id for r in left if r.block_id is None})
        if summary_farms:
            for rc in session.scalars(select(Recipient).where(Recipient.farm_id.in_(summary_farms))
                                      .order_by(Recipient.id)):
                by_farm[rc.farm_id].append(rc)
        for r in rows:
            if r.id in known:
                n, recips = known[r.id]
            else:
                n = StoredNotice(r.id, r.key, r.farm_id, r.block_id, contents[r.id])
                recips = by_block[r.block_id] if r.block_id is not None else by_farm[r.farm_id]
            out.append((n, list(recips)))
    return out
