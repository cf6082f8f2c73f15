"""What the notices of every kind share: the formatter bound to a farm's zone and units
(:class:`_Fmt`, over :mod:`advisory.notices.words`), the text message and its caution, the
cautions and footers, the sections frost and heat notes both carry (plan, data, verification),
the level words of a notice and what changed since the last one.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import logging
import math
import re
from functools import lru_cache

from advisory import assessment as asm
from advisory.assessment import Assessment
from advisory.notices import words as w
from advisory.notices.notice_data import CautionText, ChartSpec, Group, Section
from advisory.risk import cautions as caution_texts

log = logging.getLogger(__name__)


_KEY_LIKE = re.compile(r"^[a-z0-9_]+$")

#: Cautions for heat notes (frost cautions live in :mod:`advisory.risk.cautions`).
HEAT_CAUTIONS: dict[str, tuple[str, str]] = {
    "heat_illness": (
        "Know the signs of heat illness",
        "Heavy sweating, cramps, headache, dizziness, nausea or unusual tiredness mean: stop, move "
        "to shade, drink water and cool down. Confusion, fainting, hot dry skin or a collapse is an "
        "emergency: call for help at once and cool the person while you wait.",
    ),
    "never_alone": (
        "Never work alone in the heat",
        "Work in pairs or within sight of others, agree check-ins, and give new or returning "
        "workers lighter loads for the first days while they get used to the heat.",
    ),
    "heat_plan": (
        "This note is not a heat plan",
        "It helps plan the day; it does not replace your workplace heat-illness plan, the water, "
        "shade and rest rules where you work, or the judgement of the people in the field.",
    ),
}
HEAT_ALWAYS = ("heat_illness", "never_alone", "heat_plan")

FOOTER_FROST = (
    "Decision support only. This notice is built from a forecast and can be wrong: check "
    "thermometers in the block through the night. Local codes, workplace-safety rules, equipment "
    "makers' instructions and advice from your extension service or a licensed adviser come first.")
FOOTER_HEAT = (
    "Decision support only. This note is built from a forecast and can be wrong. Local codes, "
    "workplace-safety and heat-illness rules, your workplace heat plan and advice from your "
    "extension service or a licensed adviser come first.")

#: A text message is one GSM 03.38 message: at most 160 characters of the basic set (``words.gsm_safe``).
#: Every message ends with its caution (below) and stays within this length, caution included.
SMS_MAX = 160
#: The caution that ends every frost or heat text message (block notices and farm summaries).
SMS_CAUTION_FROST = "Decision support only; block thermometers first."
SMS_CAUTION_HEAT = "Decision support only; local heat rules first."
#: Longest block name in a text message (longer names are shortened with "~").
SMS_NAME_MAX = 18


def sms_caution(kind: str) -> str:
    return SMS_CAUTION_HEAT if kind == "heat" else SMS_CAUTION_FROST


def bud_temperature_line(units: str) -> str:
    """The one line every frost notice carries: T10/T90 are bud temperatures, and where to read them.

    Under clear skies buds lose heat by radiation and run colder than the
    screen air, about 0.5-2 °C (common practice, from memory).
    """
    lo, hi = w.temp_delta(0.5, units).split(" ")[0], w.temp_delta(2.0, units)
    return (f"T10 and T90 are bud temperatures: under clear skies buds run {lo}-{hi} colder than the "
            "screen air, so read thermometers at bud height in the coldest part of the block.")


class _Fmt:
    """Formatting bound to one farm's zone and units (one per zone and units: see :func:`_fmt`)."""

    def __init__(self, tz: str, units: str):
        self.tz, self.units = tz, units
        self.imp = w.imperial(units)
        self.unit = w.temp_unit(units)
        self._clocks: dict = {}  # instant -> clock text, in this zone

    def t(self, c):
        """Same as :func:`words.temp` (kept in step by the tests), without re-reading the units each time."""
        if not _finite(c):
            return "n/a"
        s = f"{c * 1.8 + 32.0 if self.imp else c:.1f}"
        return f"{'0.0' if s == '-0.0' else s} {self.unit}"

    def rng(self, lo, hi):
        return w.temp_range(lo, hi, self.units)

    def d(self, c, signed=False):
        return w.temp_delta(c, self.units, signed=signed)

    def clock(self, t):
        """Same as :func:`words.clock` in this zone (a night's notices repeat the same instants)."""
        try:
            return self._clocks[t]
        except KeyError:
            if len(self._clocks) > 20_000:
                self._clocks.clear()
            s = self._clocks[t] = w.clock(t, self.tz)
            return s
        except TypeError:  # unhashable
            return w.clock(t, self.tz)

    def when(self, t):
        return w.when(t, self.tz)


