"""Store a run's assessments in its transaction: forecasts, block notices and farm summaries.

Shared by every kind of run.  Forecasts and notices are written with bulk ``INSERT`` statements;
the notices just stored are delivered from memory, not read back (:class:`StoredNotice`).
"""

from __future__ import annotations

import datetime as dt
from collections import defaultdict
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

from sqlalchemy import func, select
from sqlalchemy.orm import Session

from advisory import assessment as asm
from advisory.notices import compose, farm_summary, notice_data
from advisory.risk import continuity
from advisory.runs import sizes
from advisory.runs.blocks import _chunked
from advisory.runs.frost_update import material_change
from advisory.runs.record import StageTimes, _lap
from advisory.store import bulk, jsoncodec
from advisory.store.schema import (
    Block,
    Forecast,
    Notice,
)


def _previous_revisions(session: Session, block_ids: Sequence[int], night: dt.date, kind: str) -> dict[int, int]:
    """Latest stored forecast revision of each block for a night (blocks without one are absent).

    One query per :data:`_IN_CHUNK` blocks, answered from the unique index on
    (block, kind, night, revision).
    """
    out: dict[int, int] = {}
    for chunk in _chunked(sorted(set(block_ids))):
        out.update(session.execute(select(Forecast.block_id, func.max(Forecast.revision))
                                   .where(Forecast.block_id.in_(chunk), Forecast.kind == kind,
                                          Forecast.night == night)
                                   .group_by(Forecast.block_id)).all())
    return out


def _last_noticed_many(session: Session, block_ids: Sequence[int], night: dt.date, kind: str
                       ) -> dict[int, asm.Assessment]:
    """The assessment behind each block's latest notice of the night (blocks without one are absent)."""
    wanted = set(block_ids)
    if not wanted:
        return {}
    latest: dict[int, tuple[int, int | None]] = {}
    for bid, rev, fid in session.execute(select(Notice.block_id, Notice.revision, Notice.forecast_id)
                                         .where(Notice.kind == kind, Notice.night == night,
                                                Notice.block_id.is_not(None))):
        if bid in wanted and (bid not in latest or rev > latest[bid][0]):
            latest[bid] = (rev, fid)
    by_forecast = {fid: bid for bid, (_, fid) in latest.items() if fid is not None}
    out: dict[int, asm.Assessment] = {}
    for chunk in _chunked(sorted(by_forecast)):
        for fid, payload in session.execute(select(Forecast.id, Forecast.payload).where(Forecast.id.in_(chunk))):
            if payload:
                out[by_forecast[fid]] = asm.from_dict(payload)
    return out


@dataclass(frozen=True)
class StoredNotice:
    """A stored notice row as the run and the delivery read it (no database session needed).

    :func:`advisory.notices.deliver.deliver_notices` reads only ``id``, ``key``
    and ``content`` of a notice row, so this stands in for the ORM row.
    """

    id: int
    key: str
    farm_id: int
    block_id: int | None
    #: The composed notice (:class:`~advisory.notices.notice_data.BlockNotice` or
    #: :class:`~advisory.notices.notice_data.FarmSummary`) when the run that stored it
    #: still has it, else ``Notice.content`` as stored (plain data).
    content: Any = field(repr=False, default_factory=dict)

    @property
    def full_content(self) -> Any:
        """The notice whole, as delivery reads it (``Notice.full_content`` of a stored row)."""
        return self.content


@dataclass
class Prepared:
    """What a batch will store: the assessments to store, their payloads and composed notices."""

    #: Assessments to store (revision set), in the batch's order.
    todo: list[asm.Assessment]
    #: The stored payload of each (``advisory.assessment.to_dict`` form), as encoded JSON.
    payloads: list[bytes]
    #: ``(key, subject, notice)`` of each block's notice, or None where no notice is due.
    composed: list[tuple | None]
    #: Messages for assessments not stored (already assessed).
    skipped: list[str]
    #: Keys of the block notices whose outbox files the worker process that composed them handed
    #: to the outbox writer itself (see :meth:`_Staging.write_share`).
    staged: list[str] = field(default_factory=list)


