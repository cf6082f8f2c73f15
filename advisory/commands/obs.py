"""`advisory obs import|sweep|report`: station observations."""

from __future__ import annotations

import json

from advisory.ingest.inbox import SETTLE_SECONDS, sweep
from advisory.ingest.observations import import_file
from advisory.ingest.report import station_report
from advisory.store.db import Database


def register(sub) -> None:
    p = sub.add_parser("obs", help="station observations: import files, sweep inboxes, quality report")
    osub = p.add_subparsers(dest="obs_command", metavar="ACTION")
    osub.required = True

    imp = osub.add_parser(
        "import", help="import an observation file (CSV) for a station",
        description="Import a station CSV: canonical columns or the station's column map. The import is "
                    "all or nothing; importing the same file again adds nothing.")
    imp.add_argument("station", metavar="STATION", help="station code")
    imp.add_argument("file", metavar="FILE", help="the CSV file")
    imp.add_argument("--replace", action="store_true",
                     help="overwrite stored readings that differ from the file's (default: keep and report)")
    imp.add_argument("--ambiguous", choices=("error", "earliest", "latest", "infer"),
                     help="how to read a naive local time repeated when clocks fall back (default: error)")
    imp.add_argument("--nonexistent", choices=("error", "before", "after"),
                     help="how to read a naive local time skipped when clocks spring forward (default: error)")
    imp.add_argument("--utc-offset", metavar="±HH:MM",
                     help="naive times are at this fixed offset from UTC, not in the station's zone "
                          "(write --utc-offset=-08:00)")
    imp.add_argument("--time-format", metavar="FMT",
                     help="strftime format of the time column, or 'epoch' (default: ISO 8601)")
    imp.add_argument("--json", action="store_true", help="print the summary as JSON")
    imp.set_defaults(func=do_import)

    sw = osub.add_parser("sweep", help="import new files from every station inbox",
                         description="Import every settled file in each station's inbox folder; move it to "
                                     "done/ or to rejected/ with a reason file.")
    sw.add_argument("--station", action="append", metavar="STATION", help="only this station (repeatable)")
    sw.add_argument("--settle-seconds", type=float, default=SETTLE_SECONDS, metavar="S",
                    help=f"leave files modified less than S seconds ago (default {SETTLE_SECONDS:.0f})")
    sw.add_argument("--json", action="store_true", help="print the results as JSON")
    sw.set_defaults(func=do_sweep)

    rep = osub.add_parser("report", help="coverage, gaps and QC flags of a station's readings")
    rep.add_argument("station", metavar="STATION", help="station code")
    rep.add_argument("--since", metavar="D",
                     help="from this date (YYYY-MM-DD, station zone), date-time, or span before the latest "
                          "reading (7d, 36h)")
    rep.add_argument("--until", metavar="D", help="up to this date or date-time (exclusive)")
    rep.add_argument("--json", action="store_true", help="print the report as JSON")
    rep.set_defaults(func=do_report)


def do_import(args) -> int:
    summary = import_file(Database(args.db), args.station, args.file, replace=args.replace,
                          ambiguous=args.ambiguous, nonexistent=args.nonexistent, utc_offset=args.utc_offset,
                          time_format=args.time_format)
    print(json.dumps(summary.as_dict(), indent=2) if args.json else summary.text())
    return 0


def do_sweep(args) -> int:
    results = sweep(Database(args.db), settle_seconds=args.settle_seconds, stations=args.station)
    if args.json:
        print(json.dumps([r.as_dict() for r in results], indent=2))
    elif not results:
        print("no station inbox holds a file")
    else:
        for r in results:
            print(r.text())
    return 1 if any(r.status == "error" for r in results) else 0


def do_report(args) -> int:
    report = station_report(Database(args.db), args.station, since=args.since, until=args.until)
    print(json.dumps(report.data, indent=2) if args.json else report.text)
    return 0
