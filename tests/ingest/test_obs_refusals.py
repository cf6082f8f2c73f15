"""Observation files: cut lines, readings from the future and error counts are refused plainly."""

from __future__ import annotations

import datetime as dt

import pytest
from sqlalchemy import func, select

from advisory.errors import InputError
from advisory.ingest.observations import import_file
from advisory.ingest.obsfile import StationInfo, parse_observation_bytes
from advisory.store.schema import Observation

ST = StationInfo(id=1, code="ST1", timezone="America/Los_Angeles")
HEADER = "time,air_temp_c,dew_point_c,wind_speed_ms,cloud_cover_pct,upper_air_temp_c\n"
GOOD = "2026-04-06T20:00-07:00,5.0,1.0,1.2,10,6.0\n"


def parse(text: str, **kw):
    return parse_observation_bytes(text.encode("utf-8"), ST, file_name="t.csv", **kw)


def test_truncated_last_line_is_refused_with_its_line():
    with pytest.raises(InputError, match="2 fields, the header has 6") as err:
        parse(HEADER + GOOD + "2026-04-06T20:10-07:00,4.8\n")
    assert err.value.line == 3 and err.value.file == "t.csv"


def test_line_cut_inside_its_time_is_not_an_empty_row():
    with pytest.raises(InputError) as err:
        parse(HEADER + GOOD + "2026-04-06T2")
    assert err.value.line == 3
    assert "empty" not in str(err.value) and "1 field, the header has 6" in str(err.value)


def test_blank_lines_are_still_skipped():
    p = parse(HEADER + GOOD + "\n   \n" + GOOD.replace("20:00", "20:10"))
    assert len(p.frame) == 2


def test_readings_from_the_future_are_refused():
    now = dt.datetime(2026, 12, 3, 12, 0, tzinfo=dt.UTC)
    with pytest.raises(InputError, match="in the future") as err:
        parse(HEADER + GOOD + "2099-04-06T20:10-07:00,4.8,1,1,1,5\n", now=now)
    assert err.value.line == 3
    # a few minutes of clock skew is allowed
    skew = (now + dt.timedelta(minutes=5)).isoformat()
    assert len(parse(HEADER + f"{skew},4.8,1,1,1,5\n", now=now).frame) == 1


def test_future_readings_leave_nothing_stored(spring_db, tmp_path):
    with spring_db.transaction() as s:
        before = s.scalar(select(func.count()).select_from(Observation))
    f = tmp_path / "future.csv"
    f.write_text(HEADER + GOOD + "2099-04-06T20:10-07:00,4.8,1,1,1,5\n")
    with pytest.raises(InputError, match="in the future"):
        import_file(spring_db, "QR-BENCH", f)
    with spring_db.transaction() as s:
        assert s.scalar(select(func.count()).select_from(Observation)) == before


def test_error_count_counts_lines_not_fields():
    bad = "".join(f"2026-04-06T2{i}:00-07:00,x,y,z,1,2\n" for i in range(3))  # three bad fields per line
    with pytest.raises(InputError, match=r"^t.csv, line 2: 3 lines cannot be read"):
        parse(HEADER + bad)
