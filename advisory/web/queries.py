"""The console's reads, straight from the ORM, each limited to the farms a viewer may see.

Tonight pages in the database (LIMIT/OFFSET) and reads the stored forecast columns (level, the
quantiles of the low); only the rows of the page have their payload decoded (first protection start,
station state as the run saw it).
"""

from __future__ import annotations

import datetime as dt
import math
from dataclasses import dataclass, field
from typing import Any

from sqlalchemy import and_, case, func, or_, select
from sqlalchemy.orm import Session, selectinload

from advisory.crops import thresholds
from advisory.errors import InputError
from advisory.store.schema import (
    AuditEntry,
    Block,
    Delivery,
    Equipment,
    Farm,
    Forecast,
    Notice,
    Observation,
    Recipient,
    StageRecord,
    Station,
    Verification,
)
from advisory.web.auth import Viewer

#: Rank of each stored level key (frost and heat), for "worst first".
LEVEL_RANKS = {"nil": 0, "easy": 0, "slight": 1, "marked": 2, "hot": 2, "serious": 3, "very_hot": 3,
               "grave": 4, "scorching": 4}
#: Level keys offered in the filter, lowest first.
LEVEL_KEYS = {"frost": ("nil", "slight", "marked", "serious", "grave"),
              "heat": ("easy", "hot", "very_hot", "scorching")}
SORTS = ("worst", "farm", "low", "crop")
PER_PAGE = 50
#: A reading older than this at the run's reference time: the station is silent.
SILENT_AFTER_MIN = 90
QC_COLUMNS = ("air_temp_qc", "dew_point_qc", "rel_humidity_qc", "wind_speed_qc", "cloud_cover_qc",
              "upper_air_temp_qc")


class NotFound(Exception):
    """Nothing there, or nothing this viewer may see (the two look the same from outside)."""


def _scope(q, viewer: Viewer, farm_col):
    if viewer.farm_ids is None:
        return q
    return q.where(farm_col.in_(sorted(viewer.farm_ids)) if viewer.farm_ids else farm_col.is_(None))


def critical(crop: str, stage: str, t10: float | None, t90: float | None):
    try:
        return thresholds.critical_temps(crop, stage, t10, t90)
    except InputError:
        return None


# ----------------------------------------------------------------------------- tonight / heat day

def farms_for(s: Session, viewer: Viewer) -> list[tuple[int, str]]:
    return list(s.execute(_scope(select(Farm.id, Farm.name), viewer, Farm.id).order_by(Farm.name)))


def crops_for(s: Session, viewer: Viewer) -> list[str]:
    return list(s.scalars(_scope(select(Block.crop).distinct(), viewer, Block.farm_id).order_by(Block.crop)))


def nights(s: Session, viewer: Viewer, kind: str, limit: int = 60) -> list[dt.date]:
    q = select(Forecast.night).distinct().where(Forecast.kind == kind)
    if viewer.farm_ids is not None:
        q = q.join(Block, Block.id == Forecast.block_id)
        q = _scope(q, viewer, Block.farm_id)
    return list(s.scalars(q.order_by(Forecast.night.desc()).limit(limit)))


@dataclass
class OverviewRow:
    block_id: int
    block: str
    farm_id: int
    farm: str
    farm_tz: str
    units: str
    crop: str
    variety: str | None
    stage: str
    stage_date: dt.date
    station_id: int
    station: str
    forecast_id: int | None
    status: str | None
    reason: str
    level: str
    reference_time: dt.datetime | None
    p10_c: float | None
    p50_c: float | None
    p90_c: float | None
    t10_override_c: float | None
    t90_override_c: float | None
    t10_c: float | None = None
    t90_c: float | None = None
    equipment: list[str] = field(default_factory=list)
    first_start_utc: dt.datetime | None = None
    station_state: list[str] = field(default_factory=list)


@dataclass
class Overview:
    kind: str
    night: dt.date | None
    rows: list[OverviewRow]
    total: int
    page: int
    pages: int
    counts: dict[str, int]


