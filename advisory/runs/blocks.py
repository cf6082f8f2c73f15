"""Select the blocks due and load their state: blocks with farm, station, recipients and
equipment, the stations' latest calibrations, recent verifications.

One query per table (in chunks of :data:`_IN_CHUNK` ids), never one per block.
"""

from __future__ import annotations

import datetime as dt
from collections import defaultdict
from collections.abc import Sequence
from dataclasses import dataclass, field

from sqlalchemy import func, select
from sqlalchemy.orm import Session

from advisory.forecast import calibration as calib
from advisory.store.schema import (
    Block,
    Calibration,
    Farm,
    Station,
    Verification,
)

#: Recent verified nights shown in a notice.
VERIFICATION_SHOWN = 5


def _load_blocks(session: Session, block_ids: Sequence[int] | None, farm: str | None = None,
                 names: Sequence[str] | None = None, *, equipment: bool = True) -> list[Block]:
    """Active blocks (all, or by id, farm or name), ordered by farm and block name.

    Each comes with its farm, station and recipients (and its equipment unless
    ``equipment=False``) already in place, read with one query per table
    rather than one per block.
    """
    blocks = list(session.scalars(_block_query(block_ids, farm, names)))
    if blocks:
        _populate(session, blocks, equipment=equipment)
    return blocks


def _block_query(block_ids: Sequence[int] | None, farm: str | None, names: Sequence[str] | None, *columns):
    """The active blocks (all, or by id, farm or name) ordered by farm and block name: ``Block``
    rows, or the given ``columns``."""
    q = select(*(columns or (Block,))).select_from(Block).join(Farm).where(Block.active.is_(True)) \
        .order_by(Farm.name, Block.name)
    if block_ids is not None:
        q = q.where(Block.id.in_(list(block_ids)))
    if farm:
        q = q.where(Farm.name == farm)
    if names:
        q = q.where(Block.name.in_(list(names)))
    return q


def _populate(session: Session, blocks: list[Block], *, equipment: bool) -> None:
    """Put the farm, station, recipients (and equipment) of ``blocks`` in place, in bulk.

    The values are set as loaded from the database (nothing becomes dirty), exactly what the
    relationships would load one block at a time.
    """
    from sqlalchemy.orm.attributes import set_committed_value

    from advisory.store.schema import BlockRecipient, Equipment, Recipient

    ids = [b.id for b in blocks]
    farms = {f.id: f for f in session.scalars(select(Farm).where(Farm.id.in_({b.farm_id for b in blocks})))}
    stations = {x.id: x for x in session.scalars(select(Station).where(
        Station.id.in_({b.station_id for b in blocks})))}
    links: dict[int, list[int]] = defaultdict(list)
    for chunk in _chunked(ids):
        for bid, rid in session.execute(select(BlockRecipient.block_id, BlockRecipient.recipient_id)
                                        .where(BlockRecipient.block_id.in_(chunk))
                                        .order_by(BlockRecipient.block_id, BlockRecipient.recipient_id)):
            links[bid].append(rid)
    wanted = sorted({r for rs in links.values() for r in rs})
    recipients = {}
    for chunk in _chunked(wanted):
        recipients.update({r.id: r for r in session.scalars(select(Recipient).where(Recipient.id.in_(chunk)))})
    gear: dict[int, list] = defaultdict(list)
    if equipment:
        for chunk in _chunked(ids):
            for e in session.scalars(select(Equipment).where(Equipment.block_id.in_(chunk)).order_by(Equipment.id)):
                gear[e.block_id].append(e)
    for b in blocks:
        set_committed_value(b, "farm", farms[b.farm_id])
        set_committed_value(b, "station", stations[b.station_id])
        set_committed_value(b, "recipients", [recipients[r] for r in links.get(b.id, ())])
        if equipment:
            set_committed_value(b, "equipment", gear.get(b.id, []))


@dataclass
class _BlockLinks:
    """What storing and delivering a block's notices needs of the block: its farm and recipients."""

    id: int
    farm_id: int
    recipients: list = field(default_factory=list)


