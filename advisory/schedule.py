"""The daily planner and the serve loop.

The planner is pure: given the active blocks and an instant ``now`` it lists
the runs due in a window around ``now``, each at a time set by its block's own
sun:

* ``evening`` -- the reference time, sunset + the block's offset (default 2 h);
* ``update`` -- every ``update_interval_min`` after the evening run, until sunrise;
* ``morning`` -- sunrise + 1 h: verification of the night's forecast;
* ``heat`` -- sunrise + 2 h on days of the farm's heat season.

Blocks due at the same minute for the same kind of run are grouped into one
run, so that the pipeline handles them in one array pass.  Every run has a
deterministic key; :mod:`advisory.runs.record` records each key it completes in
the ``runs`` table, and its forecasts and notices carry their own idempotency
keys, so that planning the same run twice, restarting mid-run or rerunning a
night never sends a notice twice.

:func:`serve` runs the planner every few minutes inside an APScheduler 3.x
scheduler.  The runs it plans are offered to every host serving the database as
rows of ``run_claims`` (:mod:`advisory.runs.claims`): each is claimed and run by
one host, and taken over by another when its host stops refreshing its heartbeat.
The scheduler's job store is this process's memory: it only wakes the local loop
at each run's time (APScheduler's SQLAlchemy job store is not safe across hosts).
A run found more than the grace time late is not run; for an evening run the
block's recipients get a notice that it was missed instead.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import logging
import signal
from collections import defaultdict
from collections.abc import Iterable
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from advisory.physics import sun

log = logging.getLogger("advisory.schedule")

EVENING, UPDATE, MORNING, HEAT = "evening", "update", "morning", "heat"
KINDS = (EVENING, UPDATE, MORNING, HEAT)


@dataclass(frozen=True)
class BlockClock:
    """What the planner needs to know about one block."""

    block_id: int
    latitude: float
    longitude: float
    tz: str
    reference_offset_min: int = 120
    #: Heat season as ("MM-DD", "MM-DD"), inclusive; None: no heat runs.
    heat_season: tuple[str, str] | None = None


@dataclass(frozen=True)
class PlannedRun:
    kind: str
    run_at: dt.datetime          # UTC, whole minute
    night: dt.date               # local date of the evening (heat: of the day)
    block_ids: tuple[int, ...]

    @property
    def key(self) -> str:
        h = hashlib.sha1(",".join(map(str, self.block_ids)).encode()).hexdigest()[:10]
        return f"{self.kind}:{self.night.isoformat()}:{self.run_at:%Y%m%dT%H%MZ}:{h}"


@dataclass
class PlannerSettings:
    update_interval_min: int = 60
    morning_offset_min: int = 60
    #: sunrise + 2.5 h: the morning reading at sunrise + 2 h is in by then
    heat_offset_min: int = 150
    #: A run may start this late and still run (restart within the grace time).
    grace_min: int = 45
    #: How far ahead to place jobs.
    horizon_h: int = 36
    kinds: tuple[str, ...] = KINDS
    skipped: list[str] = field(default_factory=list)


def _in_season(night: dt.date, season: tuple[str, str] | None) -> bool:
    if not season:
        return False
    md = night.strftime("%m-%d")
    start, end = season
    return start <= md <= end if start <= end else (md >= start or md <= end)


def plan(blocks: list[BlockClock], start: dt.datetime, end: dt.datetime,
         settings: PlannerSettings | None = None) -> list[PlannedRun]:
    """All runs with ``start <= run_at < end``, grouped by kind and minute.

    Parameters
    ----------
    blocks : list of BlockClock
        Active blocks.
    start, end : datetime (aware)
        The window [UTC].
    settings : PlannerSettings, optional

    Returns
    -------
    list of PlannedRun
        Sorted by time then kind.  Blocks where the sun does not set or rise
        that night get no evening/update/morning run (and the reason is logged
        and appended to ``settings.skipped``).
    """
    s = settings or PlannerSettings()
    if not blocks:
        return []
    start = start.astimezone(dt.UTC)
    end = end.astimezone(dt.UTC)
    ids = np.array([b.block_id for b in blocks])
    lat = np.array([b.latitude for b in blocks], dtype=float)
    lon = np.array([b.longitude for b in blocks], dtype=float)
    tzs = np.array([b.tz for b in blocks], dtype=object)
    offsets = np.array([b.reference_offset_min for b in blocks], dtype=float)
    # Every night whose runs can fall in the window: from two days before start to the end date.
    first = (start - dt.timedelta(days=2)).date()
    n_nights = (end.date() - first).days + 2
    groups: dict[tuple[str, dt.datetime, dt.date], list[int]] = defaultdict(list)

    def add(kind: str, night: dt.date, times_ns: np.ndarray, block_ids: np.ndarray) -> None:
        """Group blocks by run minute (vectorised: one entry per distinct minute)."""
        if not len(times_ns):
            return
        uniq, inv = np.unique(times_ns, return_inverse=True)
        order = np.argsort(inv, kind="stable")
        bounds = np.searchsorted(inv[order], np.arange(len(uniq) + 1))
        for j, t in enumerate(uniq):
            at = dt.datetime.fromtimestamp(int(t) / 1e9, dt.UTC)
            groups[(kind, at, night)].extend(int(x) for x in block_ids[order[bounds[j]:bounds[j + 1]]])

    minute_ns = 60 * 10**9
    for k in range(n_nights):
        night = first + dt.timedelta(days=k)
        table = sun.sun_times_batch(lat, lon, night, tzs)
        normal = (table["status"] == sun.NORMAL).to_numpy()
        if start.date() - dt.timedelta(days=1) <= night <= end.date():
            for i in np.flatnonzero(~normal):
                s.skipped.append(f"block {ids[i]}: night {night}: no nocturnal forecast, the sun does not "
                                 f"{'set' if table['status'].iat[i] == sun.POLAR_DAY else 'rise'}")
        sunset = pd.DatetimeIndex(table["sunset"]).as_unit("ns").asi8
        sunrise = pd.DatetimeIndex(table["sunrise"]).as_unit("ns").asi8
        ok_ids, set_ns, rise_ns = ids[normal], sunset[normal], sunrise[normal]
        evening = (set_ns + (offsets[normal] * minute_ns).astype("int64")) // minute_ns * minute_ns
        if EVENING in s.kinds:
            add(EVENING, night, evening, ok_ids)
        if UPDATE in s.kinds and len(ok_ids):
            step = s.update_interval_min * minute_ns
            n_steps = int(np.max((rise_ns - evening) // step)) if len(ok_ids) else 0
            if n_steps > 0:
                times = evening[:, None] + step * np.arange(1, n_steps + 1)[None, :]
                mask = times < rise_ns[:, None]
                add(UPDATE, night, times[mask], np.broadcast_to(ok_ids[:, None], times.shape)[mask])
        if MORNING in s.kinds:
            # rounded up: the morning check must not start before its window has closed
            morning = -((-(rise_ns + s.morning_offset_min * minute_ns)) // minute_ns) * minute_ns
            add(MORNING, night, morning, ok_ids)
        if HEAT in s.kinds:
            # The heat note of day D+1 follows the sunrise that ends night D.
            day = night + dt.timedelta(days=1)
            in_season = np.array([_in_season(day, blocks[i].heat_season) for i in np.flatnonzero(normal)], bool)
            if in_season.any():
                heat_at = (rise_ns + s.heat_offset_min * minute_ns) // minute_ns * minute_ns
                add(HEAT, day, heat_at[in_season], ok_ids[in_season])
    runs = [PlannedRun(kind, at, night, tuple(sorted(bids)))
            for (kind, at, night), bids in groups.items() if start <= at < end]
    runs.sort(key=lambda r: (r.run_at, KINDS.index(r.kind), r.night))
    return runs


def night_runs(blocks: list[BlockClock], night: dt.date, settings: PlannerSettings | None = None
               ) -> list[PlannedRun]:
    """Every planned run of one night (its local date: evening, updates, morning check), in time order."""
    day_start = dt.datetime.combine(night, dt.time(0), dt.UTC)
    return [r for r in plan(blocks, day_start - dt.timedelta(hours=12), day_start + dt.timedelta(hours=48),
                            settings) if r.night == night]


def split_due(runs: Iterable[PlannedRun], now: dt.datetime, grace_min: int
              ) -> tuple[list[PlannedRun], list[PlannedRun], list[PlannedRun]]:
    """Split runs into (missed beyond grace, due now within grace, future)."""
    missed, due, future = [], [], []
    late_limit = now - dt.timedelta(minutes=grace_min)
    for r in runs:
        if r.run_at > now:
            future.append(r)
        elif r.run_at >= late_limit:
            due.append(r)
        else:
            missed.append(r)
    return missed, due, future


# --------------------------------------------------------------------------- execution

def load_block_clocks(db) -> list[BlockClock]:
    """Active blocks with their farm's zone and heat season."""
    from sqlalchemy import select

    from advisory.store.schema import Block, Farm

    out = []
    with db.transaction() as s:
        rows = s.execute(select(Block.id, Block.latitude, Block.longitude, Farm.timezone,
                                Block.reference_offset_min, Farm.settings)
                         .join(Farm).where(Block.active.is_(True)).order_by(Block.id)).all()
        for bid, lat, lon, tz, off, fs in rows:
            season = (fs or {}).get("heat_season")
            out.append(BlockClock(bid, lat, lon, tz, off, tuple(season) if season else None))
    return out


