"""Compose a block notice: turn an :class:`advisory.assessment.Assessment` into the words a grower reads.

:func:`compose_block` hands a frost night to :mod:`advisory.notices.frost_notice`, a heat day to
:mod:`advisory.notices.heat_notice`, and a block without a result (station silent, no night, missed
run) to :func:`_status` here; the farm summary is :mod:`advisory.notices.farm_summary`, and what
they share is :mod:`advisory.notices.notice_parts` (over :mod:`advisory.notices.words`).

A :class:`~advisory.notices.notice_data.BlockNotice` is a plain, JSON-able data object (every field is a
string, number, list or dict; times are ISO 8601 UTC text) holding the words
already written in the farm's units and local time, plus the numbers behind
them (``data``: the assessment itself, °C and UTC) and what the chart should
draw (``chart``).  :mod:`advisory.notices.render` lays it out as a text
message, plain text, Markdown, HTML or JSON; :mod:`advisory.notices.charts`
draws its curve.

Shape of every notice, top to bottom:

1. ``subject`` / ``headline``: the level name, the block and the one number.
2. ``lead``: two to four short lines a grower can read on a phone at night:
   the forecast low and its range, when it gets critical, what to do and when,
   the expected damage.
3. ``sections``: what it means for the buds (T10/T90, damage), the protection
   plan with local start and stop times and quantities, the data behind the
   forecast (age of the latest observation, quality flags), how recent nights
   verified.  Heat notes carry fruit, crew and hour-by-hour sections instead.
4. ``cautions`` and the ``footer`` that defers to local codes, workplace-safety
   rules and extension or licensed advice.

Updates (``Assessment.is_update``) are marked as updates to the evening notice
and list what changed against the previous assessment.

Heat details
------------
A heat assessment's ``details`` may hold any of the following (all optional;
times as datetimes or ISO text, temperatures °C); what is missing is derived
from the hourly ``curve`` where possible, or left out:

``max_time_utc``
    Time of the day's maximum.
``max_estimated`` (bool), ``max_source`` (text)
    The maximum was estimated from the morning's readings (no outlook).
``hottest_hours``
    ``{"start_utc", "stop_utc"}``.
``sunburn``
    ``{"threshold_c", "hours", "start_utc", "stop_utc", "note"}``: air
    temperature at which fruit sunburn becomes likely in full sun and the hours
    at or above it.  Flat keys ``sunburn_threshold_c`` and ``sunburn_hours``
    are read too.
``crew_windows``
    List of ``{"start_utc", "stop_utc", "label", "heat_index_max_c",
    "wbgt_max_c", "advice"}``: periods with their crew heat stress.
``safer_hours``
    List of ``{"start_utc", "stop_utc"}`` (or pairs): hours better suited to
    heavy work.
``guidance``
    List of text: rest, water and shade guidance.
``thresholds``
    ``{label: value_c}`` or a list of ``{"label", "value_c"}`` to draw on the chart.
"""

from __future__ import annotations

import datetime as dt
import re
from typing import Any

from advisory import assessment as asm
from advisory.assessment import Assessment
from advisory.notices import notice_parts as parts
from advisory.notices import words as w
from advisory.notices.frost_notice import _frost
from advisory.notices.heat_notice import _heat
from advisory.notices.notice_data import BlockNotice, Section, _plain, notice_key
from advisory.notices.notice_parts import _finite, _Fmt, changes


def _status(a: Assessment, f: _Fmt, name: str):
    dq = a.data_quality or {}
    heat = a.kind == "heat"
    when_txt = "today" if heat else "tonight"
    lead: list[str] = []
    if a.status == asm.STATUS_NO_FORECAST:
        latest = dq.get("latest_obs_utc")
        if latest:
            first = f"No forecast {when_txt}: station {a.station} silent since {f.when(latest)}."
        else:  # the reason may begin with the same words (advisory.runs.frost_assess._silence_reason)
            why = re.sub(r"(?i)^no forecast (tonight|today):\s*", "", a.reason or "").rstrip(".")
            first = f"No forecast {when_txt}: " + (why + "." if why else f"no usable data from station {a.station}.")
        core = f"{a.block}: no forecast {when_txt}"
        lead.append(first)
        if latest and a.reason:
            why = re.sub(r"(?i)^no forecast (tonight|today):\s*", "", a.reason).rstrip(".")
            lead.append(f"Reason: {why}.")
        next_step = ("Check the station, its power and its data feed; the next run uses new readings "
                     "as soon as they arrive.")
    elif a.status == asm.STATUS_MISSED:
        what = "morning heat run" if heat else "evening run"
        first = f"The {what} for {'' if heat else 'the night of '}{w.day(a.night)} was missed"
        first += f": {a.reason.rstrip('.')}." if a.reason else "."
        core = f"{a.block}: {what} missed"
        lead.append(first)
        next_step = "No forecast went out in time. The next scheduled run will try again."
    elif a.status == asm.STATUS_NO_NIGHT:
        if heat:
            first = f"No heat note for {w.day(a.night)}: the sun does not rise here."
        else:
            first = f"No frost forecast for the night of {w.day(a.night)}: the sun does not set here."
        core = f"{a.block}: no {'day' if heat else 'night'} to forecast"
        lead.append(first)
        if a.reason:
            lead.append(a.reason.rstrip(".") + ".")
        next_step = ""
    else:
        first = f"No forecast: {a.reason or a.status}."
        core = f"{a.block}: no forecast"
        lead.append(first)
        next_step = ""
    running = [s for s in a.plan if s.advised and getattr(s, "started_utc", None) is not None]
    for s in running:  # protection under way since an earlier notice (advisory.risk.continuity)
        lead.append(f"Keep {w.method_name(s.method)} running (started {f.clock(s.started_utc)})"
                    + (f"; stop {s.stop_rule}" if s.stop_rule else "") + ".")
    if not heat and a.status != asm.STATUS_NO_NIGHT and _finite(a.t10_c):
        lead.append(f"{a.stage.capitalize()} buds are damaged from about {f.t(a.t10_c)} (T10): check "
                    "thermometers in the block tonight.")
        lead.append(parts.bud_temperature_line(f.units))
    if next_step:
        lead.append(next_step)
    sms_parts = [(f"{name} - {parts._short_name(a.block, parts.SMS_NAME_MAX, '.')} {w.short_day(a.night)}:", True),
                 (first.split(": ", 1)[-1], True)]
    for k, s in enumerate(running):  # before the rest: a cut text must still say it
        sms_parts.insert(1 + k, (f"Keep {w.method_name(s.method)} on.", True))
    if not heat and a.status != asm.STATUS_NO_NIGHT and _finite(a.t10_c):
        sms_parts.append((f"Buds hurt from {w.temp(a.t10_c, f.units, ascii_only=True)}; check thermometers.",
                          False))
    sections = ([parts._plan_section(a, f)] if running else []) + [parts._data_section(a, f)]
    ver = parts._verification_section(a, f)
    if ver:
        sections.append(ver)
    keys = list(a.cautions or [])
    for s in running:
        keys += [k for k in s.caution_keys if k not in keys]
    return core, lead, sms_parts, sections, None, keys


