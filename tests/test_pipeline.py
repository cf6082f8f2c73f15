"""The nightly pipeline on the demo farm: idempotent, updates, silence, missed runs, verification."""

from __future__ import annotations

import datetime as dt

import pytest
from sqlalchemy import func, select, text

from advisory import assessment as asm
from advisory.runs import blocks, calibration_refit, frost_night, frost_update, morning_check, planned
from advisory.store.schema import Delivery, Forecast, Notice, Verification

NIGHT = dt.date(2026, 4, 8)      # a radiation-frost night of the demo week
NOW = dt.datetime(2026, 4, 9, 5, 0, tzinfo=dt.UTC)


def _count(db, model, *where):
    with db.transaction() as s:
        return s.scalar(select(func.count()).select_from(model).where(*where))


def test_evening_run_assesses_every_block_once_and_rerun_sends_nothing(spring_db, quiet_channels):
    res = frost_night.run_night(spring_db, NIGHT, now=NOW, sleep=lambda s: None)
    assert len(res.assessments) == 6
    assert all(a.status == asm.STATUS_OK for a in res.assessments)
    # a frost night: every block is at some risk, and the plan says something for each
    assert all(a.level for a in res.assessments)
    assert _count(spring_db, Forecast) == 6
    notices = _count(spring_db, Notice)
    deliveries = _count(spring_db, Delivery)
    assert notices == 7  # six blocks and one farm summary
    outbox_files = sorted(p.name for p in quiet_channels.rglob("*") if p.is_file())
    assert outbox_files
    again = frost_night.run_night(spring_db, NIGHT, now=NOW, sleep=lambda s: None)
    assert len(again.skipped) == 6
    assert _count(spring_db, Forecast) == 6
    assert _count(spring_db, Notice) == notices
    assert _count(spring_db, Delivery) == deliveries
    assert sorted(p.name for p in quiet_channels.rglob("*") if p.is_file()) == outbox_files


def test_update_notice_only_on_material_change(spring_db):
    first = frost_night.run_night(spring_db, NIGHT, now=NOW, sleep=lambda s: None)
    n0 = _count(spring_db, Notice)
    # an update a minute after the reference time sees the same readings: nothing material
    ref = min(a.reference_time_utc for a in first.assessments)
    res = frost_night.run_night(spring_db, NIGHT, now=ref + dt.timedelta(minutes=1), update=True,
                             sleep=lambda s: None)
    assert _count(spring_db, Forecast, Forecast.revision == 1) == 6
    assert all(a.is_update for a in res.assessments)
    assert _count(spring_db, Notice) == n0


def _noticed(level="marked", rank=2, needs=False, p50=-1.0, start=None, ready=None, method="wind_machine",
             clock=NOW - dt.timedelta(hours=3)):
    return asm.Assessment(kind="frost", farm="F", farm_tz="UTC", units="metric", block_id=1, block="B",
                          station="S", crop="apple", variety=None, stage="full bloom", area_ha=1.0,
                          night=NIGHT, level=level, level_rank=rank, p50_c=p50, reference_time_utc=clock,
                          details={"needs_protection": needs},
                          plan=[asm.ProtectionStep(method, True, start_utc=start, ready_by_utc=ready)])


def _update(old, **changes):
    """``old`` an hour later, with ``changes`` (attributes, or ``start``/``ready`` of its one step)."""
    new = asm.from_dict(asm.to_dict(old))
    new.reference_time_utc = old.reference_time_utc + dt.timedelta(hours=1)
    for k in ("start", "ready"):
        if k in changes:
            setattr(new.plan[0], "start_utc" if k == "start" else "ready_by_utc", changes.pop(k))
    for k, v in changes.items():
        setattr(new, k, v)
    return new


