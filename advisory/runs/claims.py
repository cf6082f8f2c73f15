"""Runs shared among the hosts that serve one database: every planned run is claimed by one host.

Every ``serve`` plans the same runs (the planner is pure and the keys are deterministic), and
offers each of them as a row of ``run_claims`` (:func:`offer`; a row offered already is left as it
is).  A host takes the next run due with :func:`claim_next`: on PostgreSQL the candidate rows are
read ``FOR UPDATE SKIP LOCKED`` (a row another host is claiming at that moment is passed over, not
waited for) and the claim is a conditional update of the row in the same transaction, so that two
hosts never hold one run.  A run is due when it is pending, or when the host that claimed it has not
refreshed its heartbeat (:func:`beat`) for ``takeover_s`` seconds: that host is taken to be dead and
another one takes the run over.  A run is only claimed after the earlier runs of its night that
share a block with it are done (an update reads what the evening run stored).

The claim is marked done by :func:`advisory.runs.record._mark_run` in the transaction that marks
the run finished; what the run stored before its host died is found by its run record (``stored``:
only the delivery is left), so a run taken over is never stored twice.  A run that fails is given
back (pending) and tried again, at most :data:`MAX_ATTEMPTS` times, then marked failed with its error.
On SQLite (one host) the same code runs: the claim is then trivially one's own.
"""

from __future__ import annotations

import datetime as dt
import os
import socket
import uuid
from collections.abc import Iterable
from dataclasses import dataclass

from sqlalchemy import or_, select, update
from sqlalchemy.orm import Session

from advisory.store.schema import RunClaim

PENDING, RUNNING, DONE, FAILED = "pending", "running", "done", "failed"
#: A run that failed this many times is marked failed (and left to the office) instead of tried again.
MAX_ATTEMPTS = 3
#: Default: a claim whose heartbeat is older than this is taken over by another host [s].
TAKEOVER_S = 120.0


def host_name() -> str:
    """A name for this serving process, unique among the hosts: machine, process id and a random part."""
    return f"{socket.gethostname()}:{os.getpid()}:{uuid.uuid4().hex[:6]}"


@dataclass(frozen=True)
class Claim:
    """A run claimed by this host."""

    key: str
    kind: str
    night: dt.date
    run_at: dt.datetime
    due_at: dt.datetime
    block_ids: tuple[int, ...]
    attempts: int


def _insert(session: Session):
    from sqlalchemy.dialects import postgresql, sqlite

    mod = postgresql if session.get_bind().dialect.name == "postgresql" else sqlite
    return mod.insert(RunClaim)


def offer(db, runs: Iterable, *, due_at=None) -> int:
    """Offer planned runs (:class:`advisory.schedule.PlannedRun`) to the hosts; returns how many were new.

    ``due_at(run)`` gives the wall time to start a run (default: its planned time).  A run offered
    before keeps its row (and its due time: the first host to offer a rehearsal sets its clock).
    """
    rows = [{"key": r.key, "kind": r.kind, "night": r.night, "run_at": r.run_at,
             "due_at": due_at(r) if due_at else r.run_at, "block_ids": list(r.block_ids), "state": PENDING,
             "attempts": 0} for r in runs]
    if not rows:
        return 0
    new = 0
    with db.transaction() as s:
        lock(s, PLANNER_LOCK)  # one host offers at a time (the same rows in the same order: no waits in a circle)
        for k in range(0, len(rows), 500):
            part = rows[k:k + 500]
            res = s.execute(_insert(s).values(part).on_conflict_do_nothing(index_elements=["key"])
                            .returning(RunClaim.id))
            new += len(res.all())
    return new


