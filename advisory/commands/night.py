"""`advisory night run|verify|sheet` and `advisory verify report`."""

from __future__ import annotations

import datetime as dt
import json
import sys
from zoneinfo import ZoneInfo

from advisory import reports
from advisory.errors import InputError
from advisory.runs import command_text
from advisory.store.db import Database

#: A night or heat day further than this from today (the farm's local date) needs --allow-past or
#: --allow-future [days].
DATE_WINDOW_DAYS = 3
#: Years a night or day may fall in even with --allow-past or --allow-future: the sun, the clock
#: rules and the deadlines of a notice are computed for these, and no station has readings beyond.
DATE_YEARS = (1900, 2199)
#: Exit status of a run that finished with notices that reached a recipient on no channel.
UNDELIVERED_EXIT = 3


def _date(text: str | None, field: str = "--date") -> dt.date | None:
    if text is None:
        return None
    try:
        day = dt.date.fromisoformat(text)
    except ValueError:
        raise InputError(f"'{text}' is not a date like 2026-04-08", field=field) from None
    if not DATE_YEARS[0] <= day.year <= DATE_YEARS[1]:
        raise InputError(f"{day} is outside the years this tool runs ({DATE_YEARS[0]} to {DATE_YEARS[1]})",
                         field=field)
    return day


def add_date_limits(p, what: str = "night") -> None:
    """``--allow-past`` and ``--allow-future`` for a command that runs a dated night or day."""
    p.add_argument("--allow-past", action="store_true",
                   help=f"run a {what} more than {DATE_WINDOW_DAYS} days before today (a rerun, a rehearsal)")
    p.add_argument("--allow-future", action="store_true",
                   help=f"run a {what} more than {DATE_WINDOW_DAYS} days after today")


def check_date_window(db, day: dt.date | None, farm: str | None, args, *, field: str = "--date",
                      what: str = "night", today: dt.date | None = None) -> None:
    """Refuse a night or day far from today in the farm's zone unless asked for (nothing is written)."""
    if day is None:
        return
    if not DATE_YEARS[0] <= day.year <= DATE_YEARS[1]:
        raise InputError(f"{what} {day} is outside the years this tool runs ({DATE_YEARS[0]} to {DATE_YEARS[1]}), "
                         "even with --allow-past or --allow-future",
                         field=field)
    today = today or dt.datetime.now(ZoneInfo(reports.farm_zone(db, farm))).date()
    off = (day - today).days
    if off < -DATE_WINDOW_DAYS and not getattr(args, "allow_past", False):
        raise InputError(f"{what} {day} is {-off} days before today ({today}, the farm's local date); "
                         "add --allow-past to run it anyway", field=field)
    if off > DATE_WINDOW_DAYS and not getattr(args, "allow_future", False):
        raise InputError(f"{what} {day} is {off} days after today ({today}, the farm's local date); "
                         "add --allow-future to run it anyway", field=field)


def settle_deliveries(db, day: dt.date, kind: str, farm: str | None, names: list[str] | None,
                      started: dt.datetime, out=None) -> int:
    """After a run: retry at once what earlier runs of the day left failed, give up what is past its
    deadline (the fallback recipients are told), then print one line per notice that reached a
    recipient on no channel; the exit status (0, or :data:`UNDELIVERED_EXIT`)."""
    from sqlalchemy import or_, select

    from advisory import settings as settings_mod
    from advisory.notices import retry_queue
    from advisory.store.schema import Block, Farm, Notice

    out = out or sys.stderr
    cfg = settings_mod.load(db.url)
    ids = reports.block_ids_for(db, farm, names)
    with db.transaction() as s:
        q = select(Notice.id).where(Notice.night == day, Notice.kind.like(f"{kind}%"))
        if ids is not None:
            farms = select(Block.farm_id).where(Block.id.in_(ids))
            q = q.where(or_(Notice.block_id.in_(ids), Notice.block_id.is_(None) & Notice.farm_id.in_(farms)))
        elif farm:
            q = q.where(Notice.farm_id.in_(select(Farm.id).where(Farm.name == farm)))
        notice_ids = list(s.scalars(q))
        report = retry_queue.retry_failed(s, cfg, notice_ids=notice_ids, attempted_before=started)
    if report.retried or report.expired:
        print(report.text().splitlines()[0], file=out)
    with db.transaction() as s:
        left = retry_queue.undelivered(s, notice_ids)
    for it in left:
        print(it.line(), file=out)
    if left:
        print(f"{len({it.notice_id for it in left})} notice(s) did not reach every recipient; "
              "`advisory notices list --undelivered` lists them, `advisory notices retry` retries "
              "(`serve` retries by itself)", file=out)
        return UNDELIVERED_EXIT
    return 0