def test_material_change_rules():
    """A notice at night wakes someone: what changes the crew's work goes out, flips near an edge do not
    (the rules of frost_update.material_change)."""
    start = NOW + dt.timedelta(hours=2)   # still ahead at the update's clock
    base = _noticed(start=start)
    assert frost_update.material_change(_update(base), base) == []
    m = frost_update.MATERIAL_START_SHIFT_MIN
    assert frost_update.material_change(_update(base, start=start - dt.timedelta(minutes=m)), base)
    assert frost_update.material_change(_update(base, start=start - dt.timedelta(minutes=m - 1)), base) == []
    # later: a larger shift is needed, the crew is ready anyway
    assert frost_update.material_change(_update(base, start=start + dt.timedelta(minutes=m)), base) == []
    assert frost_update.material_change(
        _update(base, start=start + dt.timedelta(minutes=frost_update.MATERIAL_LATER_SHIFT_MIN)), base)
    # a firm start where the last notice said only "be ready"
    ready = _noticed(ready=start)
    assert frost_update.material_change(_update(ready, start=start, ready=None), ready) == ["start time set"]
    assert frost_update.material_change(_update(ready, ready=start - dt.timedelta(minutes=m)), ready)
    assert frost_update.material_change(_update(ready, ready=start + dt.timedelta(minutes=2 * m)), ready) == []
    # once the noticed start has passed, the crew is running: a new "start" is not news
    running = _noticed(start=NOW - dt.timedelta(hours=2.5))
    assert frost_update.material_change(_update(running, start=NOW - dt.timedelta(minutes=90)), running) == []


def test_material_change_levels_move_by_action_not_by_name():
    quiet = _noticed(level="nil", rank=0, p50=2.0)
    assert frost_update.material_change(_update(quiet, level="slight", level_rank=1), quiet) == []
    protect = _noticed(level="serious", rank=3, needs=True, p50=-1.0)
    assert frost_update.material_change(_update(protect, level="grave", level_rank=4, p50_c=-1.4), protect) == []
    assert frost_update.material_change(_update(quiet, level="serious", level_rank=3, p50_c=-1.0,
                                            details={"needs_protection": True}), quiet)
    # standing down must hold by a margin: 0.3 °C warmer is a flip near the edge, 0.6 °C is news
    down = {"level": "slight", "level_rank": 1, "details": {"needs_protection": False}}
    assert frost_update.material_change(_update(protect, p50_c=-0.7, **down), protect) == []
    assert frost_update.material_change(_update(protect, p50_c=-1.0 + frost_update.MATERIAL_STAND_DOWN_C, **down), protect)
    # a method dropped, the same margin; a method added goes out at once
    dropped = _update(protect, p50_c=-0.8)
    dropped.plan[0].advised = False
    assert frost_update.material_change(dropped, protect) == []
    added = _update(protect)
    added.plan.append(asm.ProtectionStep("heater", True, start_utc=NOW + dt.timedelta(hours=1)))
    assert "advised protection changed" in frost_update.material_change(added, protect)


def test_updates_through_a_frost_night_never_stop_sprinklers_once_started(spring_db, quiet_channels):
    """Hourly updates until sunrise, as the scheduler places them: once a notice has had the over-tree
    sprinklers start, every later revision keeps them running (stopping them before the ice melts does
    more harm than none; common practice), and update notices stay few."""
    from advisory import schedule
    from advisory.risk import continuity

    frost_night.run_night(spring_db, NIGHT, now=NOW, sleep=lambda s: None)
    runs = schedule.night_runs(schedule.load_block_clocks(spring_db), NIGHT,
                               schedule.PlannerSettings(kinds=(schedule.UPDATE,)))
    assert len(runs) >= 6
    for r in runs:
        frost_night.run_night(spring_db, NIGHT, list(r.block_ids), now=r.run_at, update=True, sleep=lambda s: None)
    with spring_db.transaction() as s:
        rows = s.execute(select(Forecast.block_id, Forecast.revision, Forecast.payload)
                         .where(Forecast.night == NIGHT).order_by(Forecast.block_id, Forecast.revision)).all()
        noticed = set(s.execute(select(Notice.block_id, Notice.revision).where(Notice.night == NIGHT)).all())
    checked = 0
    told: dict[int, dt.datetime] = {}  # the start the last notice gave the crew
    for bid, rev, payload in rows:
        a = asm.from_dict(payload)
        over = [p for p in a.plan if p.method in continuity.KEEP_RUNNING]
        if bid in told and told[bid] <= a.reference_time_utc:  # under way
            assert over and over[0].advised and over[0].started_utc == told[bid], (bid, rev)
            checked += 1
        elif (bid, rev) in noticed:  # before the start, a notice may still move or call off the run
            if over and over[0].advised and over[0].start_utc is not None:
                told[bid] = over[0].start_utc
            else:
                told.pop(bid, None)
    assert checked >= 4  # the sprinkler blocks ran on through several updates
    updates = [(b, r) for b, r in noticed if b is not None and r > 0]
    assert len(updates) <= 2 * 6, updates  # at most about two update notices per block on this night
    # each update's farm summary shows the whole farm (the other blocks as last sent), marked as an update
    with spring_db.transaction() as s:
        summaries = s.scalars(select(Notice).where(Notice.night == NIGHT, Notice.block_id.is_(None),
                                                   Notice.revision > 0)).all()
        assert summaries
        for n in summaries:
            assert len(n.content["rows"]) == 6 and n.content["is_update"], n.subject
            assert n.content["lead"][0].startswith(f"Update {n.revision}: new notice")


