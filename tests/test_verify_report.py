"""`verify report`: CRPS of the forecast range and the reliability of the chance of reaching T10."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pytest
from scipy.special import ndtri
from sqlalchemy import select

from advisory import reports
from advisory.forecast.result import LEVELS, table_crps, table_quantile, two_piece_table
from advisory.runs import frost_night, morning_check
from advisory.store.schema import Verification

NIGHT = dt.date(2026, 4, 8)


def test_two_piece_table_passes_through_its_three_quantiles():
    t = two_piece_table([-3.0], [-1.0], [2.0])
    assert table_quantile(t, 0.1)[0] == pytest.approx(-3.0, abs=1e-9)
    assert table_quantile(t, 0.5)[0] == pytest.approx(-1.0, abs=1e-9)
    assert table_quantile(t, 0.9)[0] == pytest.approx(2.0, abs=1e-9)
    # symmetric case: a normal of spread (p90 - p50) / z90
    sym = two_piece_table([-1.2816], [0.0], [1.2816])
    np.testing.assert_allclose(sym[0], ndtri(LEVELS), atol=1e-3)


def test_report_gives_crps_and_reliability(spring_db):
    frost_night.run_night(spring_db, NIGHT, now=dt.datetime(2026, 4, 9, 5, tzinfo=dt.UTC), sleep=lambda s: None)
    morning_check.verify_night(spring_db, NIGHT, now=dt.datetime(2026, 4, 9, 15, tzinfo=dt.UTC))
    data = reports.verification_report(spring_db, kind="frost")
    frost = data["frost"]
    with spring_db.transaction() as s:
        vs = list(s.scalars(select(Verification)))
        expected = [table_crps(two_piece_table([v.detail["p10_c"]], [v.forecast_c], [v.detail["p90_c"]]),
                               np.array([v.observed_c]))[0] for v in vs]
    assert frost["all"]["with_crps"] == len(vs) == 6
    assert frost["all"]["crps_c"] == pytest.approx(float(np.mean(expected)))
    assert sum(r["nights"] for r in frost["reliability"]) == 6
    text = reports.format_verification(data)
    assert "CRPS" in text and "chance of reaching T10" in text
