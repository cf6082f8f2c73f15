"""Composing notices from hand-built assessments: every status, updates, heat, the farm summary."""

from __future__ import annotations

import datetime as dt
import json

import pytest

from advisory.assessment import CurvePoint, ProtectionStep, from_dict, to_dict
from advisory.notices import words
from advisory.notices.compose import compose_block
from advisory.notices.farm_summary import compose_farm
from advisory.notices.notice_data import BlockNotice, FarmSummary, notice_from_dict, notice_key
from tests.notices import samples

UTC = dt.UTC


def test_frost_lead_says_the_essentials_first():
    n = compose_block(samples.frost_assessment())
    assert n.level_name == "Protect"
    assert n.subject.startswith("[Protect] Creek Bing")
    # the low, its range, when it gets critical, the action with local times, the damage
    assert n.lead[0] == "Low -2.8 °C around 05:00 PDT (8 in 10 chance: -4.1 to -1.5 °C)."
    # the critical time is when the air reaches T10 (it was printed as "from", like a start time)
    assert "reached at 02:40 PDT" in n.lead[1] and "-2.2 °C" in n.lead[1]
    assert n.lead[2] == "Start over-tree sprinklers at 01:50 PDT, stop about 07:30 PDT."
    assert "14 %" in n.lead[3] and "62 %" in n.lead[3]
    keys = [s.key for s in n.sections]
    assert keys == ["buds", "plan", "data", "verification"]
    buds = n.sections[0]
    assert "T10" in buds.paragraphs[0] and "-3.9 °C (T90)" in buds.paragraphs[0]
    plan = n.sections[1].groups[0]
    assert plan.tag == "RUN"
    assert any("910 m³" in line for line in plan.lines)
    data = n.sections[2]
    assert any("10 min old" in i for i in data.items)
    assert "Quality flags: none" in data.items


def test_frost_cautions_and_footer():
    n = compose_block(samples.frost_assessment())
    keys = [c.key for c in n.cautions]
    for k in ("sprinkler_no_stop", "ice_load", "water_supply", "crew_cold_dark", "decision_support"):
        assert k in keys
    assert "extension" in n.footer and "workplace-safety" in n.footer and "codes" in n.footer


def test_cautions_added_when_plan_advises_but_none_given():
    a = samples.frost_assessment(cautions=[])
    keys = [c.key for c in compose_block(a).cautions]
    assert "sprinkler_no_stop" in keys and "decision_support" in keys


def test_unknown_caution_keys_are_left_out_and_texts_kept():
    a = samples.frost_assessment(cautions=["ice_load", "no_such_caution", "Keep the gate to the pond locked."])
    n = compose_block(a)
    assert "no_such_caution" not in [c.key for c in n.cautions] + [c.text for c in n.cautions]
    assert n.cautions[-1].text == "Keep the gate to the pond locked."


def test_quiet_night_has_no_cautions_but_a_footer():
    n = compose_block(samples.quiet_assessment())
    assert n.level_name == "Quiet"
    assert n.cautions == []
    assert n.footer
    assert "No protection needed tonight." in n.lead
    assert n.lead[1] == "Critical for full pink buds (-2.2 °C) not reached."
    assert n.sections[1].groups[0].tag == "not advised"


def test_notice_round_trips_through_json():
    n = compose_block(samples.frost_assessment())
    d = json.loads(json.dumps(n.to_dict()))
    back = notice_from_dict(d)
    assert isinstance(back, BlockNotice)
    assert back == n
    # the numbers travel with the words
    assert from_dict(back.data).p50_c == -2.8


def test_accepts_assessment_dicts():
    a = samples.frost_assessment()
    assert compose_block(to_dict(a)).lead == compose_block(a).lead


