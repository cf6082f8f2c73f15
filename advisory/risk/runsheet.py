"""The crew run sheet for one farm and night.

Pure: takes the :class:`advisory.risk.frost_data.BlockRisk` objects (or the stored
:class:`advisory.assessment.Assessment` objects) of a farm's blocks for a night
and returns strings.  Every block that needs protection
appears once per method in its plan, in the order the crew must start them
(start time, or the cold-case "ready by" time when the start is reached only in
a colder night).  Blocks at risk with no usable protection follow in their own
section, then the cautions that apply.

Three renderings: :func:`render_text` (narrow plain text for a phone),
:func:`render_markdown` and :func:`render_csv` (one row per block and method,
SI units, local times in ISO 8601 with their UTC offset).

Times are shown in the farm's IANA zone with the zone abbreviation (for
example "23:45 MDT"); on a night when clocks change the abbreviation changes
with them.  A night is named by the local date of its evening.
"""

from __future__ import annotations

import csv
import io
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import UTC, date, datetime
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from advisory.errors import InputError
from advisory.risk import cautions as caut
from advisory.risk import economics
from advisory.risk.frost_assessment import risk_from_assessment
from advisory.risk.frost_data import BlockRisk, MethodPlan

METHOD_NAMES = {
    "overtree_sprinkler": "Over-tree sprinklers",
    "undertree_sprinkler": "Under-tree sprinklers",
    "wind_machine": "Wind machine",
    "heater": "Heaters",
    "none": "No usable protection",
}

_M3_TO_US_GAL = 264.172052
_L_PER_HA_TO_US_GAL_PER_ACRE = 0.106907
_L_TO_US_GAL = 0.264172052


@dataclass(frozen=True)
class RunSheetRow:
    """One line of the run sheet: one block and one method (times tz-aware, local)."""

    order: int
    risk: BlockRisk
    plan: MethodPlan
    ready_by: datetime | None
    start: datetime | None
    stop: datetime | None
    #: Expected net saving of protecting the block tonight (None: no figures).
    saving: float | None = None
    #: Whether the crew is expected to reach the block (False only when the crew is short).
    reached: bool = True


@dataclass(frozen=True)
class RunSheet:
    """A farm's run sheet for one night.

    Attributes
    ----------
    farm : str
    night : date
        Local date of the evening.
    timezone : str
        IANA zone of the farm.
    generated_utc : datetime
    units : str
        "metric" or "imperial" (text and Markdown only; CSV is always SI).
    rows : tuple of RunSheetRow
        Protection to run, in start order.
    unprotected : tuple of BlockRisk
        Blocks that need protection but have none usable.
    quiet : tuple of BlockRisk
        Blocks that do not need protection tonight.
    caution_keys : tuple of str
        Cautions that apply to this sheet, in display order.
    """

    farm: str
    night: date
    timezone: str
    generated_utc: datetime
    units: str
    rows: tuple[RunSheetRow, ...]
    unprotected: tuple[BlockRisk, ...]
    quiet: tuple[BlockRisk, ...]
    caution_keys: tuple[str, ...]
    #: Blocks the crew can start and tend at once, when the crew is short tonight (rows then by saving).
    crew_size: int | None = None
    #: The farm's currency of the savings (from the stored economics), None when not known.
    currency: str | None = None


def level_name(level: str, unprotected: bool = False) -> str:
    """The level's display name, as the notices show it (one vocabulary everywhere); for a block
    with no usable protection the name says so instead of reading as an order to protect."""
    from advisory.notices.words import level_style, unprotected_style

    return (unprotected_style if unprotected else level_style)("frost", level).name


def _critical(sheet: RunSheet, r: BlockRisk) -> str:
    """When the middle forecast reaches the critical temperature (T10) itself."""
    t10 = _t(sheet, r.t10_c)
    if r.critical_time_utc is None:
        return f"air not forecast to reach T10 ({t10}) on the middle forecast"
    return f"air reaches T10 ({t10}) at {_clock(r.critical_time_utc.astimezone(_zone(sheet.timezone)))}"


def _loss(r: BlockRisk) -> str:
    return f"expected bud loss {100 * r.expected_kill:.0f} %"


def _zone(name: str) -> ZoneInfo:
    try:
        return ZoneInfo(name)
    except (ZoneInfoNotFoundError, ValueError):
        raise InputError(f"unknown time zone {name!r}", field="timezone") from None