def execute_run(db_url: str, kind: str, night_iso: str, block_ids: list[int], run_at_iso: str,
                key: str) -> None:
    """Run one planned run (the function the job store keeps a reference to).

    Safe to call twice: the pipeline skips work already recorded under ``key``
    and never sends a notice twice.
    """
    from advisory.runs import planned
    from advisory.store.db import Database

    db = Database(db_url)
    try:
        night = dt.date.fromisoformat(night_iso)
        run_at = dt.datetime.fromisoformat(run_at_iso)
        planned.run_planned(db, kind, night, list(block_ids), run_at=run_at, key=key)
    finally:
        db.dispose()


class _Worker:
    """This host's share of the runs: claim the next run due (:mod:`advisory.runs.claims`), run it, repeat.

    Called from the scheduler's one run thread (at a run's due time, and every few seconds to take
    over what a dead host left); a run found more than ``grace_min`` late is not run (an evening run:
    its blocks' recipients are told that it was missed).  ``keys`` limits it to those runs.
    """

    def __init__(self, db, host: str, *, takeover_s: float, grace_min: int | None, now_fn, echo,
                 keys: Iterable[str] | None = None):
        import threading

        self.db, self.host, self.takeover_s, self.grace_min = db, host, takeover_s, grace_min
        self.now_fn, self.echo = now_fn, echo
        self.keys = list(keys) if keys is not None else None
        self.stop = threading.Event()
        self.executed: list[str] = []
        self.missed: list[str] = []

    def work(self) -> None:
        from advisory.runs import claims

        while not self.stop.is_set():
            try:
                c = claims.claim_next(self.db, self.host, self.now_fn(), takeover_s=self.takeover_s,
                                      keys=self.keys)
            except Exception:  # the server away for a moment: the next wake-up tries again
                log.exception("claiming a run failed")
                return
            if c is None:
                return
            self._run(c)

    def _run(self, c) -> None:
        from advisory.runs import claims, planned, record
        from advisory.store.retry import with_retries

        now = self.now_fn()
        try:
            late = self.grace_min is not None and now - c.due_at > dt.timedelta(minutes=self.grace_min)
            if late and record.run_status(self.db, c.key) not in ("stored", "finished"):  # (stored: deliver)
                if c.kind == EVENING:
                    planned.record_missed(self.db, c.night, list(c.block_ids), key=c.key, run_at=c.run_at, now=now)
                self.missed.append(c.key)
            else:
                with_retries(lambda: execute_run(self.db.url, c.kind, c.night.isoformat(), list(c.block_ids),
                                                 c.run_at.isoformat(), c.key), what=f"run {c.key}")
                self.executed.append(c.key)
            with self.db.transaction() as s:  # (done already, unless the run had been finished before)
                claims.mark_done(s, c.key, self.now_fn())
        except Exception as exc:
            log.exception("run %s failed", c.key)
            state = claims.give_back(self.db, c, self.host, self.now_fn(), f"{type(exc).__name__}: {exc}")
            self.echo(f"  run {c.key} failed ({'tried again later' if state == claims.PENDING else 'given up'}): "
                      f"{exc}")

    def heartbeat(self, every_s: float, stop) -> None:
        """Refresh this host's claims every ``every_s`` seconds until ``stop`` is set (a thread's body)."""
        from advisory.runs import claims

        while not stop.wait(every_s):
            try:
                claims.beat(self.db, self.host, self.now_fn())
            except Exception:
                log.exception("heartbeat failed")