@lru_cache(maxsize=64)
def _fmt(tz: str, units: str) -> _Fmt:
    return _Fmt(tz, units)


def _finite(x) -> bool:
    if type(x) is float:
        return x - x == 0.0          # False for NaN and ±inf
    return isinstance(x, int | float) and not isinstance(x, bool) and math.isfinite(x)


def _curve_extreme(a: Assessment, lowest: bool):
    pts = [p for p in a.curve if _finite(p.p50_c)]
    if not pts:
        return None, None
    p = min(pts, key=lambda q: q.p50_c) if lowest else max(pts, key=lambda q: q.p50_c)
    return p.time_utc, p.p50_c


def _steps(a: Assessment):
    advised = [s for s in a.plan if s.advised and s.method != "none"]
    none_advised = any(s.advised and s.method == "none" for s in a.plan)
    return advised, none_advised


def _sms(parts: list[tuple], caution: str = SMS_CAUTION_FROST) -> str:
    """Join parts (text, keep) into one text message of at most :data:`SMS_MAX` GSM characters,
    ending with ``caution``.

    ``keep`` is True for a part that must stay; otherwise False or a number:
    optional parts are dropped, lowest ``keep`` first (the later one of equal
    ones), until the message fits; then the text before the caution is cut.
    A part given as (text, keep, short) is shortened to ``short`` (which then
    stays) instead of dropped; as (text, keep, short, short_keep), the short
    form may itself be dropped later, by ``short_keep``.  The caution is never
    cut.
    """
    shorts = {i: (w.gsm_safe(p[2]), p[3] if len(p) > 3 else True) for i, p in enumerate(parts)
              if len(p) > 2 and p[0]}
    parts = [(w.gsm_safe(p[0]), p[1], i) for i, p in enumerate(parts) if p[0]]
    tail = w.gsm_safe(caution)
    room = SMS_MAX - len(tail) - 1
    while True:
        text = " ".join(t for t, _, _ in parts)
        if len(text) <= room:
            return f"{text} {tail}"
        opt = [(int(keep), -i) for i, (_, keep, _) in enumerate(parts) if keep is not True]
        if not opt:
            return text[: room - 3].rstrip() + "... " + tail
        i = -min(opt)[1]
        orig = parts[i][2]
        if orig in shorts:
            short, short_keep = shorts.pop(orig)
            parts[i] = (short, short_keep, orig)
        else:
            parts.pop(i)


def _short_name(name: str, n: int = 28, mark: str = "~") -> str:
    return name if len(name) <= n else name[: n - 1].rstrip() + mark


def _caution_list(keys: list[str]) -> list[CautionText]:
    """Caution keys (or literal texts) to caution texts, known keys first in their fixed order.

    Keys come from :mod:`advisory.risk.cautions` or :data:`HEAT_CAUTIONS`; an
    unknown key is logged and left out; any other text is shown as written.
    """
    out: list[CautionText] = []
    seen = set()
    known = [c for c in caution_texts.ordered(keys)]
    for c in known:
        out.append(CautionText(c.key, c.title, c.text))
        seen.add(c.key)
    for k in keys:
        if k in seen:
            continue
        seen.add(k)
        if k in HEAT_CAUTIONS:
            title, text = HEAT_CAUTIONS[k]
            out.append(CautionText(k, title, text))
        elif k not in caution_texts.CAUTIONS:
            if _KEY_LIKE.match(str(k)):
                log.warning("unknown caution key %r left out of the notice", k)
            else:
                out.append(CautionText("note", "", str(k)))
    return out


def _sun_mark(chart: ChartSpec, f: _Fmt, role: str, t_utc) -> None:
    """Mark sunrise or sunset (``role``, also the mark's word) on a notice's chart at its local time."""
    chart.marks.append({"label": f"{role} {f.clock(t_utc)}", "time_utc": w.iso(t_utc), "role": role})


def _time_pair(x):
    """(start, stop) from a dict with start_utc/stop_utc or a 2-sequence."""
    if isinstance(x, dict):
        return w.parse_time(x.get("start_utc") or x.get("start")), w.parse_time(x.get("stop_utc") or x.get("stop")
                                                                                or x.get("end_utc"))
    if isinstance(x, list | tuple) and len(x) == 2:
        return w.parse_time(x[0]), w.parse_time(x[1])
    return None, None