def test_imperial_farm_gets_fahrenheit_everywhere():
    n = compose_block(samples.frost_assessment(units="imperial"))
    # -2.8 °C = 26.96 °F; -4.1 °C = 24.62 °F; -1.5 °C = 29.3 °F (F = 1.8 C + 32)
    assert n.lead[0] == "Low 27.0 °F around 05:00 PDT (8 in 10 chance: 24.6 to 29.3 °F)."
    words_shown = n.lead + [x for s in n.sections for x in s.paragraphs + s.items]
    words_shown += [line for s in n.sections for g in s.groups for line in g.lines]
    words_shown += [c for s in n.sections if s.table for r in s.table["rows"] for c in r]
    assert not [x for x in words_shown if "°C" in x]
    plan_lines = " ".join(n.sections[1].groups[0].lines)
    assert "wet bulb falls to 29.8 °F" in plan_lines          # -1.2 °C, rewritten from the numbers
    assert "910 m³ (240,317 gal)" in plan_lines                # 909.7 m³ x 264.172 gal/m³
    ver = n.sections[3].table["rows"][0]
    assert ver[3] == "+1.1 °F"                                  # a 0.6 °C difference is 1.08 °F


def test_no_forecast_says_station_silent_since():
    a = samples.frost_assessment(status="no_forecast", reason="no observation for 7 h", level="", level_rank=0,
                                 p10_c=None, p50_c=None, p90_c=None, curve=[], plan=[], cautions=[],
                                 critical_time_utc=None,
                                 data_quality={"latest_obs_utc": "2026-04-06T21:05:00+00:00",
                                               "obs_age_min": 455.0, "flags": ["air_temp: stuck"]})
    n = compose_block(a)
    assert n.level_name == "No forecast"
    assert n.lead[0] == "No forecast tonight: station QR-CREEK silent since Mon 6 Apr 14:05 PDT."
    assert "Reason: no observation for 7 h." in n.lead
    assert any("-2.2 °C" in line for line in n.lead)
    assert n.chart is None
    assert n.sms.startswith("No forecast - Creek Bing 6 Apr:")  # sentence case, no capitals
    assert "Quality flags: air_temp: stuck" in n.sections[0].items


def test_no_night_and_missed():
    n = compose_block(samples.frost_assessment(status="no_night", reason="polar day at 78.2 N", plan=[],
                                               curve=[], level="", cautions=[]))
    assert n.lead[0] == "No frost forecast for the night of Mon 6 Apr 2026: the sun does not set here."
    assert "polar day" in n.lead[1]
    m = compose_block(samples.frost_assessment(status="missed", reason="server was down until 23:50",
                                               plan=[], curve=[], level="", cautions=[]))
    assert m.level_name == "Run missed"
    assert m.lead[0].startswith("The evening run for the night of Mon 6 Apr 2026 was missed: server")
    assert len(m.sms) <= 160


def test_update_marks_and_lists_changes():
    evening = samples.frost_assessment(level="marked", level_rank=2, p50_c=-1.9)
    evening.plan[0].start_utc = dt.datetime(2026, 4, 7, 9, 30, tzinfo=UTC)
    later = samples.frost_assessment(revision=1, is_update=True)
    n = compose_block(later, evening)
    assert n.is_update
    assert n.subject.startswith("[Protect] Update 1 to the evening notice: Creek Bing")
    assert n.lead[0].startswith("Update 1 to the evening notice: level Stand by → Protect")
    assert "low -1.9 °C → -2.8 °C" in n.changes
    assert "over-tree sprinklers start 02:30 PDT → 01:50 PDT" in n.changes
    assert n.sections[0].key == "changes"
    assert n.sms.startswith("Update 1: Protect - Creek Bing")
    assert n.key.endswith(":r1")


def test_update_with_no_material_change():
    a = samples.frost_assessment(revision=2, is_update=True)
    n = compose_block(a, samples.frost_assessment())
    assert n.changes == []
    assert "small changes only" in n.lead[0]


def test_sms_fits_one_message_and_gsm_alphabet():
    long_name = "Über-long Block Name With Ünicode — and more words than fit"
    # One text message holds 160 characters of the GSM 7-bit default alphabet (3GPP TS 23.038).
    for a in (samples.frost_assessment(block=long_name), samples.heat_assessment(block=long_name),
              samples.quiet_assessment(), samples.frost_assessment(revision=3, is_update=True)):
        s = compose_block(a).sms
        assert len(s) <= 160
        assert all(ch in words._GSM7_BASIC for ch in s), s


