"""The main job on the demo farm, end to end.

Copies the invented demo farm (``demo-farm/``) into the demo folder, drops its
station files into the stations' inbox folders and sweeps them in (units,
column maps and quality control included), then runs each spring night as the
scheduler would (evening run at sunset + 2 h, hourly updates until sunrise,
morning check at sunrise + 1 h), and the summer heat week.  It prints what a
grower, an extension agent and a crew lead would see; every notice is also
written to the demo's outbox.  Running it twice gives the same result: by
default it starts from a fresh database in the demo folder.
"""

from __future__ import annotations

import datetime as dt
import logging
import os
import shutil
from dataclasses import dataclass
from pathlib import Path
from zoneinfo import ZoneInfo

from sqlalchemy import select

from advisory import reports
from advisory import settings as settings_mod
from advisory.ingest import inbox
from advisory.ingest.farm_file import import_farm_file
from advisory.ingest.report import station_report
from advisory.physics import sun
from advisory.runs import frost_night, morning_check
from advisory.store.db import Database, upgrade
from advisory.store.schema import Block, Farm

REPO = Path(__file__).resolve().parents[1]
DEMO_FARM = REPO / "demo-farm"
DEFAULT_OUT = REPO / "demo-output"

#: Local dates of the demo's spring nights (the readings run from 6 to 13 April).
SPRING_NIGHTS = [dt.date(2026, 4, 6) + dt.timedelta(days=i) for i in range(7)]
SEASONS = ("spring", "summer")
#: Station files from before the spring week (heat for the stage check), where a station has one.
EARLY = ("march",)


@dataclass
class DemoPaths:
    out: Path
    db_url: str
    outbox: Path
    farm_dir: Path


def prepare(out: Path = DEFAULT_OUT, db_url: str | None = None) -> DemoPaths:
    """Make the demo folder; a fresh SQLite database there unless a URL is given."""
    out = Path(out).resolve()
    if db_url is None and out.exists():
        shutil.rmtree(out)
    out.mkdir(parents=True, exist_ok=True)
    for sub in ("outbox", "farm"):
        if (out / sub).exists():
            shutil.rmtree(out / sub)
    shutil.copytree(DEMO_FARM, out / "farm", ignore=shutil.ignore_patterns("inbox", "__pycache__", "*.py"))
    return DemoPaths(out=out, db_url=db_url or f"sqlite:///{out / 'demo.sqlite'}", outbox=out / "outbox",
                     farm_dir=out / "farm")


def _evening_clock(db, night: dt.date) -> dt.datetime:
    """The latest evening reference time of the demo's blocks that night (as the scheduler would run)."""
    with db.transaction() as s:
        rows = s.execute(select(Block.latitude, Block.longitude, Farm.timezone, Block.reference_offset_min)
                         .join(Farm).where(Block.active.is_(True))).all()
    times = []
    for lat, lon, tz, off in rows:
        st = sun.sun_times(lat, lon, night, tz)
        times.append(st.sunset + dt.timedelta(minutes=off))
    return max(times) + dt.timedelta(minutes=1)


def _night_updates(db, night: dt.date, settings) -> tuple[int, int, list[str]]:
    """Run the night's updates at the times the scheduler plans them (every hour after each block's
    evening run, until sunrise); returns the number of update runs, of update notices sent, and lines
    saying when each went out and what changed."""
    from advisory import schedule
    from advisory.store.schema import Notice

    runs = schedule.night_runs(schedule.load_block_clocks(db), night,
                               schedule.PlannerSettings(kinds=(schedule.UPDATE,)))
    lines, n_sent = [], 0
    for r in runs:
        res = frost_night.run_night(db, night, list(r.block_ids), now=r.run_at, update=True, settings=settings)
        if not res.notices:
            continue
        with db.transaction() as s:
            sent = s.scalars(select(Notice).where(Notice.id.in_(res.notices), Notice.block_id.is_not(None))
                             .order_by(Notice.id)).all()
            n_sent += len(sent)
            for n in sent:
                tz = n.content.get("farm_tz") or "UTC"
                at = r.run_at.astimezone(ZoneInfo(tz))
                lines.append(f"      {at:%H:%M} update notice: {n.subject}")
                if n.content.get("changes"):
                    lines.append("            what changed: " + "; ".join(n.content["changes"]))
    return len(runs), n_sent, lines


#: The night whose evening notices the demo quotes for the stage check and the economics.
STAGE_CHECK_NIGHT = dt.date(2026, 4, 8)


