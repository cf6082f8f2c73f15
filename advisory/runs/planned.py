"""The scheduler's entry points: a planned run by kind, and a missed evening run.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Sequence

import pandas as pd

from advisory import assessment as asm
from advisory import settings as settings_mod
from advisory.runs.blocks import _load_blocks
from advisory.runs.frost_assess import _base_assessment
from advisory.runs.frost_night import run_night
from advisory.runs.heat_day import run_heat
from advisory.runs.morning_check import verify_night
from advisory.runs.record import RunResult, _mark_run, _start_run
from advisory.runs.save import _store
from advisory.runs.send import _deliver, _pending_notices


def record_missed(db, night: dt.date, block_ids: Sequence[int], *, key: str, run_at: dt.datetime,
                  now: dt.datetime, settings=None) -> RunResult:
    """The evening run was missed beyond the grace time: tell the manager, once."""
    settings = settings or settings_mod.load(db.url)
    res = RunResult(kind="missed", night=night)
    if _start_run(db, key, "missed", night, now) == "finished":
        return res
    with db.transaction() as session:
        blocks = _load_blocks(session, block_ids, equipment=False)
        out = []
        crit: dict = {}
        for b in blocks:
            a = _base_assessment(b, night, critical=crit)
            a.status = asm.STATUS_MISSED
            local = run_at.astimezone(pd.Timestamp(run_at).tz_convert(b.farm.timezone).tzinfo)
            a.reason = (f"the evening run due at {local:%H:%M %Z} was missed (the scheduler was not running "
                        f"until {now.astimezone(local.tzinfo):%H:%M %Z}); no forecast was made for tonight. "
                        "Check the block yourself or run `advisory night run` by hand.")
            a.reference_time_utc = run_at
            out.append(a)
        stored, res.skipped = _store(session, out, revision_mode="missed", now=now)
        res.notices = [n.id for n, _ in stored]
        known = {n.id: (n, recips) for n, recips in stored}
        farm_ids = sorted({b.farm_id for b in blocks})
        res.assessments = out
        _mark_run(session, key, "stored", now)
    res.deliveries = _deliver(db, _pending_notices(db, night, "frost", farm_ids, known=known), settings)
    _mark_run(db, key, "finished", now)
    return res


def run_planned(db, kind: str, night: dt.date, block_ids: list[int], *, run_at: dt.datetime, key: str) -> None:
    """Entry point of the scheduler's jobs.

    The planned time is the run's logical clock: an update uses the readings up
    to ``run_at`` even when the job fires a little late, which makes a rerun
    after a restart give the same result.
    """
    if kind == "evening":
        run_night(db, night, block_ids, key=key, now=run_at)
    elif kind == "update":
        run_night(db, night, block_ids, key=key, now=run_at, update=True)
    elif kind == "morning":
        verify_night(db, night, block_ids, key=key, now=run_at)
    elif kind == "heat":
        run_heat(db, night, block_ids, key=key, now=run_at)
    else:
        raise ValueError(f"unknown run kind {kind!r}")
