"""Small shared queries."""

from __future__ import annotations

from sqlalchemy import select
from sqlalchemy.orm import Session, selectinload

from advisory.errors import NotFoundError
from advisory.store.schema import Block, Farm, Station


def find_farm(session: Session, name: str) -> Farm:
    farm = session.scalar(select(Farm).where(Farm.name == name))
    if farm is None:
        known = ", ".join(session.scalars(select(Farm.name).order_by(Farm.name))) or "none imported yet"
        raise NotFoundError(f"no farm named '{name}' (farms: {known})", field="--farm")
    return farm


def find_station(session: Session, code: str) -> Station:
    st = session.scalar(select(Station).where(Station.code == code))
    if st is None:
        known = ", ".join(session.scalars(select(Station.code).order_by(Station.code))) or "none imported yet"
        raise NotFoundError(f"no station with id '{code}' (stations: {known})", field="STATION")
    return st


def find_block(session: Session, name: str, farm: str | None = None) -> Block:
    """A block by name; ``farm`` is needed only when two farms use the same block name."""
    q = select(Block).join(Farm).where(Block.name == name)
    if farm:
        q = q.where(Farm.name == farm)
    rows = list(session.scalars(q.options(selectinload(Block.equipment), selectinload(Block.stage_history))))
    if not rows:
        raise NotFoundError(f"no block named '{name}'" + (f" on farm '{farm}'" if farm else ""), field="NAME")
    if len(rows) > 1:
        farms = ", ".join(sorted(b.farm.name for b in rows))
        raise NotFoundError(f"block name '{name}' is used on several farms ({farms}); add --farm",
                            field="NAME")
    return rows[0]


def blocks_query(farm: str | None = None, names: list[str] | None = None, active_only: bool = True):
    q = (select(Block).join(Farm)
         .options(selectinload(Block.equipment), selectinload(Block.station), selectinload(Block.farm),
                  selectinload(Block.recipients))
         .order_by(Farm.name, Block.name))
    if farm:
        q = q.where(Farm.name == farm)
    if names:
        q = q.where(Block.name.in_(names))
    if active_only:
        q = q.where(Block.active.is_(True))
    return q
