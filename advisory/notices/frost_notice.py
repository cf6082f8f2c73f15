"""The frost block notice: the night's low, the buds at their stage, the protection plan.
"""

from __future__ import annotations

from advisory.assessment import Assessment
from advisory.crops import thresholds
from advisory.notices import notice_parts as parts
from advisory.notices import words as w
from advisory.notices.notice_data import ChartSpec, Section
from advisory.notices.notice_parts import _finite, _Fmt
from advisory.risk import cautions as caution_texts
from advisory.risk import economics


def _frost(a: Assessment, f: _Fmt, name: str):
    d = a.details or {}
    t_min = w.parse_time(d.get("time_of_min_utc")) or parts._curve_extreme(a, lowest=True)[0]
    advised, none_advised = parts._steps(a)
    lead: list[str] = []
    if _finite(a.p50_c):
        s = f"Low {f.t(a.p50_c)}" + (f" around {f.clock(t_min)}" if t_min else "")
        if _finite(a.p10_c) and _finite(a.p90_c):
            s += f" (8 in 10 chance: {f.rng(a.p10_c, a.p90_c)})"
        lead.append(s + ".")
    stage = a.stage
    if _finite(a.t10_c):
        # The critical time is when the middle forecast reaches T10 itself (protection starts earlier).
        if a.critical_time_utc:
            s = f"Critical for {stage} buds ({f.t(a.t10_c)}) reached at {f.clock(a.critical_time_utc)}"
            if _finite(a.hours_below_t10) and a.hours_below_t10 > 0:
                s += f", about {w.hours(a.hours_below_t10)} at or below it"
            lead.append(s + ".")
        elif _finite(a.p10_c) and a.p10_c <= a.t10_c:
            lead.append(f"Critical for {stage} buds ({f.t(a.t10_c)}) not reached on the middle forecast; "
                        "the cold end of the range goes below it.")
        else:
            lead.append(f"Critical for {stage} buds ({f.t(a.t10_c)}) not reached.")
    stage_lines = _stage_check_lines(a, f)
    lead.extend(stage_lines)
    actions = []
    for s in advised:
        m = w.method_name(s.method)
        ready = w.parse_time(getattr(s, "ready_by_utc", None))
        started = getattr(s, "started_utc", None)
        if started is not None:  # under way since an earlier notice
            txt = f"Keep {m} running (started {f.clock(started)})"
            if s.stop_utc is not None:
                txt += f", stop {'not before' if s.stop_open else 'about'} {f.clock(s.stop_utc)}"
            actions.append(txt)
        elif s.start_utc is not None:
            txt = f"Start {m} at {f.clock(s.start_utc)}"
            if ready is not None and ready < s.start_utc:
                txt += f" (ready by {f.clock(ready)} in case it runs colder)"
            if s.stop_utc is not None:
                open_ = bool(getattr(s, "stop_open", False))
                txt += f", stop {'not before' if open_ else 'about'} {f.clock(s.stop_utc)}"
            actions.append(txt)
        elif ready is not None:
            actions.append(f"Have {m} ready by {f.clock(ready)}; start only if it gets colder than forecast")
        else:
            actions.append(f"Have {m} ready" + (f"; start {s.start_rule}" if s.start_rule else ""))
    if actions:
        lead.append(". ".join(actions) + ".")
    elif none_advised:
        lead.append("No usable protection on this block tonight: check the buds, call your adviser tonight "
                    "and record the stage.")
    elif a.level_rank >= 2:
        lead.append("No protection run advised on the middle forecast; have it ready and check thermometers.")
    elif a.level_rank == 1:
        lead.append("No protection needed on this forecast; check a thermometer late in the night.")
    else:
        lead.append("No protection needed tonight.")
    eco_lines = _economics_lines(a)
    lead.extend(eco_lines)
    if _finite(a.expected_kill_pct) and (a.level_rank >= 1 or a.expected_kill_pct >= 0.5):
        s = f"Expected bud loss {w.pct(a.expected_kill_pct / 100.0)}"
        if _finite(a.p_kill_ge_10pct):
            s += f"; chance of losing 10 % or more: {w.pct(a.p_kill_ge_10pct)}"
        lead.append(s + ".")

    # headline, subject, text message
    core = f"{a.block}: low {f.t(a.p50_c)}" if _finite(a.p50_c) else a.block
    if a.critical_time_utc:
        core += f", critical at {f.clock(a.critical_time_utc)}"
    elif _finite(a.p50_c) and _finite(a.t10_c):
        core += ", critical not reached"
    sms_parts: list[tuple] = [
        (f"{name} - {parts._short_name(a.block, parts.SMS_NAME_MAX, '.')} {w.short_day(a.night)}:", True)]
    if _finite(a.p50_c):
        low = f"low {w.temp(a.p50_c, f.units, ascii_only=True)}"
        if _finite(a.p10_c) and _finite(a.p90_c):  # shortened to the low alone first when space is short
            sms_parts.append((f"{low} ({w.temp_range(a.p10_c, a.p90_c, f.units, ascii_only=True)}).", 1,
                              f"{low}."))
        else:
            sms_parts.append((f"{low}.", True))
    for s in advised:  # what to do must stay
        if s.start_utc is not None:
            stop = f"-{f.clock(s.stop_utc)}" if s.stop_utc else f" {f.clock(s.start_utc)[6:]}"
            on = " on since " if getattr(s, "started_utc", None) is not None else " "
            sms_parts.append((f"{w.method_name(s.method).capitalize()}{on}{f.clock(s.start_utc)[:5]}{stop}.", True))
    if none_advised:
        sms_parts.append(("Check buds; call adviser tonight.", True))
    check = (a.details or {}).get("stage_check") or {}
    if check.get("sentence") and check.get("expected_stage"):  # the figures may rest on a stale stage
        sms_parts.append((f"Stage may be {check['expected_stage']}; check buds.", 2,
                          f"Stage now {check['expected_stage']}?", 2))
    if a.critical_time_utc:  # when the air reaches T10, kept before the range when space is short
        sms_parts.append((f"Critical at {f.clock(a.critical_time_utc)[:5]}.", 2))

    # body
    sections = []
    buds = Section("buds", "What it means for the buds")
    if _finite(a.t10_c) and _finite(a.t90_c):
        crop = w.crop_name(a.crop) + (f" ({a.variety})" if a.variety else "")
        buds.paragraphs.append(
            f"{crop[:1].upper() + crop[1:]} at {stage}: about 10 % of buds die after half an hour at {f.t(a.t10_c)} "
            f"(T10) and 90 % at {f.t(a.t90_c)} (T90).")
    if _finite(a.expected_kill_pct):
        buds.items.append(f"Expected bud loss: {w.pct(a.expected_kill_pct / 100.0)}")
    if _finite(a.p_kill_ge_10pct):
        buds.items.append(f"Chance of losing 10 % of buds or more: {w.pct(a.p_kill_ge_10pct)}")
    if _finite(d.get("p_kill_ge_90pct")):
        buds.items.append(f"Chance of losing 90 % or more: {w.pct(d['p_kill_ge_90pct'])}")
    if _finite(a.p_below_t10):
        s = f"Chance the low reaches T10: {w.pct(a.p_below_t10)}"
        if _finite(a.p_below_t90):
            s += f"; reaches T90: {w.pct(a.p_below_t90)}"
        buds.items.append(s)
    if _finite(a.hours_below_t10):
        s = f"Time at or below T10: {w.hours(a.hours_below_t10)} on the middle forecast"
        if _finite(d.get("hours_below_t10_cold")):
            s += f", {w.hours(d['hours_below_t10_cold'])} if colder"
        buds.items.append(s)
    buds.paragraphs.append(parts.bud_temperature_line(f.units))
    if a.critical_source:
        buds.items.append(f"Critical temperatures: {a.critical_source}")
    other_family = thresholds.cultivar_note(a.crop, a.variety, a.critical_source)
    if other_family:
        buds.paragraphs.append(other_family)
    buds.paragraphs.extend(stage_lines)
    sections.append(buds)
    parts._shared_sections(a, f, sections)
    if eco_lines:
        plan = next((sec for sec in sections if sec.key == "plan"), None)
        if plan is not None:
            plan.paragraphs.extend(eco_lines)
            plan.paragraphs.append(ECONOMICS_NOTE)

    chart = ChartSpec("frost", f"{a.block}: night of {w.day(a.night)}")
    if _finite(a.t10_c):
        chart.lines.append({"label": f"T10 {f.t(a.t10_c)}", "value_c": a.t10_c, "role": "t10"})
    if _finite(a.t90_c):
        chart.lines.append({"label": f"T90 {f.t(a.t90_c)}", "value_c": a.t90_c, "role": "t90"})
    for s in advised:
        q = s.quantities or {}
        wb_start = q.get("start_wet_bulb_c")
        if _finite(wb_start):
            chart.curves.append("wet_bulb")  # the wet bulb is drawn only where a plan starts on it
            chart.lines.append({"label": f"start: wet bulb {f.t(wb_start)}",
                                "value_c": wb_start, "role": "start"})
        elif _finite(q.get("start_air_temp_c")):
            chart.lines.append({"label": f"start: air {f.t(q['start_air_temp_c'])}",
                                "value_c": q["start_air_temp_c"], "role": "start"})
        if s.start_utc is not None:
            chart.windows.append({"label": w.method_name(s.method), "start_utc": w.iso(s.start_utc),
                                  "stop_utc": w.iso(s.stop_utc or a.sunrise_utc or s.start_utc), "role": "protect"})
        ready = w.parse_time(getattr(s, "ready_by_utc", None))
        if ready is not None and (s.start_utc is None or ready < s.start_utc):
            chart.marks.append({"label": f"ready by {f.clock(ready)[:5]}", "time_utc": w.iso(ready), "role": "ready"})
    chart.curves = list(dict.fromkeys(chart.curves))
    if a.critical_time_utc:
        chart.marks.append({"label": f"air at T10 {f.clock(a.critical_time_utc)[:5]}",
                            "time_utc": w.iso(a.critical_time_utc), "role": "critical"})
    if a.sunset_utc:
        parts._sun_mark(chart, f, "sunset", a.sunset_utc)
    if a.sunrise_utc:
        parts._sun_mark(chart, f, "sunrise", a.sunrise_utc)

    keys = list(a.cautions or [])
    if not keys and (advised or none_advised):
        for s in a.plan:
            if s.advised:
                keys.extend(caution_texts.cautions_for_method(s.method))
    if keys and (advised or none_advised or a.level_rank >= 2):
        keys.extend(caution_texts.ALWAYS)
    return core, lead, sms_parts, sections, chart, keys


