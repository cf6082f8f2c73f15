"""Unit tests for advisory.risk.runsheet (pure formatting of plan objects)."""

import csv
import io
from datetime import UTC, date, datetime

import pytest

from advisory.assessment import Assessment
from advisory.errors import InputError
from advisory.risk import cautions, frost_assessment, frost_data
from advisory.risk import runsheet as rs


def plan(method, start, stop, ready=None, **kw):
    kw.setdefault("start_air_temp_c", -1.2)
    return frost_data.MethodPlan(method=method, usable=True, recommended=kw.pop("recommended", True), start_utc=start,
                         ready_by_utc=ready or start, stop_utc=stop,
                         run_hours=(stop - start).total_seconds() / 3600 if start and stop else None,
                         caution_keys=cautions.cautions_for_method(method), **kw)


def risk(name, plans, level="serious", needs=True, p50=-2.0):
    return frost_data.BlockRisk(
        block=name, crop="apple", stage="full bloom", t10_c=-2.2, t90_c=-3.9, critical_c=-2.2,
        min_p10_c=p50 - 1.5, min_p50_c=p50, min_p90_c=p50 + 1.0,
        time_of_min_utc=datetime(2024, 4, 10, 12, tzinfo=UTC), sustained_min_offset_c=0.1,
        duration_shift_c=0.2, near_min_hours=2.0, hours_below_t10=1.0, hours_below_t10_cold=3.0,
        expected_kill=0.25, p_kill_10=0.6, p_kill_90=0.05, level=level, needs_protection=needs,
        plans=tuple(plans))


def U(h, m=0, day=10, month=4):
    return datetime(2024, month, day, h, m, tzinfo=UTC)


def sheet(risks, tz="America/Denver", night=date(2024, 4, 9), **kw):
    return rs.build_run_sheet("Invented Orchard", night, tz, risks, generated_utc=U(2, 0), **kw)


def example():
    spr = plan("overtree_sprinkler", U(5, 45), U(13, 0), ready=U(3, 45), start_wet_bulb_c=-1.2,
               start_air_temp_c=1.1, rate_mm_h=4.5, water_m3=1305.0, water_m3_cold=1755.0,
               water_l_per_ha=326250.0)
    wm = plan("wind_machine", U(9, 30), U(13, 0), ready=U(7, 0), inversion_c=2.4)
    heat = plan("heater", U(8, 0), U(13, 30), fuel_l=440.0, fuel_l_cold=600.0)
    none = frost_data.MethodPlan("none", usable=False, recommended=True, notes=("No protection equipment recorded.",),
                         caution_keys=cautions.cautions_for_method("none"))
    return [risk("Upper", [wm]), risk("North", [spr]), risk("Creek", [heat]), risk("East", [none], level="grave"),
            risk("Quiet", [plan("heater", None, None, recommended=False)], level="nil", needs=False)]


def test_rows_in_start_order_and_sections():
    s = sheet(example())
    assert [r.risk.block for r in s.rows] == ["North", "Creek", "Upper"]
    assert [r.order for r in s.rows] == [1, 2, 3]
    assert [r.block for r in s.unprotected] == ["East"]
    assert [r.block for r in s.quiet] == ["Quiet"]
    assert s.rows[0].start.tzinfo is not None and s.rows[0].start.strftime("%H:%M %Z") == "23:45 MDT"
    assert "decision_support" in s.caution_keys and "ice_load" in s.caution_keys
    assert "heater_fire_co" in s.caution_keys and "no_protection" in s.caution_keys


def test_text_for_phone():
    text = rs.render_text(sheet(example()))
    assert "INVENTED ORCHARD" in text and "Night of Tue 09 Apr 2024" in text
    assert text.index("1. North") < text.index("2. Creek") < text.index("3. Upper")
    assert "ready by 21:45 MDT, start 23:45 MDT, stop 07:00 MDT" in text
    assert "wet bulb falls to -1.2 °C" in text and "water 1,305 m³ (326,250 L/ha)" in text
    assert "fuel 440 L, up to 600 L if colder" in text
    assert "min -2.0 °C (-3.5 to -1.0)" in text
    assert "AT RISK, NO USABLE PROTECTION" in text and "East" in text
    assert "CAUTIONS" in text and cautions.get("heater_fire_co").text in text
    # Narrow lines apart from the caution paragraphs.
    body = text.split("CAUTIONS")[0]
    assert max(len(line) for line in body.splitlines() if not line.startswith("  No")) < 100


def test_markdown():
    md = rs.render_markdown(sheet(example()))
    assert md.startswith("# Frost run sheet: Invented Orchard")
    table = [line for line in md.splitlines() if line.startswith("| ")]
    assert len(table) == 1 + 3  # header + three rows
    assert "| 1 | North |" in table[1] and "Over-tree sprinklers" in table[1]
    assert "## At risk, no usable protection" in md and "## Cautions" in md


