"""A frost notice warns of a stage from an earlier season; the no-forecast text says its reason once."""

from __future__ import annotations

import dataclasses

from advisory.notices.compose import compose_block
from tests.notices.samples import frost_assessment


def _no_forecast(reason: str, latest: str | None = None):
    a = frost_assessment()
    return dataclasses.replace(a, status="no_forecast", reason=reason, level="", level_rank=0, plan=[],
                               curve=[], data_quality={"latest_obs_utc": latest} if latest else {})


def test_no_forecast_text_is_not_doubled():
    n = compose_block(_no_forecast("no forecast tonight: station QR-CREEK has sent no usable readings"))
    text = " ".join(n.lead)
    assert "No forecast tonight: station QR-CREEK has sent no usable readings." in text
    assert "no forecast tonight: no forecast tonight" not in text.lower()


def test_no_forecast_reason_line_is_not_doubled():
    n = compose_block(_no_forecast("no forecast tonight: station QR-CREEK silent since Mon 6 Apr 14:05 PDT",
                                   latest="2026-04-06T21:05:00+00:00"))
    assert not any("Reason: no forecast" in line for line in n.lead), n.lead


def test_stage_from_an_earlier_season_is_warned_first():
    a = frost_assessment()
    old = dataclasses.replace(a, details={**a.details, "stage_date": "2025-04-01"})
    lead = compose_block(old).lead
    assert lead[0].startswith("Check the stage: 'first bloom' was recorded on 2025-04-01, in an earlier season")
    after = dataclasses.replace(a, details={**a.details, "stage_date": "2026-05-01"})
    assert "after this night" in compose_block(after).lead[0]
    fresh = dataclasses.replace(a, details={**a.details, "stage_date": "2026-04-04"})
    assert not any(line.startswith("Check the stage") for line in compose_block(fresh).lead)
