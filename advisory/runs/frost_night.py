"""The frost night (the evening run, and each update through the night), its steps in order:

1. select the blocks due (:func:`advisory.runs.blocks._block_query`), skip those assessed already;
2. start the outbox writer for a large run (:func:`advisory.runs.staging._start_staging`);
3. load, forecast and assess (:func:`advisory.runs.frost_assess.assess_night`), shared among
   forked processes for a large run (:func:`_assess_prepared`);
4. compose and store in one transaction (:func:`advisory.runs.save._store`), mark the run stored;
5. deliver (:func:`advisory.runs.send._deliver`), mark the run finished.

Python's cyclic garbage collector is paused during the batch.  Each run reports the wall time of
its stages in :attr:`RunResult.timings`; ``benchmarks/bench_night.py`` measures a night of 10,000
blocks.  For such numbers of blocks a lean outbox (``ADVISORY_OUTBOX_FORMATS``,
``ADVISORY_OUTBOX_CHARTS`` in :mod:`advisory.settings`) avoids drawing and writing every notice in
every format.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import gc
import os
from collections.abc import Callable, Sequence
from typing import Any

from sqlalchemy.orm import Session

from advisory import assessment as asm
from advisory import settings as settings_mod
from advisory.notices import notice_data
from advisory.runs import sizes
from advisory.runs.blocks import _block_links, _block_query, _load_blocks
from advisory.runs.frost_assess import assess_night
from advisory.runs.record import RunResult, StageTimes, _lap, _mark_run, _start_run
from advisory.runs.save import Prepared, _prepare, _previous_revisions, _store
from advisory.runs.send import _deliver, _pending_notices
from advisory.runs.staging import _Staging, _start_staging
from advisory.store import db as db_mod
from advisory.store.schema import (
    Block,
)


@contextlib.contextmanager
def _batch_gc():
    """Pause Python's cyclic garbage collector while a batch is computed and stored.

    A run for thousands of blocks keeps hundreds of thousands of small objects
    alive (assessments, curves, notices); every automatic collection of the
    oldest generation walks all of them again, which costs a fifth of the
    computation and frees almost nothing.  Reference counting still frees
    memory as usual; the collector is switched back on afterwards (unless it
    was off before).  Not for the delivery: drawing charts leaves reference
    cycles that only the collector frees.

    The objects made meanwhile are then moved out of the collector's sight
    (:func:`gc.freeze`): switched on again, it would otherwise walk all of them
    at once (about a second for 10,000 blocks).  The caller puts them back with
    :func:`gc.unfreeze` when the run is done (see :func:`run_night`), so that
    any reference cycles among them are still collected later.
    """
    was_enabled = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if was_enabled:
            gc.freeze()
            gc.enable()


@contextlib.contextmanager
def _frozen_heap():
    """Let the cyclic garbage collector see only the objects made from now on.

    For the delivery: the run's assessments and notices stay alive through it
    and need not be walked again and again, while the cycles that drawing
    charts leaves behind are still collected.  (:func:`gc.freeze` moves every
    object alive now out of the collector's sight; :func:`gc.unfreeze` puts them
    back afterwards.)
    """
    gc.freeze()
    try:
        yield
    finally:
        gc.unfreeze()


#: The run's own process takes this many times a worker's share of the blocks: a worker
#: also loads its blocks again and sends its results back, while this process loads every
#: block, hands its own notices to the outbox writer and takes the workers' results in
#: (measured at 10,000 blocks with ``benchmarks/bench_night.py``: both shares then end together).
OWN_SHARE_WEIGHT = 1.5


def _assess_prepared(db, session: Session, block_ids: list[int], night: dt.date, *, now: dt.datetime,
                     update: bool, workers: int = 1, timings: StageTimes | None = None,
                     staging: _Staging | None = None, load: Callable[[], list[Block]] | None = None
                     ) -> tuple[list[asm.Assessment], Prepared, dict[int, Any]]:
    """Load and assess the blocks ``block_ids`` (in that order) and prepare what to store
    (:func:`assess_night`, then :func:`_prepare`); also the blocks by id (those assessed by workers
    as :class:`_BlockLinks`).

    A large run (:data:`advisory.runs.sizes.PARALLEL_FROM_BLOCKS` blocks or more, ``workers`` > 1, a database
    other processes can open, and no other thread in this process) is cut into
    ``workers`` consecutive shares of the block list: this process does the first, forked
    processes the others, each reading the database on its own connection (forked before
    this process loads the blocks, so that they start at once).  Nothing is written until
    every share is back, and the shares are joined in the order of the blocks, so the
    result is the one a single process gives.  A share that fails raises here, and the
    run stores nothing.  With ``staging``, a worker also writes its own notices' outbox
    files ahead (:meth:`_Staging.write_share`) before it hands them back.  ``load()`` loads
    the blocks of a run in one process (default: by their ids).
    """
    from advisory import forking

    mode = "update" if update else "evening"
    as_of = now if update else None
    n_workers = min(int(workers or 1), len(block_ids) // max(1, sizes.PARALLEL_FROM_BLOCKS // 2))
    load = load or (lambda: _load_blocks(session, block_ids, equipment=False) if block_ids else [])
    if n_workers < 2 or not _shared_database(db) or not forking.can_fork():
        blocks = load() if block_ids else []
        if staging is not None:
            staging.settle(())
        assessments = assess_night(session, blocks, night, as_of=as_of, update=update, timings=timings)
        return (assessments, _prepare(session, assessments, revision_mode=mode, timings=timings),
                {b.id: b for b in blocks})
    bounds = forking.share_bounds(len(block_ids), n_workers, OWN_SHARE_WEIGHT)
    home = os.getpid()
    known: dict[int, Any] = {}

    def share(k: int) -> tuple[list[asm.Assessment], Prepared]:
        a, b = bounds[k]
        if os.getpid() == home:  # this process: its own share (or that of a worker that stopped)
            mine = _load_blocks(session, block_ids[a:b], equipment=False)
            if [x.id for x in mine] != list(block_ids[a:b]):
                raise RuntimeError("the blocks changed while the run started; run it again")
            known.update((x.id, x) for x in mine)
            _lap(timings, "load blocks")
            own = assess_night(session, mine, night, as_of=as_of, update=update, timings=timings)
            p = _prepare(session, own, revision_mode=mode, timings=timings)
            if staging is not None:  # the writer starts on these while the workers finish
                staging.hand_over([(c[0], c[2], (c[3], payload))
                                   for c, payload in zip(p.composed, p.payloads, strict=True) if c])
                _lap(timings, "hand over to the outbox writer")
            return own, p
        return _assess_share(db.url, list(block_ids[a:b]), night, now, update, staging, k)

    results = forking.fork_map(share, list(range(n_workers)), n_workers, own_weight=1.0 + 1e-9)
    if staging is not None:  # a worker that handed its files over said so; a stopped one did not
        staging.settle([k for k, (_, p) in enumerate(results) if k and p.staged])
    _lap(timings, "wait for workers")
    assessments: list[asm.Assessment] = []
    prepared = Prepared([], [], [], [])
    for share_assessments, p in results:
        assessments += share_assessments
        prepared = Prepared(prepared.todo + p.todo, prepared.payloads + p.payloads,
                            prepared.composed + p.composed, prepared.skipped + p.skipped,
                            prepared.staged + p.staged)
    # the workers' blocks: only what storing and delivering their notices needs
    known.update(_block_links(session, [i for i in block_ids if i not in known]))
    return assessments, prepared, known


def _shared_database(db) -> bool:
    """Whether another process can open the run's database (not an in-memory SQLite)."""
    from sqlalchemy.engine import make_url

    return make_url(db.url).get_backend_name() != "sqlite" or db_mod.sqlite_file(db.url) is not None