def overview(s: Session, viewer: Viewer, kind: str, night: dt.date | None, *, farm_id: int | None = None,
             level: str | None = None, crop: str | None = None, sort: str = "worst", page: int = 1,
             per_page: int = PER_PAGE) -> Overview:
    """Every active block the viewer may see with its latest forecast of the night, one page of them."""
    latest = (select(Forecast.block_id.label("block_id"), func.max(Forecast.revision).label("rev"))
              .where(Forecast.night == night, Forecast.kind == kind)
              .group_by(Forecast.block_id).subquery())
    rank = case({k: v for k, v in LEVEL_RANKS.items()}, value=Forecast.level, else_=None)
    rank = case((Forecast.status == "ok", rank), else_=None)
    cols = (Block.id, Block.name, Farm.id, Farm.name, Farm.timezone, Farm.units, Block.crop, Block.variety,
            Block.stage, Block.stage_date, Station.id, Station.code, Forecast.id, Forecast.status,
            Forecast.reason, Forecast.level, Forecast.reference_time, Forecast.min_p10_c, Forecast.min_p50_c,
            Forecast.min_p90_c, Block.t10_override_c, Block.t90_override_c)
    base = (select(*cols).select_from(Block).join(Farm, Farm.id == Block.farm_id)
            .join(Station, Station.id == Block.station_id)
            .outerjoin(latest, latest.c.block_id == Block.id)
            .outerjoin(Forecast, and_(Forecast.block_id == Block.id, Forecast.night == night,
                                      Forecast.kind == kind, Forecast.revision == latest.c.rev))
            .where(Block.active.is_(True)))
    base = _scope(base, viewer, Block.farm_id)
    if farm_id is not None:
        base = base.where(Block.farm_id == farm_id)
    if crop:
        base = base.where(Block.crop == crop)
    if level == "none":
        base = base.where(or_(Forecast.id.is_(None), Forecast.status != "ok"))
    elif level:
        base = base.where(Forecast.level == level, Forecast.status == "ok")
    low = Forecast.min_p50_c if kind == "frost" else -Forecast.min_p50_c
    order = {
        "worst": (rank.desc().nulls_last(), low.asc().nulls_last(), Farm.name, Block.name),
        "farm": (Farm.name, Block.name),
        "low": (low.asc().nulls_last(), Farm.name, Block.name),
        "crop": (Block.crop, Block.stage, Farm.name, Block.name),
    }[sort if sort in SORTS else "worst"]
    count_q = select(func.count()).select_from(base.subquery())
    total = int(s.scalar(count_q) or 0)
    sub = base.subquery()
    counts_q = select(sub.c.level, sub.c.status, func.count()).group_by(sub.c.level, sub.c.status)
    counts: dict[str, int] = {}
    for lv, st, n in s.execute(counts_q):
        key = lv if st == "ok" and lv else "none"
        counts[key] = counts.get(key, 0) + n
    pages = max(1, math.ceil(total / per_page))
    page = max(1, min(page, pages))
    rows = [OverviewRow(*r) for r in
            s.execute(base.order_by(*order).limit(per_page).offset((page - 1) * per_page))]
    _fill_page(s, rows, kind)
    return Overview(kind=kind, night=night, rows=rows, total=total, page=page, pages=pages, counts=counts)


def _fill_page(s: Session, rows: list[OverviewRow], kind: str) -> None:
    if not rows:
        return
    ids = [r.block_id for r in rows]
    equip: dict[int, list[str]] = {}
    for bid, kind_ in s.execute(select(Equipment.block_id, Equipment.kind).where(Equipment.block_id.in_(ids))
                                .order_by(Equipment.id)):
        equip.setdefault(bid, []).append(kind_)
    fids = [r.forecast_id for r in rows if r.forecast_id is not None]
    payloads = dict(s.execute(select(Forecast.id, Forecast.payload).where(Forecast.id.in_(fids))).all()) if fids else {}
    refs: dict[int, dt.datetime] = {}
    for r in rows:
        ct = critical(r.crop, r.stage, r.t10_override_c, r.t90_override_c) if kind == "frost" else None
        if ct is not None:
            r.t10_c, r.t90_c = ct.t10_c, ct.t90_c
        r.equipment = equip.get(r.block_id, [])
        p = payloads.get(r.forecast_id) or {}
        starts = [st.get("start_utc") or st.get("ready_by_utc") for st in p.get("plan") or [] if st.get("advised")]
        starts = sorted(x for x in starts if x)
        r.first_start_utc = dt.datetime.fromisoformat(starts[0]) if starts else None
        dq = p.get("data_quality") or {}
        age = dq.get("obs_age_min")
        if r.status is not None and r.status != "ok":
            r.station_state.append("no forecast")
        if isinstance(age, int | float) and age > SILENT_AFTER_MIN:
            r.station_state.append(f"silent {age / 60:.0f} h")
        if dq.get("flags"):
            r.station_state.append("flagged")
        if r.reference_time is not None:
            refs[r.station_id] = min(refs.get(r.station_id, r.reference_time), r.reference_time)
    flagged = _flagged_stations(s, refs)
    for r in rows:
        if r.station_id in flagged and "flagged" not in r.station_state:
            r.station_state.append("flagged")


