"""Runs already under way carry into the night's updates (advisory.risk.continuity)."""

from __future__ import annotations

import datetime as dt

from advisory.assessment import ProtectionStep
from advisory.risk import continuity

UTC = dt.UTC
NOW = dt.datetime(2026, 4, 9, 8, 0, tzinfo=UTC)
EARLIER = NOW - dt.timedelta(minutes=90)


def _sprinkler(advised=True, start=EARLIER, **kw):
    return ProtectionStep("overtree_sprinkler", advised, start_utc=start,
                          stop_utc=NOW + dt.timedelta(hours=7), **kw)


def test_started_sprinklers_run_on_when_the_update_finds_the_rate_short():
    """Common practice: over-tree sprinklers, once started, run until the ice melts after sunrise."""
    short = _sprinkler(advised=False, start=NOW, quantities={"rate_available_mm_h": 3.8, "rate_needed_mm_h": 4.1},
                       notes=["Already at the start temperature when the forecast begins: start now.",
                              "System rate 3.8 mm/h is below the 4.1 mm/h needed; too little water can freeze "
                              "buds harder than none."])
    plan = [short, ProtectionStep("none", True, notes=["No usable protection tonight."])]
    out = continuity.carry_started(plan, [_sprinkler()], NOW)
    assert [s.method for s in out] == ["overtree_sprinkler"]          # "no usable protection" is gone
    kept = out[0]
    assert kept.advised and kept.start_utc == EARLIER and kept.started_utc == EARLIER
    assert kept.stop_utc == short.stop_utc                              # the new plan's stop
    assert "Do not stop" in kept.notes[0] and "3.8" in kept.notes[0] and "4.1" in kept.notes[0]
    assert not any("start now" in n or "harder than none" in n for n in kept.notes)
    assert plan[0].advised is False                                    # the input is not modified


def test_a_run_is_started_only_once_its_noticed_start_has_passed():
    later = _sprinkler(start=NOW + dt.timedelta(minutes=30))
    assert continuity.started_at(later, NOW) is None
    assert continuity.started_at(_sprinkler(), NOW) == EARLIER
    ready_only = ProtectionStep("heater", True, ready_by_utc=EARLIER)  # "be ready; start if colder"
    assert continuity.started_at(ready_only, NOW) is None
    assert continuity.started_at(_sprinkler(advised=False), NOW) is None
    # a run kept by an earlier update keeps its first start
    kept = _sprinkler(start=EARLIER, started_utc=EARLIER - dt.timedelta(hours=1))
    assert continuity.started_at(kept, NOW) == EARLIER - dt.timedelta(hours=1)
    new = [_sprinkler(advised=False, start=NOW)]
    assert continuity.carry_started(new, [later], NOW) == new           # not started: the new plan stands


def test_other_started_methods_keep_their_start_but_may_be_called_off():
    wind = ProtectionStep("wind_machine", True, start_utc=EARLIER)
    moved = ProtectionStep("wind_machine", True, start_utc=NOW + dt.timedelta(minutes=15))
    out = continuity.carry_started([moved], [wind], NOW)
    assert out[0].start_utc == EARLIER and out[0].started_utc == EARLIER
    off = ProtectionStep("wind_machine", False, start_utc=NOW, notes=["Wind 4.2 m/s is above the 3 m/s ..."])
    assert continuity.carry_started([off], [wind], NOW) == [off]        # news for the grower: said, not hidden


def test_a_run_under_way_drops_fresh_start_notes_and_says_its_figures_are_for_the_rest_of_the_run():
    fresh = ProtectionStep("heater", True, start_utc=NOW, quantities={"hours": 2.5, "fuel_l": 400.0},
                           notes=["Already at the start temperature when the forecast begins: start now.",
                                  "Fuel on hand (300 L) is less than the 400 L the run needs."])
    out = continuity.carry_started([fresh], [ProtectionStep("heater", True, start_utc=EARLIER)], NOW)[0]
    assert out.started_utc == EARLIER and not any("start now" in n for n in out.notes)
    assert "Fuel on hand" in out.notes[0] and "rest of the run" in out.notes[-1]


def test_a_silent_station_mid_run_keeps_every_started_run_on():
    """No forecast at the update (the new plan is empty): what the crew started stays on, as noticed,
    without the old run-time figures."""
    noticed = [_sprinkler(quantities={"hours": 8.0, "water_m3": 900.0, "rate_available_mm_h": 3.8},
                          stop_rule="after sunrise, once the ice is melting"),
               ProtectionStep("heater", True, start_utc=NOW + dt.timedelta(hours=1))]   # not started yet
    out = continuity.carry_started([], noticed, NOW)
    assert [s.method for s in out] == ["overtree_sprinkler"]
    s = out[0]
    assert s.advised and s.started_utc == EARLIER and s.stop_rule == "after sunrise, once the ice is melting"
    assert s.quantities == {"rate_available_mm_h": 3.8} and s.notes[0].startswith("No new forecast")