def _stage_and_economics_lines(assessments) -> list[str]:
    """One line for the first block whose stage looks stale, one for the first economics line."""
    from advisory.risk.economics import economics_sentence

    out = []
    stale = [(a, c) for a in assessments if (c := (a.details or {}).get("stage_check") or {}).get("sentence")]
    if stale:
        a, c = stale[0]
        out.append(f"      stage check in {a.block}'s notice: {c['sentence']}")
    for a in assessments:
        for e in (a.details or {}).get("economics") or []:
            s = economics_sentence(e["loss_without"], e["loss_with"], e["running_cost"], e["currency"])
            if s:
                out.append(f"      economics in {a.block}'s notice ({e['method'].replace('_', ' ')}): {s}")
                return out
    return out


def _morning_clock(db, night: dt.date) -> dt.datetime:
    with db.transaction() as s:
        rows = s.execute(select(Block.latitude, Block.longitude, Farm.timezone).join(Farm)).all()
    return max(sun.sun_times(lat, lon, night, tz).sunrise for lat, lon, tz in rows) + dt.timedelta(hours=1,
                                                                                                   minutes=1)


#: The demo extension agent's webhook (see demo-farm/farm.toml) and its shared secret (demo only).
DEMO_WEBHOOK_PORT = 8765
DEMO_WEBHOOK_SECRET = "demo-only-secret-quillback"


def run(paths: DemoPaths, echo=print, *, heat: bool = True) -> Database:
    """Run the demo; ``echo`` receives every line meant for the person watching.

    A local webhook receiver stands in for the extension office's system and
    checks every delivery's signature; a local mail server (plain SMTP on
    127.0.0.1) receives the e-mails, so that they are delivered and counted.  The
    demo always mails its invented people there, whatever ``ADVISORY_SMTP_*`` say
    (those name the real server for real farms).
    """
    import contextlib

    from advisory.notices.receiver import SmtpReceiver, WebhookReceiver

    logging.getLogger("advisory.notices.deliver").setLevel(logging.ERROR)
    os.environ["ADVISORY_OUTBOX"] = str(paths.outbox)
    os.environ.setdefault("ADVISORY_WEBHOOK_SECRET", DEMO_WEBHOOK_SECRET)
    with contextlib.ExitStack() as stack:
        try:
            receiver = stack.enter_context(WebhookReceiver(os.environ["ADVISORY_WEBHOOK_SECRET"],
                                                           port=DEMO_WEBHOOK_PORT))
        except OSError as exc:
            echo(f"(webhook receiver not started: port {DEMO_WEBHOOK_PORT} busy: {exc.strerror})")
            receiver = None
        mail = stack.enter_context(SmtpReceiver())
        saved = {k: os.environ.get(k) for k in _DEMO_SMTP}
        os.environ.update({"ADVISORY_SMTP_HOST": mail.host, "ADVISORY_SMTP_PORT": str(mail.port),
                           "ADVISORY_SMTP_TLS": "none", "ADVISORY_SMTP_FROM": "advisory@quillback.example"})
        for k in ("ADVISORY_SMTP_USER", "ADVISORY_SMTP_PASSWORD", "ADVISORY_SMTP_STARTTLS"):
            os.environ.pop(k, None)
        try:
            db = _run(paths, echo, heat=heat)
        finally:
            for k, v in saved.items():
                if v is None:
                    os.environ.pop(k, None)
                else:
                    os.environ[k] = v
        echo(f"\nThe local mail server (standing in for your SMTP server) received {len(mail.messages)} e-mails.")
        if receiver is not None:
            got = receiver.received
            echo(f"The extension office's webhook received {len(got.verified)} signed notices "
                 f"(signature verified), rejected {got.rejected}.")
    return db


#: The mail settings the demo points at its own local mail server while it runs.
_DEMO_SMTP = ("ADVISORY_SMTP_HOST", "ADVISORY_SMTP_PORT", "ADVISORY_SMTP_TLS", "ADVISORY_SMTP_FROM",
              "ADVISORY_SMTP_USER", "ADVISORY_SMTP_PASSWORD", "ADVISORY_SMTP_STARTTLS")