def build_run_sheet(farm: str, night: date, timezone: str, risks: Sequence[BlockRisk], *,
                    generated_utc: datetime | None = None, units: str = "metric",
                    crew_size: int | None = None, savings: Mapping[str, float] | None = None) -> RunSheet:
    """Assemble the run sheet from the night's block risks.

    Parameters
    ----------
    farm : str
        Farm name.
    night : datetime.date
        Local date of the evening.
    timezone : str
        The farm's IANA zone.
    risks : sequence of BlockRisk or advisory.assessment.Assessment
        All of the farm's blocks for the night (stored frost Assessments are
        converted with :func:`advisory.risk.frost_assessment.risk_from_assessment`, so a
        sheet can be reprinted from the database).
    generated_utc : datetime, optional
        When the sheet was made (default: now).
    units : {"metric", "imperial"}
    crew_size : int, optional
        Blocks the crew can start and tend at once (default: the stored
        assessments' ``crew_size``).
    savings : mapping of block name to float, optional
        Expected net saving of protecting each block (default: the best of
        the stored assessments' ``economics``).  With a crew size and more
        blocks to protect than the crew can reach, the rows go by saving
        (largest first; blocks without figures last) and the blocks beyond the
        crew's reach are marked; otherwise they go in start order.

    Returns
    -------
    RunSheet
    """
    if units not in ("metric", "imperial"):
        raise InputError("units must be 'metric' or 'imperial'", field="units")
    tz = _zone(timezone)

    def loc(t):
        return None if t is None else t.astimezone(tz)

    entries = []
    unprotected, quiet = [], []
    savings = dict(savings or {})
    currency = None
    for r in risks:
        if not isinstance(r, BlockRisk):
            d = getattr(r, "details", None) or {}
            currency = currency or next((e.get("currency") for e in d.get("economics") or [] if e.get("currency")),
                                        None)
            best = [e.get("saving") for e in d.get("economics") or [] if e.get("saving") is not None]
            if best and r.block not in savings:
                savings[r.block] = max(best)
            if crew_size is None and d.get("crew_size") is not None:
                crew_size = int(d["crew_size"])
    risks = [r if isinstance(r, BlockRisk) else risk_from_assessment(r) for r in risks]
    for r in risks:
        if not r.needs_protection:
            quiet.append(r)
            continue
        chosen = [p for p in r.recommended if p.method != "none"]
        if not chosen:
            unprotected.append(r)
            continue
        for p in chosen:
            key = p.start_utc or p.ready_by_utc
            entries.append((key is None, key or datetime.max.replace(tzinfo=UTC), r.block, p.method, r, p))
    entries.sort(key=lambda e: e[:4])
    reach: dict[str, bool] = {}
    to_protect = list(dict.fromkeys(e[2] for e in entries))
    short = crew_size is not None and len(to_protect) > crew_size and any(b in savings for b in to_protect)
    if short:
        # The crew cannot reach every block at once: the blocks that save the most first.
        order, _ = economics.visit_order([savings.get(b, float("nan")) for b in to_protect])
        rank = {to_protect[k]: pos for pos, k in enumerate(order.tolist())}
        reach = {b: rank[b] < crew_size for b in to_protect}
        entries.sort(key=lambda e: (rank[e[2]],) + e[:4])
    rows = tuple(RunSheetRow(i + 1, r, p, loc(p.ready_by_utc), loc(p.start_utc), loc(p.stop_utc),
                             savings.get(r.block), reach.get(r.block, True))
                 for i, (*_, r, p) in enumerate(entries))
    keys: list[str] = []
    for row in rows:
        keys.extend(row.plan.caution_keys)
    if unprotected:
        keys.extend(caut.cautions_for_method("none"))
    if rows or unprotected:
        keys.extend(caut.ALWAYS)
    order = [c.key for c in caut.ordered(keys)]
    return RunSheet(farm, night, timezone, generated_utc or datetime.now(UTC), units, rows,
                    tuple(sorted(unprotected, key=lambda r: r.block)),
                    tuple(sorted(quiet, key=lambda r: r.block)), tuple(order), crew_size if short else None, currency)


# --------------------------------------------------------------------------------------------------
# Formatting helpers
# --------------------------------------------------------------------------------------------------

def _t(sheet: RunSheet, value_c: float | None, digits: int = 1) -> str:
    if value_c is None:
        return "-"
    return f"{_tnum(sheet, value_c, digits)} {'°F' if sheet.units == 'imperial' else '°C'}"