def test_no_equipment_block():
    a = samples.frost_assessment(plan=[ProtectionStep(method="none", advised=True,
                                                      notes=["No protection equipment recorded for this block."])],
                                 cautions=["no_protection"])
    n = compose_block(a)
    assert ("No usable protection on this block tonight: check the buds, call your adviser tonight and "
            "record the stage.") in n.lead
    assert n.sections[1].groups[0].tag == "AT RISK"
    assert "no_protection" in [c.key for c in n.cautions]


def test_ready_by_only_in_cold_case():
    a = samples.frost_assessment(level="marked", level_rank=2, critical_time_utc=None)
    a.plan[0].start_utc = None
    a.plan[0].stop_utc = None
    a.plan[0].ready_by_utc = dt.datetime(2026, 4, 7, 11, 10, tzinfo=UTC)  # set by the frost bridge when present
    n = compose_block(a)
    assert "Have over-tree sprinklers ready by 04:10 PDT" in n.lead[2]
    assert n.sections[1].groups[0].tag == "BE READY"


def test_heat_note():
    n = compose_block(samples.heat_assessment())
    assert n.kind == "heat" and n.level_name == "Very hot"
    assert n.lead[0].startswith("High 35.4 °C around 16:00 PDT")
    assert "sunburn" in n.lead[1] and "31.5 °C" in n.lead[1]
    assert n.lead[2] == "Heavy work: best 06:00 PDT to 11:00 PDT, still with rest in shade each hour."
    keys = [s.key for s in n.sections]
    assert keys[:3] == ["fruit", "crew", "hours"]
    crew = n.sections[1]
    assert crew.table["rows"][0][2] == "36.4 °C"
    ckeys = [c.key for c in n.cautions]
    assert {"heat_illness", "never_alone", "heat_plan"} <= set(ckeys)
    assert "heat plan" in n.footer
    assert n.chart.windows[0]["role"] == "sunburn"


def test_heat_without_details_uses_the_curve():
    a = samples.heat_assessment(details={})
    n = compose_block(a)
    assert any("heat index peaks at 36.4 °C" in line for line in n.lead)
    assert any(s.key == "hours" for s in n.sections)


def test_heat_estimated_maximum_is_said():
    n = compose_block(samples.heat_assessment(details={"max_estimated": True}))
    assert "Estimated from this morning's readings" in n.lead[0]


def test_heat_note_says_how_the_curve_was_drawn():
    a = samples.heat_assessment()
    a.details = {**a.details, "curve_model": "Curve drawn through\nthis morning's 07:30 reading"}
    data = next(s for s in compose_block(a).sections if s.key == "data")
    assert "Hourly curve: Curve drawn through this morning's 07:30 reading" in data.items
    assert not any(i.startswith("Hourly curve") for s in compose_block(samples.heat_assessment()).sections
                   for i in s.items)


@pytest.mark.parametrize(("model", "nights", "want"), [
    ("physical", 2, "Model: physical cooling model, its spread learned from 2 nights at this station"),
    ("physical", 0, "Model: physical cooling model (no checked nights at this station yet)"),
    ("calibrated", 120, "Model: calibrated on 120 nights at this station"),
])
def test_data_section_says_what_the_forecast_rests_on(model, nights, want):
    a = samples.frost_assessment(model=model, training_nights=nights)
    data = next(s for s in compose_block(a).sections if s.key == "data")
    assert any(i.startswith(want) for i in data.items)
    assert not any("physical, fitted" in i for i in data.items)


def test_unknown_level_key_is_shown_tidily():
    n = compose_block(samples.frost_assessment(level="very_odd", level_rank=9))
    assert n.level_name == "Very odd"
    assert n.colour == words.RANK_COLOURS[-1]


def test_level_names_are_our_own():
    banned = ("watch", "warning", "advisory", "excessive", "freeze")
    for table in words.LEVELS.values():
        for style in table.values():
            assert not any(b in style.name.lower() for b in banned), style.name


def test_notice_key_is_stable_and_distinct():
    k = notice_key("frost", "Quillback Ridge Orchards", 3, dt.date(2026, 4, 6), 0)
    assert k == notice_key("frost", "Quillback Ridge Orchards", 3, "2026-04-06", 0)
    assert k != notice_key("frost", "Quillback Ridge Orchards", 3, dt.date(2026, 4, 6), 1)
    assert k != notice_key("frost", "Quillback-Ridge Orchards", 3, dt.date(2026, 4, 6), 0)
    assert notice_key("frost", "Quillback Ridge Orchards", None, dt.date(2026, 4, 6), 0).split(":")[2] == "farm"
    assert len(notice_key("heat-summary", "x" * 500, 10**9, dt.date(2026, 4, 6), 99)) <= 110
    assert notice_key("frost-summary", "F", None, "2026-04-06", 0).startswith("frost-summary:")


