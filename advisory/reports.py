"""Text the command line prints: run results, run sheets, verification skill.

Thin glue between the pipeline, the store and the renderers; no models here.
"""

from __future__ import annotations

import datetime as dt
from collections import defaultdict

import numpy as np
from sqlalchemy import select

from advisory import assessment as asm
from advisory import pipeline
from advisory import settings as settings_mod
from advisory.errors import InputError
from advisory.notices import render
from advisory.physics import sun
from advisory.risk import runsheet
from advisory.store import queries
from advisory.store.schema import Block, Farm, Forecast, Notice, Verification


def farm_zone(db, farm: str | None) -> str:
    """The IANA zone of the named farm (or of the first farm)."""
    with db.transaction() as s:
        q = select(Farm.timezone).order_by(Farm.name)
        if farm:
            q = q.where(Farm.name == farm)
        tz = s.scalar(q)
    if tz is None:
        raise InputError("no farm imported yet (use `advisory farm import FARM.toml`)" if not farm
                         else f"no farm named '{farm}'", field="--farm")
    return tz


def _default_night(db, farm: str | None, now: dt.datetime | None = None) -> dt.date:
    """Tonight (or, before noon, last night) in the zone of the first selected farm."""
    return sun.night_of(now or dt.datetime.now(dt.UTC), farm_zone(db, farm))


def block_ids_for(db, farm: str | None, names: list[str] | None) -> list[int] | None:
    if not names:
        return None
    with db.transaction() as s:
        return [queries.find_block(s, n, farm).id for n in names]


def summary_text(db, notice_ids: list[int], fmt: str = "text") -> list[str]:
    """Rendered farm summaries among the given notices."""
    out = []
    with db.transaction() as s:
        for n in s.scalars(select(Notice).where(Notice.id.in_(notice_ids), Notice.block_id.is_(None))
                           .order_by(Notice.id)):
            out.append(render.render(n.content, fmt))
    return out


def night_run(db, night: dt.date | None, *, farm: str | None = None, names: list[str] | None = None,
              update: bool = False, deliver: bool = True, fmt: str = "text", now: dt.datetime | None = None,
              settings=None) -> str:
    night = night or _default_night(db, farm, now)
    ids = block_ids_for(db, farm, names)
    settings = settings or settings_mod.load(db.url)
    res = pipeline.run_night(db, night, ids, farm=farm, update=update, deliver=deliver, now=now,
                             settings=settings)
    lines = []
    if not res.assessments and not res.skipped:
        return f"night {night}: no active blocks selected"
    lines.extend(summary_text(db, res.notices, fmt))
    if update:
        sent = sum(1 for _ in res.notices)
        lines.append(f"update of night {night}: {len(res.assessments)} blocks re-forecast, {sent} notices "
                     "(a notice goes out only when the level, the advised methods or the start time changed)")
    for msg in res.skipped:
        lines.append(f"skipped: {msg}")
    if res.deliveries:
        lines.append("deliveries: " + ", ".join(f"{k} {v}" for k, v in sorted(res.deliveries.items())))
        lines.append(f"outbox: {settings.outbox}")
    return "\n".join(lines)


def night_verify(db, night: dt.date | None, *, names: list[str] | None = None,
                 now: dt.datetime | None = None) -> str:
    now = now or dt.datetime.now(dt.UTC)
    # default: the last night that has ended (local noon to noon)
    night = night or _default_night(db, None, now - dt.timedelta(hours=12))
    res = pipeline.verify_night(db, night, block_ids_for(db, None, names), now=now)
    lines = [f"night {night}: {len(res.verified)} forecasts verified"]
    for v in res.verified:
        err = v["forecast_c"] - v["observed_c"] if v["forecast_c"] is not None else float("nan")
        lines.append(f"  {v['block']:<24} forecast {v['forecast_c']:6.1f} °C  observed {v['observed_c']:6.1f} °C"
                     f"  error {err:+.1f} °C")
    for m in res.skipped:
        lines.append(f"  skipped: {m}")
    return "\n".join(lines)