def _prepare(session: Session, assessments: list[asm.Assessment], *, revision_mode: str,
             timings: StageTimes | None = None) -> Prepared:
    """Revisions, payloads and notices of a batch (reads the database, writes nothing).

    See :func:`_store` for ``revision_mode``.
    """
    skipped: list[str] = []
    if not assessments:
        return Prepared([], [], [], skipped)
    kinds = {a.kind for a in assessments}
    nights = {a.night for a in assessments}
    prev: dict[tuple, int] = {}
    for kind in kinds:
        for night in nights:
            ids = [a.block_id for a in assessments if a.kind == kind and a.night == night]
            prev.update({(bid, kind, night): rev
                         for bid, rev in _previous_revisions(session, ids, night, kind).items()})
    todo: list[asm.Assessment] = []
    for a in assessments:
        p = prev.get((a.block_id, a.kind, a.night))
        if revision_mode in ("evening", "heat", "missed"):
            if p is not None:
                skipped.append(f"{a.block}: {a.kind} {a.night} already assessed (revision {p})")
                continue
            a.revision = 0
        else:
            a.revision = 0 if p is None else p + 1
            a.is_update = p is not None
        todo.append(a)
    noticed: dict = {}
    if revision_mode == "update":
        for kind in kinds:
            for night in nights:
                ids = [a.block_id for a in todo if a.is_update and a.kind == kind and a.night == night]
                noticed.update({(bid, kind, night): v
                                for bid, v in _last_noticed_many(session, ids, night, kind).items()})
    payloads: list[bytes] = []
    composed: list[tuple | None] = []
    for a in todo:
        previous_noticed = noticed.get((a.block_id, a.kind, a.night)) if a.is_update else None
        notice = None
        why: list[str] = []
        if a.is_update:
            if previous_noticed is not None and a.reference_time_utc is not None:
                a.plan = continuity.carry_started(a.plan, previous_noticed.plan, a.reference_time_utc)
            why = material_change(a, previous_noticed)
            if why:
                a.details = {**a.details, "update_reasons": why}
        # advisory.assessment.to_dict(a), encoded once: stored as the forecast's payload, and the
        # notice's data (parsed only if the notice is drawn or rendered from it)
        encoded = jsoncodec.encode(a)
        if not a.is_update or why:
            n = compose.compose_block(a, previous_noticed, data=jsoncodec.Encoded(encoded))
            # stored without its data (the forecast's payload, stored once)
            notice = (n.key, n.subject, n, notice_data.stored_json(n))
        payloads.append(encoded)
        composed.append(notice)
    _lap(timings, "compose")
    return Prepared(todo, payloads, composed, skipped)