def _tnum(sheet: RunSheet, value_c: float, digits: int = 1) -> str:
    s = f"{value_c * 1.8 + 32 if sheet.units == 'imperial' else value_c:.{digits}f}"
    return s.lstrip("-") if float(s) == 0.0 else s  # never "-0.0"


def _clock(t: datetime | None) -> str:
    return "-" if t is None else f"{t.hour:02d}:{t.minute:02d} {t.tzname() or ''}".rstrip()  # as %H:%M %Z


def _min_range(sheet: RunSheet, r: BlockRisk) -> str:
    return f"{_t(sheet, r.min_p50_c)} ({_tnum(sheet, r.min_p10_c)} to {_tnum(sheet, r.min_p90_c)})"


def _supply(sheet: RunSheet, p: MethodPlan) -> str:
    parts = []
    if p.water_m3 is not None:
        if sheet.units == "imperial":
            parts.append(f"water {p.water_m3 * _M3_TO_US_GAL:,.0f} gal "
                         f"({(p.water_l_per_ha or 0) * _L_PER_HA_TO_US_GAL_PER_ACRE:,.0f} gal/acre)")
        else:
            parts.append(f"water {p.water_m3:,.0f} m³ ({p.water_l_per_ha or 0:,.0f} L/ha)")
        if p.water_m3_cold is not None and p.water_m3_cold > p.water_m3 + 0.5:
            cold = p.water_m3_cold * (_M3_TO_US_GAL if sheet.units == "imperial" else 1.0)
            parts[-1] += f", up to {cold:,.0f} {'gal' if sheet.units == 'imperial' else 'm³'} if colder"
    elif p.water_m3_cold is not None:
        cold = p.water_m3_cold * (_M3_TO_US_GAL if sheet.units == "imperial" else 1.0)
        parts.append(f"water up to {cold:,.0f} {'gal' if sheet.units == 'imperial' else 'm³'} if colder")
    if p.fuel_l is not None or p.fuel_l_cold is not None:
        f = _L_TO_US_GAL if sheet.units == "imperial" else 1.0
        unit = "gal" if sheet.units == "imperial" else "L"
        if p.fuel_l is not None:
            parts.append(f"fuel {p.fuel_l * f:,.0f} {unit}")
            if p.fuel_l_cold is not None and p.fuel_l_cold > p.fuel_l + 0.5:
                parts[-1] += f", up to {p.fuel_l_cold * f:,.0f} {unit} if colder"
        else:
            parts.append(f"fuel up to {p.fuel_l_cold * f:,.0f} {unit} if colder")
    return "; ".join(parts)


def _start_rule(sheet: RunSheet, r: BlockRisk, p: MethodPlan) -> str:
    if p.start_wet_bulb_c is not None:
        return (f"start when the wet bulb falls to {_t(sheet, p.start_wet_bulb_c)} "
                f"(air about {_t(sheet, p.start_air_temp_c)} at tonight's dew point)")
    return f"start when the air falls to {_t(sheet, p.start_air_temp_c)}"


def _stop_rule(sheet: RunSheet, r: BlockRisk, p: MethodPlan) -> str:
    if p.method == "overtree_sprinkler":
        return (f"after sunrise, once the wet bulb is above {_t(sheet, r.critical_c)} "
                "and the ice is melting")
    return f"after sunrise, once the air is back above {_t(sheet, p.start_air_temp_c)}"


def _when(row: RunSheetRow) -> str:
    p = row.plan
    if row.start is not None:
        s = f"start {_clock(row.start)}"
        if row.ready_by is not None and row.ready_by < row.start:
            s = f"ready by {_clock(row.ready_by)}, " + s
    elif row.ready_by is not None:
        s = f"only if colder: start {_clock(row.ready_by)}"
    else:
        s = "start not expected"
    if row.stop is not None:
        s += f", stop {'not before ' if p.stop_open else ''}{_clock(row.stop)}"
    return s


def _run(p: MethodPlan) -> str:
    if p.run_hours is not None:
        s = f"{p.run_hours:.1f} h"
        if p.run_hours_cold is not None and p.run_hours_cold > p.run_hours + 0.05:
            s += f" (up to {p.run_hours_cold:.1f} h)"
        return s
    if p.run_hours_cold is not None:
        return f"up to {p.run_hours_cold:.1f} h"
    return "-"


def _order_words(sheet: RunSheet) -> str:
    if sheet.crew_size is None:
        return "in start order"
    return (f"largest expected saving first (the crew can tend {sheet.crew_size} "
            f"block{'s' if sheet.crew_size != 1 else ''} at once)")