def _assess_share(url: str, block_ids: list[int], night: dt.date, now: dt.datetime, update: bool,
                  staging: _Staging | None = None, k: int = 1) -> tuple[list[asm.Assessment], Prepared]:
    """One worker's share of :func:`_assess_prepared` (runs in a forked process; reads the database,
    and with ``staging`` writes its notices' outbox files ahead)."""
    from advisory.store.db import Database

    db = Database(url, check=False)
    try:
        with db.transaction() as session:
            blocks = _load_blocks(session, block_ids, equipment=False)
            assessments = assess_night(session, blocks, night, as_of=now if update else None, update=update)
            p = _prepare(session, assessments, revision_mode="update" if update else "evening")
    finally:
        db.engine.dispose()
    # each notice goes back as the bytes already made of it (read again only where it is rendered)
    composed = [c if c is None else (c[0], c[1], notice_data.EncodedBlockNotice.of(c[2], c[3], payload), c[3])
                for c, payload in zip(p.composed, p.payloads, strict=True)]
    mine = [(c[0], c[2], (c[3], payload)) for c, payload in zip(composed, p.payloads, strict=True) if c]
    fed = staging is not None and staging.write_share(k, mine)
    return assessments, Prepared(p.todo, p.payloads, composed, p.skipped, [key for key, _, _ in mine] if fed else [])