def _flagged_stations(s: Session, refs: dict[int, dt.datetime]) -> set[int]:
    """Stations with readings that failed a quality check in the 24 h before the run."""
    out = set()
    qc_any = or_(*[getattr(Observation, c) != 0 for c in QC_COLUMNS])
    for sid, ref in refs.items():
        q = (select(Observation.station_id).where(Observation.station_id == sid,
                                                  Observation.time_utc >= ref - dt.timedelta(hours=24),
                                                  Observation.time_utc <= ref, qc_any).limit(1))
        if s.scalar(q) is not None:
            out.add(sid)
    return out


# ----------------------------------------------------------------------------- one block

def block(s: Session, viewer: Viewer, block_id: int) -> Block:
    b = s.scalar(select(Block).where(Block.id == block_id)
                 .options(selectinload(Block.equipment), selectinload(Block.stage_history),
                          selectinload(Block.recipients), selectinload(Block.farm), selectinload(Block.station)))
    if b is None or not viewer.sees(b.farm_id):
        raise NotFound
    return b


def block_nights(s: Session, block_id: int, kind: str = "frost") -> list[dt.date]:
    return list(s.scalars(select(Forecast.night).distinct().where(Forecast.block_id == block_id,
                                                                  Forecast.kind == kind)
                          .order_by(Forecast.night.desc())))


def latest_forecast(s: Session, block_id: int, night: dt.date, kind: str = "frost") -> Forecast | None:
    return s.scalar(select(Forecast).where(Forecast.block_id == block_id, Forecast.night == night,
                                           Forecast.kind == kind)
                    .order_by(Forecast.revision.desc()).limit(1))


def block_notices(s: Session, block_id: int, night: dt.date | None) -> list[tuple[Notice, list[Delivery]]]:
    q = select(Notice).where(Notice.block_id == block_id)
    if night is not None:
        q = q.where(Notice.night == night)
    notices = list(s.scalars(q.order_by(Notice.night.desc(), Notice.kind, Notice.revision)))
    dels: dict[int, list[Delivery]] = {}
    if notices:
        for d in s.scalars(select(Delivery).where(Delivery.notice_id.in_([n.id for n in notices]))
                           .order_by(Delivery.attempted_at, Delivery.id)):
            dels.setdefault(d.notice_id, []).append(d)
    return [(n, dels.get(n.id, [])) for n in notices]


def notice(s: Session, viewer: Viewer, notice_id: int) -> Notice:
    n = s.get(Notice, notice_id)
    if n is None or not viewer.sees(n.farm_id):
        raise NotFound
    return n


def audit(s: Session, block_id: int | None = None, farm_id: int | None = None, limit: int = 50):
    q = select(AuditEntry)
    if block_id is not None:
        q = q.where(AuditEntry.block_id == block_id)
    if farm_id is not None:
        q = q.where(AuditEntry.farm_id == farm_id)
    return list(s.scalars(q.order_by(AuditEntry.at.desc(), AuditEntry.id.desc()).limit(limit)))


# ----------------------------------------------------------------------------- skill

@dataclass
class Skill:
    name: str
    n: int = 0
    mae_c: float | None = None
    bias_c: float | None = None
    hits: int = 0
    misses: int = 0
    false_alarms: int = 0
    quiet: int = 0


def _skill(name: str, rows: list[tuple[float | None, dict]]) -> Skill:
    errs = [e for e, _ in rows if e is not None and math.isfinite(e)]
    sk = Skill(name=name, n=len(rows))
    if errs:
        sk.mae_c = sum(abs(e) for e in errs) / len(errs)
        sk.bias_c = sum(errs) / len(errs)
    for _, d in rows:
        warned, event = bool((d or {}).get("warned")), bool((d or {}).get("event"))
        if warned and event:
            sk.hits += 1
        elif event:
            sk.misses += 1
        elif warned:
            sk.false_alarms += 1
        else:
            sk.quiet += 1
    return sk


