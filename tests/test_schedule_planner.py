"""The planner with an injected clock: one evening run per block and night, DST, southern zone, polar."""

from __future__ import annotations

import datetime as dt
from collections import Counter
from zoneinfo import ZoneInfo

import numpy as np
import pytest

from advisory.physics import sun
from advisory.schedule import EVENING, HEAT, MORNING, UPDATE, BlockClock, PlannerSettings, plan, split_due

ZONES = [  # (zone, latitude, longitude) -- one southern zone
    ("America/Los_Angeles", 46.4, -120.3),
    ("Europe/Berlin", 50.0, 8.3),
    ("Australia/Hobart", -42.9, 147.3),
]


def _blocks(n=50):
    rng = np.random.default_rng(7)
    out = []
    for i in range(n):
        tz, lat, lon = ZONES[i % 3]
        out.append(BlockClock(i + 1, lat + rng.uniform(-0.5, 0.5), lon + rng.uniform(-0.5, 0.5), tz,
                              reference_offset_min=int(rng.choice([90, 120, 150]))))
    return out


def test_simulated_year_exactly_one_evening_run_per_block_and_night():
    """Step an injected clock through a year, planning 36 h ahead every 18 h (overlapping windows, as serve
    plans the same hours many times)."""
    blocks = _blocks(50)
    settings = PlannerSettings(kinds=(EVENING, MORNING))
    start = dt.datetime(2026, 1, 1, tzinfo=dt.UTC)
    seen: dict[str, object] = {}
    now = start
    end = dt.datetime(2027, 1, 1, tzinfo=dt.UTC)
    while now < end:
        for r in plan(blocks, now, now + dt.timedelta(hours=36), settings):
            seen[r.key] = r
        now += dt.timedelta(hours=18)
    per_block_night = Counter()
    for r in seen.values():
        if r.kind == EVENING:
            for b in r.block_ids:
                per_block_night[(b, r.night)] += 1
    nights = {n for (_b, n) in per_block_night}
    # every block, every night of 2026 in its window: exactly once
    for b in blocks:
        for k in range(2, 364):
            night = dt.date(2026, 1, 1) + dt.timedelta(days=k)
            assert per_block_night[(b.block_id, night)] == 1, (b, night)
    assert max(per_block_night.values()) == 1
    assert len(nights) >= 362


@pytest.mark.parametrize("tz,lat,lon,night", [
    ("America/Los_Angeles", 46.4, -120.3, dt.date(2026, 3, 7)),   # spring forward in the small hours of 03-08
    ("America/Los_Angeles", 46.4, -120.3, dt.date(2026, 10, 31)),  # fall back on 11-01
    ("Australia/Hobart", -42.9, 147.3, dt.date(2026, 4, 4)),     # southern fall back on 04-05
    ("Australia/Hobart", -42.9, 147.3, dt.date(2026, 10, 3)),    # southern spring forward on 10-04
    ("Europe/Berlin", 50.0, 8.3, dt.date(2026, 3, 28)),
])
def test_dst_nights_run_once_at_the_right_local_time(tz, lat, lon, night):
    b = BlockClock(1, lat, lon, tz, reference_offset_min=120)
    runs = plan([b], dt.datetime.combine(night, dt.time(0), ZoneInfo(tz)),
                dt.datetime.combine(night + dt.timedelta(days=2), dt.time(0), ZoneInfo(tz)),
                PlannerSettings(update_interval_min=60))
    evenings = [r for r in runs if r.kind == EVENING and r.night == night]
    assert len(evenings) == 1
    st = sun.sun_times(lat, lon, night, tz, engine="astral")
    expected = st.sunset + dt.timedelta(minutes=120)
    assert abs((evenings[0].run_at - expected).total_seconds()) <= 120  # within 2 min (engine difference)
    # local time of the evening run is sunset + 2 h in local wall-clock terms
    local = evenings[0].run_at.astimezone(ZoneInfo(tz))
    assert local.date() in (night, night + dt.timedelta(days=1))
    updates = [r for r in runs if r.kind == UPDATE and r.night == night]
    times = [u.run_at for u in updates]
    assert times == sorted(set(times))          # no duplicate update across the clock change
    assert all(t < st.sunrise for t in times)
    gaps = {(b2 - a).total_seconds() for a, b2 in zip(times, times[1:], strict=False)}
    assert gaps <= {3600.0}                      # hourly in real (UTC) time, even across DST
    mornings = [r for r in runs if r.kind == MORNING and r.night == night]
    assert len(mornings) == 1


def test_blocks_due_at_the_same_minute_are_grouped():
    blocks = [BlockClock(i, 46.4, -120.3, "America/Los_Angeles") for i in range(1, 6)]
    runs = plan(blocks, dt.datetime(2026, 4, 8, 12, tzinfo=dt.UTC), dt.datetime(2026, 4, 9, 12, tzinfo=dt.UTC),
                PlannerSettings(kinds=(EVENING,)))
    assert len(runs) == 1
    assert runs[0].block_ids == (1, 2, 3, 4, 5)


def test_polar_day_is_skipped_with_a_reason():
    b = BlockClock(9, 78.2, 15.6, "Arctic/Longyearbyen")
    s = PlannerSettings(kinds=(EVENING,))
    runs = plan([b], dt.datetime(2026, 6, 20, tzinfo=dt.UTC), dt.datetime(2026, 6, 22, tzinfo=dt.UTC), s)
    assert runs == []
    assert any("does not set" in m for m in s.skipped)


def test_heat_runs_only_in_season():
    b = BlockClock(3, 46.4, -120.3, "America/Los_Angeles", heat_season=("06-01", "09-15"))
    s = PlannerSettings(kinds=(HEAT,))
    july = plan([b], dt.datetime(2026, 7, 15, tzinfo=dt.UTC), dt.datetime(2026, 7, 17, tzinfo=dt.UTC), s)
    assert {r.night for r in july} == {dt.date(2026, 7, 15), dt.date(2026, 7, 16)}
    april = plan([b], dt.datetime(2026, 4, 15, tzinfo=dt.UTC), dt.datetime(2026, 4, 17, tzinfo=dt.UTC), s)
    assert april == []


def test_split_due_respects_grace():
    b = BlockClock(1, 46.4, -120.3, "America/Los_Angeles")
    runs = plan([b], dt.datetime(2026, 4, 8, 12, tzinfo=dt.UTC), dt.datetime(2026, 4, 10, 12, tzinfo=dt.UTC),
                PlannerSettings(kinds=(EVENING,)))
    first = runs[0].run_at
    missed, due, future = split_due(runs, first + dt.timedelta(minutes=30), grace_min=45)
    assert due == [runs[0]] and missed == []
    missed, due, future = split_due(runs, first + dt.timedelta(minutes=50), grace_min=45)
    assert missed == [runs[0]] and due == []