#: Beside the economics lines in the plan section: what they rest on, and whose decision it is.
ECONOMICS_NOTE = ("The money figures are estimates from the crop value and costs on file for this block and "
                  "tonight's forecast range; they support your decision, they do not make it.")


def _cap(text: str) -> str:
    return text[:1].upper() + text[1:]


def _stage_check_lines(a: Assessment, f: _Fmt) -> list[str]:
    """The stage check (when the heat since the recorded stage suggests another stage) and, when it is
    worse, the risk at the expected stage; the recorded stage still drives the figures above."""
    c = (a.details or {}).get("stage_check") or {}
    if not c.get("sentence"):
        return []
    out = [_cap(c["sentence"]) + "."]
    p_exp, t10 = c.get("expected_p_kill_ge_10pct"), c.get("expected_t10_c")
    if _finite(p_exp) and _finite(t10) and _finite(a.p_kill_ge_10pct) \
            and w.pct(p_exp) != w.pct(a.p_kill_ge_10pct) and p_exp > a.p_kill_ge_10pct:
        out.append(f"At {c['expected_stage']} (T10 {f.t(t10)}) the chance of losing 10 % or more would be "
                   f"{w.pct(p_exp)}, not {w.pct(a.p_kill_ge_10pct)}.")
    return out


def _economics_lines(a: Assessment) -> list[str]:
    """One line per method with figures (the advised one, or each usable one, best first); none for a
    block without a crop value and costs."""
    out = []
    rows = (a.details or {}).get("economics") or []
    for e in rows:
        s = economics.economics_sentence(e.get("loss_without"), e.get("loss_with"), e.get("running_cost"),
                                         e.get("currency"))
        if s:
            out.append(f"{_cap(w.method_name(e.get('method', '')))}: {s}.")
    return out
