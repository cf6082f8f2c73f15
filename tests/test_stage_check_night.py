"""The night run's stage check, the risk at the expected stage, the economics line and the run sheet's
order when the crew is short, on the demo farm (invented data)."""

from __future__ import annotations

import dataclasses
import datetime as dt

import pytest

from advisory.notices import compose, farm_summary, frost_notice
from advisory.risk import runsheet
from advisory.runs import frost_night

NIGHT = dt.date(2026, 4, 8)
NOW = dt.datetime(2026, 4, 9, 5, 0, tzinfo=dt.UTC)


@pytest.fixture
def night(spring_db, demo_farm):
    from advisory.ingest.observations import import_file

    import_file(spring_db, "QR-CREEK", demo_farm / "stations" / "QR-CREEK-march.csv")
    res = frost_night.run_night(spring_db, NIGHT, now=NOW, sleep=lambda s: None)
    return {a.block: a for a in res.assessments}


def _text(a) -> str:
    n = compose.compose_block(a)
    return "\n".join(n.lead + [p for s in n.sections for p in s.paragraphs + s.items])


def test_stale_stage_is_flagged_with_the_risk_at_the_expected_stage(night):
    a = night["Lower Bartlett"]
    c = a.details["stage_check"]
    assert c["sentence"] == ("stage recorded first white on 2026-03-30; heat since suggests full white; "
                             "check the buds")
    assert c["heat_since_stage_c"] > 22.2          # full white is 22.2 °C-days past first white
    assert a.stage == "first white" and a.t10_c == pytest.approx(-3.9, abs=0.05)  # the record still rules
    assert c["expected_p_kill_ge_10pct"] > a.p_kill_ge_10pct
    n = compose.compose_block(a)
    lead = " ".join(n.lead)
    assert "Stage recorded first white on 2026-03-30; heat since suggests full white; check the buds." in lead
    assert "At full white (T10 -3.3 °C) the chance of losing 10 % or more would be" in lead
    buds = next(s for s in n.sections if s.key == "buds")
    assert any(p.startswith("Stage recorded first white") for p in buds.paragraphs)
    # the stages of the other blocks agree with the heat since
    assert not night["Bench Gala"].details["stage_check"]["stale"]
    assert "Stage recorded" not in _text(night["Bench Gala"])


def test_the_text_message_of_a_stale_block_says_so_within_one_message(night):
    from advisory.notices import notice_parts
    from advisory.notices.words import gsm_safe

    n = compose.compose_block(night["Lower Bartlett"])
    assert "Stage now full white?" in n.sms and "..." not in n.sms  # the short form, never cut
    assert len(n.sms) <= notice_parts.SMS_MAX and gsm_safe(n.sms) == n.sms
    assert n.sms.endswith(notice_parts.sms_caution("frost"))
    assert "Stage may be" not in compose.compose_block(night["Bench Gala"]).sms


def test_farm_summary_names_the_stale_block(night):
    s = farm_summary.compose_farm(list(night.values()))
    line = next(x for x in s.lead if x.startswith("Stage looks stale"))
    assert "Lower Bartlett (recorded first white, heat since suggests full white)" in line
    assert "Bench Gala" not in line


def test_economics_line_only_for_blocks_with_values(night):
    gala = night["Bench Gala"]
    e = gala.details["economics"][0]
    assert e["method"] == "wind_machine" and e["currency"] == "USD"
    assert e["running_cost"] == pytest.approx(60 * e["run_hours"] + 80)
    assert e["loss_without"] > e["loss_with"] >= 0
    n = compose.compose_block(gala)
    line = next(x for x in n.lead if "expected loss" in x)
    assert line.startswith("Wind machines: expected loss ") and "(USD): protecting pays" in line
    plan = next(s for s in n.sections if s.key == "plan")
    assert line in plan.paragraphs and frost_notice.ECONOMICS_NOTE in plan.paragraphs
    # no crop value (Terrace Chardonnay), or a method without its protection (Lower Bartlett): no line
    for name in ("Terrace Chardonnay", "Lower Bartlett"):
        assert "economics" not in night[name].details
        assert "expected loss" not in _text(night[name])


def test_run_sheet_by_saving_when_the_crew_is_short(night):
    ok = list(night.values())
    sheet = runsheet.build_run_sheet("Quillback Ridge Orchards", NIGHT, "America/Los_Angeles", ok)
    assert sheet.crew_size == 2
    savings = [r.saving for r in sheet.rows]
    assert savings == sorted(savings, reverse=True)
    assert [r.reached for r in sheet.rows] == [True, True] + [False] * (len(sheet.rows) - 2)
    text = runsheet.render_text(sheet)
    assert "largest expected saving first (the crew can tend 2 blocks at once)" in text
    assert "crew not expected to reach it: the crew of 2 is at blocks with larger expected savings" in text
    assert "crew not expected" in runsheet.render_markdown(sheet)
    assert sheet.currency == "USD" and f"(expected saving {sheet.rows[0].saving:,.0f} USD)" in text
    # without economics values or crew size: today's start order, nothing marked
    bare = [dataclasses.replace(a, details={k: v for k, v in a.details.items()
                                            if k not in ("economics", "crew_size")}) for a in ok]
    plain = runsheet.build_run_sheet("Quillback Ridge Orchards", NIGHT, "America/Los_Angeles", bare)
    assert plain.crew_size is None and all(r.reached for r in plain.rows)
    starts = [r.start or r.ready_by for r in plain.rows]
    assert starts == sorted(starts)
    assert "in start order" in runsheet.render_text(plain)
    no_crew = [dataclasses.replace(a, details={k: v for k, v in a.details.items() if k != "crew_size"})
               for a in ok]
    assert runsheet.build_run_sheet("Q", NIGHT, "America/Los_Angeles", no_crew).crew_size is None