def test_farm_summary_worst_first_with_run_sheet():
    quiet = samples.quiet_assessment()
    protect = samples.frost_assessment()
    silent = samples.frost_assessment(block_id=5, block="Terrace Chardonnay", status="no_forecast", level="",
                                      level_rank=0, plan=[], curve=[], cautions=[])
    stand_by = samples.frost_assessment(block_id=3, block="Lower Bartlett", level="marked", level_rank=2)
    stand_by.plan = [ProtectionStep(method="wind_machine", advised=True,
                                    start_utc=dt.datetime(2026, 4, 7, 10, 20, tzinfo=UTC),
                                    stop_utc=dt.datetime(2026, 4, 7, 14, 0, tzinfo=UTC),
                                    quantities={"hours": 3.7, "inversion_c": 2.6, "start_air_temp_c": -1.2})]
    s = compose_farm([quiet, silent, stand_by, protect])
    assert isinstance(s, FarmSummary)
    assert [r.block for r in s.rows] == ["Creek Bing", "Terrace Chardonnay", "Lower Bartlett", "Bench Gala"]
    assert s.level_name == "Protect"
    assert s.lead[0] == "4 blocks: 1 Protect, 1 No forecast, 1 Stand by, 1 Quiet."
    assert "01:50 PDT (Creek Bing)" in s.lead[1]
    assert "Terrace Chardonnay" in s.lead[2]
    rows = s.runsheet["rows"]
    assert [r["block"] for r in rows] == ["Creek Bing", "Lower Bartlett"]    # start order
    assert rows[0]["start"] == "01:50 PDT"
    assert "FROST RUN SHEET" in s.runsheet["text"].upper()
    assert s.runsheet["csv"].startswith("order,")
    assert len(s.sms) <= 160 and s.sms.startswith("Quillback Ridge Orchards 6 Apr: Creek Bing (Protect) from 01:50")
    assert s.sms.endswith(" Decision support only; block thermometers first.")
    back = notice_from_dict(json.loads(json.dumps(s.to_dict())))
    assert back == s


def test_farm_summary_rejects_mixed_farms():
    with pytest.raises(ValueError):
        compose_farm([samples.frost_assessment(), samples.quiet_assessment(farm="Other Farm")])
    with pytest.raises(ValueError):
        compose_farm([])


def test_heat_farm_summary():
    s = compose_farm([samples.heat_assessment(), samples.heat_assessment(block_id=2, block="Creek Bing",
                                                                         level="nil", level_rank=0)])
    assert s.rows[0].block == "Bench Gala"
    assert s.runsheet == {}
    assert {"heat_illness", "never_alone", "heat_plan"} <= {c.key for c in s.cautions}


def test_dst_night_times_carry_their_own_abbreviation():
    # Fall-back night in Los Angeles: 2026-11-01 02:00 PDT (09:00 UTC) becomes 01:00 PST, so 01:30 happens twice.
    a = samples.frost_assessment(night=dt.date(2026, 10, 31),
                                 critical_time_utc=dt.datetime(2026, 11, 1, 9, 30, tzinfo=UTC),
                                 curve=[CurvePoint(dt.datetime(2026, 11, 1, 7, 0, tzinfo=UTC), 1.0),
                                        CurvePoint(dt.datetime(2026, 11, 1, 9, 0, tzinfo=UTC), -2.0)])
    a.plan[0].start_utc = dt.datetime(2026, 11, 1, 8, 30, tzinfo=UTC)
    n = compose_block(a)
    assert "reached at 01:30 PST" in n.lead[1]
    assert "at 01:30 PDT" in n.lead[2]


def test_southern_hemisphere_zone():
    a = samples.frost_assessment(farm_tz="Pacific/Auckland", night=dt.date(2026, 6, 10),
                                 critical_time_utc=dt.datetime(2026, 6, 10, 15, 0, tzinfo=UTC))
    n = compose_block(a)
    assert "03:00 NZST" in n.lead[1]