def stored_assessments(session, farm: Farm, night: dt.date, kind: str = "frost") -> list[asm.Assessment]:
    """The latest stored assessment of each of a farm's blocks for a night."""
    rows = session.scalars(select(Forecast).join(Block)
                           .where(Block.farm_id == farm.id, Forecast.night == night, Forecast.kind == kind)
                           .order_by(Forecast.block_id, Forecast.revision))
    latest: dict[int, Forecast] = {}
    for r in rows:
        latest[r.block_id] = r
    return [asm.from_dict(r.payload) for r in latest.values() if r.payload]


def run_sheet(db, farm: str, night: dt.date, fmt: str = "text") -> str:
    with db.transaction() as s:
        f = queries.find_farm(s, farm)
        items = stored_assessments(s, f, night)
        if not items:
            raise InputError(f"no forecast stored for farm '{farm}' on the night of {night} "
                             "(run `advisory night run --date ...` first)", field="--date")
        sheet = runsheet.build_run_sheet(f.name, night, f.timezone,
                                         [a for a in items if a.status == asm.STATUS_OK], units=f.units)
    return {"text": runsheet.render_text, "markdown": runsheet.render_markdown,
            "csv": runsheet.render_csv}[fmt](sheet)


def verification_report(db, *, block: str | None = None, farm: str | None = None) -> dict:
    """Skill to date per block: MAE, bias, hits, misses, false alarms (event: minimum at or below T10)."""
    with db.transaction() as s:
        q = select(Verification).join(Block).join(Farm).where(Verification.kind == "frost")
        if farm:
            q = q.where(Farm.name == farm)
        if block:
            q = q.where(Block.id == queries.find_block(s, block, farm).id)
        per: dict[str, list[Verification]] = defaultdict(list)
        names = {}
        for v in s.scalars(q.order_by(Verification.night)):
            b = s.get(Block, v.block_id)
            names[v.block_id] = f"{b.farm.name} / {b.name}"
            per[v.block_id].append(v)
        out = {"blocks": [], "event": "observed minimum at or below the stage's T10",
               "warned": "the block was put on the run sheet (level at or above the farm's protect level)"}
        for bid, vs in per.items():
            err = np.array([v.error_c for v in vs if v.error_c is not None], float)
            warned = np.array([bool(v.detail.get("warned")) for v in vs])
            event = np.array([bool(v.detail.get("event")) for v in vs])
            out["blocks"].append({
                "block": names[bid], "nights": len(vs),
                "mae_c": float(np.mean(np.abs(err))) if len(err) else None,
                "bias_c": float(np.mean(err)) if len(err) else None,
                "hits": int((warned & event).sum()), "misses": int((~warned & event).sum()),
                "false_alarms": int((warned & ~event).sum()), "quiet_nights": int((~warned & ~event).sum()),
                "last_night": vs[-1].night.isoformat(),
            })
        return out


def format_verification(data: dict) -> str:
    if not data["blocks"]:
        return "no verified nights yet (the morning step `advisory night verify` stores them)"
    lines = [f"{'block':<44} {'nights':>6} {'MAE °C':>7} {'bias °C':>8} {'hits':>5} {'misses':>6} "
             f"{'false alarms':>12}"]
    for b in data["blocks"]:
        mae = "-" if b["mae_c"] is None else f"{b['mae_c']:.2f}"
        bias = "-" if b["bias_c"] is None else f"{b['bias_c']:+.2f}"
        lines.append(f"{b['block']:<44} {b['nights']:>6} {mae:>7} {bias:>8} {b['hits']:>5} {b['misses']:>6} "
                     f"{b['false_alarms']:>12}")
    lines.append(f"event: {data['event']}; warned: {data['warned']}; bias = forecast - observed")
    return "\n".join(lines)
