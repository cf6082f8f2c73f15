"""Night outlooks: import (same rules for bad rows as the other files), storage, and their use in the frost run."""

from __future__ import annotations

import datetime as dt

import pytest
from sqlalchemy import func, select

from advisory.errors import InputError
from advisory.ingest.night_outlook import import_night_outlook, parse_night_outlook_csv
from advisory.runs import calibration_refit, frost_assess, frost_night
from advisory.store.schema import NightOutlook

NIGHT = dt.date(2026, 4, 8)
NOW = dt.datetime(2026, 4, 9, 5, 0, tzinfo=dt.UTC)


def _count(db):
    with db.transaction() as s:
        return s.scalar(select(func.count()).select_from(NightOutlook))


def _clearing_file(tmp_path, evening_sky=90, late_sky=5):
    """QR-BENCH's outlook for the night of 8 April: cloudy in the evening, clearing after midnight, calm."""
    lines = ["station,time,sky_cover_pct,wind_speed_mph,air_temp_f"]
    for h in range(19, 24):
        lines.append(f"QR-BENCH,2026-04-08T{h:02d}:00,{evening_sky},2,40")
    for h in range(0, 8):
        lines.append(f"QR-BENCH,2026-04-09T{h:02d}:00,{late_sky},1,30")
    p = tmp_path / "night.csv"
    p.write_text("\n".join(lines) + "\n")
    return p


def test_parse_units_and_aliases():
    f = parse_night_outlook_csv("site;time;sky_pct;wind_kmh;temp_c\nA;2026-04-08T22:00-07:00;40%;36;2.5\n",
                                name="n.csv")
    row = f.iloc[0]
    assert row.station == "A" and row.sky_cover_pct == 40.0
    assert row.wind_speed_ms == pytest.approx(10.0) and row.air_temp_c == 2.5


@pytest.mark.parametrize("text,line,field,words", [
    ("station,time,sky_cover_pct\nA,2026-04-08T22:00\n", 2, None, "fewer than the header"),
    ("station,time,sky_cover_pct\nA,2026-04-08T22:00,10,5\n", 2, None, "more than the header"),
    ("station,time,sky_cover_pct\nA,yesterday night,10\n", 2, "time", "not a time"),
    ("station,time,sky_cover_pct\nA,2026-04-08T22:00,140\n", 2, "sky_cover_pct", "0-100"),
    ("station,time,sky_cover_pct,wind_speed_ms\nA,2026-04-08T22:00,,\n", 2, "sky_cover_pct", "neither"),
    ("station,time,sky_cover_pct\nA,2026-04-08T22:00,10\nA,2026-04-08T22:00,20\n", 3, "time", "already given"),
    ("station,time\nA,2026-04-08T22:00\n", 1, "sky_cover_pct", "needs a"),
    ("station,time,sky_cover_pct,wind_speed_ms,wind_speed_mph\nA,x,1,1,1\n", 1, "wind_speed_mph", "one unit"),
])
def test_bad_rows_are_refused_with_line_and_field(text, line, field, words):
    with pytest.raises(InputError) as err:
        parse_night_outlook_csv(text, name="n.csv")
    assert err.value.line == line and err.value.field == field and words in err.value.message


def test_import_is_idempotent_and_reads_naive_times_in_the_station_zone(spring_db, tmp_path):
    path = _clearing_file(tmp_path)
    first = import_night_outlook(spring_db, path)
    assert first.added == 13 and first.stations == ["QR-BENCH"]
    assert first.first_utc.startswith("2026-04-09T02:00")  # 19:00 PDT
    again = import_night_outlook(spring_db, path)
    assert again.added == 0 and again.unchanged == 13
    assert _count(spring_db) == 13


def test_a_bad_file_writes_nothing(spring_db, tmp_path):
    p = tmp_path / "bad.csv"
    p.write_text("station,time,sky_cover_pct\nQR-BENCH,2026-04-08T22:00,10\nNOPE,2026-04-08T23:00,10\n")
    with pytest.raises(InputError) as err:
        import_night_outlook(spring_db, p)
    assert err.value.line == 3 and err.value.field == "station"
    gap = tmp_path / "gap.csv"  # 02:30 on 8 March does not exist in the farm's zone
    gap.write_text("station,time,sky_cover_pct\nQR-BENCH,2026-03-08T01:30,10\nQR-BENCH,2026-03-08T02:30,10\n")
    with pytest.raises(InputError) as err:
        import_night_outlook(spring_db, gap)
    assert err.value.line == 3 and "clock change" in err.value.message
    assert _count(spring_db) == 0


