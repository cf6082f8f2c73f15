"""The record of a run: its result, the wall time of its stages, its key in the ``runs`` table.

Every planned run has a key; :func:`_start_run` says whether it is new, stored (only delivery is
left) or finished, and :func:`_mark_run` records each step once it is committed.
"""

from __future__ import annotations

import datetime as dt
import time
from collections.abc import Sequence
from dataclasses import dataclass, field

from sqlalchemy import select
from sqlalchemy.orm import Session

from advisory import assessment as asm
from advisory.runs import claims
from advisory.store.schema import (
    RunRecord,
)


@dataclass
class RunResult:
    """What a run did, for the command line and the scheduler."""

    kind: str
    night: dt.date
    assessments: list[asm.Assessment] = field(default_factory=list)
    notices: list[int] = field(default_factory=list)
    deliveries: dict[str, int] = field(default_factory=dict)
    skipped: list[str] = field(default_factory=list)
    verified: list[dict] = field(default_factory=list)
    farm_summaries: dict[str, int] = field(default_factory=dict)
    #: Wall time of each stage of the run [s] (see :class:`StageTimes`).
    timings: dict[str, float] = field(default_factory=dict)


class StageTimes(dict):
    """Wall time per stage of a run [s]: ``lap(name)`` adds the time since the previous lap."""

    def __init__(self):
        super().__init__()
        self._t = time.perf_counter()

    def lap(self, name: str) -> None:
        now = time.perf_counter()
        self[name] = self.get(name, 0.0) + now - self._t
        self._t = now


def _lap(timings: StageTimes | None, name: str) -> None:
    if timings is not None:
        timings.lap(name)


def _start_run(db, key: str | None, kind: str, night: dt.date, now: dt.datetime) -> str:
    """Record the start of a keyed run; returns its state before: "new", "stored" or "finished"."""
    if key is None:
        return "new"
    with db.transaction() as s:
        row = s.scalar(select(RunRecord).where(RunRecord.key == key))
        if row is None:
            s.add(RunRecord(key=key, kind=kind, night=night, started_at=now, status="running"))
            return "new"
        return {"stored": "stored", "finished": "finished"}.get(row.status, "new")


def _mark_run(session_or_db, key: str | None, status: str, now: dt.datetime, detail: dict | None = None) -> None:
    if key is None:
        return

    def _do(s):
        row = s.scalar(select(RunRecord).where(RunRecord.key == key))
        if row is not None:
            row.status = status
            if status == "finished":
                row.finished_at = now
            if detail:
                row.detail = {**(row.detail or {}), **detail}
        if status == "finished":  # the run's claim among the hosts is done with it (same transaction)
            claims.mark_done(s, key, now)

    if isinstance(session_or_db, Session):
        _do(session_or_db)
    else:
        with session_or_db.transaction() as s:
            _do(s)


def run_status(db, key: str) -> str | None:
    """The recorded status of run ``key`` ("running", "stored", "finished"), None if it never started."""
    with db.transaction() as s:
        return s.scalar(select(RunRecord.status).where(RunRecord.key == key))


def finished_run_keys(db, keys: Sequence[str]) -> set[str]:
    if not keys:
        return set()
    with db.transaction() as s:
        out = set()
        keys = list(keys)
        for k in range(0, len(keys), 500):
            out |= set(s.scalars(select(RunRecord.key).where(RunRecord.key.in_(keys[k:k + 500]),
                                                              RunRecord.status == "finished")))
        return out
