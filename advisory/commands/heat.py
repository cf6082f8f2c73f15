"""`advisory heat run|verify`: the morning heat note for a day, and its check against the observed high."""

from __future__ import annotations

import datetime as dt
from zoneinfo import ZoneInfo

from advisory import reports
from advisory.commands.night import _date, add_date_limits, check_date_window, settle_deliveries
from advisory.runs import command_text
from advisory.store.db import Database


def register(sub) -> None:
    p = sub.add_parser("heat", help="summer heat: the morning note on fruit sunburn and crew heat")
    hsub = p.add_subparsers(dest="heat_command", metavar="ACTION")
    hsub.required = True
    run = hsub.add_parser(
        "run", help="assess and notify one day (one-shot, for cron or by hand)",
        description="Assess the day's heat for each block: the high from the imported outlook (or, without "
                    "one, estimated from the morning readings), the hourly curve, fruit sunburn hours, "
                    "evaporative cooling, crew heat index and WBGT estimate; store and deliver the notes. "
                    "Runs whatever the farm's heat season; a day already assessed is not assessed again.")
    run.add_argument("--date", help="local date of the day (default: today in the farm's zone)")
    run.add_argument("--block", action="append", metavar="NAME", help="only this block (repeatable)")
    run.add_argument("--farm", help="only this farm")
    run.add_argument("--no-deliver", action="store_true", help="store the notes but deliver nothing")
    run.add_argument("--format", choices=("text", "markdown"), default="text", help="how to print the summary")
    add_date_limits(run, "day")
    run.set_defaults(func=do_run)
    ver = hsub.add_parser(
        "verify", help="check a day's forecast highs against the observed high",
        description="Compare each block's forecast high with the highest reading of its station from sunrise "
                    "to sunset, and store the check (once). The morning heat run does this for the past days "
                    "by itself; this is for a check by hand. See the skill with `advisory verify report`.")
    ver.add_argument("--date", help="local date of the day (default: yesterday)")
    ver.add_argument("--block", action="append", metavar="NAME", help="only this block (repeatable)")
    ver.set_defaults(func=do_verify)


def do_run(args) -> int:
    db = Database(args.db)
    day = _date(args.date)
    check_date_window(db, day, args.farm, args, what="day")
    started = dt.datetime.now(dt.UTC)
    day = day or started.astimezone(ZoneInfo(reports.farm_zone(db, args.farm))).date()
    print(command_text.heat_run_text(db, day, farm=args.farm, names=args.block,
                                      deliver=not args.no_deliver, fmt=args.format), flush=True)
    if args.no_deliver:
        return 0
    return settle_deliveries(db, day, "heat", args.farm, args.block, started)


def do_verify(args) -> int:
    db = Database(args.db)
    print(command_text.heat_verify(db, _date(args.date), names=args.block))
    return 0