def _reach(sheet: RunSheet, row: RunSheetRow) -> str:
    """Whether the crew is expected to reach the block, and why (decision support: the crew decides)."""
    money = f" {sheet.currency}" if sheet.currency else ""
    saving = "no saving figures" if row.saving is None else f"expected saving {row.saving:,.0f}{money}"
    if row.reached:
        return f"crew expected to reach it ({saving})"
    return (f"crew not expected to reach it: the crew of {sheet.crew_size} is at blocks with larger "
            f"expected savings ({saving}); call in more hands, or start it before the crew is tied up, "
            "if that can be done safely")


def _title(sheet: RunSheet) -> str:
    return f"Frost run sheet: {sheet.farm}"


def _night_line(sheet: RunSheet) -> str:
    tz = ZoneInfo(sheet.timezone)
    gen = sheet.generated_utc.astimezone(tz)
    return (f"Night of {sheet.night.strftime('%a %d %b %Y')} - times {sheet.timezone} - "
            f"made {gen.strftime('%d %b %H:%M %Z')}")


# --------------------------------------------------------------------------------------------------
# Renderings
# --------------------------------------------------------------------------------------------------

def render_text(sheet: RunSheet) -> str:
    """Plain text for a phone screen (short lines, no tables)."""
    out = [_title(sheet).upper(), _night_line(sheet), ""]
    if not sheet.rows and not sheet.unprotected:
        out.append("No block needs protection tonight.")
    if sheet.rows:
        out.append(f"{len(sheet.rows)} to run, {_order_words(sheet)}:")
        out.append("")
    for row in sheet.rows:
        r, p = row.risk, row.plan
        out.append(f"{row.order}. {r.block} - {METHOD_NAMES[p.method]}")
        out.append(f"   {r.crop.replace('_', ' ')}, {r.stage}; {level_name(r.level)}")
        if sheet.crew_size is not None:
            out.append(f"   {_reach(sheet, row)}")
        out.append(f"   {_when(row)}")
        out.append(f"   {_start_rule(sheet, r, p)}")
        out.append(f"   stop {_stop_rule(sheet, r, p)}")
        out.append(f"   run {_run(p)}" + (f"; {_supply(sheet, p)}" if _supply(sheet, p) else ""))
        out.append(f"   min {_min_range(sheet, r)}")
        out.append(f"   {_critical(sheet, r)}")
        for note in p.notes:
            out.append(f"   - {note}")
        titles = [caut.get(k).title for k in p.caution_keys if k not in caut.ALWAYS]
        if titles:
            out.append("   ! " + ". ".join(titles) + ".")
        out.append("")
    if sheet.unprotected:
        out.append("AT RISK, NO USABLE PROTECTION:")
        for r in sheet.unprotected:
            out.append(f"- {r.block} ({r.crop.replace('_', ' ')}, {r.stage}): {level_name(r.level, True)}, "
                       f"min {_min_range(sheet, r)}, {_loss(r)}")
            out.append(f"  {_critical(sheet, r)}")
            for p in r.recommended:
                for note in p.notes:
                    out.append(f"  {note}")
        out.append("")
    if sheet.quiet:
        out.append("No protection needed: " + ", ".join(f"{r.block} ({level_name(r.level)})" for r in sheet.quiet))
        out.append("")
    if sheet.caution_keys:
        out.append("CAUTIONS")
        for c in caut.ordered(sheet.caution_keys):
            out.append(f"* {c.title}: {c.text}")
    return "\n".join(out).rstrip() + "\n"


def _md_escape(text: str) -> str:
    """Escape table pipes, and HTML so a block name cannot inject markup where Markdown is rendered."""
    return (text.replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;")
            .replace("|", "\\|"))