def _run_stages(db, res: RunResult, staged: list, state: str, night: dt.date, block_ids, farm, names, *,
                now: dt.datetime, update: bool, key: str | None, deliver: bool, settings, sleep,
                timings: StageTimes) -> None:
    """The stages of :func:`run_night` after its start: assess and store (one transaction), then deliver."""
    known: dict[int, tuple] = {}  # the notices stored by this run and their recipients (not read back)
    if state == "new":
        with _batch_gc(), db.transaction() as session:
            timings.lap("start")
            # the blocks' ids first: a large run's workers start on theirs while this process loads its own
            rows = session.execute(_block_query(block_ids, farm, names, Block.id, Block.name, Block.farm_id)).all()
            farm_ids = sorted({r.farm_id for r in rows})
            done_before: list[str] = []
            if not update:  # a block already assessed tonight is not assessed again (a rerun)
                before = _previous_revisions(session, [r.id for r in rows], night, "frost")
                done_before = [f"{r.name}: frost {night} already assessed (revision {before[r.id]})"
                               for r in rows if r.id in before]
                rows = [r for r in rows if r.id not in before]
            if deliver:
                staging = _start_staging(len(rows), settings)
                if staging is not None:
                    staged.append(staging)
                    staging.defer_checkpoints(session, db.url)
            timings.lap("load blocks")
            wanted = {r.id for r in rows}
            res.assessments, prepared, known_blocks = _assess_prepared(
                db, session, [r.id for r in rows], night, now=now, update=update,
                workers=getattr(settings, "workers", 1), timings=timings, staging=staged[0] if staged else None,
                load=lambda: [b for b in _load_blocks(session, block_ids, farm, names, equipment=False)
                              if b.id in wanted])
            stored, res.skipped = _store(session, res.assessments,
                                         revision_mode="update" if update else "evening", now=now,
                                         timings=timings, prepared=prepared,
                                         workers=getattr(settings, "workers", 1),
                                         stage=staged[0].hand_over if staged else None,
                                         known_blocks=known_blocks)
            res.skipped = done_before + res.skipped
            res.notices = [n.id for n, _ in stored]
            known = {n.id: (n, recips) for n, recips in stored}
            _mark_run(session, key, "stored", now)
        timings.lap("commit")
    else:  # stored before a crash or a stop: only delivery is left
        with db.transaction() as session:
            farm_ids = sorted({b.farm_id for b in _load_blocks(session, block_ids, farm, names, equipment=False)})
    if deliver:
        # New notices, and any of this night's notices that a crash left undelivered.
        staging = staged[0] if staged else None
        token = staging.wait() if staging is not None else None
        if staging is not None:
            timings.lap("wait for outbox writer")
        if token:
            timings["outbox files written ahead"] = staging.seconds  # by the writer, meanwhile
            staging.publish()  # the notices are stored: the writer moves its files to their names meanwhile
            staging.checkpoint()  # and then copies the run's writes into the database file
        with _frozen_heap():
            pending = _pending_notices(db, night, "frost", farm_ids, known=known)
            res.deliveries = _deliver(db, pending, settings, sleep=sleep, staged=token,
                                      published=staging.published() if token else frozenset())
        timings.lap("outbox delivery")


def run_night(db, night: dt.date, block_ids: Sequence[int] | None = None, *, now: dt.datetime | None = None,
              update: bool = False, key: str | None = None, farm: str | None = None,
              names: Sequence[str] | None = None, deliver: bool = True, settings=None,
              sleep=None, timings: StageTimes | None = None) -> RunResult:
    """The evening run (or an update) for a night.

    Parameters
    ----------
    db : Database
    night : date
        Local date of the evening.
    block_ids, farm, names : optional
        Which active blocks (default all).
    now : datetime, optional
        The run's clock (default: the real time).  For an update the
        observations up to ``now`` are used.
    update : bool
        An update through the night instead of the evening run.
    key : str, optional
        The planned run's key (restart safety).
    deliver : bool
        Deliver the notices (always to the outbox; mail and webhook when set up).
    """
    now = now or dt.datetime.now(dt.UTC)
    settings = settings or settings_mod.load(db.url)
    res = RunResult(kind="update" if update else "evening", night=night)
    timings = timings if timings is not None else StageTimes()
    state = _start_run(db, key, res.kind, night, now)
    if state == "finished":
        res.skipped.append(f"run {key} already done")
        return res
    staged: list[_Staging] = []  # outbox files written ahead while the run stores
    try:
        _run_stages(db, res, staged, state, night, block_ids, farm, names, now=now, update=update, key=key,
                    deliver=deliver, settings=settings, sleep=sleep, timings=timings)
    finally:
        staging = staged[0] if staged else None
        if staging is not None:  # what the delivery did not use (or all of it, if the run failed before)
            if not staging.used:
                staging.wait()
            staging.discard()
        gc.unfreeze()  # the run's objects, hidden from the collector by _batch_gc
    _mark_run(db, key, "finished", now)
    timings.lap("finish")
    res.timings = dict(timings)
    return res
