"""The summer week of the demo: morning heat runs on the demo farm and what they print.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
from collections import defaultdict
from collections.abc import Sequence
from pathlib import Path

import numpy as np
import pandas as pd
from sqlalchemy import select

from advisory import assessment as asm
from advisory import settings as settings_mod
from advisory.ingest.outlook_import import import_outlook
from advisory.notices import words as w
from advisory.runs.heat_check import verify_day
from advisory.runs.heat_day import run_heat
from advisory.runs.record import RunResult
from advisory.store.schema import Farm, Notice, Verification

#: The demo's summer days (local dates).
DEMO_HEAT_DAYS = [dt.date(2026, 7, 14) + dt.timedelta(days=i) for i in range(6)]
#: The demo heat runs at this local time each morning (after the morning reading).
DEMO_RUN_LOCAL = dt.time(9, 0)


def demo_heat(paths, db, echo=print, *, demo_farm: Path | None = None) -> str:
    """The demo's heat week: summer readings and outlook imported, one heat run per day.

    Parameters
    ----------
    paths : advisory.demo.DemoPaths
        The demo folder (its ``outbox`` receives the notices).
    db : Database
        With the demo farm already imported.
    echo : callable
        Gets progress lines (the imports).
    demo_farm : Path, optional
        The demo farm folder (default ``paths.farm_dir`` when the paths have
        one, else ``demo-farm/`` of the checkout).

    Returns
    -------
    str
        One line per day (highs and where they came from, levels, cooling),
        then the farm summary of the day without an outlook and one block's
        full note that day, then the morning checks of the week (one line per
        day) and the heat skill report, ready to print.
    """
    from advisory import reports
    from advisory.ingest.observations import import_file
    from advisory.notices import render

    folder = demo_farm or getattr(paths, "farm_dir", None) or Path(__file__).resolve().parents[1] / "demo-farm"
    folder = Path(folder)
    for code in ("QR-BENCH", "QR-CREEK"):
        summary = import_file(db, code, folder / "stations" / f"{code}-summer.csv")
        echo(summary.text().splitlines()[0])
    echo(import_outlook(db, folder / "outlook-summer.csv").text())
    settings = dataclasses.replace(settings_mod.load(db.url), outbox=Path(paths.outbox))
    with db.transaction() as s:
        tz = s.scalar(select(Farm.timezone).order_by(Farm.name))
    lines, shown = [], None
    for day in DEMO_HEAT_DAYS:
        now = pd.Timestamp(dt.datetime.combine(day, DEMO_RUN_LOCAL), tz=tz).tz_convert("UTC").to_pydatetime()
        res = run_heat(db, day, now=now, settings=settings, sleep=lambda s: None)
        lines.append(f"  {day:%a %d %b}: " + (_demo_day_line(res) if res.assessments else
                                             f"already assessed ({len(res.skipped)} blocks)"))
        if shown is None and any((a.details or {}).get("max_estimated") for a in res.assessments):
            shown = (day, res)
    if shown is not None:
        day, res = shown
        lines.append(f"\nThe farm summary on {day:%a %d %b}, the day without an outlook:")
        lines.extend(reports.summary_text(db, res.notices))
        ok = [a for a in res.assessments if a.status == asm.STATUS_OK]
        if ok:
            a = next((x for x in ok if x.plan), ok[0])
            with db.transaction() as s:
                n = s.scalar(select(Notice).where(Notice.block_id == a.block_id, Notice.kind == "heat",
                                                  Notice.night == day))
                lines.append(f"\n{a.block}'s note that day (text; the outbox has it with its chart):")
                lines.append(render.render(n.full_content, "text"))
    last = DEMO_HEAT_DAYS[-1]
    next_morning = pd.Timestamp(dt.datetime.combine(last + dt.timedelta(days=1), DEMO_RUN_LOCAL),
                                tz=tz).tz_convert("UTC").to_pydatetime()
    verify_day(db, last, now=next_morning)       # the last day's check falls on the morning after the week
    lines.append("\nEach morning the heat run first checks the days before against what the stations read "
                 "(forecast high against the highest reading from sunrise to sunset):")
    lines.extend(_demo_check_lines(db, DEMO_HEAT_DAYS))
    lines.append("\nHeat skill to date (advisory verify report --kind heat):")
    lines.append(reports.format_verification(reports.verification_report(db, kind="heat")))
    lines.append(f"outbox: {settings.outbox}")
    return "\n".join(lines)


def _demo_check_lines(db, days: Sequence[dt.date]) -> list[str]:
    """One line per checked demo day: forecast and observed highs, misses, range, sunburn event and warning."""
    with db.transaction() as s:
        rows = list(s.scalars(select(Verification).where(Verification.kind == "heat",
                                                         Verification.night.in_(list(days)))))
    per: dict[dt.date, list[Verification]] = defaultdict(list)
    for v in rows:
        per[v.night].append(v)
    out = []
    for day in days:
        vs = per.get(day)
        if not vs:
            out.append(f"  {day:%a %d %b}: not checked")
            continue
        fc = [v.forecast_c for v in vs if v.forecast_c is not None]
        ob = [v.observed_c for v in vs]
        err = [v.error_c for v in vs if v.error_c is not None]
        inside = sum(1 for v in vs if v.detail.get("p10_c") is not None
                     and v.detail["p10_c"] <= v.observed_c <= v.detail["p90_c"])
        event = sum(1 for v in vs if v.detail.get("event"))
        hits = sum(1 for v in vs if v.detail.get("event") and v.detail.get("warned"))
        false = sum(1 for v in vs if v.detail.get("warned") and not v.detail.get("event"))
        est = " (estimated high)" if any(v.detail.get("estimated") for v in vs) else ""
        out.append(f"  {day:%a %d %b}{est}: forecast {min(fc):.1f}-{max(fc):.1f} °C, observed {min(ob):.1f}-"
                   f"{max(ob):.1f} °C ({_ran(float(np.mean(err)))}); {inside} of {len(vs)} blocks inside "
                   f"the 8-in-10 range; sunburn temperature reached at {event}, flagged at {hits} of them"
                   + (f"; {false} more flagged but not reached" if false else ""))
    return out


def _ran(mean_error_c: float) -> str:
    """How a mean error (forecast - observed) reads to a grower."""
    if abs(mean_error_c) < 0.05:
        return "spot on on average"
    return f"the forecast ran {abs(mean_error_c):.1f} °C {'high' if mean_error_c > 0 else 'low'} on average"


def _demo_day_line(res: RunResult) -> str:
    ok = [a for a in res.assessments if a.status == asm.STATUS_OK]
    if not ok:
        return "no heat note could be made"
    tz = ok[0].farm_tz
    lo, hi = min(a.p50_c for a in ok), max(a.p50_c for a in ok)
    where = sorted({a.model for a in ok})
    src = ("from the outlook" if where == ["outlook"] else
           "ESTIMATED, no outlook (" + ", ".join(where) + ")")
    counts: dict[str, int] = defaultdict(int)
    for a in ok:
        counts[w.level_style("heat", a.level).name] += 1
    cool = [f"{a.block} {pd.Timestamp(s.start_utc).tz_convert(tz):%H:%M}-"
            f"{pd.Timestamp(s.stop_utc).tz_convert(tz):%H:%M}" for a in ok for s in a.plan
            if s.advised and s.start_utc and s.stop_utc]
    return (f"highs {lo:.1f} to {hi:.1f} °C {src}; " + ", ".join(f"{v} {k}" for k, v in counts.items())
            + ("; evaporative cooling " + ", ".join(cool) if cool else ""))