def _assess(db):
    from sqlalchemy.orm import selectinload

    from advisory.store.schema import Block

    with db.transaction() as s:
        blocks = list(s.scalars(select(Block).options(selectinload(Block.farm)).order_by(Block.id)))
        codes = {b.name: b.station.code for b in blocks}
        return {a.block: a for a in frost_assess.assess_night(s, blocks, NIGHT)}, codes


def test_without_an_outlook_nothing_changes_and_with_one_the_forecast_moves_and_says_why(spring_db, tmp_path):
    plain, codes = _assess(spring_db)
    import_night_outlook(spring_db, _clearing_file(tmp_path, evening_sky=100, late_sky=0))
    moved, _ = _assess(spring_db)
    shifted = 0
    for name, a in plain.items():
        b = moved[name]
        if codes[name] != "QR-BENCH" or a.p50_c is None:
            # no outlook for this station: exactly the same forecast and no sentence
            assert (b.p10_c, b.p50_c, b.p90_c) == (a.p10_c, a.p50_c, a.p90_c)
            assert "night_outlook" not in b.details
            continue
        shift = b.p50_c - a.p50_c
        assert -2.0 - 1e-6 <= shift <= 1.0 + 1e-6  # the default bounds
        assert b.p10_c - a.p10_c == pytest.approx(shift, abs=0.05)  # the whole range moves
        assert b.details["night_outlook"].startswith("The night outlook ")
        shifted += abs(shift) > 0.05
    assert shifted >= 1


def test_the_notice_gives_the_outlooks_reason(spring_db, tmp_path, quiet_channels):
    import_night_outlook(spring_db, _clearing_file(tmp_path, evening_sky=100, late_sky=0))
    frost_night.run_night(spring_db, NIGHT, now=NOW, sleep=lambda s: None)
    texts = [p.read_text() for p in quiet_channels.rglob("*bench-gala*frost_r0*.txt") if ".sms." not in p.name]
    assert texts and "The night outlook " in texts[0]


def test_the_morning_refit_learns_the_outlooks_weight(monkeypatch):
    """Wiring of the learned weight: nights whose outcome follows the outlook's physics earn it a weight near 1."""
    import numpy as np
    import pandas as pd

    from advisory.forecast import calibration as calib
    from advisory.forecast import outlook_effect as oe
    from advisory.forecast.cooling import physical_night
    from tests.forecast.helpers import history_frame

    hist = history_frame(200, seed=21)
    rng = np.random.default_rng(22)
    sky = rng.uniform(0, 100, len(hist))
    change = oe.physical_change_c(physical_night(hist), sky, np.full(len(hist), np.nan))
    hist["observed_min_c"] = hist["observed_min_c"] + change  # the outlook was right every night
    cal = calib.fit_calibration(hist)
    frames = [pd.DataFrame({"sky_cover_pct": [s, s], "wind_speed_ms": [np.nan, np.nan],
                            "air_temp_c": [np.nan, np.nan]},
                           index=pd.DatetimeIndex([r + pd.Timedelta(minutes=30), r + pd.Timedelta(hours=2)]))
              for r, s in zip(pd.DatetimeIndex(hist["reference_time"]), sky, strict=True)]
    hours = pd.concat(frames).sort_index()

    class _Station:
        id, timezone = 1, "UTC"

    monkeypatch.setattr(calibration_refit, "load_night_outlooks", lambda session, ids, t0, t1: {1: hours})
    cal = calibration_refit._fit_outlook_weight(None, cal, hist, _Station())
    assert cal.outlook_nights == 200
    assert cal.outlook_weight == pytest.approx(1.0, abs=0.25), cal.outlook_weight
    assert calib.Calibration.from_dict(cal.to_dict()).outlook_weight == pytest.approx(cal.outlook_weight)