def register(sub) -> None:
    p = sub.add_parser("night", help="frost nights: run, verify, reprint the crew run sheet")
    nsub = p.add_subparsers(dest="night_command", metavar="ACTION")
    nsub.required = True
    run = nsub.add_parser("run", help="forecast, assess and notify one night (one-shot, for cron or by hand)")
    run.add_argument("--date", help="local date of the evening (default: tonight)")
    run.add_argument("--block", action="append", metavar="NAME", help="only this block (repeatable)")
    run.add_argument("--farm", help="only this farm")
    run.add_argument("--update", action="store_true",
                     help="an update through the night from the latest readings (notice only if it changed)")
    run.add_argument("--no-deliver", action="store_true", help="store the notices but deliver nothing")
    run.add_argument("--format", choices=("text", "markdown"), default="text", help="how to print the summary")
    add_date_limits(run)
    run.set_defaults(func=do_run)
    ver = nsub.add_parser("verify", help="morning check: observed minimum against the forecast, then refit")
    ver.add_argument("--date", help="local date of the evening (default: last night)")
    ver.add_argument("--block", action="append", metavar="NAME")
    ver.set_defaults(func=do_verify)
    sh = nsub.add_parser("sheet", help="reprint a farm's crew run sheet for a night")
    sh.add_argument("--farm", required=True)
    sh.add_argument("--date", required=True)
    sh.add_argument("--format", choices=("text", "markdown", "csv"), default="text")
    sh.set_defaults(func=do_sheet)

    v = sub.add_parser("verify", help="forecast skill to date")
    vsub = v.add_subparsers(dest="verify_command", metavar="ACTION")
    vsub.required = True
    rep = vsub.add_parser("report", help="MAE, bias, hits, misses and false alarms per block",
                          description="Skill to date per block: frost nights (forecast against observed "
                                      "minimum) and heat days (forecast against observed high, with the share "
                                      "of days inside the 8-in-10 range).")
    rep.add_argument("--block", help="only this block")
    rep.add_argument("--farm")
    rep.add_argument("--kind", choices=("all", "frost", "heat"), default="all",
                     help="which checks to show (default all: frost nights first, then heat days)")
    rep.add_argument("--json", action="store_true")
    rep.set_defaults(func=do_verify_report)


def do_run(args) -> int:
    db = Database(args.db)
    night = _date(args.date)
    check_date_window(db, night, args.farm, args)
    started = dt.datetime.now(dt.UTC)
    night = night or reports._default_night(db, args.farm, started)
    out = command_text.night_run(db, night, farm=args.farm, names=args.block, update=args.update,
                            deliver=not args.no_deliver, fmt=args.format)
    print(out, flush=True)
    if args.no_deliver:
        return 0
    return settle_deliveries(db, night, "frost", args.farm, args.block, started)


def do_verify(args) -> int:
    db = Database(args.db)
    print(command_text.night_verify(db, _date(args.date), names=args.block))
    return 0


def do_sheet(args) -> int:
    db = Database(args.db)
    print(reports.run_sheet(db, args.farm, _date(args.date), args.format))
    return 0


def do_verify_report(args) -> int:
    db = Database(args.db)
    data = reports.verification_report(db, block=args.block, farm=args.farm, kind=args.kind)
    print(json.dumps(data, indent=2) if args.json else reports.format_verification(data))
    return 0