def _block_links(session: Session, block_ids: Sequence[int]) -> dict[int, _BlockLinks]:
    """:class:`_BlockLinks` of ``block_ids`` (recipients in the order :func:`_populate` gives them)."""
    from advisory.store.schema import BlockRecipient, Recipient

    out: dict[int, _BlockLinks] = {}
    for chunk in _chunked(block_ids):
        out.update((i, _BlockLinks(i, f)) for i, f in session.execute(
            select(Block.id, Block.farm_id).where(Block.id.in_(chunk))))
    links: list[tuple[int, int]] = []
    for chunk in _chunked(block_ids):
        links += session.execute(select(BlockRecipient.block_id, BlockRecipient.recipient_id)
                                 .where(BlockRecipient.block_id.in_(chunk))
                                 .order_by(BlockRecipient.block_id, BlockRecipient.recipient_id)).all()
    recipients = {}
    for chunk in _chunked(sorted({r for _, r in links})):
        recipients.update({r.id: r for r in session.scalars(select(Recipient).where(Recipient.id.in_(chunk)))})
    for bid, rid in links:
        out[bid].recipients.append(recipients[rid])
    return out


def _equipment_of(session: Session, blocks: list[Block]) -> dict[int, list[dict]]:
    """Each block's protection equipment as ``{"kind": ..., **params}`` dicts, in id order (one query per
    5000 blocks; the ``equipment`` collections are used where already loaded)."""
    from sqlalchemy import inspect as sa_inspect

    from advisory.store.schema import Equipment

    out: dict[int, list[dict]] = {}
    missing = []
    for b in blocks:
        if "equipment" in sa_inspect(b).dict:
            out[b.id] = [{"kind": e.kind, **e.params} for e in b.equipment]
        else:
            missing.append(b.id)
    for chunk in _chunked(missing):
        for bid, kind, params in session.execute(select(Equipment.block_id, Equipment.kind, Equipment.params)
                                                 .where(Equipment.block_id.in_(chunk)).order_by(Equipment.id)):
            out.setdefault(bid, []).append({"kind": kind, **(params or {})})
    return out


def _latest_calibrations(session: Session, station_ids: Sequence[int], kind: str = "night_min",
                         before: dt.datetime | None = None) -> dict[int, calib.Calibration]:
    """Each station's newest calibration of ``kind`` (fitted at or before ``before`` when given,
    so that a past night run again is forecast only with what was known that evening)."""
    if not station_ids:
        return {}
    latest = (select(Calibration.station_id, func.max(Calibration.id).label("id"))
              .where(Calibration.kind == kind, Calibration.station_id.in_(list(station_ids)))
              .group_by(Calibration.station_id))
    if before is not None:
        latest = latest.where(Calibration.fitted_at <= before)
    latest = latest.subquery()
    rows = session.scalars(select(Calibration).join(latest, Calibration.id == latest.c.id))
    return {r.station_id: calib.Calibration.from_dict(r.params) for r in rows}


def _recent_verification(session: Session, block_ids: Sequence[int], before: dt.date, kind: str = "frost"
                         ) -> dict[int, list[dict]]:
    """The latest :data:`VERIFICATION_SHOWN` verified nights (or heat days, ``kind="heat"``) of each
    block before ``before``, newest first.

    Only those rows are read (a window function ranks each block's nights in the database), so
    the cost does not grow with the season's history.
    """
    out: dict[int, list[dict]] = defaultdict(list)
    for chunk in _chunked(block_ids):
        rank = func.row_number().over(partition_by=Verification.block_id,
                                      order_by=Verification.night.desc()).label("rank")
        sub = (select(Verification.block_id, Verification.night, Verification.forecast_c, Verification.observed_c,
                      Verification.error_c, rank)
               .where(Verification.block_id.in_(chunk), Verification.kind == kind, Verification.night < before)
               .subquery())
        for r in session.execute(select(sub).where(sub.c.rank <= VERIFICATION_SHOWN)
                                 .order_by(sub.c.block_id, sub.c.rank)):
            out[r.block_id].append({"night": r.night.isoformat(), "forecast_c": r.forecast_c,
                                    "observed_c": r.observed_c, "error_c": r.error_c})
    return out


#: Ids per ``IN (...)`` list (well below SQLite's limit on bound parameters).
_IN_CHUNK = 5000


def _chunked(values: Sequence, size: int = _IN_CHUNK):
    values = list(values)
    for k in range(0, len(values), size):
        yield values[k:k + size]
