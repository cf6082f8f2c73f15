"""`advisory outlook import|list`: forecast daily highs and lows, or a night's hours, per station, as copied by a grower."""

from __future__ import annotations

import datetime as dt
import json

from advisory.errors import InputError
from advisory.ingest import night_outlook, outlook_import
from advisory.store.db import Database


def register(sub) -> None:
    p = sub.add_parser("outlook", help="outlooks: a day's forecast high and low, or a night's hourly sky, wind and "
                                        "temperature, per station")
    osub = p.add_subparsers(dest="outlook_command", metavar="ACTION")
    osub.required = True
    imp = osub.add_parser(
        "import", help="import an outlook CSV (station,date,high_c,low_c,min_rel_humidity_pct)",
        description="Read a CSV of forecast daily highs (and lows, minimum relative humidity) per station "
                    "and local date and store it; a station and date already stored are updated. All or "
                    "nothing: a bad line stops the import with its line and field named.")
    imp.add_argument("file", metavar="FILE", help="the CSV file")
    imp.add_argument("--station", metavar="CODE", help="the station for a file without a station column")
    imp.add_argument("--kind", choices=("auto", "day", "night"), default="auto",
                     help="day: daily highs and lows (station,date,high_c,...); night: the hours of a night "
                          "(station,time,sky_cover_pct,wind_speed_ms,air_temp_c), used by the frost forecast; "
                          "auto (default): night when the header has a 'time' column")
    imp.add_argument("--json", action="store_true", help="print the summary as JSON")
    imp.set_defaults(func=do_import)
    ls = osub.add_parser("list", help="stored outlooks: day outlooks by day, night outlooks by night")
    ls.add_argument("--kind", choices=("all", "day", "night"), default="all",
                    help="which outlooks to list (default: both kinds, each in its own table)")
    ls.add_argument("--station", metavar="CODE", help="only this station")
    ls.add_argument("--since", metavar="D", help="from this local date (YYYY-MM-DD)")
    ls.add_argument("--json", action="store_true")
    ls.set_defaults(func=do_list)


def _kind(args) -> str:
    if args.kind != "auto":
        return args.kind
    return "night" if night_outlook.is_night_outlook_header(night_outlook.read_text(args.file)) else "day"


def do_import(args) -> int:
    if _kind(args) == "night":
        report = night_outlook.import_night_outlook(Database(args.db), args.file, station=args.station)
    else:
        report = outlook_import.import_outlook(Database(args.db), args.file, station=args.station)
    print(json.dumps(report.as_dict(), indent=2) if args.json else report.text())
    return 0


def do_list(args) -> int:
    since = None
    if args.since:
        try:
            since = dt.date.fromisoformat(args.since)
        except ValueError:
            raise InputError(f"'{args.since}' is not a date like 2026-07-15", field="--since") from None
    db = Database(args.db)
    days = (outlook_import.list_outlooks(db, station=args.station, since=since)
            if args.kind in ("all", "day") else [])
    nights = (night_outlook.list_night_outlooks(db, station=args.station, since=since)
              if args.kind in ("all", "night") else [])
    if args.json:
        print(json.dumps([{"kind": "day", **r} for r in days] + [{"kind": "night", **r} for r in nights],
                         indent=2))
        return 0
    if args.kind == "day" or (args.kind == "all" and days and not nights):
        print(outlook_import.format_outlooks(days))
    elif args.kind == "night" or (args.kind == "all" and nights and not days):
        print(night_outlook.format_night_outlooks(nights))
    elif days and nights:
        print(outlook_import.format_outlooks(days) + "\n\n" + night_outlook.format_night_outlooks(nights))
    else:
        print("no outlook stored (use `advisory outlook import FILE`)")
    return 0
