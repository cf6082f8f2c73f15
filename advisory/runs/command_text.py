"""A run as the command line prints it: run a night, an update, a check or a heat day, and
return the text (farm summaries, skips, tallies).
"""

from __future__ import annotations

import datetime as dt
from zoneinfo import ZoneInfo

from advisory import settings as settings_mod
from advisory.reports import _default_night, block_ids_for, farm_zone, summary_text
from advisory.runs.frost_night import run_night
from advisory.runs.heat_check import check_summary_line, checked_count, verify_day
from advisory.runs.heat_day import run_heat
from advisory.runs.morning_check import verify_night


def _today(db, farm: str | None, now: dt.datetime | None = None) -> dt.date:
    return (now or dt.datetime.now(dt.UTC)).astimezone(ZoneInfo(farm_zone(db, farm))).date()


def heat_run_text(db, day: dt.date | None = None, *, farm: str | None = None, names: list[str] | None = None,
                  deliver: bool = True, fmt: str = "text", now: dt.datetime | None = None, settings=None,
                  sleep=None) -> str:
    """Run a heat day and return what the command line prints (the farm summaries and a tally)."""
    day = day or _today(db, farm, now)
    ids = block_ids_for(db, farm, names)
    settings = settings or settings_mod.load(db.url)
    res = run_heat(db, day, ids, farm=farm, deliver=deliver, now=now, settings=settings, sleep=sleep)
    if not res.assessments and not res.skipped:
        return f"heat day {day}: no active blocks selected"
    lines = list(summary_text(db, res.notices, fmt))
    estimated = sorted({a.station for a in res.assessments if (a.details or {}).get("max_estimated")})
    if estimated and res.notices:
        lines.append(f"day {day}: no outlook for station{'s' if len(estimated) > 1 else ''} "
                     f"{', '.join(estimated)}: the high there is an estimate (see each block's note)")
    for msg in res.skipped:
        lines.append(f"skipped: {msg}")
    if res.verified:
        lines.append(check_summary_line(res.verified))
    if res.deliveries:
        lines.append("deliveries: " + ", ".join(f"{k} {v}" for k, v in sorted(res.deliveries.items())))
        lines.append(f"outbox: {settings.outbox}")
    return "\n".join(lines)


def night_run(db, night: dt.date | None, *, farm: str | None = None, names: list[str] | None = None,
              update: bool = False, deliver: bool = True, fmt: str = "text", now: dt.datetime | None = None,
              settings=None) -> str:
    night = night or _default_night(db, farm, now)
    ids = block_ids_for(db, farm, names)
    settings = settings or settings_mod.load(db.url)
    res = run_night(db, night, ids, farm=farm, update=update, deliver=deliver, now=now,
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
    res = verify_night(db, night, block_ids_for(db, None, names), now=now)
    lines = [f"night {night}: {len(res.verified)} forecasts verified"]
    for v in res.verified:
        err = v["forecast_c"] - v["observed_c"] if v["forecast_c"] is not None else float("nan")
        lines.append(f"  {v['block']:<24} forecast {v['forecast_c']:6.1f} °C  observed {v['observed_c']:6.1f} °C"
                     f"  error {err:+.1f} °C")
    for m in res.skipped:
        lines.append(f"  skipped: {m}")
    return "\n".join(lines)


def heat_verify(db, day: dt.date | None, *, names: list[str] | None = None,
                now: dt.datetime | None = None) -> str:
    """Check a heat day's forecasts against the observed high and say what was found."""
    now = now or dt.datetime.now(dt.UTC)
    # default: yesterday in the farm's zone (today is not over before sunset)
    day = day or (now.astimezone(ZoneInfo(farm_zone(db, None))).date() - dt.timedelta(days=1))
    ids = block_ids_for(db, None, names)
    res = verify_day(db, day, ids, now=now)
    lines = [f"heat day {day}: {len(res.verified)} forecast high{'s' if len(res.verified) != 1 else ''} checked"]
    for v in res.verified:
        rng = ("" if v["p10_c"] is None or v["p90_c"] is None else
               f"  (8-in-10 range {v['p10_c']:.1f} to {v['p90_c']:.1f}"
               f"{', inside' if v['p10_c'] <= v['observed_c'] <= v['p90_c'] else ', outside'})")
        err = "" if v["error_c"] is None else f"  error {v['error_c']:+.1f} °C"
        est = "  [estimated high]" if v["estimated"] else ""
        fc = "-" if v["forecast_c"] is None else f"{v['forecast_c']:.1f}"
        lines.append(f"  {v['block']:<24} forecast {fc:>5} °C  observed {v['observed_c']:5.1f} °C{err}{rng}{est}")
    already = checked_count(db, day, ids) - len(res.verified)
    if already > 0:
        lines.append(f"  {already} checked before (a check is stored once)")
    for m in res.skipped:
        lines.append(f"  skipped: {m}")
    return "\n".join(lines)