#: A stage seen this long before the night is from an earlier season: a spring frost season, bud break
#: to fruit set, lasts about two to three months (common practice) [days].
STAGE_SEASON_DAYS = 120


def stage_warning(a: Assessment) -> str | None:
    """A warning when the block's recorded stage is from an earlier season (or after the night)."""
    seen = (a.details or {}).get("stage_date")
    night = a.night if isinstance(a.night, dt.date) else dt.date.fromisoformat(str(a.night))
    if not seen:
        return None
    seen = dt.date.fromisoformat(str(seen))
    if (night - seen).days > STAGE_SEASON_DAYS or seen > night:
        return (f"Check the stage: '{a.stage}' was recorded on {seen.isoformat()}, "
                f"{'after this night' if seen > night else 'in an earlier season'}; the critical temperatures "
                "here are for that stage. Record the stage seen now (advisory blocks set-stage).")
    return None


def compose_block(a: Assessment | dict, previous: Assessment | dict | None = None, *,
                  data: dict[str, Any] | None = None) -> BlockNotice:
    """Compose one block's notice.

    Parameters
    ----------
    a : Assessment or dict
        The block's assessment (a dict from :func:`advisory.assessment.to_dict` is accepted).
    previous : Assessment or dict, optional
        For an update: the assessment of the last notice sent for this block
        and night, to say what changed.
    data : dict, optional
        ``advisory.assessment.to_dict(a)`` when the caller already has it (the
        forecast payload): saves encoding the assessment a second time.

    Returns
    -------
    BlockNotice
    """
    if isinstance(a, dict):
        data = a if data is None else data
        a = asm.from_dict(a)
    if isinstance(previous, dict):
        previous = asm.from_dict(previous)
    key = notice_key(a.kind, a.farm, a.block_id, a.night, a.revision)
    if data is None:
        data = _plain(a)
    a = parts._clean_names(a)
    f = parts._fmt(a.farm_tz, a.units)
    style = parts._style(a)
    name = style.name
    if a.status != asm.STATUS_OK:
        core, lead, sms_parts, sections, chart, keys = _status(a, f, name)
    elif a.kind == "heat":
        core, lead, sms_parts, sections, chart, keys = _heat(a, f, name)
    else:
        core, lead, sms_parts, sections, chart, keys = _frost(a, f, name)

    changed = changes(a, previous) if a.is_update else []
    if a.kind != "heat" and (warn := stage_warning(a)):
        lead.insert(0, warn)
    outlook = (a.details or {}).get("night_outlook") if a.kind != "heat" and a.status == asm.STATUS_OK else None
    if isinstance(outlook, str) and " the forecast low is " in outlook:
        lead.append(parts._one_line(outlook))
    when_txt = f"night of {w.short_day(a.night)}" if a.kind != "heat" else w.short_day(a.night)
    first = "morning note" if a.kind == "heat" else "evening notice"
    prefix = f"[{name}] "
    if a.is_update:
        prefix += f"Update {a.revision} to the {first}: "
        upd = f"Update {a.revision} to the {first}"
        upd += (": " + "; ".join(changed) + ".") if changed else (
            "." if previous is None else ": small changes only; the plan stands.")
        lead = [upd] + lead
        sms_parts.insert(0, (f"Update {a.revision}:", True))
        sections.insert(0, Section("changes", "What changed", items=changed or ["Small changes only."]))
    subject = (prefix + core + f" ({when_txt})")[:250]
    headline = f"{name}: {core}"
    notice = BlockNotice(
        key=key, kind=a.kind, status=a.status,
        farm=a.farm, farm_tz=a.farm_tz, units=a.units, block_id=a.block_id, block=a.block, station=a.station,
        crop=a.crop, variety=a.variety, stage=a.stage, night=a.night.isoformat(), revision=a.revision,
        is_update=a.is_update, level=a.level, level_rank=int(a.level_rank or 0), level_name=name,
        level_meaning=style.meaning, colour=style.colour, subject=subject, headline=headline, lead=lead,
        sms=parts._sms(sms_parts, parts.sms_caution(a.kind)), sections=sections, cautions=parts._caution_list(keys),
        footer=parts.FOOTER_HEAT if a.kind == "heat" else parts.FOOTER_FROST, changes=changed, chart=chart,
        issued_utc=w.iso(a.reference_time_utc), data=data)
    return notice