def reconcile(db, scheduler, now: dt.datetime, settings: PlannerSettings, wake=None) -> dict[str, int]:
    """Offer the runs of the coming hours to the hosts and wake this host at each one's time.

    Every host plans the same runs; :func:`advisory.runs.claims.offer` keeps one row per run key
    whoever offers it first.  Runs missed while no host served (beyond the grace time) are offered
    too: the host that claims one tells the recipients of a missed evening run.  ``wake`` is the
    job each wake-up runs (this host's :meth:`_Worker.work`).  Returns counts of what was done.
    """
    from advisory.runs import claims, record

    clocks = load_block_clocks(db)
    lookback = dt.timedelta(hours=18)
    runs = plan(clocks, now - lookback, now + dt.timedelta(hours=settings.horizon_h), settings)
    done = record.finished_run_keys(db, [r.key for r in runs])
    todo = [r for r in runs if r.key not in done]
    claims.offer(db, todo)
    missed, due, future = split_due(todo, now, settings.grace_min)
    counts = {"placed": len(future), "due": len(due), "missed": sum(r.kind == EVENING for r in missed)}
    if wake is not None:
        times = sorted({max(r.run_at, now) for r in missed + due + future})
        for at in times:
            job_id = f"wake:{at:%Y%m%dT%H%M%SZ}"
            if scheduler.get_job(job_id) is None:
                scheduler.add_job(wake, "date", run_date=at, id=job_id, misfire_grace_time=None, coalesce=True,
                                  replace_existing=True)
    return counts