def test_heat_model_levels_and_caution_texts():
    from advisory.risk import heat

    for rank, key in enumerate(heat.LEVELS):
        n = compose_block(samples.heat_assessment(level=key, level_rank=rank))
        assert n.level_name in {"Easy day", "Hot", "Very hot", "Scorching"}
    n = compose_block(samples.heat_assessment(level="very_hot", cautions=list(heat.CAUTIONS)))
    assert [c.text for c in n.cautions] == list(heat.CAUTIONS)       # the model's texts, not doubled
    # the top word is our own ("severe" was replaced); notices stored with the old keys still read right
    assert compose_block(samples.heat_assessment(level="scorching", level_rank=3)).level_name == "Scorching"
    assert compose_block(samples.heat_assessment(level="acute", level_rank=3)).level_name == "Scorching"


def test_method_not_advised_shows_why_not_when():
    a = samples.frost_assessment(level="grave", level_rank=4)
    a.plan[0].advised = False
    a.plan[0].notes = ["Stop condition not reached before the forecast ends; keep running until it is.",
                       "System rate 3.8 mm/h is below the 10.2 mm/h needed."]
    a.plan[0].quantities = {**a.plan[0].quantities, "rate_needed_mm_h": 10.2}
    a.plan.append(ProtectionStep(method="none", advised=True, notes=["No usable protection tonight."]))
    n = compose_block(a)
    groups = {g.title: g for g in n.sections[1].groups}
    assert groups["No usable protection"].tag == "AT RISK"
    lines = " ".join(groups["Over-tree sprinklers"].lines)
    assert groups["Over-tree sprinklers"].tag == "not advised"
    assert "keep running" not in lines and "01:50" not in lines and "910 m³" not in lines
    assert "rate needed 10.2 mm/h" in lines and "below the 10.2 mm/h" in lines


def test_no_usable_protection_gives_each_reason_once():
    """The "none" step's note repeats every method's reason; the notice shows each reason once, in
    its method's group."""
    a = samples.frost_assessment(level="grave", level_rank=4)
    a.plan[0].advised = False
    a.plan[0].notes = ["System rate 3.8 mm/h is below the 10.2 mm/h needed."]
    a.plan.append(ProtectionStep(method="none", advised=True, notes=[
        "No usable protection tonight. Over-tree sprinklers: System rate 3.8 mm/h is below the 10.2 mm/h needed."]))
    n = compose_block(a)
    plan = n.sections[1]
    text = " ".join(line for g in plan.groups for line in g.lines)
    assert text.count("below the 10.2 mm/h needed") == 1
    assert [g.title for g in plan.groups][:2] == ["No usable protection", "Over-tree sprinklers"]
    assert "method by method, below" in " ".join(plan.groups[0].lines)
    bare = samples.frost_assessment(level="grave", level_rank=4)  # no equipment: the step's own note stays
    bare.plan = [ProtectionStep(method="none", advised=True, notes=["No protection equipment recorded."])]
    assert compose_block(bare).sections[1].groups[0].lines == ["No protection equipment recorded."]


def test_ready_by_before_start_is_said():
    a = samples.frost_assessment()
    a.plan[0].ready_by_utc = dt.datetime(2026, 4, 7, 7, 30, tzinfo=UTC)
    n = compose_block(a)
    assert "Start over-tree sprinklers at 01:50 PDT (ready by 00:30 PDT in case it runs colder)" in n.lead[2]
    assert any(line.startswith("Be ready by 00:30 PDT") for line in n.sections[1].groups[0].lines)


def test_fast_paths_agree_with_the_reference_functions():
    from advisory.notices.notice_data import _plain
    from advisory.notices.notice_parts import _Fmt

    for a in (samples.frost_assessment(), samples.heat_assessment(), samples.quiet_assessment()):
        assert _plain(a) == to_dict(a)
        assert compose_block(a, data=to_dict(a)).to_dict() == compose_block(a).to_dict()
    for units in ("metric", "imperial"):
        f = _Fmt("UTC", units)
        for c in (-17.78, -0.04, 0.0, 2.35, None, float("nan"), float("inf"), 3):
            assert f.t(c) == words.temp(c, units), (c, units)