def test_csv_round_trip():
    text = rs.render_csv(sheet(example()))
    rows = list(csv.DictReader(io.StringIO(text)))
    assert tuple(rows[0].keys()) == rs.CSV_COLUMNS
    assert [r["block"] for r in rows] == ["North", "Creek", "Upper", "East"]
    assert rows[0]["start_local"] == "2024-04-09T23:45-06:00"
    assert rows[0]["stop_local"] == "2024-04-10T07:00-06:00"
    assert float(rows[0]["water_m3"]) == 1305.0 and rows[0]["method"] == "overtree_sprinkler"
    assert rows[3]["method"] == "none" and rows[3]["order"] == ""
    assert "ice_load" in rows[0]["cautions"].split(";")


def test_imperial_units():
    text = rs.render_text(sheet(example(), units="imperial"))
    assert "°F" in text and "gal" in text and "m³" not in text.split("CAUTIONS")[0]
    with pytest.raises(InputError):
        sheet(example(), units="furlongs")


def test_empty_night():
    s = sheet([risk("Quiet", [], level="nil", needs=False)])
    assert "No block needs protection tonight." in rs.render_text(s)
    assert "No block needs protection tonight." in rs.render_markdown(s)
    assert rs.render_csv(s).strip() == ",".join(rs.CSV_COLUMNS)
    assert s.caution_keys == ()


def test_spring_forward_night_shows_both_abbreviations():
    # US clocks went forward at 02:00 local on 10 March 2024 (America/Denver, 09:00 UTC).
    p = plan("heater", datetime(2024, 3, 10, 8, 30, tzinfo=UTC), datetime(2024, 3, 10, 14, 0, tzinfo=UTC))
    text = rs.render_text(sheet([risk("North", [p])], night=date(2024, 3, 9)))
    assert "start 01:30 MST" in text and "stop 08:00 MDT" in text
    assert p.run_hours == pytest.approx(5.5)


def test_southern_hemisphere_fall_back():
    # Tasmania left daylight time at 03:00 local on 7 April 2024 (16:00 UTC on the 6th).
    p = plan("wind_machine", datetime(2024, 4, 6, 15, 30, tzinfo=UTC), datetime(2024, 4, 6, 21, 0, tzinfo=UTC))
    s = sheet([risk("Ridge", [p])], tz="Australia/Hobart", night=date(2024, 4, 6))
    text = rs.render_text(s)
    assert "start 02:30 AEDT" in text and "stop 07:00 AEST" in text
    assert "Night of Sat 06 Apr 2024" in text


def test_unknown_zone():
    with pytest.raises(InputError):
        sheet(example(), tz="Mars/Olympus")


def test_sheet_from_stored_assessments_matches():
    risks = example()[:3]
    assessments = []
    for r in risks:
        f = frost_assessment.assessment_fields(r)
        assessments.append(Assessment(kind="frost", farm="Invented Orchard", farm_tz="America/Denver",
                                      units="metric", block_id=1, block=r.block, station="S", crop=r.crop,
                                      variety=None, stage=r.stage, area_ha=4.0, night=date(2024, 4, 9), **f))
    a = rs.render_text(sheet(risks))
    b = rs.render_text(sheet(assessments))
    assert [line for line in a.splitlines() if line.startswith(("1.", "2.", "3.", "   ready", "   start"))] == \
        [line for line in b.splitlines() if line.startswith(("1.", "2.", "3.", "   ready", "   start"))]


def test_a_temperature_that_rounds_to_zero_reads_0_0_not_minus_0_0():
    """common practice: a crew reads "0.0 °C", never "-0.0 °C"."""
    p = plan("overtree_sprinkler", datetime(2024, 4, 10, 9, tzinfo=UTC), datetime(2024, 4, 10, 14, tzinfo=UTC),
             start_air_temp_c=-0.04, start_wet_bulb_c=-1.2)
    r = risk("Creek", [p])
    assert "air about 0.0 °C" in frost_assessment.start_rule_text(r, p)
    text = rs.render_text(sheet([r]))
    assert "-0.0" not in text and "0.0 °C" in text


def test_text_names_the_critical_time_and_one_word_for_loss():
    text = rs.render_text(sheet(example()))
    md = rs.render_markdown(sheet(example()))
    assert "buds at risk" not in text and "buds at risk" not in md
    assert "expected bud loss" in text and "expected bud loss" in md
    assert "reach T10" in text or "reaches T10" in text
    assert "Unprotected" in text                                 # an unprotected block is not told to protect