def retry_deliveries(db, now: dt.datetime, echo=print):
    """One pass of the delivery queue (:func:`advisory.notices.retry_queue.retry_failed`), in one transaction
    (one host at a time)."""
    from advisory import settings as settings_mod
    from advisory.notices import retry_queue
    from advisory.runs import claims

    with db.transaction() as s:
        claims.lock(s, claims.DELIVERY_LOCK)
        report = retry_queue.retry_failed(s, settings_mod.load(db.url), now=now)
    if report.retried or report.expired:
        echo(f"{now:%Y-%m-%d %H:%M:%S}Z {report.text()}")
    return report


def _takeover_every(takeover_s: float) -> tuple[float, float]:
    """(heartbeat interval, interval of the look for runs to take over) [s] for a takeover time."""
    return max(0.2, takeover_s / 4), max(0.5, min(30.0, takeover_s / 2))


def serve(db, *, planner_every_min: int = 10, settings: PlannerSettings | None = None,
          stop_after_s: float | None = None, clock=None, echo=print, retry_every_s: float = 60.0,
          takeover_s: float | None = None) -> None:
    """The long-running scheduler; stops cleanly on SIGTERM or SIGINT.

    Any number of hosts may serve one database (PostgreSQL): each run is claimed by one of them
    (:mod:`advisory.runs.claims`), and a host that stops refreshing its claims for ``takeover_s``
    seconds has its runs taken over.  The job store is this process's memory; it only wakes the
    local loop, the runs themselves are kept in the database.  Besides the runs, it works the queue
    of failed deliveries every ``retry_every_s`` seconds (:func:`retry_deliveries`).

    Parameters
    ----------
    db : advisory.store.db.Database
    planner_every_min : int
        How often the planner looks ahead and offers the runs.
    stop_after_s : float, optional
        Stop by itself after this many seconds (tests, demos).
    clock : callable, optional
        Returns the current aware datetime (tests).
    takeover_s : float, optional
        A claim not refreshed for this long is taken over (default
        :data:`advisory.runs.claims.TAKEOVER_S`).
    """
    import threading

    from apscheduler.executors.pool import ThreadPoolExecutor
    from apscheduler.jobstores.memory import MemoryJobStore
    from apscheduler.schedulers.background import BackgroundScheduler

    from advisory.runs import claims

    s = settings or PlannerSettings()
    now_fn = clock or (lambda: dt.datetime.now(dt.UTC))
    takeover_s = claims.TAKEOVER_S if takeover_s is None else takeover_s
    beat_s, look_s = _takeover_every(takeover_s)
    stop = threading.Event()
    worker = _Worker(db, claims.host_name(), takeover_s=takeover_s, grace_min=s.grace_min, now_fn=now_fn, echo=echo)
    # Runs execute one at a time on a host (a later run reads what the earlier one stored); the planner
    # has its own thread.
    scheduler = BackgroundScheduler(
        jobstores={"default": MemoryJobStore()},
        executors={"default": ThreadPoolExecutor(1), "planner": ThreadPoolExecutor(1)},
        job_defaults={"max_instances": 1}, timezone=dt.UTC)

    def planner_tick():
        try:
            counts = reconcile(db, scheduler, now_fn(), s, wake=worker.work)
            echo(f"{now_fn():%Y-%m-%d %H:%M:%S}Z planner: {counts['placed']} placed, {counts['due']} due now, "
                 f"{counts['missed']} missed beyond grace")
        except Exception:  # keep serving; the next tick tries again
            log.exception("planner failed")

    previous = {sig: signal.getsignal(sig) for sig in (signal.SIGTERM, signal.SIGINT)}

    def _stop(signum, _frame):
        echo(f"received signal {signum}: stopping after the running job")
        stop.set()
        worker.stop.set()

    if threading.current_thread() is threading.main_thread():
        for sig in previous:
            signal.signal(sig, _stop)

    def retry_tick():
        try:
            retry_deliveries(db, now_fn(), echo)
        except Exception:  # keep serving; the next tick tries again
            log.exception("delivery retry failed")

    beats = threading.Thread(target=worker.heartbeat, args=(beat_s, stop), name="heartbeat", daemon=True)
    beats.start()
    scheduler.start()
    scheduler.add_job(planner_tick, "interval", minutes=planner_every_min, id="planner",
                      next_run_time=dt.datetime.now(dt.UTC), executor="planner")
    # the runs' thread: what other hosts left (a dead host's claims), between the planned wake-ups
    scheduler.add_job(worker.work, "interval", seconds=look_s, id="claims", coalesce=True, max_instances=3,
                      next_run_time=dt.datetime.now(dt.UTC) + dt.timedelta(seconds=look_s))
    # in the runs' own thread: a retry never overlaps a run (a run's notices are delivered by the run)
    scheduler.add_job(retry_tick, "interval", seconds=retry_every_s, id="retry",
                      next_run_time=dt.datetime.now(dt.UTC) + dt.timedelta(seconds=min(retry_every_s, 5)))
    echo(f"serving {db.url.split('///')[-1]} as {worker.host}: planner every {planner_every_min} min; "
         "Ctrl-C to stop")
    try:
        stop.wait(timeout=stop_after_s)
    finally:
        worker.stop.set()
        _shut_down(scheduler)
        stop.set()
        beats.join(timeout=5)
        if threading.current_thread() is threading.main_thread():
            for sig, handler in previous.items():
                signal.signal(sig, handler)
        echo("scheduler stopped")