def render_markdown(sheet: RunSheet) -> str:
    """Markdown: a table in start order, then notes, unprotected blocks and cautions."""
    out = [f"# {_title(sheet)}", "", _night_line(sheet), ""]
    if not sheet.rows and not sheet.unprotected:
        out += ["No block needs protection tonight.", ""]
    if sheet.rows:
        out += ["| # | Block | Crop, stage | Risk | Method | Ready by | Start | Stop | Run | "
                "Start rule | Water / fuel | Minimum (range) |",
                "|---|---|---|---|---|---|---|---|---|---|---|---|"]
        for row in sheet.rows:
            r, p = row.risk, row.plan
            ready = _clock(row.ready_by) if row.ready_by is not None else "-"
            stop = ("≥ " if p.stop_open else "") + _clock(row.stop) if row.stop is not None else "-"
            cells = [str(row.order), r.block, f"{r.crop.replace('_', ' ')}, {r.stage}", level_name(r.level),
                     METHOD_NAMES[p.method], ready, _clock(row.start), stop, _run(p),
                     _start_rule(sheet, r, p), _supply(sheet, p) or "-", _min_range(sheet, r)]
            out.append("| " + " | ".join(_md_escape(c) for c in cells) + " |")
        out.append("")
        if sheet.crew_size is not None:
            out += [f"Order: {_order_words(sheet)}.", ""]
            out += [f"- **{row.order}. {_md_escape(row.risk.block)}**: {_reach(sheet, row)}"
                    for row in sheet.rows]
            out.append("")
        notes = [(row, n) for row in sheet.rows for n in row.plan.notes]
        if notes:
            out += ["## Notes", ""]
            out += [f"- **{row.order}. {_md_escape(row.risk.block)}**: {_md_escape(n)}" for row, n in notes]
            out.append("")
    if sheet.unprotected:
        out += ["## At risk, no usable protection", ""]
        for r in sheet.unprotected:
            reasons = " ".join(n for p in r.recommended for n in p.notes)
            out.append(f"- **{_md_escape(r.block)}** ({r.crop.replace('_', ' ')}, {r.stage}): "
                       f"{level_name(r.level, True)}, minimum {_min_range(sheet, r)}, {_loss(r)}; "
                       f"{_critical(sheet, r)}. {_md_escape(reasons)}")
        out.append("")
    if sheet.quiet:
        out += ["## No protection needed", "",
                ", ".join(f"{_md_escape(r.block)} ({level_name(r.level)})" for r in sheet.quiet), ""]
    if sheet.caution_keys:
        out += ["## Cautions", ""]
        out += [f"- **{c.title}.** {c.text}" for c in caut.ordered(sheet.caution_keys)]
        out.append("")
    return "\n".join(out).rstrip() + "\n"


CSV_COLUMNS = (
    "order", "block", "crop", "stage", "risk_level", "method", "ready_by_local", "start_local",
    "stop_local", "stop_open", "run_hours", "run_hours_cold", "start_air_temp_c", "start_wet_bulb_c",
    "rate_mm_h", "required_rate_mm_h", "water_m3", "water_m3_cold", "water_l_per_ha", "fuel_l",
    "fuel_l_cold", "min_p10_c", "min_p50_c", "min_p90_c", "expected_kill", "p_kill_10", "notes",
    "cautions",
)


def _iso(t: datetime | None) -> str:
    return "" if t is None else t.isoformat(timespec="minutes")


def _num(v: float | None, digits: int = 2) -> str:
    return "" if v is None else f"{v:.{digits}f}"


def render_csv(sheet: RunSheet) -> str:
    """CSV, one row per block and method (protection rows in order, then unprotected blocks).

    Columns are :data:`CSV_COLUMNS`; SI units; times are local ISO 8601 with
    the UTC offset; ``cautions`` holds caution keys separated by ";".
    """
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(CSV_COLUMNS)
    tz = ZoneInfo(sheet.timezone)
    lines = [(row.order, row.risk, row.plan) for row in sheet.rows]
    lines += [("", r, p) for r in sheet.unprotected for p in r.recommended]
    def loc(t):
        return None if t is None else t.astimezone(tz)

    for order, r, p in lines:
        w.writerow([
            order, r.block, r.crop, r.stage, r.level, p.method, _iso(loc(p.ready_by_utc)),
            _iso(loc(p.start_utc)), _iso(loc(p.stop_utc)), str(p.stop_open).lower(), _num(p.run_hours),
            _num(p.run_hours_cold), _num(p.start_air_temp_c), _num(p.start_wet_bulb_c), _num(p.rate_mm_h),
            _num(p.required_rate_mm_h), _num(p.water_m3, 1), _num(p.water_m3_cold, 1), _num(p.water_l_per_ha, 0),
            _num(p.fuel_l, 1), _num(p.fuel_l_cold, 1), _num(r.min_p10_c), _num(r.min_p50_c), _num(r.min_p90_c),
            _num(r.expected_kill, 3), _num(r.p_kill_10, 3), " ".join(p.notes), ";".join(p.caution_keys),
        ])
    return buf.getvalue()


RENDERERS = {"text": render_text, "markdown": render_markdown, "csv": render_csv}