def _store(session: Session, assessments: list[asm.Assessment], *, revision_mode: str,
           now: dt.datetime, timings: StageTimes | None = None, prepared: Prepared | None = None,
           workers: int = 1, stage: Callable[[list], Any] | None = None,
           known_blocks: Mapping[int, Block] | None = None) -> tuple[list[tuple[StoredNotice, list]], list[str]]:
    """Store forecasts and notices; returns (notices to deliver, skipped messages).

    The rows are written with a few bulk INSERT statements (the database hands back
    the new ids in order); what was stored before is read with one query per
    table, not one per block.

    Parameters
    ----------
    session : Session
        The run's transaction (the caller commits).
    assessments : list of Assessment
    revision_mode : {"evening", "heat", "missed", "update"}
        ``evening``, ``heat`` and ``missed`` store revision 0 of a block-night
        once (a block already assessed is skipped); ``update`` stores the next
        revision and a notice only when :func:`material_change` says so.
    now : datetime
        The run's clock (``created_at``).
    prepared : Prepared, optional
        :func:`_prepare` of ``assessments`` when already made (by the run's worker processes).
    workers : int
        Processes that may compose the farm summaries of a large run (see :mod:`advisory.forking`).
    known_blocks : mapping, optional
        The assessed blocks by id (or their :class:`_BlockLinks`), when the caller has them
        (else each is looked up).
    stage : callable, optional
        Called with ``[(key, block notice, (stored JSON, payload JSON))]``, ``[(key, farm
        summary)]`` and the keys of the block notices worker processes handed over themselves,
        once every notice of the batch is composed, before anything is written (see
        :meth:`_Staging.hand_over`).
    """
    if prepared is None:
        prepared = _prepare(session, assessments, revision_mode=revision_mode, timings=timings)
    todo, payloads, composed, skipped = prepared.todo, prepared.payloads, prepared.composed, prepared.skipped
    if not todo:
        return [], skipped
    loaded = known_blocks or {}
    blocks = {a.block_id: loaded.get(a.block_id) or session.get(Block, a.block_id) for a in todo}
    by_farm: dict[int, list[tuple[asm.Assessment, Block]]] = defaultdict(list)
    for a, notice in zip(todo, composed, strict=True):
        if notice is not None:
            by_farm[blocks[a.block_id].farm_id].append((a, blocks[a.block_id]))
    # One farm summary per farm and run (only for the evening and heat runs and for updates with news).
    batch: dict[int, list[asm.Assessment]] = defaultdict(list)  # this batch's assessments by farm
    for a in todo:
        batch[blocks[a.block_id].farm_id].append(a)
    wanted = []  # (farm id, its assessments, revision, key, recipients) of each summary to compose
    for farm_id, items in by_farm.items():
        farm_assessments = [a for a, _ in items]
        a0 = farm_assessments[0]
        revision = max(a.revision for a in farm_assessments)
        if revision_mode in ("evening", "heat"):
            # the summary gathers every block of the farm assessed for this night, not only this batch
            farm_assessments = _farm_payloads(session, farm_id, a0.night, a0.kind, batch[farm_id]) \
                or farm_assessments
        elif revision_mode == "update":
            # the farm's whole picture: the blocks with news as now, the others as last sent
            farm_assessments = _farm_last_noticed(session, farm_id, a0.night, a0.kind, farm_assessments)
        key = notice_data.notice_key(a0.kind + "-summary", a0.farm, None, a0.night, revision) + f":{_batch_tag(items)}"
        if session.scalar(select(Notice.id).where(Notice.key == key)) is not None:
            continue
        recips = {r.id: r for _, b in items for r in b.recipients}
        wanted.append((farm_id, farm_assessments, revision, key, list(recips.values())))
    # Large farms' summaries are composed by several processes (each a farm at a time).
    from advisory import forking

    share = workers if sum(len(x[1]) for x in wanted) >= sizes.PARALLEL_FROM_BLOCKS else 1
    news = {a.block_id for a, notice in zip(todo, composed, strict=True) if notice is not None}
    composed_summaries = forking.fork_map(
        lambda x: farm_summary.compose_farm(x[1], revision=x[2], changed=news if x[2] else None), wanted, share)
    _lap(timings, "compose summaries")
    if stage is not None:  # every notice is composed: its outbox files can be written ahead
        stage([(c[0], c[2], (c[3], p)) for c, p in zip(composed, payloads, strict=True) if c],
              [(x[3], summary) for x, summary in zip(wanted, composed_summaries, strict=True)],
              prepared.staged)
        _lap(timings, "hand over to the outbox writer")
    forecast_ids = _insert_returning_ids(session, Forecast, [
        {"block_id": a.block_id, "kind": a.kind, "night": a.night, "revision": a.revision, "created_at": now,
         "reference_time": a.reference_time_utc, "status": a.status, "reason": a.reason, "model": a.model,
         "training_nights": a.training_nights, "min_p10_c": a.p10_c, "min_p50_c": a.p50_c,
         "min_p90_c": a.p90_c, "level": a.level, "payload": jsoncodec.Fragment(payload)}
        for a, payload in zip(todo, payloads, strict=True)])
    _lap(timings, "store forecasts")
    rows, sent, notices = [], [], []
    for a, notice, fid in zip(todo, composed, forecast_ids, strict=True):
        if notice is None:
            continue
        block = blocks[a.block_id]
        key, subject, content, stored = notice
        rows.append({"key": key, "farm_id": block.farm_id, "block_id": a.block_id, "forecast_id": fid,
                     "kind": a.kind, "night": a.night, "revision": a.revision, "is_update": a.is_update,
                     "level": a.level, "subject": subject, "created_at": now,
                     "content": jsoncodec.Fragment(stored)})  # without its data: the forecast's payload
        notices.append(content)
        sent.append(list(block.recipients))
    for (farm_id, _, revision, key, recips), summary in zip(wanted, composed_summaries, strict=True):
        rows.append({"key": key, "farm_id": farm_id, "block_id": None, "forecast_id": None,
                     "kind": summary.kind + "-summary", "night": dt.date.fromisoformat(summary.night),
                     "revision": revision, "is_update": revision > 0, "level": summary.level,
                     "subject": summary.subject, "created_at": now, "content": summary})
        notices.append(summary)
        sent.append(recips)
    notice_ids = _insert_returning_ids(session, Notice, rows)
    to_send = [(StoredNotice(nid, r["key"], r["farm_id"], r["block_id"], n), recips)
               for nid, r, n, recips in zip(notice_ids, rows, notices, sent, strict=True)]
    _lap(timings, "store notices")
    return to_send, skipped


