"""`advisory hindcast FILE --lat --lon --tz [--rows-out F.jsonl] [--json] [--plot F.png]`."""

from __future__ import annotations

import json

from advisory.forecast.hindcast import WARNING_PROBABILITY, format_summary, run_hindcast


def register(sub) -> None:
    p = sub.add_parser(
        "hindcast", help="verify the night-minimum forecast over a station history (rolling origin)",
        description="Forecast every night of a station history in the canonical CSV as it would have been "
                    "forecast that evening, and score the forecasts against the observed minima.")
    p.add_argument("file", metavar="FILE", help="station history in the canonical observation CSV")
    p.add_argument("--lat", type=float, required=True, metavar="DEG", help="station latitude [degrees north]")
    p.add_argument("--lon", type=float, required=True, metavar="DEG", help="station longitude [degrees east]")
    p.add_argument("--tz", required=True, metavar="ZONE", help="IANA time zone of the station, e.g. Europe/Paris")
    p.add_argument("--rows-out", metavar="F.jsonl", help="write one JSON line per verified night")
    p.add_argument("--plot", metavar="F.png", help="draw forecast against observed minimum to a PNG")
    p.add_argument("--warning-probability", type=float, default=WARNING_PROBABILITY, metavar="P",
                   help=f"frost probability that counts as a warning (default {WARNING_PROBABILITY:g})")
    p.add_argument("--json", action="store_true", help="print the summary as one JSON object")
    p.set_defaults(func=handler)


def handler(args) -> int:
    summary = run_hindcast(args.file, args.lat, args.lon, args.tz, rows_out=args.rows_out, plot=args.plot,
                           warning_probability=args.warning_probability)
    if args.json:
        print(json.dumps(summary, ensure_ascii=False))
    else:
        print(format_summary(summary))
    return 0