def _hours_window(points, cond):
    """Start and end (UTC) of the hours where ``cond(point)`` holds, and how many hours.

    Each point stands for the hour it starts (as in the crew windows), so the end is the end of the
    last such hour.
    """
    hit = [p for p in points if cond(p)]
    if not hit:
        return None, None, 0.0
    step_h = 1.0
    if len(points) > 1:
        step_h = max((points[1].time_utc - points[0].time_utc).total_seconds() / 3600.0, 1e-6)
    return hit[0].time_utc, hit[-1].time_utc + dt.timedelta(hours=step_h), len(hit) * step_h


# --------------------------------------------------------------------------------------------------
# Sections shared by frost and heat
# --------------------------------------------------------------------------------------------------

def _rules(a: Assessment, s, f: _Fmt) -> tuple[str, str]:
    """Start and stop rules; rewritten from the numbers for a farm in °F (the plan's texts are in °C)."""
    start, stop = s.start_rule, s.stop_rule
    if not w.imperial(f.units) or a.kind == "heat":
        return start, stop
    q = s.quantities or {}
    wb, air = q.get("start_wet_bulb_c"), q.get("start_air_temp_c")
    crit = (a.details or {}).get("critical_c", a.t10_c)
    if _finite(wb):
        start = f"when the wet bulb falls to {f.t(wb)}" + (
            f" (air about {f.t(air)} at the forecast dew point)" if _finite(air) else "")
    elif _finite(air):
        start = f"when the air falls to {f.t(air)}"
    if s.method == "overtree_sprinkler" and _finite(crit):
        stop = f"after sunrise, once the wet bulb is above {f.t(crit)} and the ice is melting; never earlier"
    elif _finite(air):
        stop = f"after sunrise, once the air is back above {f.t(air)}"
    return start, stop


#: Quantities shown for a method that is not advised (they explain why).
_ADEQUACY_KEYS = ("rate_needed_mm_h", "required_rate_mm_h", "rate_available_mm_h", "rate_mm_h", "inversion_c")
#: How the plan's note on a wind machine's inversion begins (``risk.protection.wind_machine``).
_INVERSION_NOTE = "Inversion "


def _plan_section(a: Assessment, f: _Fmt) -> Section:
    sec = Section("plan", "Protection plan" if a.kind != "heat" else "Cooling plan")
    if not a.plan:
        sec.paragraphs.append("No protection equipment is recorded for this block.")
        return sec
    order = sorted(a.plan, key=lambda s: (not s.advised, s.method == "none"))
    has_equipment = any(s.method != "none" for s in a.plan)
    for s in order:
        if s.method == "none":
            title = "No usable protection" if has_equipment else w.method_name("none").capitalize()
            g = Group(title, "AT RISK" if s.advised else "")
            if has_equipment:  # each method's own group says why (its note would say it twice)
                g.lines.append("None of the equipment recorded for this block can be used tonight; "
                               "why, method by method, below.")
            else:
                g.lines.extend(s.notes)
            sec.groups.append(g)
            continue
        ready = w.parse_time(getattr(s, "ready_by_utc", None))
        started = getattr(s, "started_utc", None)
        if s.advised and started is not None:
            tag = "KEEP RUNNING"
        elif s.advised and s.start_utc is not None:
            tag = "RUN"
        elif s.advised:
            tag = "BE READY"
        else:
            tag = "not advised"
        g = Group(w.method_name(s.method).capitalize(), tag)
        start_rule, stop_rule = _rules(a, s, f)
        q = {k: v for k, v in (s.quantities or {}).items()
             if k not in ("start_air_temp_c", "start_wet_bulb_c") and v is not None}
        if any(n.startswith(_INVERSION_NOTE) for n in s.notes):
            q.pop("inversion_c", None)  # the note gives it, and says whether it was measured or estimated
        if not s.advised:
            # Why not, and the figures that say so; no times, amounts or run instructions ("keep running
            # until ...") that could read as an order for a method the plan does not advise.
            g.lines.extend(n for n in s.notes if "keep running" not in n.lower())
            q = {k: v for k, v in q.items() if k in _ADEQUACY_KEYS}
            if q:
                g.lines.append("; ".join(f"{w.quantity_label(k)} {w.quantity(k, v, f.units)}" for k, v in q.items()))
            # No start rule either: for a method ruled out tonight it would read as an instruction.
            sec.groups.append(g)
            continue
        if started is not None:
            g.lines.append(f"Running since {f.clock(started)} (started on an earlier notice of the night)")
        elif s.start_utc is not None:
            g.lines.append(f"Start {f.clock(s.start_utc)}" + (f", {start_rule}" if start_rule else ""))
            if ready is not None and ready < s.start_utc:
                g.lines.append(f"Be ready by {f.clock(ready)}: that is when it starts if the night runs colder")
        elif ready is not None:
            g.lines.append(f"Only if colder than forecast: start about {f.clock(ready)}"
                           + (f", {start_rule}" if start_rule else ""))
        elif start_rule:
            g.lines.append(f"Start {start_rule}")
        if s.stop_utc is not None:
            open_ = bool(getattr(s, "stop_open", False))
            g.lines.append(f"Stop {'not before' if open_ else 'about'} {f.clock(s.stop_utc)}"
                           + (f", {stop_rule}" if stop_rule else ""))
        elif stop_rule:
            g.lines.append(f"Stop {stop_rule}")
        if q:
            g.lines.append("; ".join(f"{w.quantity_label(k)} {w.quantity(k, v, f.units)}" for k, v in q.items()))
        if s.estimated:
            g.lines.append("Some inputs are estimates (no direct measurement); check in the block.")
        g.lines.extend(s.notes)
        sec.groups.append(g)
    return sec


