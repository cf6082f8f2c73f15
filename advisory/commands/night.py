"""`advisory night run|verify|sheet` and `advisory verify report`."""

from __future__ import annotations

import datetime as dt
import json

from advisory import reports
from advisory.errors import InputError
from advisory.store.db import Database


def _date(text: str | None, field: str = "--date") -> dt.date | None:
    if text is None:
        return None
    try:
        return dt.date.fromisoformat(text)
    except ValueError:
        raise InputError(f"'{text}' is not a date like 2026-04-08", field=field) from None


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
    out = reports.night_run(db, _date(args.date), farm=args.farm, names=args.block, update=args.update,
                            deliver=not args.no_deliver, fmt=args.format)
    print(out)
    return 0


def do_verify(args) -> int:
    db = Database(args.db)
    print(reports.night_verify(db, _date(args.date), names=args.block))
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