def test_wind_machine_inversion_is_given_once():
    """The plan's note on the inversion (measured or estimated) and its figure were both shown: once is enough."""
    import numpy as np
    import pandas as pd

    from advisory.crops import thresholds as th
    from advisory.risk import damage, frost_assessment, frost_data
    from advisory.risk import frost as fr

    hours = pd.date_range("2026-04-07T03:00Z", periods=14, freq="h")
    h = np.arange(14, dtype=float)
    air = 6.0 - 8.0 * np.sqrt(np.minimum(h, 10) / 10) + np.where(h > 10, (h - 10) * 2.5, 0.0)
    sunrise = (hours[0] + pd.Timedelta(hours=10.2)).tz_localize(None)
    curves = frost_data.NightCurves(times_utc=hours, air_temp_c=air[None, :], dew_point_c=np.full((1, 14), -5.0),
                            wind_speed_ms=np.full((1, 14), 1.0), sunrise_utc=np.array([np.datetime64(sunrise, "ns")]))
    ct = th.critical_temps("apple", "full bloom")
    for inversion, advised in ((2.5, True), (1.0, False)):
        b = frost_data.BlockSetup("B1", "apple", "full bloom", ct.t10_c, ct.t90_c, 4.0,
                          equipment=[{"kind": "wind_machine"}], upper_inversion_c=inversion)
        risk = fr.plan_night([b], curves, damage.MinTempForecast(np.array([-3.0]), np.array([-2.0]),
                                                             np.array([-1.0])))[0]
        a = samples.frost_assessment(level="serious", level_rank=3)
        a.plan = frost_assessment.protection_steps(risk)
        assert a.plan[0].advised is advised
        group = next(g for g in compose_block(a).sections[1].groups
                     if g.title == words.method_name("wind_machine").capitalize())
        lines = " ".join(group.lines).lower()
        assert lines.count("inversion") == 1 and "measured" in lines, group.lines


def test_a_run_under_way_reads_keep_running():
    a = samples.frost_assessment(level="grave", level_rank=4, is_update=True, revision=3)
    s = a.plan[0]
    s.started_utc = s.start_utc
    n = compose_block(a)
    g = n.sections[1].groups[0] if n.sections[0].key != "changes" else n.sections[2].groups[0]
    assert g.tag == "KEEP RUNNING"
    assert g.lines[0].startswith("Running since 01:50 PDT (started on an earlier notice")
    assert any(line.startswith("Keep over-tree sprinklers running (started 01:50 PDT)") for line in n.lead)
    assert "on since 01:50" in n.sms


def test_update_summary_names_the_blocks_with_news_and_shows_the_whole_farm():
    from advisory.notices.render import render

    protect = samples.frost_assessment()                    # as last sent, in the evening
    quiet = samples.quiet_assessment(is_update=True, revision=2)
    quiet.reference_time_utc = samples.REFERENCE + dt.timedelta(hours=3)   # the update's clock
    s = compose_farm([protect, quiet], revision=2, changed={quiet.block_id})
    assert s.is_update and s.revision == 2
    assert s.subject.startswith("[Protect] Update 2: Quillback Ridge Orchards, night of 6 Apr: ")
    assert s.lead[0] == "Update 2: new notice for Bench Gala; the other blocks stand as last sent."
    assert s.lead[1] == "2 blocks: 1 Protect, 1 Quiet."
    assert "update 2:" in s.sms and len(s.sms) <= 160
    assert render(s, "text").startswith("QUILLBACK RIDGE ORCHARDS - Night of Mon 6 Apr 2026 (UPDATE 2)\n")
    # the run sheet is made at the update, not at the evening run of the worst block
    assert words.clock(quiet.reference_time_utc, quiet.farm_tz) in s.runsheet["text"].splitlines()[1]
    evening = compose_farm([quiet, protect])
    assert not evening.is_update and not evening.lead[0].startswith("Update")


