"""`advisory outlook import|list`: forecast daily highs and lows, or a night's hours, per station, as copied by a grower."""

from __future__ import annotations

import datetime as dt
import json

from advisory.errors import InputError
from advisory.ingest import night_outlook, outlook_import
from advisory.store.db import Database


def register(sub) -> None:
    p = sub.add_parser("outlook", help="day outlooks: forecast highs and lows per station and date")
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
    ls = osub.add_parser("list", help="stored outlooks")
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
    rows = outlook_import.list_outlooks(Database(args.db), station=args.station, since=since)
    print(json.dumps(rows, indent=2) if args.json else outlook_import.format_outlooks(rows))
    return 0