#: Columns that identify a new row of these tables (a unique constraint), to find its id.
_ROW_KEYS = {"forecasts": ("block_id", "kind", "night", "revision"), "notices": ("key",)}


def _insert_returning_ids(session: Session, model, rows: list[dict]) -> list[int]:
    """Bulk ``INSERT`` of ``rows``; the new ids in the order of ``rows`` (see :func:`advisory.store.bulk.insert_rows`)."""
    return bulk.insert_rows(session, model, rows, _ROW_KEYS.get(model.__table__.name))


def _batch_tag(items) -> str:
    return "-".join(str(b.id) for _, b in sorted(items, key=lambda x: x[1].id))[:120]


def _farm_payloads(session: Session, farm_id: int, night: dt.date, kind: str,
                   ours: Sequence[asm.Assessment]) -> list[asm.Assessment | dict]:
    """Every active block's revision-0 forecast of the farm for the night (assessment or payload).

    Those stored before come first (as stored payloads, in the order they were stored), then
    ``ours``: the batch's own assessments of the farm (not stored yet), as they are.
    """
    mine = {a.block_id for a in ours}
    stored = [fid for fid, bid in session.execute(
        select(Forecast.id, Forecast.block_id).join(Block).where(
            Block.farm_id == farm_id, Forecast.night == night, Forecast.kind == kind, Forecast.revision == 0,
            Block.active.is_(True)).order_by(Forecast.id)) if bid not in mine]
    found: dict[int, dict] = {}
    for chunk in _chunked(stored):
        found.update(session.execute(select(Forecast.id, Forecast.payload).where(Forecast.id.in_(chunk))).all())
    return [found[fid] for fid in stored if found.get(fid)] + [a for a in ours if a.revision == 0]


def _farm_last_noticed(session: Session, farm_id: int, night: dt.date, kind: str,
                       news: Sequence[asm.Assessment]) -> list[asm.Assessment]:
    """Every active block of the farm as its latest notice of the night told it, in block order, with
    ``news`` (this update's assessments with a new notice) in their place."""
    mine = {a.block_id: a for a in news}
    ids = session.scalars(select(Block.id).where(Block.farm_id == farm_id, Block.active.is_(True))).all()
    told = _last_noticed_many(session, [i for i in ids if i not in mine], night, kind)
    told.update(mine)
    return [told[bid] for bid in sorted(told)]
