"""Run claims: each planned run offered once, claimed by one host, taken over from a silent one, in order."""

from __future__ import annotations

import datetime as dt

from sqlalchemy import func, select

from advisory import schedule
from advisory.runs import claims, record
from advisory.store.schema import Notice, RunClaim

NIGHT = dt.date(2026, 4, 8)
T0 = dt.datetime(2026, 4, 9, 4, 0, tzinfo=dt.UTC)


def _runs():
    return [schedule.PlannedRun(schedule.EVENING, T0, NIGHT, (1, 2)),
            schedule.PlannedRun(schedule.EVENING, T0, NIGHT, (3,)),
            schedule.PlannedRun(schedule.UPDATE, T0 + dt.timedelta(hours=1), NIGHT, (1, 2))]


def test_a_run_is_offered_once_whoever_offers_it(db):
    runs = _runs()
    assert claims.offer(db, runs, due_at=lambda r: r.run_at + dt.timedelta(seconds=5)) == 3
    assert claims.offer(db, runs) == 0  # a second host: nothing new, and the first host's clock holds
    assert set(claims.due_times(db, [r.key for r in runs]).values()) == {
        T0 + dt.timedelta(seconds=5), T0 + dt.timedelta(hours=1, seconds=5)}
    with db.transaction() as s:
        assert s.scalar(select(func.count()).select_from(RunClaim)) == 3


def test_each_run_is_claimed_by_one_host_and_in_order(db):
    runs = _runs()
    claims.offer(db, runs)
    later = T0 + dt.timedelta(hours=2)
    a = claims.claim_next(db, "host-a", later)
    b = claims.claim_next(db, "host-b", later)
    assert {a.key, b.key} == {runs[0].key, runs[1].key}          # the two evening runs, one each
    # the update of blocks 1 and 2 waits for their evening run, even though it is due
    assert claims.claim_next(db, "host-b", later) is None
    with db.transaction() as s:
        claims.mark_done(s, runs[0].key, later)
    assert claims.claim_next(db, "host-b", later).key == runs[2].key
    assert claims.states(db, [r.key for r in runs]) == {runs[0].key: "done", runs[1].key: "running",
                                                        runs[2].key: "running"}


def test_a_silent_host_s_run_is_taken_over_after_the_takeover_time(db):
    run = _runs()[1]
    claims.offer(db, [run])
    first = claims.claim_next(db, "host-a", T0, takeover_s=60)
    assert first.attempts == 1
    assert claims.claim_next(db, "host-b", T0 + dt.timedelta(seconds=30), takeover_s=60) is None
    claims.beat(db, "host-a", T0 + dt.timedelta(seconds=50))   # host a is alive
    assert claims.claim_next(db, "host-b", T0 + dt.timedelta(seconds=100), takeover_s=60) is None
    # host a dies: no more heartbeats
    taken = claims.claim_next(db, "host-b", T0 + dt.timedelta(seconds=111), takeover_s=60)
    assert taken.key == run.key and taken.attempts == 2
    with db.transaction() as s:
        assert s.scalar(select(RunClaim.host).where(RunClaim.key == run.key)) == "host-b"


def test_a_failing_run_is_tried_again_a_bounded_number_of_times(db):
    run = _runs()[1]
    claims.offer(db, [run])
    states = []
    for k in range(claims.MAX_ATTEMPTS + 1):
        c = claims.claim_next(db, "host-a", T0 + dt.timedelta(minutes=k))
        if c is None:
            break
        states.append(claims.give_back(db, c, "host-a", T0, "RuntimeError: broken"))
    assert states == ["pending"] * (claims.MAX_ATTEMPTS - 1) + ["failed"]
    with db.transaction() as s:
        assert s.scalar(select(RunClaim.error).where(RunClaim.key == run.key)) == "RuntimeError: broken"


def test_finishing_a_run_marks_its_claim_done(db):
    run = _runs()[1]
    claims.offer(db, [run])
    claims.claim_next(db, "host-a", T0)
    assert record._start_run(db, run.key, run.kind, NIGHT, T0) == "new"
    record._mark_run(db, run.key, "stored", T0)
    assert claims.states(db, [run.key]) == {run.key: "running"}
    record._mark_run(db, run.key, "finished", T0)
    assert claims.states(db, [run.key]) == {run.key: "done"}


def test_an_evening_run_claimed_beyond_the_grace_time_tells_of_the_missed_run(spring_db):
    clocks = schedule.load_block_clocks(spring_db)
    evening = [r for r in schedule.night_runs(clocks, NIGHT) if r.kind == schedule.EVENING]
    claims.offer(spring_db, evening)
    late = max(r.run_at for r in evening) + dt.timedelta(hours=2)
    worker = schedule._Worker(spring_db, "host-a", takeover_s=60, grace_min=45, now_fn=lambda: late,
                              echo=lambda *_: None)
    worker.work()
    assert sorted(worker.missed) == sorted(r.key for r in evening) and worker.executed == []
    assert set(claims.states(spring_db, [r.key for r in evening]).values()) == {"done"}
    with spring_db.transaction() as s:
        kinds = s.scalars(select(Notice.content["status"].as_string()).where(Notice.block_id.is_not(None))).all()
    assert kinds and set(kinds) == {"missed"}