def test_silence_notice_mid_run_says_to_keep_protection_running():
    a = samples.frost_assessment(status="no_forecast", level="", level_rank=0, is_update=True, revision=4,
                                 curve=[], reason="no reading for 95 min")
    step = a.plan[0]
    step.started_utc = step.start_utc
    step.stop_rule = "after sunrise, once the wet bulb is above -2.2 °C and the ice is melting"
    n = compose_block(a)
    assert any(line.startswith("Keep over-tree sprinklers running (started 01:50 PDT); stop after sunrise")
               for line in n.lead)
    assert "Keep over-tree sprinklers on." in n.sms
    assert any(sec.key == "plan" for sec in n.sections)


# ------------------------------------------------------------------------------------------------
# Read as a grower: critical time, bud temperature, blocks without protection, text-message cautions
# ------------------------------------------------------------------------------------------------

def _unprotected(**kw):
    a = samples.frost_assessment(level="grave", level_rank=4, **kw)
    a.plan = [ProtectionStep(method="overtree_sprinkler", advised=False,
                             start_rule="when the wet bulb falls to -1.2 °C", quantities={
                                 "rate_available_mm_h": 3.0, "rate_needed_mm_h": 3.4, "start_wet_bulb_c": -1.2},
                             notes=["System 3 mm/h, needs 3.4 mm/h: 88 % of the need."]),
              ProtectionStep(method="none", advised=True, notes=["No usable protection tonight."])]
    a.cautions = ["no_protection"]
    return a


def test_critical_time_everywhere_is_when_t10_is_reached():
    a = samples.frost_assessment()
    n = compose_block(a)
    assert "critical at 02:40 PDT" in n.subject and "critical at 02:40 PDT" in n.headline
    assert "from 02:40" not in n.subject + n.headline + n.sms + " ".join(n.lead)
    s = compose_farm([a])
    assert s.rows[0].critical == "02:40 PDT"
    assert s.data["blocks"][0]["critical_time_utc"] == "2026-04-07T09:40:00+00:00"
    from advisory.notices.render import render
    assert "critical at 02:40 PDT" in render(s, "text")
    above = compose_block(samples.frost_assessment(critical_time_utc=None, p50_c=-1.5, p10_c=-3.0))
    assert "critical not reached" in above.subject
    assert "not reached on the middle forecast" in above.lead[1]
    assert compose_farm([samples.frost_assessment(critical_time_utc=None)]).rows[0].critical == "not reached"


def test_every_frost_notice_says_bud_temperature_is_not_air_temperature():
    for a in (samples.frost_assessment(), samples.quiet_assessment(),
              samples.frost_assessment(status="no_forecast", plan=[], curve=[], level="", cautions=[])):
        n = compose_block(a)
        lines = n.lead + [p for sec in n.sections for p in sec.paragraphs]
        hit = [x for x in lines if "bud temperatures" in x]
        assert len(hit) == 1, a.status
        assert "0.5-2.0 °C colder" in hit[0] and "at bud height" in hit[0] and "coldest part" in hit[0]
    imperial = compose_block(samples.frost_assessment(units="imperial"))
    assert any("0.9-3.6 °F colder" in p for p in imperial.sections[0].paragraphs)


def test_no_usable_protection_is_not_told_to_protect():
    n = compose_block(_unprotected())
    assert n.level_name == "Unprotected: grave"
    assert not n.headline.lower().startswith("protect") and "protect:" not in n.sms.lower()
    assert n.sms.startswith("Unprotected: grave - Creek Bing")
    assert "Check buds; call adviser tonight." in n.sms
    assert any("check the buds, call your adviser tonight and record the stage" in x for x in n.lead)
    # a ruled-out method's start rule is not printed as something to do
    plan = next(s for s in n.sections if s.key == "plan")
    text = " ".join(line for g in plan.groups for line in g.lines)
    assert "start rule" not in text.lower() and "when the wet bulb falls" not in text
    s = compose_farm([_unprotected()])
    assert s.rows[0].level_name == "Unprotected: grave"


def test_wine_grape_notice_says_the_values_are_for_another_cultivar_family():
    from advisory.crops import thresholds
    ct = thresholds.critical_temps("wine_grape", "bud burst")
    n = compose_block(samples.frost_assessment(crop="wine_grape", variety="Chardonnay", stage="bud burst",
                                               critical_source=ct.source))
    buds = n.sections[0]
    assert any("Concord" in p and "another cultivar family" in p for p in buds.paragraphs)
    assert not any("cultivar family" in p for p in compose_block(samples.frost_assessment()).sections[0].paragraphs)