def skill(s: Session, viewer: Viewer, kind: str = "frost", *, block_id: int | None = None,
          station_id: int | None = None):
    """Verification per station and per block (MAE, bias, hits, misses, false alarms) and the
    reliability of the stored probability of going below T10 (frost)."""
    q = (select(Verification.error_c, Verification.detail, Block.id, Block.name, Farm.name, Station.id,
                Station.code)
         .join(Block, Block.id == Verification.block_id).join(Farm, Farm.id == Block.farm_id)
         .join(Station, Station.id == Block.station_id).where(Verification.kind == kind))
    q = _scope(q, viewer, Block.farm_id)
    if block_id is not None:
        q = q.where(Block.id == block_id)
    if station_id is not None:
        q = q.where(Station.id == station_id)
    by_block: dict[int, list] = {}
    by_station: dict[int, list] = {}
    names_b: dict[int, str] = {}
    names_s: dict[int, str] = {}
    bins = [[0, 0, 0.0] for _ in range(10)]  # n, events, sum of p
    for err, detail, bid, bname, fname, sid, scode in s.execute(q):
        by_block.setdefault(bid, []).append((err, detail))
        by_station.setdefault(sid, []).append((err, detail))
        names_b[bid], names_s[sid] = f"{bname} ({fname})", scode
        p = (detail or {}).get("p_below_t10")
        if isinstance(p, int | float) and math.isfinite(p):
            i = min(9, max(0, int(p * 10)))
            bins[i][0] += 1
            bins[i][1] += bool((detail or {}).get("event"))
            bins[i][2] += p
    blocks = sorted((_skill(names_b[k], v) for k, v in by_block.items()), key=lambda x: x.name)
    stations = sorted(((k, _skill(names_s[k], v)) for k, v in by_station.items()), key=lambda x: x[1].name)
    reliability = [{"lo": i / 10, "hi": (i + 1) / 10, "n": n, "observed": (ev / n if n else None),
                    "mean_p": (sp / n if n else None)} for i, (n, ev, sp) in enumerate(bins)]
    overall = _skill("all", [r for v in by_block.values() for r in v])
    return blocks, stations, reliability, overall


# ----------------------------------------------------------------------------- one station

def station(s: Session, viewer: Viewer, station_id: int) -> Station:
    st = s.get(Station, station_id)
    if st is None or not viewer.sees(st.farm_id):
        raise NotFound
    return st


@dataclass
class StationView:
    latest: list[Observation]
    window: list[Observation]
    gaps: list[tuple[dt.datetime, dt.datetime, float]]
    flags: dict[str, int]
    start: dt.datetime | None
    end: dt.datetime | None


def station_view(s: Session, station_id: int, days: int = 3) -> StationView:
    end = s.scalar(select(func.max(Observation.time_utc)).where(Observation.station_id == station_id))
    if end is None:
        return StationView([], [], [], {}, None, None)
    if isinstance(end, int):
        end = dt.datetime.fromtimestamp(end, dt.UTC)
    start = end - dt.timedelta(days=days)
    window = list(s.scalars(select(Observation).where(Observation.station_id == station_id,
                                                      Observation.time_utc >= start)
                            .order_by(Observation.time_utc)))
    steps = [(b.time_utc - a.time_utc).total_seconds() for a, b in zip(window, window[1:], strict=False)]
    typical = sorted(steps)[len(steps) // 2] if steps else 0
    gaps = [(a.time_utc, b.time_utc, (b.time_utc - a.time_utc).total_seconds() / 3600)
            for a, b in zip(window, window[1:], strict=False)
            if typical and (b.time_utc - a.time_utc).total_seconds() > 2.5 * typical]
    flags = {}
    for c in QC_COLUMNS:
        n = sum(1 for o in window if getattr(o, c))
        if n:
            flags[c.removesuffix("_qc").replace("_", " ")] = n
    return StationView(latest=list(reversed(window[-12:])), window=window, gaps=gaps, flags=flags,
                       start=start, end=end)


def station_blocks(s: Session, station_id: int) -> list[Block]:
    return list(s.scalars(select(Block).where(Block.station_id == station_id).order_by(Block.name)))


def recipient(s: Session, viewer: Viewer, recipient_id: int) -> Recipient:
    r = s.get(Recipient, recipient_id)
    if r is None or not viewer.sees(r.farm_id):
        raise NotFound
    return r


def stage_history(s: Session, block_id: int) -> list[StageRecord]:
    return list(s.scalars(select(StageRecord).where(StageRecord.block_id == block_id)
                          .order_by(StageRecord.observed_on.desc(), StageRecord.id.desc())))


def payload_value(payload: dict[str, Any] | None, key: str):
    return (payload or {}).get(key)
