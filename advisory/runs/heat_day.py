"""The heat day (the morning run), its steps in order:

1. select and load the blocks due (:func:`advisory.runs.blocks._load_blocks`);
2. check the days before against what was observed (:func:`advisory.runs.heat_check.check_heat_days`);
3. assess (:func:`advisory.runs.heat_assess.assess_day`), skipping blocks assessed already;
4. compose and store in one transaction (:func:`advisory.runs.save._store`), mark the run stored;
5. deliver (:func:`advisory.runs.send._deliver`), mark the run finished.
"""

from __future__ import annotations

import datetime as dt
import logging
from collections.abc import Callable, Sequence

from sqlalchemy import select

from advisory import settings as settings_mod
from advisory.runs.blocks import _load_blocks
from advisory.runs.heat_assess import assess_day
from advisory.runs.heat_check import CHECK_LOOKBACK_DAYS, check_heat_days
from advisory.runs.record import RunResult, _mark_run, _start_run
from advisory.runs.save import _store
from advisory.runs.send import _deliver, _pending_notices
from advisory.store.schema import Forecast

log = logging.getLogger(__name__)


def run_heat(db, day: dt.date, block_ids: Sequence[int] | None = None, *, now: dt.datetime | None = None,
             key: str | None = None, farm: str | None = None, names: Sequence[str] | None = None,
             deliver: bool = True, settings=None, sleep: Callable[[float], object] | None = None,
             check_days: int | None = None) -> RunResult:
    """The morning heat run for a day: check the past days, assess, store, notify.

    Before the day is assessed, the heat forecasts of the selected blocks for
    the :data:`CHECK_LOOKBACK_DAYS` days before it that have no check yet are
    checked against the observed high (:func:`check_heat_days`), in the same
    transaction as the new forecasts.

    Parameters
    ----------
    db : Database
    day : date
        Local date of the day.
    block_ids, farm, names : optional
        Which active blocks (default all).  The farm's heat season is the
        scheduler's business; a run asked for runs.
    now : datetime, optional
        The run's clock (default the real time): readings from then on are not used.
    key : str, optional
        The planned run's key (restart safety).
    deliver : bool
        Deliver the notices (always to the outbox; mail and webhook when set up).
    settings : advisory.settings.Settings, optional
    sleep : callable, optional
        Pause between delivery retries (a no-op in tests and the demo).
    check_days : int, optional
        Days before ``day`` whose unchecked forecasts are checked first
        (default :data:`CHECK_LOOKBACK_DAYS`; 0 checks none).

    Returns
    -------
    advisory.runs.record.RunResult
        ``kind`` "heat", ``night`` the day; ``verified`` lists the earlier
        forecasts checked by this run (see :func:`check_heat_days`).
    """
    now = now or dt.datetime.now(dt.UTC)
    settings = settings or settings_mod.load(db.url)
    res = RunResult(kind="heat", night=day)
    state = _start_run(db, key, "heat", day, now)
    if state == "finished":
        res.skipped.append(f"run {key} already done")
        return res
    if state == "new":
        with db.transaction() as session:
            blocks = _load_blocks(session, block_ids, farm, names)
            farm_ids = sorted({b.farm_id for b in blocks})
            lookback = CHECK_LOOKBACK_DAYS if check_days is None else int(check_days)
            if blocks and lookback > 0:      # each morning: how did the last days' forecasts do?
                past = [day - dt.timedelta(days=k) for k in range(1, lookback + 1)]
                res.verified, not_checked = check_heat_days(session, past, [b.id for b in blocks], now=now)
                for msg in not_checked:
                    log.info("heat check: %s", msg)
            done = dict(session.execute(select(Forecast.block_id, Forecast.revision).where(
                Forecast.kind == "heat", Forecast.night == day,
                Forecast.block_id.in_([b.id for b in blocks]))).all()) if blocks else {}
            res.skipped = [f"{b.name}: heat {day} already assessed (revision {done[b.id]})"
                           for b in blocks if b.id in done]
            todo = [b for b in blocks if b.id not in done]
            res.assessments = assess_day(session, todo, day, as_of=now, now=now)
            stored, skipped = _store(session, res.assessments, revision_mode="heat", now=now)
            res.skipped += skipped
            res.notices = [n.id for n, _ in stored]
            _mark_run(session, key, "stored", now)
    else:  # stored before a crash or a stop: only delivery is left
        with db.transaction() as session:
            farm_ids = sorted({b.farm_id for b in _load_blocks(session, block_ids, farm, names)})
    if deliver:
        res.deliveries = _deliver(db, _pending_notices(db, day, "heat", farm_ids), settings, sleep=sleep)
    _mark_run(db, key, "finished", now)
    return res