def _run(paths: DemoPaths, echo, *, heat: bool) -> Database:
    _before, after = upgrade(paths.db_url)
    echo(f"database  {paths.db_url} (schema {after})")
    echo(f"outbox    {paths.outbox}")
    db = Database(paths.db_url)
    settings = settings_mod.load(paths.db_url)

    echo("\n== 1. The extension agent registers the farm")
    echo(import_farm_file(db, paths.farm_dir / "farm.toml").text())

    echo("\n== 2. The loggers' files arrive in the station inboxes and are swept in")
    with db.transaction() as s:
        from advisory.store.schema import Station

        inboxes = {st.code: Path(st.inbox) for st in s.scalars(select(Station)) if st.inbox}
    for code, folder in sorted(inboxes.items()):
        folder.mkdir(parents=True, exist_ok=True)
        for season in SEASONS + EARLY:
            src = paths.farm_dir / "stations" / f"{code}-{season}.csv"
            if src.exists():  # the late-March file is the creek logger's only
                shutil.copy(src, folder)
    for r in inbox.sweep(db, settle_seconds=0):
        echo(f"  {r.station_code}: {Path(r.file).name} -> {r.status}" + (f" ({r.reason})" if r.reason else ""))
    for code in sorted(inboxes):
        echo("")
        echo(station_report(db, code, since="2026-04-06", until="2026-04-14", max_items=4).text)

    echo("\n== 3. Spring week: each evening at sunset + 2 h, hourly updates until sunrise, each morning at sunrise + 1 h")
    worst = None
    for night in SPRING_NIGHTS:
        res = frost_night.run_night(db, night, now=_evening_clock(db, night), settings=settings)
        rank = max((a.level_rank for a in res.assessments), default=0)
        lows = ", ".join(f"{a.block} {a.p50_c:.1f}" for a in res.assessments if a.p50_c is not None)
        echo(f"  night of {night:%a %d %b}: forecast lows °C: {lows}")
        if worst is None or rank > worst[0]:
            worst = (rank, night, res)
        if night == STAGE_CHECK_NIGHT:
            for line in _stage_and_economics_lines(res.assessments):
                echo(line)
        n_runs, n_sent, lines = _night_updates(db, night, settings)
        echo(f"      through the night: {n_runs} hourly updates, {n_sent} update notice(s) sent "
             "(only when the crew's work changes)")
        for line in lines:
            echo(line)
        ver = morning_check.verify_night(db, night, now=_morning_clock(db, night))
        if ver.verified:
            errs = [v["forecast_c"] - v["observed_c"] for v in ver.verified if v["forecast_c"] is not None]
            echo(f"      next morning: {len(ver.verified)} blocks verified, mean error "
                 f"{sum(errs) / len(errs):+.1f} °C (forecast - observed)")

    if worst is not None:
        _rank, night, res = worst
        echo(f"\n== 4. What the manager reads on the coldest night ({night:%a %d %b}): the farm summary")
        for text in reports.summary_text(db, res.notices, "text"):
            echo(text)
        echo(f"\n== 5. The run sheet as CSV for the office (advisory night sheet --farm "
             f"\"{res.assessments[0].farm}\" --date {night} --format csv)")
        echo(reports.run_sheet(db, res.assessments[0].farm, night, "csv"))

    echo("\n== 6. Verification to date (advisory verify report)")
    echo(reports.format_verification(reports.verification_report(db)))

    if heat:
        try:
            from advisory import demo_heat
        except ImportError:  # heat notes not installed in this build
            demo_heat = None
        if demo_heat is not None and hasattr(demo_heat, "demo_heat"):
            echo("\n== 7. Summer heat week: a morning heat note per block")
            echo(demo_heat.demo_heat(paths, db, echo=echo) or "")

    with db.transaction() as s:
        from sqlalchemy import func

        from advisory.store.schema import Delivery

        counts = s.execute(select(Delivery.channel, Delivery.status, func.count())
                           .group_by(Delivery.channel, Delivery.status)).all()
    echo("\nDeliveries logged (attempts): " + ", ".join(f"{ch} {st} {n}" for ch, st, n in sorted(counts))
         + "  (text messages are queued in the outbox: no gateway here)")
    echo(f"Every notice (text, Markdown, HTML, JSON, text messages) is in {paths.outbox}")
    echo("Watch the scheduler run a night in under a minute:  advisory --db "
         f"{paths.db_url} serve --rehearse 2026-04-10 --allow-past --seconds-per-hour 4")
    echo("Open the web console: add a user, start it, then open http://127.0.0.1:8040/")
    echo(f"  advisory --db {paths.db_url} users add wren --role agent --all-farms")
    echo(f"  advisory --db {paths.db_url} web")
    return db