def _shut_down(scheduler) -> None:
    """Stop a running scheduler: its jobs first, under the scheduler's own lock, then the scheduler.

    APScheduler 3 marks itself stopped before it takes its lock, so a wake-up being processed at that
    moment finds its finished job gone and dies with a JobLookupError in its thread; removing the jobs
    first (which waits for that pass) leaves nothing for it to trip on.
    """
    scheduler.remove_all_jobs()
    scheduler.shutdown(wait=True)


def rehearse(db, night: dt.date, *, seconds_per_hour: float = 4.0, settings: PlannerSettings | None = None,
             echo=print, takeover_s: float | None = None) -> int:
    """Run one night's planned runs on a compressed clock, shared with the other hosts rehearsing it.

    Every run of the night (evening, hourly updates, morning verification) is offered to the hosts
    (:mod:`advisory.runs.claims`) at ``seconds_per_hour`` real seconds per hour of the night, counted
    from the first run, by the first host to offer them; each run uses its planned time as its
    logical clock.  Any number of processes may rehearse the same night on one database: each run is
    claimed by one of them, and a process that dies has its claims taken over after ``takeover_s``
    seconds.  For demonstrations and tests: a person sees a whole night within a minute.  Returns
    when every run of the night is done (or given up), or on SIGTERM / SIGINT after the running run.

    Returns the number of the night's runs done (by this process or another).
    """
    import threading

    from apscheduler.executors.pool import ThreadPoolExecutor
    from apscheduler.jobstores.memory import MemoryJobStore
    from apscheduler.schedulers.background import BackgroundScheduler

    from advisory.runs import claims

    s = settings or PlannerSettings(kinds=(EVENING, UPDATE, MORNING))
    runs = night_runs(load_block_clocks(db), night, s)
    if not runs:
        echo(f"night {night}: nothing to run")
        return 0
    takeover_s = claims.TAKEOVER_S if takeover_s is None else takeover_s
    beat_s, look_s = _takeover_every(takeover_s)
    first = runs[0].run_at
    wall0 = dt.datetime.now(dt.UTC) + dt.timedelta(seconds=1)

    def wall(r: PlannedRun) -> dt.datetime:
        return wall0 + dt.timedelta(seconds=(r.run_at - first).total_seconds() / 3600 * seconds_per_hour)

    keys = [r.key for r in runs]
    claims.offer(db, runs, due_at=wall)
    due = claims.due_times(db, keys)  # another host's clock, if it offered them first
    worker = _Worker(db, claims.host_name(), takeover_s=takeover_s, grace_min=None,
                     now_fn=lambda: dt.datetime.now(dt.UTC), echo=echo, keys=keys)
    scheduler = BackgroundScheduler(jobstores={"default": MemoryJobStore()},
                                    executors={"default": ThreadPoolExecutor(1)},
                                    job_defaults={"max_instances": 1, "misfire_grace_time": None, "coalesce": True},
                                    timezone=dt.UTC)
    stopped: list[int] = []
    previous = {sig: signal.getsignal(sig) for sig in (signal.SIGTERM, signal.SIGINT)}

    def _stop(signum, _frame):
        # the running run finishes (stored and delivered); the runs not started are left to the others
        echo(f"received signal {signum}: stopping after the running run")
        stopped.append(signum)
        worker.stop.set()

    main_thread = threading.current_thread() is threading.main_thread()
    if main_thread:
        for sig in previous:
            signal.signal(sig, _stop)
    now = dt.datetime.now(dt.UTC)
    for at in sorted({max(due[r.key], now) for r in runs}):
        scheduler.add_job(worker.work, "date", run_date=at, id=f"wake:{at:%Y%m%dT%H%M%S.%fZ}")
    for r in runs:
        echo(f"  placed {r.kind:<8} {r.run_at:%H:%M}Z for {len(r.block_ids)} block(s) "
             f"-> in {max(0.0, (due[r.key] - now).total_seconds()):.0f} s")
    scheduler.add_job(worker.work, "interval", seconds=look_s, id="claims", next_run_time=now, max_instances=3)
    beat_stop = threading.Event()
    beats = threading.Thread(target=worker.heartbeat, args=(beat_s, beat_stop), name="heartbeat", daemon=True)
    beats.start()
    scheduler.start()
    deadline = max(due.values()) + dt.timedelta(seconds=60 + 3 * takeover_s)
    finished = (claims.DONE, claims.FAILED)
    try:
        while not stopped:
            st = claims.states(db, keys)
            if all(st.get(k) in finished for k in keys) or dt.datetime.now(dt.UTC) > deadline:
                break
            worker.stop.wait(0.25)
        worker.stop.set()
        _shut_down(scheduler)
    finally:
        beat_stop.set()
        beats.join(timeout=5)
        if main_thread:
            for sig, handler in previous.items():
                signal.signal(sig, handler)
    st = claims.states(db, keys)
    done_n = sum(st.get(k) == claims.DONE for k in keys)
    echo(f"night {night}: {done_n} of {len(runs)} runs executed ({len(worker.executed)} here)"
         + (" (stopped by a signal; run the rehearsal again for the rest)" if stopped else ""))
    return done_n
