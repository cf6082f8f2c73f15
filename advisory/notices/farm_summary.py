"""The farm summary: one notice per farm and run, the blocks by severity, with the run sheet.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Collection
from typing import Any

from advisory import assessment as asm
from advisory.assessment import Assessment
from advisory.notices import words as w
from advisory.notices.notice_data import FarmRow, FarmSummary, notice_key
from advisory.notices.notice_parts import (
    FOOTER_FROST,
    FOOTER_HEAT,
    HEAT_ALWAYS,
    SMS_MAX,
    SMS_NAME_MAX,
    _caution_list,
    _clean_names,
    _finite,
    _fmt,
    _short_name,
    _sms,
    _steps,
    _style,
    sms_caution,
)
from advisory.notices.run_sheet_notice import _runsheet


def _severity(a: Assessment) -> float:
    """Sort weight: ok blocks by level rank; a block without a forecast ranks just below "protect"."""
    if a.status == asm.STATUS_OK:
        return float(a.level_rank or 0)
    if a.status in (asm.STATUS_NO_FORECAST, asm.STATUS_MISSED):
        return 2.5
    return -1.0


def _first_start(a: Assessment):
    starts = [s.start_utc for s in a.plan if s.advised and s.start_utc is not None]
    return min(starts) if starts else None


def compose_farm(assessments: list[Assessment], *, revision: int = 0,
                 changed: Collection[int] | None = None) -> FarmSummary:
    """Compose the farm summary: every block worst first, and the crew run sheet.

    Parameters
    ----------
    assessments : list of Assessment (or dicts)
        One per block, all of the same farm and night (or day).
    revision : int
        0 for the evening summary; higher when re-issued after updates.
    changed : collection of block ids, optional
        For an update (``revision`` > 0): the blocks with a new notice in
        this update; the summary says so first, and names them.  The other
        blocks stand as last sent.

    Returns
    -------
    FarmSummary

    Order: blocks by level rank (highest first), a block without a forecast
    (station silent, run missed) just below the blocks to protect, blocks with
    no night last; within a level by expected damage (highest first), then
    earliest protection start, then name.
    """
    items = [asm.from_dict(x) if isinstance(x, dict) else x for x in assessments]
    if not items:
        raise ValueError("compose_farm needs at least one assessment")
    summary_key = notice_key(items[0].kind, items[0].farm, None, items[0].night, revision)
    items = [_clean_names(x) for x in items]
    farms = {x.farm for x in items}
    if len(farms) > 1:
        raise ValueError(f"assessments of several farms: {sorted(farms)}")
    a0 = items[0]
    f = _fmt(a0.farm_tz, a0.units)
    kind = a0.kind
    far = dt.datetime.max.replace(tzinfo=dt.UTC)
    items.sort(key=lambda x: (-_severity(x), -(x.expected_kill_pct or 0.0) if x.status == asm.STATUS_OK else 0.0,
                              _first_start(x) or far, x.block))

    rows: list[FarmRow] = []
    for x in items:
        style = _style(x)
        if x.status != asm.STATUS_OK:
            low = ""
            action = {"no_forecast": "no forecast: check the station and thermometers",
                      "missed": "run missed: check thermometers",
                      "no_night": "no night to forecast" if x.kind != "heat" else "no day to forecast",
                      }.get(x.status, x.status)
        else:
            word = "high" if x.kind == "heat" else "low"
            low = (f"{word} {f.t(x.p50_c)} ({f.rng(x.p10_c, x.p90_c)})"
                   if _finite(x.p50_c) and _finite(x.p10_c) and _finite(x.p90_c) else
                   (f"{word} {f.t(x.p50_c)}" if _finite(x.p50_c) else "n/a"))
            advised, none_advised = _steps(x)
            acts = []
            for s in advised:
                if s.start_utc is not None:
                    acts.append(f"{w.method_name(s.method)} {f.clock(s.start_utc)}"
                                + (f" to {f.clock(s.stop_utc)}" if s.stop_utc else ""))
                else:
                    acts.append(f"{w.method_name(s.method)}: be ready")
            if none_advised:
                acts.append("no usable protection")
            action = "; ".join(acts) or "none needed"
        # when the middle forecast reaches T10 itself ("not reached" when it does not)
        crit = "-"
        if x.status == asm.STATUS_OK and x.kind != "heat":
            crit = f.clock(x.critical_time_utc) if x.critical_time_utc else "not reached"
        rows.append(FarmRow(x.block, x.block_id, x.status, x.level, int(x.level_rank or 0), style.name,
                            style.colour, low, crit, action, x.kind))

    worst = items[0]
    wstyle = _style(worst)
    # the summary shows the worst *level* among blocks with a forecast
    ok = [x for x in items if x.status == asm.STATUS_OK]
    top = max(ok, key=lambda x: x.level_rank or 0) if ok else worst
    tstyle = w.level_style(top.kind, top.level, top.level_rank, top.status)  # the farm's worst level, as such
    if not ok:
        tstyle = wstyle

    counts: dict[str, int] = {}
    for r in rows:
        counts[r.level_name] = counts.get(r.level_name, 0) + 1
    order_names = []
    for r in rows:
        if r.level_name not in order_names:
            order_names.append(r.level_name)
    count_txt = ", ".join(f"{counts[n]} {n}" for n in order_names)

    runsheet: dict[str, Any] = {}
    cautions_keys: list[str] = []
    starts = [(_first_start(x), x) for x in ok]
    starts = [(t, x) for t, x in starts if t is not None]
    first_start = min(starts, key=lambda p: p[0]) if starts else None
    if kind != "heat" and ok:
        runsheet, cautions_keys = _runsheet(a0, ok, f)
    elif kind == "heat":
        cautions_keys = list(HEAT_ALWAYS)

    when_txt = f"night of {w.short_day(a0.night)}" if kind != "heat" else w.short_day(a0.night)
    lead = [f"{len(rows)} block{'s' if len(rows) != 1 else ''}: {count_txt}."]
    is_update = revision > 0
    if is_update:
        names = [x.block for x in items if changed is None or x.block_id in changed]
        lead.insert(0, f"Update {revision}: new notice{'s' if len(names) != 1 else ''} for "
                       f"{', '.join(names)}; the other blocks stand as last sent." if len(names) < len(items)
                    else f"Update {revision}: new notices for every block.")
    if first_start:
        what = "First evaporative cooling start" if kind == "heat" else "First protection start"
        lead.append(f"{what} {f.clock(first_start[0])} ({first_start[1].block}).")
    bare = [x.block for x in ok if _steps(x)[1]]
    if bare:
        lead.append("At risk with no usable protection: " + ", ".join(bare) + ".")
    silent = [x.block for x in items if x.status in (asm.STATUS_NO_FORECAST, asm.STATUS_MISSED)]
    if silent:
        lead.append("No forecast for: " + ", ".join(silent) + ".")
    stale = [(x, c) for x in ok if (c := (x.details or {}).get("stage_check") or {}).get("sentence")]
    if stale:
        lead.append("Stage looks stale, check the buds: " + ", ".join(
            f"{x.block} (recorded {x.stage}, heat since suggests {c['expected_stage']})" for x, c in stale) + ".")
    core = f"{a0.farm}, {when_txt}: {count_txt}"
    subject = f"[{tstyle.name}] " + (f"Update {revision}: " if is_update else "") + core
    subject = subject[:250]
    head = w.gsm_safe(f"{_short_name(a0.farm, 24, '.')} {w.short_day(a0.night)}"
                      + (f" update {revision}:" if is_update else ":"))
    tail = w.gsm_safe(sms_caution(kind))
    room = SMS_MAX - len(tail) - 1
    bits = []
    for x, r in zip(items, rows, strict=True):
        if r.status == asm.STATUS_OK and r.level_rank < 2:
            continue
        bit = f"{_short_name(r.block, SMS_NAME_MAX, '.')} ({r.level_name})"
        st = _first_start(x) if r.status == asm.STATUS_OK else None
        if st:
            bit += f" from {f.clock(st)[:5]}"
        bits.append(w.gsm_safe(bit))
    tz_note = f" (times {f.clock(first_start[0])[6:]})" if first_start else ""
    if not bits:
        who = f"all {len(rows)} blocks" if len(rows) > 1 else _short_name(rows[0].block, SMS_NAME_MAX, '.')
        sms = _sms([(head, True), (f"{who} {tstyle.name.lower()}.", True)], sms_caution(kind))
    else:
        sms = ""
        lower = len(rows) - len(bits)
        for k in range(len(bits), 0, -1):
            # the counts say plainly what is named and what is not: "5 at risk in all, 1 lower"
            more = [f"{len(bits)} at risk in all"] if k < len(bits) else []
            if lower:
                more.append(f"{lower} lower")
            more_txt = ("; " + ", ".join(more)) if more else ""
            for tz_txt in (tz_note, ""):
                cand = f"{head} {'; '.join(bits[:k])}{more_txt}.{tz_txt}"
                if len(cand) <= room:
                    sms = f"{cand} {tail}"
                    break
            if sms:
                break
        if not sms:
            sms = _sms([(head, True), (bits[0], True), (f"{len(bits)} at risk in all.", True)], sms_caution(kind))

    return FarmSummary(
        key=summary_key, kind=kind, farm=a0.farm, farm_tz=a0.farm_tz,
        units=a0.units, night=a0.night.isoformat(), level=top.level, level_rank=int(top.level_rank or 0),
        level_name=tstyle.name, colour=tstyle.colour, subject=subject, headline=f"{tstyle.name}: {core}",
        lead=lead, sms=sms, rows=rows, runsheet=runsheet, cautions=_caution_list(cautions_keys),
        footer=FOOTER_HEAT if kind == "heat" else FOOTER_FROST, is_update=is_update,
        data={"blocks": [{"block": x.block, "block_id": x.block_id, "status": x.status, "level": x.level,
                          "level_rank": x.level_rank, "p10_c": x.p10_c, "p50_c": x.p50_c, "p90_c": x.p90_c,
                          "critical_time_utc": w.iso(x.critical_time_utc),
                          "first_start_utc": w.iso(_first_start(x))} for x in items]},
        revision=revision)