def test_silent_station_gets_an_explicit_notice(spring_db):
    # QR-CREEK stops reporting at 15:00 local on the day of the night
    cut = int(dt.datetime(2026, 4, 8, 22, 0, tzinfo=dt.UTC).timestamp())
    with spring_db.engine.begin() as conn:
        conn.execute(text("DELETE FROM observations WHERE station_id = (SELECT id FROM stations WHERE code = "
                          "'QR-CREEK') AND time_utc >= :t"), {"t": cut})
    res = frost_night.run_night(spring_db, NIGHT, now=NOW, sleep=lambda s: None)
    creek = [a for a in res.assessments if a.station == "QR-CREEK"]
    assert creek and all(a.status == asm.STATUS_NO_FORECAST for a in creek)
    assert all("silent since Wed 08 Apr 14:45 PDT" in a.reason for a in creek)
    with spring_db.transaction() as s:
        subjects = [n.subject for n in s.scalars(select(Notice).where(Notice.block_id.is_not(None)))]
    assert len(subjects) == 6  # the silent blocks get a notice too, not silence


@pytest.mark.parametrize("every_reading_gone", [False, True])
def test_station_silent_mid_run_says_keep_the_sprinklers_running(spring_db, quiet_channels, every_reading_gone):
    """Creek Bing's notice as of 22:39 PDT has the over-tree sprinklers start before midnight; QR-CREEK then
    falls silent after midnight.  The update that finds no forecast says so, and to keep them running."""
    frost_night.run_night(spring_db, NIGHT, now=NOW, sleep=lambda s: None)
    first = dt.datetime(2026, 4, 9, 5, 39, tzinfo=dt.UTC)           # 22:39 PDT
    frost_night.run_night(spring_db, NIGHT, [2], now=first, update=True, sleep=lambda s: None)
    with spring_db.transaction() as s:
        told = s.scalars(select(Notice).where(Notice.block_id == 2, Notice.night == NIGHT)
                         .order_by(Notice.revision.desc())).first()
        plan = told.forecast.payload["plan"]
    sprinklers = [p for p in plan if p["method"] == "overtree_sprinkler" and p["advised"]]
    # The evening notice may already advise them (the sprinkler rate table is interpolated, so the
    # 3.8 mm/h system meets the need); then the 22:39 update has nothing new to send.
    assert told.revision in (0, 1) and sprinklers and sprinklers[0]["start_utc"] < "2026-04-09T07:00"
    cut = int(dt.datetime(2026, 4, 9, 7, 0, tzinfo=dt.UTC).timestamp())   # silent from 00:00 PDT
    if every_reading_gone:  # not a reading left: no evening state at all
        cut = 0
    with spring_db.engine.begin() as conn:
        conn.execute(text("DELETE FROM observations WHERE station_id = (SELECT id FROM stations WHERE code = "
                          "'QR-CREEK') AND time_utc >= :t"), {"t": cut})
    res = frost_night.run_night(spring_db, NIGHT, [2], now=dt.datetime(2026, 4, 9, 9, 39, tzinfo=dt.UTC),
                             update=True, sleep=lambda s: None)
    a = res.assessments[0]
    assert a.status == asm.STATUS_NO_FORECAST
    assert [(p.method, p.advised, p.started_utc is not None) for p in a.plan] == [("overtree_sprinkler", True, True)]
    with spring_db.transaction() as s:
        n = s.scalars(select(Notice).where(Notice.block_id == 2, Notice.night == NIGHT)
                      .order_by(Notice.revision.desc())).first()
        lead = n.content["lead"]
    assert n.revision == 2 and lead[0].startswith("Update 2 to the evening notice")
    assert any(line.startswith("Keep over-tree sprinklers running (started 23:") for line in lead), lead