def test_farm_text_message_counts_what_it_does_not_name():
    blocks = []
    for i, name in enumerate(["North Honeycrisp Upper", "Creek Bing Lower Bench", "Bench Gala West Row",
                              "Roadside Peaches East", "Lower Bartlett South"]):
        blocks.append(samples.frost_assessment(block_id=10 + i, block=name, level="grave", level_rank=4))
    blocks.append(samples.quiet_assessment(block_id=30))
    s = compose_farm(blocks)
    assert len(s.sms) <= 160
    named = sum(1 for b in blocks[:5] if b.block[:15] in s.sms)
    assert 0 < named < 5
    assert "5 at risk in all, 1 lower." in s.sms           # five at risk in all, whatever is named
    assert "more at risk" not in s.sms


def test_level_words_and_colours_are_our_own():
    from advisory.notices import words as wd
    names = {st.name for table in wd.LEVELS.values() for st in table.values()}
    assert not any("severe" in x.lower() for x in names)
    for word in ("watch", "warning", "advisory", "extreme", "moderate", "caution", "danger"):
        assert not any(word in x.lower() for x in names)
    assert "high" not in wd.LEVELS["heat"]                 # no level key "high"
    # one hue, in steps of intensity (each darker than the last), no green
    def hsv(c):
        import colorsys
        return colorsys.rgb_to_hsv(*(int(c[i:i + 2], 16) / 255 for i in (1, 3, 5)))
    hues = [hsv(c)[0] for c in wd.RANK_COLOURS]
    assert max(hues) - min(hues) < 0.03 and not any(0.2 < h < 0.45 for h in hues)
    values = [hsv(c)[2] for c in wd.RANK_COLOURS]
    assert values == sorted(values, reverse=True)
    # text messages carry the level in sentence case
    assert compose_block(samples.frost_assessment(level="grave", level_rank=4)).sms.startswith("Protect: grave - ")
    assert compose_block(samples.heat_assessment(level="scorching", level_rank=3)).sms.startswith("Scorching - ")


def test_every_text_message_ends_with_a_caution_within_one_message():
    """One GSM 03.38 message: 160 characters of the basic set, the caution included, even at the longest."""
    from advisory.notices import notice_parts
    long_name = "Upper Terrace Late Chardonnay North Slope Extension"
    started = samples.frost_assessment(level="grave", level_rank=4, is_update=True, revision=12, block=long_name,
                                       units="imperial", p10_c=-12.3, p50_c=-10.6, p90_c=-8.8)
    started.plan[0].started_utc = started.plan[0].start_utc
    cases = [samples.frost_assessment(), samples.quiet_assessment(), _unprotected(block=long_name),
             _unprotected(block=long_name, is_update=True, revision=12, units="imperial"), started,
             samples.frost_assessment(status="no_forecast", plan=[], curve=[], level="", block=long_name,
                                      is_update=True, revision=11, reason="no observation for 7 h"),
             samples.heat_assessment(), samples.heat_assessment(block=long_name, level="scorching", level_rank=3,
                                                                  units="imperial")]
    for a in cases:
        n = compose_block(a)
        tail = notice_parts.SMS_CAUTION_HEAT if a.kind == "heat" else notice_parts.SMS_CAUTION_FROST
        assert n.sms.endswith(" " + tail), n.sms
        assert len(n.sms) <= 160 and all(ch in words._GSM7_BASIC for ch in n.sms), n.sms
        assert "..." not in n.sms, n.sms               # nothing cut: the parts that must stay fit
    heat = [samples.heat_assessment(block_id=i, block=f"{long_name} {i}", level="scorching", level_rank=3)
            for i in range(8)]
    frost = [_unprotected(block_id=i, block=f"{long_name} {i}") for i in range(8)]
    for s in (compose_farm(heat), compose_farm(frost), compose_farm(frost, revision=14, changed={1, 2})):
        tail = notice_parts.SMS_CAUTION_HEAT if s.kind == "heat" else notice_parts.SMS_CAUTION_FROST
        assert s.sms.endswith(" " + tail) and len(s.sms) <= 160, s.sms