def _data_section(a: Assessment, f: _Fmt) -> Section:
    sec = Section("data", "Data behind this notice")
    dq = a.data_quality or {}
    run = "evening run" if a.kind != "heat" else "morning run"
    if a.reference_time_utc:
        sec.items.append(f"Issued {f.when(a.reference_time_utc)} ({'update ' + str(a.revision) if a.is_update else run})")
    latest = dq.get("latest_obs_utc")
    age_min = dq.get("obs_age_min")
    if latest or _finite(age_min):
        s = "Latest observation: " + (f.when(latest) if latest else "time unknown")
        if _finite(age_min):
            s += f", {w.age(age_min)} old at the run"
        sec.items.append(s)
    sec.items.append(f"Station: {a.station}")
    flags = dq.get("flags")
    if isinstance(flags, dict):
        flags = [f"{k}: {v}" for k, v in flags.items()]
    if flags:
        sec.items.append("Quality flags: " + "; ".join(str(x) for x in flags))
    elif dq:
        sec.items.append("Quality flags: none")
    state = {k: v for k, v in dq.items()
             if k not in ("latest_obs_utc", "obs_age_min", "flags") and _finite(v)}
    if state:
        sec.items.append(("Evening readings: " if a.kind != "heat" else "Morning readings: ")
                         + ", ".join(f"{w.quantity_label(k)} {w.quantity(k, v, f.units)}" for k, v in state.items()))
    if a.model:
        sec.items.append(_model_line(a))
    outlook = (a.details or {}).get("night_outlook") if a.kind != "heat" else None
    if isinstance(outlook, str) and outlook.strip():
        sec.items.append(_one_line(outlook))
    curve_model = (a.details or {}).get("curve_model") if a.kind == "heat" else None
    if isinstance(curve_model, str) and curve_model.strip():
        sec.items.append("Hourly curve: " + _one_line(curve_model))
    if a.sunset_utc or a.sunrise_utc:
        parts = []
        if a.sunset_utc:
            parts.append(f"sunset {f.clock(a.sunset_utc)}")
        if a.sunrise_utc:
            parts.append(f"sunrise {f.clock(a.sunrise_utc)}")
        sec.items.append("Sun: " + ", ".join(parts))
    return sec


def _shared_sections(a: Assessment, f: _Fmt, sections: list[Section], *, plan: bool = True) -> None:
    """Append the sections frost and heat notes both end with: the plan (unless ``plan`` is false),
    the data behind the forecast, and how recent forecasts verified (when there are any)."""
    if plan:
        sections.append(_plan_section(a, f))
    sections.append(_data_section(a, f))
    ver = _verification_section(a, f)
    if ver:
        sections.append(ver)


def _model_line(a: Assessment) -> str:
    """What the forecast rests on, in words (a physical model is not "fitted")."""
    n = int(a.training_nights or 0)
    unit = "days" if a.kind == "heat" else "nights"
    if a.kind != "heat" and a.model == "physical":
        if n:
            return (f"Model: physical cooling model, its spread learned from {n} {unit} at this station "
                    "(too few yet for a calibration of its own)")
        return "Model: physical cooling model (no checked nights at this station yet)"
    if a.kind != "heat" and a.model == "calibrated":
        return f"Model: calibrated on {n} {unit} at this station"
    return f"Model: {a.model}" + (f", fitted on {n} {unit} at this station" if n else "")


