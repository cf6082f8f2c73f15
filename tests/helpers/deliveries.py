"""Delivery invariants the crash and multi-host tests check after a night (any engine)."""

from __future__ import annotations

from sqlalchemy import func, select, text

from advisory.store.schema import Delivery, Notice


def delivered_twice(session) -> list:
    """(notice, recipient, channel, count) of every notice delivered more than once to the same
    recipient on the same channel: a crash or a takeover must never send a notice twice."""
    return session.execute(text(
        "SELECT notice_id, recipient_id, channel, COUNT(*) FROM deliveries WHERE status IN ('sent','queued') "
        "GROUP BY notice_id, recipient_id, channel HAVING COUNT(*) > 1")).all()


def without_outbox_file(session) -> int:
    """How many stored notices have no outbox delivery marked sent."""
    return session.scalar(select(func.count()).select_from(Notice).where(
        Notice.id.not_in(select(Delivery.notice_id).where(Delivery.channel == "outbox",
                                                            Delivery.status == "sent"))))