def test_missed_evening_run_sends_one_notice(spring_db):
    run_at = dt.datetime(2026, 4, 9, 4, 39, tzinfo=dt.UTC)
    res = planned.record_missed(spring_db, NIGHT, [1, 2], key="evening:test", run_at=run_at,
                                 now=run_at + dt.timedelta(hours=3))
    assert {a.status for a in res.assessments} == {asm.STATUS_MISSED}
    assert "was missed" in res.assessments[0].reason
    again = planned.record_missed(spring_db, NIGHT, [1, 2], key="evening:test", run_at=run_at,
                                   now=run_at + dt.timedelta(hours=3))
    assert again.assessments == []
    assert _count(spring_db, Notice, Notice.block_id.is_not(None)) == 2


def test_morning_verification_stores_observed_minimum(spring_db):
    frost_night.run_night(spring_db, NIGHT, now=NOW, sleep=lambda s: None)
    early = morning_check.verify_night(spring_db, NIGHT, now=NOW)
    assert early.verified == [] and early.skipped
    res = morning_check.verify_night(spring_db, NIGHT, now=dt.datetime(2026, 4, 9, 15, tzinfo=dt.UTC))
    assert len(res.verified) == 6
    assert _count(spring_db, Verification) == 6
    # the demo's bench station bottoms out near -3.4 °C at dawn (see demo-farm/generate.py)
    bench = [v for v in res.verified if v["block"] == "Bench Gala"][0]
    assert -4.5 < bench["observed_c"] < -2.5
    again = morning_check.verify_night(spring_db, NIGHT, now=dt.datetime(2026, 4, 9, 16, tzinfo=dt.UTC))
    assert again.verified == []


def test_calibrations_are_refitted_on_a_schedule(spring_db):
    from sqlalchemy import select

    from advisory.store.schema import Calibration, Station

    with spring_db.transaction() as s:
        ids = list(s.scalars(select(Station.id).order_by(Station.id)))
        t0 = dt.datetime(2026, 4, 9, 15, tzinfo=dt.UTC)
        assert calibration_refit.stations_due_for_refit(s, ids, t0) == ids  # none fitted yet
        s.add(Calibration(station_id=ids[0], kind="night_min", fitted_at=t0, training_nights=400, params={}))
        s.add(Calibration(station_id=ids[1], kind="night_min", fitted_at=t0, training_nights=20, params={}))
        s.flush()
        day = dt.timedelta(days=1)
        # next morning: the young fit (20 nights) again, the seasoned one (400 nights) not yet
        assert calibration_refit.stations_due_for_refit(s, ids, t0 + day) == [ids[1]]
        assert calibration_refit.stations_due_for_refit(s, ids, t0 + 6 * day) == [ids[1]]
        # a week on, both
        assert calibration_refit.stations_due_for_refit(s, ids, t0 + calibration_refit.REFIT_EVERY_DAYS * day) == ids


def test_a_past_night_run_again_uses_only_calibrations_fitted_by_then(spring_db):
    from sqlalchemy import select

    from advisory.store.schema import Calibration, Station

    frost_night.run_night(spring_db, NIGHT, now=NOW, deliver=False)
    morning = dt.datetime(2026, 4, 9, 15, tzinfo=dt.UTC)
    morning_check.verify_night(spring_db, NIGHT, now=morning)  # fits the stations' calibrations
    with spring_db.transaction() as s:
        ids = list(s.scalars(select(Station.id).order_by(Station.id)))
        fitted = set(s.scalars(select(Calibration.station_id).where(Calibration.kind == "night_min")))
        assert fitted
        assert blocks._latest_calibrations(s, ids, before=NOW) == {}  # the evening before: not yet known
        assert set(blocks._latest_calibrations(s, ids, before=morning)) == fitted


def test_observed_minimum_needs_a_covered_window():
    import pandas as pd

    idx = pd.date_range("2026-04-09 04:00", "2026-04-09 14:00", freq="15min", tz="UTC")
    frame = pd.DataFrame({"air_temp_c": range(len(idx))}, index=idx, dtype=float)
    assert morning_check.observed_minimum(frame, idx[0], idx[-1]) == 0.0
    holed = frame.drop(frame.index[8:20])
    assert morning_check.observed_minimum(holed, idx[0], idx[-1]) is None