def _verification_section(a: Assessment, f: _Fmt) -> Section | None:
    rows = [r for r in (a.verification or []) if isinstance(r, dict)]
    if not rows:
        return None
    rows = sorted(rows, key=lambda r: str(r.get("night", "")))[-5:]
    what = "low" if a.kind != "heat" else "high"
    sec = Section("verification", "How recent forecasts verified here")
    errs = []
    table_rows = []
    for r in rows:
        fc, ob, er = r.get("forecast_c"), r.get("observed_c"), r.get("error_c")
        if not _finite(er) and _finite(fc) and _finite(ob):
            er = fc - ob
        if _finite(er):
            errs.append(er)
        table_rows.append([w.short_day(str(r.get("night", ""))), f.t(fc) if _finite(fc) else "n/a",
                           f.t(ob) if _finite(ob) else "n/a", f.d(er, signed=True) if _finite(er) else "n/a"])
    sec.table = {"header": ["Night" if a.kind != "heat" else "Day", f"Forecast {what}", "Observed",
                            "Forecast minus observed"], "rows": table_rows}
    if errs:
        mae = sum(abs(e) for e in errs) / len(errs)
        bias = sum(errs) / len(errs)
        lean = "about right on average"
        if bias >= 0.3:
            lean = f"too warm by {f.d(bias)} on average"
        elif bias <= -0.3:
            lean = f"too cold by {f.d(-bias)} on average"
        sec.paragraphs.append(f"Last {len(errs)} {'nights' if a.kind != 'heat' else 'days'}: typical miss "
                              f"{f.d(mae)}; forecasts ran {lean}.")
    return sec


def _style(a: Assessment) -> w.LevelStyle:
    """How a notice shows its level: a frost level that means "protect" on a block with no usable
    protection tonight is shown as what it is (at risk, unprotected), not as an order."""
    if a.kind != "heat" and a.status == asm.STATUS_OK and _steps(a)[1]:
        return w.unprotected_style(a.kind, a.level, a.level_rank, a.status)
    return w.level_style(a.kind, a.level, a.level_rank, a.status)


def _status_name(a: Assessment) -> str:
    return _style(a).name


def changes(a: Assessment, previous: Assessment | None) -> list[str]:
    """What changed between the previous notice's assessment and this one, in plain words."""
    if previous is None:
        return []
    f = _fmt(a.farm_tz, a.units)
    out = []
    if previous.status != a.status or previous.level != a.level:
        out.append(f"level {_status_name(previous)} → {_status_name(a)}")
    if _finite(a.p50_c) and _finite(previous.p50_c) and abs(a.p50_c - previous.p50_c) >= 0.3:
        out.append(f"{'low' if a.kind != 'heat' else 'high'} {f.t(previous.p50_c)} → {f.t(a.p50_c)}")
    pc, ac = previous.critical_time_utc, a.critical_time_utc
    if (pc is None) != (ac is None):
        out.append(f"critical temperature now reached at {f.clock(ac)}" if ac
                   else "no longer reaches the critical temperature")
    elif pc and ac and abs((ac - pc).total_seconds()) >= 600:
        out.append(f"critical temperature reached at {f.clock(pc)} → {f.clock(ac)}")
    before = {s.method: s for s in previous.plan}
    for s in a.plan:
        m = w.method_name(s.method)
        p = before.get(s.method)
        if p is None or p.advised != s.advised:
            if s.method == "none":
                continue
            out.append(f"{m} now advised" if s.advised else f"{m} no longer advised")
            continue
        if not s.advised:
            continue
        if (p.start_utc is None) != (s.start_utc is None) or (
                p.start_utc and s.start_utc and abs((s.start_utc - p.start_utc).total_seconds()) >= 600):
            out.append(f"{m} start {f.clock(p.start_utc) if p.start_utc else 'not set'} → "
                       f"{f.clock(s.start_utc) if s.start_utc else 'not set'}")
        if p.stop_utc and s.stop_utc and abs((s.stop_utc - p.stop_utc).total_seconds()) >= 1800:
            out.append(f"{m} stop {f.clock(p.stop_utc)} → {f.clock(s.stop_utc)}")
    return out


def _one_line(text):
    """Names on one line: control characters and runs of white space become one space."""
    if text is None:
        return None
    return " ".join("".join(ch if ch.isprintable() else " " for ch in str(text)).split())


_NAME_FIELDS = ("farm", "block", "station", "variety", "stage", "crop")


def _clean_names(a: Assessment) -> Assessment:
    """``a`` with its names on one line (a copy only when a name needs it)."""
    if all((v := getattr(a, k)) is None or (v.isprintable() and "  " not in v and v == v.strip())
           for k in _NAME_FIELDS):
        return a
    return dataclasses.replace(a, farm=_one_line(a.farm), block=_one_line(a.block), station=_one_line(a.station),
                               variety=_one_line(a.variety), stage=_one_line(a.stage), crop=_one_line(a.crop))