def claim_next(db, host: str, now: dt.datetime, *, takeover_s: float = TAKEOVER_S,
               keys: Iterable[str] | None = None, scan: int = 50) -> Claim | None:
    """Claim the next run due at ``now`` for ``host`` (or take over a dead host's); None if there is none.

    ``keys`` limits the choice to those runs (a rehearsal's night).
    """
    stale = now - dt.timedelta(seconds=takeover_s)
    due = or_(RunClaim.state == PENDING,
              (RunClaim.state == RUNNING) & (RunClaim.heartbeat_at < stale))
    keys = list(keys) if keys is not None else None
    with db.transaction() as s:
        q = select(RunClaim).where(RunClaim.due_at <= now, due)
        if keys is not None:
            q = q.where(RunClaim.key.in_(keys))
        candidates = list(s.scalars(q.order_by(RunClaim.due_at, RunClaim.id).limit(scan)
                                    .with_for_update(skip_locked=True)))
        if not candidates:
            return None
        nights = sorted({c.night for c in candidates})
        earlier = s.execute(select(RunClaim.id, RunClaim.night, RunClaim.due_at, RunClaim.block_ids)
                            .where(RunClaim.night.in_(nights), RunClaim.state.in_((PENDING, RUNNING)))).all()
        for c in candidates:
            mine = set(c.block_ids or ())
            if any(e.night == c.night and e.id != c.id and (e.due_at, e.id) < (c.due_at, c.id)
                   and mine & set(e.block_ids or ()) for e in earlier):
                continue  # an earlier run of these blocks is not done yet
            c.state, c.host, c.heartbeat_at, c.attempts = RUNNING, host, now, (c.attempts or 0) + 1
            return Claim(c.key, c.kind, c.night, c.run_at, c.due_at, tuple(c.block_ids or ()), c.attempts)
    return None


def beat(db, host: str, now: dt.datetime) -> int:
    """Refresh the heartbeat of every run ``host`` holds; returns how many."""
    with db.transaction() as s:
        res = s.execute(update(RunClaim).where(RunClaim.host == host, RunClaim.state == RUNNING)
                        .values(heartbeat_at=now))
        return res.rowcount or 0


def mark_done(session: Session, key: str, now: dt.datetime) -> None:
    """Mark the claim of run ``key`` done (in the caller's transaction; no row: a run not offered)."""
    session.execute(update(RunClaim).where(RunClaim.key == key, RunClaim.state != DONE)
                    .values(state=DONE, finished_at=now))


def give_back(db, claim: Claim, host: str, now: dt.datetime, error: str) -> str:
    """A run that failed: pending again for any host, or failed after :data:`MAX_ATTEMPTS`; the new state."""
    state = FAILED if claim.attempts >= MAX_ATTEMPTS else PENDING
    with db.transaction() as s:
        s.execute(update(RunClaim).where(RunClaim.key == claim.key, RunClaim.host == host,
                                         RunClaim.state == RUNNING)
                  .values(state=state, host=None if state == PENDING else host, error=error[:2000],
                          finished_at=now if state == FAILED else None))
    return state


#: Keys of the server-wide advisory locks (``pg_advisory_xact_lock(LOCKS, n)``).
LOCKS = 0x4164_7673
DELIVERY_LOCK, PLANNER_LOCK = 1, 2


def lock(session: Session, which: int) -> None:
    """Hold a lock shared by every host until the end of ``session``'s transaction (PostgreSQL; on
    SQLite a writing transaction is alone anyway).

    ``DELIVERY_LOCK``: one delivery at a time among the hosts.  A host that delivers what it finds
    undelivered of a night (what a dead host left) must not send what another host is delivering
    right then: under the lock, what was delivered is committed before the next delivery reads it.
    """
    from sqlalchemy import text

    if session.get_bind().dialect.name == "postgresql":
        session.execute(text("SELECT pg_advisory_xact_lock(:a, :b)"), {"a": LOCKS, "b": which})


def states(db, keys: Iterable[str]) -> dict[str, str]:
    """The state of each run offered among ``keys``."""
    keys = list(keys)
    out: dict[str, str] = {}
    with db.transaction() as s:
        for k in range(0, len(keys), 500):
            out.update(s.execute(select(RunClaim.key, RunClaim.state).where(RunClaim.key.in_(keys[k:k + 500]))).all())
    return out


def due_times(db, keys: Iterable[str]) -> dict[str, dt.datetime]:
    """When each run offered among ``keys`` is due (wall time)."""
    keys = list(keys)
    out: dict[str, dt.datetime] = {}
    with db.transaction() as s:
        for k in range(0, len(keys), 500):
            out.update(s.execute(select(RunClaim.key, RunClaim.due_at).where(RunClaim.key.in_(keys[k:k + 500]))).all())
    return out
