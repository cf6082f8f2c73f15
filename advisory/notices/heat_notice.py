"""The heat block notice: the day's high, fruit sunburn, crew heat, the hours of the day.
"""

from __future__ import annotations

from advisory.assessment import Assessment
from advisory.notices import notice_parts as parts
from advisory.notices import words as w
from advisory.notices.notice_data import ChartSpec, Section
from advisory.notices.notice_parts import _finite, _Fmt, _hours_window, _time_pair
from advisory.risk import cautions as caution_texts


def _heat(a: Assessment, f: _Fmt, name: str):
    d = a.details or {}
    pts = [p for p in a.curve if _finite(p.p50_c)]
    t_max, v_max = parts._curve_extreme(a, lowest=False)
    t_max = w.parse_time(d.get("max_time_utc")) or t_max
    lead: list[str] = []
    if _finite(a.p50_c):
        s = f"High {f.t(a.p50_c)}" + (f" around {f.clock(t_max)}" if t_max else "")
        if _finite(a.p10_c) and _finite(a.p90_c):
            s += f" (8 in 10 chance: {f.rng(a.p10_c, a.p90_c)})"
        s += "."
        if d.get("max_estimated"):
            s += " Estimated from this morning's readings (no outlook entered)."
        lead.append(s)

    # fruit
    fruit = Section("fruit", "Fruit")
    sb = d.get("sunburn") if isinstance(d.get("sunburn"), dict) else {}
    thr = sb.get("threshold_c", d.get("sunburn_threshold_c"))
    sb_hours = sb.get("hours", d.get("sunburn_hours"))
    sb_start, sb_stop = _time_pair(sb)
    if _finite(thr) and pts and (sb_start is None or not _finite(sb_hours)):
        s0, s1, h = _hours_window(pts, lambda p: p.p50_c >= thr)
        sb_start, sb_stop = sb_start or s0, sb_stop or s1
        sb_hours = sb_hours if _finite(sb_hours) else h
    hot_start, hot_stop = _time_pair(d.get("hottest_hours") or {})
    if hot_start is None and pts and _finite(v_max):
        hot_start, hot_stop, _ = _hours_window(pts, lambda p: p.p50_c >= v_max - 1.0)
    if _finite(sb_hours) and sb_hours > 0:
        s = f"Fruit sunburn risk for about {w.hours(sb_hours)}"
        if sb_start and sb_stop:
            s += f" ({f.clock(sb_start)} to {f.clock(sb_stop)})"
        if _finite(thr):
            s += f", air at or above {f.t(thr)}"
        lead.append(s + ".")
        fruit.paragraphs.append(s + " in full sun on exposed fruit.")
    elif _finite(thr):
        lead.append(f"Air stays below the fruit sunburn threshold of {f.t(thr)}.")
        fruit.paragraphs.append(f"The air is not forecast to reach {f.t(thr)}, where sunburn on exposed fruit "
                                "becomes likely in full sun.")
    if hot_start and hot_stop:
        fruit.items.append(f"Hottest hours: {f.clock(hot_start)} to {f.clock(hot_stop)}")
    if sb.get("note"):
        fruit.items.append(str(sb["note"]))

    # crew
    crew = Section("crew", "Crews")
    safer = [_time_pair(x) for x in (d.get("safer_hours") or [])]
    safer = [(s0, s1) for s0, s1 in safer if s0 and s1]
    windows = [x for x in (d.get("crew_windows") or []) if isinstance(x, dict)]
    if safer:
        spans = ", ".join(f"{f.clock(s0)} to {f.clock(s1)}" for s0, s1 in safer)
        lead.append(f"Heavy work: best {spans}, still with rest in shade each hour.")
        crew.paragraphs.append(f"Hours better suited to heavy work: {spans}.")
    rows = []
    for x in windows:
        s0, s1 = _time_pair(x)
        rows.append([f"{f.clock(s0)} to {f.clock(s1)}" if s0 and s1 else "n/a",
                     str(x.get("label", "")),
                     f.t(x["heat_index_max_c"]) if _finite(x.get("heat_index_max_c")) else "n/a",
                     f.t(x["wbgt_max_c"]) if _finite(x.get("wbgt_max_c")) else "n/a",
                     str(x.get("advice", ""))])
    if rows:
        crew.table = {"header": ["Hours", "Heat stress", "Heat index up to", "WBGT up to", "What to do"],
                      "rows": rows}
    hi_pts = [p for p in pts if _finite(p.heat_index_c)]
    wb_pts = [p for p in pts if _finite(p.wbgt_c)]
    if hi_pts:
        p = max(hi_pts, key=lambda q: q.heat_index_c)
        crew.items.append(f"Heat index peaks at {f.t(p.heat_index_c)} around {f.clock(p.time_utc)}")
        if not safer and not windows:
            lead.append(f"Crew heat index peaks at {f.t(p.heat_index_c)} around {f.clock(p.time_utc)}.")
    if wb_pts:
        p = max(wb_pts, key=lambda q: q.wbgt_c)
        crew.items.append(f"Wet-bulb globe temperature (estimate) peaks at {f.t(p.wbgt_c)} around "
                          f"{f.clock(p.time_utc)}")
    for g in d.get("guidance") or []:
        crew.items.append(str(g))

    advised, _ = parts._steps(a)
    for s in advised:
        if s.start_utc is not None:
            stop = f", stop about {f.clock(s.stop_utc)}" if s.stop_utc else ""
            lead.append(f"Start {w.method_name(s.method)} at {f.clock(s.start_utc)}{stop}.")

    # hour by hour
    hours_sec = None
    if pts:
        day_pts = [p for p in pts if (not a.sunrise_utc or p.time_utc >= a.sunrise_utc)
                   and (not a.sunset_utc or p.time_utc <= a.sunset_utc)] or pts
        header = ["Time", "Air"]
        has_hi, has_wb = any(_finite(p.heat_index_c) for p in day_pts), any(_finite(p.wbgt_c) for p in day_pts)
        if has_hi:
            header.append("Heat index")
        if has_wb:
            header.append("WBGT")
        trows = []
        for p in day_pts[:24]:
            r = [f.clock(p.time_utc), f.t(p.p50_c)]
            if has_hi:
                r.append(f.t(p.heat_index_c) if _finite(p.heat_index_c) else "n/a")
            if has_wb:
                r.append(f.t(p.wbgt_c) if _finite(p.wbgt_c) else "n/a")
            trows.append(r)
        hours_sec = Section("hours", "Hour by hour", table={"header": header, "rows": trows})

    core = f"{a.block}: high {f.t(a.p50_c)}" if _finite(a.p50_c) else a.block
    if hot_start and hot_stop:
        core += f", hottest {f.clock(hot_start)[:5]}-{f.clock(hot_stop)}"
    sms_parts: list[tuple] = [
        (f"{name} - {parts._short_name(a.block, parts.SMS_NAME_MAX, '.')} {w.short_day(a.night)}:", True)]
    if _finite(a.p50_c):
        sms_parts.append((f"high {w.temp(a.p50_c, f.units, ascii_only=True)}"
                          + (f" at {f.clock(t_max)}" if t_max else "") + ".", True))
    if _finite(sb_hours) and sb_hours > 0:
        sms_parts.append((f"Sunburn risk {sb_hours:.0f} h.", 2))
    if safer:
        sms_parts.append((f"Heavy work best {f.clock(safer[0][0])[:5]}-{f.clock(safer[0][1])}.", 3))
    sms_parts.append(("Water, shade, rest; never alone.", 1))

    sections = []
    if fruit.paragraphs or fruit.items:
        sections.append(fruit)
    if crew.paragraphs or crew.items or crew.table:
        sections.append(crew)
    if hours_sec:
        sections.append(hours_sec)
    parts._shared_sections(a, f, sections, plan=bool(a.plan))

    chart = ChartSpec("heat", f"{a.block}: {w.day(a.night)}")
    if _finite(thr):
        chart.lines.append({"label": f"sunburn {f.t(thr)}", "value_c": thr, "role": "threshold"})
    th = d.get("thresholds")
    if isinstance(th, dict):
        th = [{"label": k, "value_c": v} for k, v in th.items()]
    for x in th or []:
        if isinstance(x, dict) and _finite(x.get("value_c")):
            chart.lines.append({"label": f"{x.get('label', '')} {f.t(x['value_c'])}".strip(),
                                "value_c": x["value_c"], "role": "threshold"})
    if sb_start and sb_stop and _finite(sb_hours) and sb_hours > 0:
        chart.windows.append({"label": "sunburn risk", "start_utc": w.iso(sb_start), "stop_utc": w.iso(sb_stop),
                              "role": "sunburn"})
    for s0, s1 in safer:
        chart.windows.append({"label": "heavy work", "start_utc": w.iso(s0), "stop_utc": w.iso(s1), "role": "work"})
    if a.sunrise_utc:
        parts._sun_mark(chart, f, "sunrise", a.sunrise_utc)
    if a.sunset_utc:
        parts._sun_mark(chart, f, "sunset", a.sunset_utc)

    # The heat model's own caution texts when it gives them (they cover illness signs, working in pairs
    # and the workplace heat plan); otherwise ours.
    keys = list(a.cautions) if a.cautions else list(parts.HEAT_ALWAYS)
    for s in advised:
        keys.extend(caution_texts.METHOD_CAUTIONS.get(s.method, ()))
    return core, lead, sms_parts, sections, chart, keys
