"""`advisory serve`: the long-running scheduler."""

from __future__ import annotations

import datetime as dt
import logging

from advisory import schedule
from advisory.commands.night import add_date_limits, check_date_window
from advisory.errors import InputError
from advisory.store.db import Database


def register(sub) -> None:
    p = sub.add_parser("serve", help="run the scheduler: every block's evening run, updates and morning check")
    p.add_argument("--planner-every-min", type=int, default=10, metavar="N",
                   help="how often the planner looks ahead (default 10 min)")
    p.add_argument("--update-every-min", type=int, default=60, metavar="N",
                   help="interval of the updates through the night (default 60 min)")
    p.add_argument("--grace-min", type=int, default=45, metavar="N",
                   help="a run found this late after a restart still runs; later, a missed-run notice goes out")
    p.add_argument("--rehearse", metavar="NIGHT",
                   help="run one night's runs now on a compressed clock (demonstration), then stop")
    p.add_argument("--seconds-per-hour", type=float, default=4.0, metavar="S",
                   help="with --rehearse: real seconds per hour of the night (default 4)")
    p.add_argument("--stop-after", type=float, metavar="SECONDS", help="stop by itself after this long")
    p.add_argument("--retry-every", type=float, default=60.0, metavar="SECONDS",
                   help="how often failed deliveries are retried (default 60 s; each waits its own pause)")
    p.add_argument("--takeover-after", type=float, default=None, metavar="SECONDS",
                   help="a run claimed by a host that has not shown a sign of life for this long is taken over "
                        "by another host serving the same database (default 120 s)")
    add_date_limits(p, "rehearsal night")
    p.set_defaults(func=run)


def run(args) -> int:
    logging.basicConfig(level=logging.WARNING, format="%(asctime)s %(name)s %(levelname)s %(message)s")
    db = Database(args.db)
    settings = schedule.PlannerSettings(update_interval_min=args.update_every_min, grace_min=args.grace_min)
    if args.takeover_after is not None and args.takeover_after <= 0:
        raise InputError("must be positive", field="--takeover-after")
    if args.rehearse:
        try:
            night = dt.date.fromisoformat(args.rehearse)
        except ValueError:
            raise InputError(f"'{args.rehearse}' is not a date like 2026-04-08", field="--rehearse") from None
        if args.seconds_per_hour <= 0:
            raise InputError("must be positive", field="--seconds-per-hour")
        check_date_window(db, night, None, args, field="--rehearse", what="night")
        settings.kinds = (schedule.EVENING, schedule.UPDATE, schedule.MORNING)
        schedule.rehearse(db, night, seconds_per_hour=args.seconds_per_hour, settings=settings,
                          takeover_s=args.takeover_after)
        return 0
    if args.retry_every <= 0:
        raise InputError("must be positive", field="--retry-every")
    schedule.serve(db, planner_every_min=args.planner_every_min, settings=settings, stop_after_s=args.stop_after,
                   retry_every_s=args.retry_every, takeover_s=args.takeover_after)
    return 0
