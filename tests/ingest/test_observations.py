"""Reading, converting, storing and loading station observations."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd
import pytest
from sqlalchemy import func, select

from advisory.errors import InputError, NotFoundError
from advisory.ingest import qc
from advisory.ingest.observations import (
    StationInfo,
    import_file,
    load_observations,
    load_observations_many,
    parse_observation_bytes,
    read_observation_file,
)
from advisory.physics.moisture import dew_point_c_from_rh, rel_humidity_pct_from_dew_point
from advisory.store.schema import Import, Observation
from tests.ingest.conftest import db_state, station_id

NY = StationInfo(id=1, code="ST1", timezone="America/New_York")
UTC = dt.UTC


def parse(text: str, station: StationInfo = NY, **kw):
    return parse_observation_bytes(text.encode("utf-8"), station, file_name="t.csv", **kw)


def utc(*args) -> pd.Timestamp:
    return pd.Timestamp(dt.datetime(*args, tzinfo=UTC))


# ---------------------------------------------------------------------------------------------- parsing


def test_canonical_file_with_offsets_is_read_exactly():
    p = parse("time,air_temp_c,dew_point_c,wind_speed_ms,cloud_cover_pct,upper_air_temp_c\n"
              "2024-04-02T21:00:00-04:00,5.5,1.2,2.0,40,6.1\n"
              "2024-04-02T21:15:00-04:00,5.1,1.1,1.5,,5.9\n"
              "2024-04-03T01:30:00Z,4.0,0.5,0.0,0,4.8\n")
    f = p.frame
    assert list(f.index) == [utc(2024, 4, 3, 1, 0), utc(2024, 4, 3, 1, 15), utc(2024, 4, 3, 1, 30)]
    assert f["air_temp_c"].tolist() == [5.5, 5.1, 4.0]
    assert np.isnan(f["cloud_cover_pct"].iloc[1])
    assert f["upper_air_temp_c"].tolist() == [6.1, 5.9, 4.8]
    # RH derived from the dew point through the project's Magnus form.
    np.testing.assert_allclose(f["rel_humidity_pct"], rel_humidity_pct_from_dew_point(f["air_temp_c"], f["dew_point_c"]))
    assert p.derived == {"rel_humidity_pct": 3}
    assert p.rows_read == 3


def test_units_are_converted_at_the_edge():
    p = parse("time,air_temp_f,dew_point_f,wind_speed_kmh,cloud_cover_okta,upper_air_temp_f\n"
              "2024-01-01T00:00Z,32,14,36,4,50\n")
    row = p.frame.iloc[0]
    assert row["air_temp_c"] == pytest.approx(0.0)  # 32 °F is 0 °C by definition
    assert row["dew_point_c"] == pytest.approx(-10.0)  # 14 °F = -10 °C
    assert row["wind_speed_ms"] == pytest.approx(10.0)  # 36 km/h = 10 m/s
    assert row["cloud_cover_pct"] == pytest.approx(50.0)  # 4 oktas of 8
    assert row["upper_air_temp_c"] == pytest.approx(10.0)
    p = parse("time,air_temp_c,rel_humidity_pct,wind_speed_mph\n2024-01-01T00:00Z,10,50,10\n")
    assert p.frame["wind_speed_ms"].iloc[0] == pytest.approx(4.4704)  # 1 mph = 0.44704 m/s exactly
    p = parse("time,air_temp_c,wind_speed_kn\n2024-01-01T00:00Z,10,10\n")
    assert p.frame["wind_speed_ms"].iloc[0] == pytest.approx(10 * 1852 / 3600)  # 1 kn = 1852 m/h exactly


def test_dew_point_derived_from_rh_over_water_also_below_freezing():
    p = parse("time,air_temp_c,rel_humidity_pct\n2024-01-01T00:00Z,-5,80\n2024-01-01T00:05Z,12,55\n")
    np.testing.assert_allclose(p.frame["dew_point_c"], dew_point_c_from_rh([-5, 12], [80, 55]))
    assert p.frame["dew_point_c"].iloc[0] < -5
    assert p.derived == {"dew_point_c": 2}


def test_both_moisture_columns_fill_each_other_row_by_row():
    p = parse("time,air_temp_c,dew_point_c,rel_humidity_pct\n"
              "2024-01-01T00:00Z,10,5,\n2024-01-01T00:05Z,10,,60\n2024-01-01T00:10Z,10,4,70\n")
    f = p.frame
    assert f["rel_humidity_pct"].iloc[0] == pytest.approx(rel_humidity_pct_from_dew_point(10, 5))
    assert f["dew_point_c"].iloc[1] == pytest.approx(dew_point_c_from_rh(10, 60))
    assert (f["dew_point_c"].iloc[2], f["rel_humidity_pct"].iloc[2]) == (4, 70)  # both given: kept


def test_headers_are_matched_loosely_and_unknown_columns_listed():
    p = parse(" Time , AIR_TEMP_C ,battery_v\n2024-01-01T00:00Z,1.5,12.9\n")
    assert p.frame["air_temp_c"].iloc[0] == 1.5
    assert p.ignored_columns == ["battery_v"]


def test_naive_times_are_read_in_the_station_zone():
    p = parse("time,air_temp_c\n2024-07-01 06:00,15\n2024-01-15T06:00:00,1\n")
    assert list(p.frame.index) == [utc(2024, 1, 15, 11), utc(2024, 7, 1, 10)]  # EST and EDT


def test_time_utc_column_reads_naive_times_as_utc():
    p = parse("time_utc,air_temp_c\n2024-07-01 06:00,15\n")
    assert p.frame.index[0] == utc(2024, 7, 1, 6)


def test_mixed_naive_and_offset_times():
    p = parse("time,air_temp_c\n2024-07-01 06:00,15\n2024-07-01T10:15:00+00:00,16\n2024-07-01T06:30-04:00,17\n")
    assert list(p.frame.index) == [utc(2024, 7, 1, 10), utc(2024, 7, 1, 10, 15), utc(2024, 7, 1, 10, 30)]


FALL_BACK = ("time,air_temp_c\n2024-11-03 00:30,5\n2024-11-03 01:00,4\n2024-11-03 01:30,3\n"
             "2024-11-03 01:00,2\n2024-11-03 01:30,1\n2024-11-03 02:00,0\n")


def test_ambiguous_local_times_are_refused_naming_the_lines():
    with pytest.raises(InputError) as e:
        parse(FALL_BACK)
    msg = str(e.value)
    assert "t.csv" in msg and "line 3" in msg and "line 6" in msg and "occurs twice" in msg
    assert e.value.line == 3


def test_ambiguous_policies():
    # New York falls back at 02:00 EDT -> 01:00 EST on 2024-11-03 (tz database).
    inferred = parse(FALL_BACK, ambiguous="infer").frame
    assert list(inferred.index) == [utc(2024, 11, 3, 4, 30), utc(2024, 11, 3, 5), utc(2024, 11, 3, 5, 30),
                                    utc(2024, 11, 3, 6), utc(2024, 11, 3, 6, 30), utc(2024, 11, 3, 7)]
    assert inferred["air_temp_c"].tolist() == [5, 4, 3, 2, 1, 0]
    # The file itself can say so, before its header.
    assert parse("# ambiguous=infer\n" + FALL_BACK).frame.equals(inferred)
    one = "time,air_temp_c\n2024-11-03 01:30,3\n"
    assert parse(one, ambiguous="earliest").frame.index[0] == utc(2024, 11, 3, 5, 30)
    assert parse(one, ambiguous="latest").frame.index[0] == utc(2024, 11, 3, 6, 30)


def test_ambiguous_in_the_southern_hemisphere():
    # Hobart leaves daylight time at 03:00 AEDT -> 02:00 AEST on 2024-04-07 (tz database).
    hobart = StationInfo(2, "SOUTH", "Australia/Hobart")
    text = "time,air_temp_c\n2024-04-07 02:30,3\n2024-04-07 02:30,2\n"
    with pytest.raises(InputError, match="occurs twice"):
        parse(text, hobart)
    f = parse(text, hobart, ambiguous="infer").frame
    assert list(f.index) == [utc(2024, 4, 6, 15, 30), utc(2024, 4, 6, 16, 30)]


def test_nonexistent_local_times():
    # New York springs forward at 02:00 EST -> 03:00 EDT on 2024-03-10 (tz database).
    text = "time,air_temp_c\n2024-03-10 01:15,3\n2024-03-10 02:30,2\n2024-03-10 03:45,1\n"
    with pytest.raises(InputError, match="line 3.*does not exist"):
        parse(text)
    before = parse(text, nonexistent="before").frame  # 02:30 read on EST (UTC-5)
    assert list(before.index) == [utc(2024, 3, 10, 6, 15), utc(2024, 3, 10, 7, 30), utc(2024, 3, 10, 7, 45)]
    after = parse(text, nonexistent="after").frame  # 02:30 read on EDT (UTC-4)
    assert after.index[1] == utc(2024, 3, 10, 6, 30)


def test_fixed_utc_offset_for_loggers_on_standard_time():
    f = parse("# utc_offset=-05:00\n" + FALL_BACK.replace("2024-11-03 01:00,2", "2024-11-03 01:15,2")
              .replace("01:30,1", "01:45,1")).frame
    assert f.index[0] == utc(2024, 11, 3, 5, 30)
    assert len(f) == 6


def test_custom_time_format_and_epoch():
    f = parse("# time_format=%m/%d/%Y %H:%M\ntime,air_temp_c\n07/01/2024 06:00,15\n").frame
    assert f.index[0] == utc(2024, 7, 1, 10)
    f = parse("time,air_temp_c\n1719813600,15\n", time_format="epoch").frame
    assert f.index[0] == utc(2024, 7, 1, 6)


def test_fractional_seconds_and_quoted_fields_use_the_general_reader():
    fast = parse("time,air_temp_c\n2024-07-01T06:00:00Z,15\n2024-07-01T06:05:00Z,16\n").frame
    quoted = parse('time,air_temp_c\n"2024-07-01T06:00:00Z","15"\n"2024-07-01T06:05:00Z",16\n').frame
    frac = parse("time,air_temp_c\n2024-07-01T06:00:00.000Z,15\n2024-07-01T06:05:00.4Z,16\n").frame
    assert fast.equals(quoted) and fast.equals(frac)


def test_column_map_and_station_options(tmp_path):
    logger = StationInfo(3, "LOGGER", "America/Los_Angeles", {
        "TIMESTAMP": "time", "AirT_F": "air_temp_f", "RH": "rel_humidity_pct", "WS_mph": "wind_speed_mph",
        "_options": {"missing": "-6999", "delimiter": ";", "decimal": ","}})
    p = parse("TIMESTAMP;AirT_F;RH;WS_mph;Batt\n2024-04-02 21:00;41,0;80;-6999;12,8\n", logger)
    row = p.frame.iloc[0]
    assert p.frame.index[0] == utc(2024, 4, 3, 4)
    assert row["air_temp_c"] == pytest.approx(5.0)
    assert np.isnan(row["wind_speed_ms"])  # the logger's missing-value code
    assert p.ignored_columns == ["Batt"]


def test_crlf_bom_blank_lines_and_spaces():
    text = "\ufefftime, air_temp_c\r\n\r\n2024-07-01T06:00:00Z , 15 \r\n   \r\n2024-07-01T06:05:00Z,16\r\n"
    p = parse(text)
    assert p.frame["air_temp_c"].tolist() == [15, 16]
    assert p.blank_rows == 2


def test_identical_repeated_rows_are_dropped_and_differing_ones_refused():
    p = parse("time,air_temp_c\n2024-07-01T06:00Z,15\n2024-07-01T06:00Z,15\n")
    assert len(p.frame) == 1 and p.duplicate_rows == 1
    with pytest.raises(InputError, match=r"line 3: time 2024-07-01 06:00:00Z already given on line 2"):
        parse("time,air_temp_c\n2024-07-01T06:00Z,15\n2024-07-01T06:00Z,14\n")


def test_unsorted_file_is_sorted():
    p = parse("time,air_temp_c\n2024-07-01T06:10Z,3\n2024-07-01T06:00Z,1\n2024-07-01T06:05Z,2\n")
    assert p.frame["air_temp_c"].tolist() == [1, 2, 3]


# ---------------------------------------------------------------------------------------------- malformed


@pytest.mark.parametrize("content, pattern, line", [
    ("air_temp_c,wind_speed_ms\n1,2\n", "no time column", 1),
    ("time,battery_v\n2024-01-01T00:00Z,12\n", "no observation columns", 1),
    ("", "empty", None),
    ("time,air_temp_c\n", "no data lines", 1),
    ("time,air_temp_c\n2024-01-01T00:00Z,\n", "no readings", 1),
    ("time,air_temp_c\n2024-01-01T00:00Z,1\nyesterday,2\n2024-01-01T00:10Z,3\n2024-13-01T00:00Z,4\n",
     r"2 lines cannot be read.*line 3: time 'yesterday'.*line 5: time '2024-13-01T00:00Z'", 3),
    ("time,air_temp_c\n2024-01-01T00:00Z,1\n2024-01-01T00:05Z,warm\n", r"line 3: air_temp_c 'warm' is not a number",
     3),
    ("time,air_temp_c\n2024-01-01T00:00Z,1,7\n2024-01-01T00:05Z,2\n", r"line 2: 3 fields, the header has 2", 2),
    ('time,air_temp_c\n2024-01-01T00:00Z,"1\n2024-01-01T00:05Z,2\n', "broken quoting", 2),
    ("time,air_temp_c\n,5\n", "line 2: values without a time", 2),
    ("time,time_utc,air_temp_c\n", "two time columns", 1),
    ("time,air_temp_c,air_temp_f\n2024-01-01T00:00Z,1,33\n", "both give air_temp_c", 1),
    ("# ambiguous=sometimes\ntime,air_temp_c\n", "ambiguous must be one of", 1),
    ("# colour=blue\ntime,air_temp_c\n", "unknown reading option", 1),
])
def test_malformed_files_name_file_and_lines(content, pattern, line):
    with pytest.raises(InputError, match=pattern) as e:
        parse(content)
    assert e.value.file == "t.csv"
    assert e.value.line == line


def test_bad_encoding_names_the_line():
    raw = b"time,air_temp_c\n2024-01-01T00:00Z,1\n" + b"2024-01-01T00:05Z,2\xb0\n"
    with pytest.raises(InputError, match=r"not valid utf-8 text.*encoding") as e:
        parse_observation_bytes(raw, NY, file_name="t.csv")
    assert e.value.line == 3
    # Declared, it reads.
    p = parse_observation_bytes(b"# encoding=latin-1\ntime,air_temp_c,note\n2024-01-01T00:00Z,1,caf\xe9\n", NY,
                                file_name="t.csv")
    assert len(p.frame) == 1 and p.ignored_columns == ["note"]


def test_binary_file_is_refused():
    with pytest.raises(InputError, match="NUL"):
        parse_observation_bytes(b"\x89PNG\r\n\x1a\n\x00\x00", NY, file_name="t.png")


def test_missing_file(tmp_path):
    with pytest.raises(InputError, match="cannot read"):
        read_observation_file(tmp_path / "nope.csv", NY)
    with pytest.raises(InputError, match="folder"):
        read_observation_file(tmp_path, NY)


def test_many_bad_lines_are_counted_and_the_first_shown():
    rows = "".join(f"2024-01-01T00:{m:02d}Z,x{m}\n" for m in range(40))
    with pytest.raises(InputError, match=r"40 lines cannot be read \(first 5 shown\): line 2:") as e:
        parse("time,air_temp_c\n" + rows)
    assert "line 7:" not in str(e.value)


# ---------------------------------------------------------------------------------------------- import


CSV_A = "".join(["time,air_temp_c\n"] + [f"2024-04-01T{h:02d}:00:00Z,{5 + h * 0.1:.1f}\n" for h in range(0, 12)])
CSV_B = "".join(["time,air_temp_c,rel_humidity_pct\n"]
                + [f"2024-04-01T{h:02d}:00:00Z,{5 + h * 0.1:.1f},{60 + h}\n" for h in range(6, 18)])


def count(db, model=Observation) -> int:
    with db.transaction() as s:
        return s.scalar(select(func.count()).select_from(model))


def test_import_then_same_file_again_adds_nothing(obs_db, csv_file):
    path = csv_file(CSV_A)
    first = import_file(obs_db, "ST1", path)
    assert (first.rows_added, first.conflicts, first.already_imported) == (12, 0, False)
    state = db_state(obs_db)
    again = import_file(obs_db, "ST1", path)
    assert (again.rows_added, again.rows_unchanged, again.already_imported) == (0, 12, True)
    assert db_state(obs_db) == state  # not even a second import record
    assert count(obs_db, Import) == 1


def test_overlapping_files_merge_and_fill_in(obs_db, csv_file):
    import_file(obs_db, "ST1", csv_file(CSV_A))
    b = import_file(obs_db, "ST1", csv_file(CSV_B))
    assert (b.rows_added, b.rows_filled, b.conflicts) == (6, 6, 0)
    sid = station_id(obs_db, "ST1")
    with obs_db.transaction() as s:
        f = load_observations(s, sid, utc(2024, 4, 1), utc(2024, 4, 2))
    assert len(f) == 18
    assert f["rel_humidity_pct"].isna().sum() == 6  # hours 0-5 only in file A
    assert f.loc[utc(2024, 4, 1, 6), "rel_humidity_pct"] == 66
    assert f.loc[utc(2024, 4, 1, 6), "dew_point_c"] == pytest.approx(dew_point_c_from_rh(5.6, 66))


def test_conflicts_are_kept_and_reported_unless_replace(obs_db, csv_file):
    import_file(obs_db, "ST1", csv_file(CSV_A))
    changed = CSV_A.replace("T03:00:00Z,5.3", "T03:00:00Z,5.9")
    path = csv_file(changed)
    s = import_file(obs_db, "ST1", path)
    assert (s.conflicts, s.rows_added, s.rows_replaced) == (1, 0, 0)
    assert s.conflict_examples == [{"time_utc": "2024-04-01 03:00:00Z", "column": "air_temp_c", "stored": 5.3,
                                    "file": 5.9}]
    assert "--replace" in s.text()
    sid = station_id(obs_db, "ST1")
    with obs_db.transaction() as ss:
        assert load_observations(ss, sid, utc(2024, 4, 1), utc(2024, 4, 2))["air_temp_c"].iloc[3] == 5.3
    r = import_file(obs_db, "ST1", path, replace=True)
    assert (r.conflicts, r.rows_replaced) == (1, 1)
    with obs_db.transaction() as ss:
        assert load_observations(ss, sid, utc(2024, 4, 1), utc(2024, 4, 2))["air_temp_c"].iloc[3] == 5.9


def test_malformed_import_leaves_the_database_unchanged(obs_db, csv_file):
    import_file(obs_db, "ST1", csv_file(CSV_A))
    state = db_state(obs_db)
    bad = CSV_B + "2024-04-01T20:00:00Z,oops,50\n"
    with pytest.raises(InputError, match="line 14"):
        import_file(obs_db, "ST1", csv_file(bad))
    assert db_state(obs_db) == state


def test_unknown_station(obs_db, csv_file):
    with pytest.raises(NotFoundError, match="known stations: LOGGER, SOUTH, ST1, UTCST"):
        import_file(obs_db, "NOPE", csv_file(CSV_A))


def test_import_through_the_station_column_map(obs_db, csv_file):
    path = csv_file("TIMESTAMP,AirT_F,RH,WS_mph\n2024-04-02 21:00,41,80,-6999\n2024-04-02 21:15,40.1,82,2.0\n")
    s = import_file(obs_db, "LOGGER", path)
    assert s.rows_added == 2 and s.derived == {"dew_point_c": 2}
    with obs_db.transaction() as ss:
        f = load_observations(ss, station_id(obs_db, "LOGGER"), utc(2024, 4, 3), utc(2024, 4, 4))
    assert f.index[0] == utc(2024, 4, 3, 4)
    assert f["air_temp_c"].iloc[0] == pytest.approx(5.0)
    assert np.isnan(f["wind_speed_ms"].iloc[0])


def test_import_in_a_callers_session(obs_db, csv_file):
    with obs_db.transaction() as s:
        summary = import_file(s, "ST1", csv_file(CSV_A))
        assert summary.rows_added == 12
    assert count(obs_db) == 12


def test_qc_flags_are_stored_and_kept_out_of_loads(obs_db, csv_file):
    lines = ["time,air_temp_c,dew_point_c,wind_speed_ms"]
    for i in range(48):
        t = f"2024-04-01T{i // 4:02d}:{(i % 4) * 15:02d}:00Z"
        air = 10 - i * 0.1
        lines.append(f"{t},{air:.1f},{air - 3:.1f},{1 + (i % 3) * 0.5}")
    lines[10] = lines[10].replace(",9.1,", ",24.5,", 1)  # a spike
    lines[20] = "2024-04-01T04:45:00Z,8.1,9.5,-3"  # dew point above air, negative wind
    path = csv_file("\n".join(lines) + "\n")
    s = import_file(obs_db, "ST1", path)
    assert s.flags["air_temp_c"]["spike"] == 1
    assert s.flags["dew_point_c"]["dew_above_air"] == 1
    assert s.flags["rel_humidity_pct"]["dew_above_air"] == 1  # shared within the moisture pair
    assert s.flags["wind_speed_ms"]["range"] == 1
    sid = station_id(obs_db, "ST1")
    with obs_db.transaction() as ss:
        raw = load_observations(ss, sid, utc(2024, 4, 1), utc(2024, 4, 2), qc_passed_only=False, include_qc=True)
        clean = load_observations(ss, sid, utc(2024, 4, 1), utc(2024, 4, 2))
    spike_t = utc(2024, 4, 1, 2, 15)
    assert raw.loc[spike_t, "air_temp_c"] == 24.5 and raw.loc[spike_t, "air_temp_qc"] == qc.SPIKE
    assert np.isnan(clean.loc[spike_t, "air_temp_c"])
    assert np.isnan(clean.loc[utc(2024, 4, 1, 4, 45), "dew_point_c"])
    assert clean.loc[utc(2024, 4, 1, 4, 45), "air_temp_c"] == 8.1
    assert "air_temp_qc" not in clean
    # Keeping steps and spikes if a caller wants them:
    with obs_db.transaction() as ss:
        loose = load_observations(ss, sid, utc(2024, 4, 1), utc(2024, 4, 2), reject_mask=qc.RANGE)
    assert loose.loc[spike_t, "air_temp_c"] == 24.5


def test_qc_does_not_depend_on_how_readings_were_split_into_files(obs_db, tmp_path):
    # A sensor stuck for 5 h in each of two files: 10 h in all, flagged only once both are in.
    rows = [f"2024-04-01T{h:02d}:{m:02d}:00Z,{(3.3 if 6 <= h < 16 else 5 + h / 10 + m / 600):.3f}"
            for h in range(24) for m in (0, 30)]
    head = "time,air_temp_c\n"
    (tmp_path / "a.csv").write_text(head + "\n".join(rows[:22]) + "\n")
    (tmp_path / "b.csv").write_text(head + "\n".join(rows[22:]) + "\n")
    first = import_file(obs_db, "ST1", tmp_path / "a.csv")
    assert first.flags["air_temp_c"]["stuck"] == 0
    second = import_file(obs_db, "ST1", tmp_path / "b.csv")
    assert second.requalified == 10  # the first file's part of the run, flagged now
    sid = station_id(obs_db, "ST1")
    with obs_db.transaction() as s:
        split = load_observations(s, sid, utc(2024, 4, 1), utc(2024, 4, 2), qc_passed_only=False, include_qc=True)
    assert int((split["air_temp_qc"] & qc.STUCK != 0).sum()) == 20
    expected = qc.apply_qc(split[list(qc.VALUE_COLUMNS)])
    np.testing.assert_array_equal(split["air_temp_qc"], expected["air_temp_qc"])


# ---------------------------------------------------------------------------------------------- loading


def test_load_many_stations_in_one_call(obs_db, csv_file):
    import_file(obs_db, "ST1", csv_file(CSV_A))
    import_file(obs_db, "UTCST", csv_file(CSV_B))
    ids = [station_id(obs_db, c) for c in ("ST1", "UTCST", "SOUTH")]
    got = load_observations_many(obs_db, ids, utc(2024, 4, 1, 6), utc(2024, 4, 1, 9))
    assert set(got) == set(ids)
    assert len(got[ids[0]]) == 3 and len(got[ids[1]]) == 3 and got[ids[2]].empty
    assert list(got[ids[2]].columns) == list(qc.VALUE_COLUMNS)
    assert str(got[ids[0]].index.tz) == "UTC" and got[ids[0]].index.name == "time_utc"
    only = load_observations_many(obs_db, ids[:1], utc(2024, 4, 1), utc(2024, 4, 2), columns=["air_temp_c"])
    assert list(only[ids[0]].columns) == ["air_temp_c"]


def test_load_needs_aware_times(obs_db):
    with obs_db.transaction() as s, pytest.raises(ValueError, match="timezone-aware"):
        load_observations(s, 1, dt.datetime(2024, 1, 1), utc(2024, 1, 2))


def test_time_column_need_not_come_first():
    p = parse("air_temp_c,wind_speed_ms,time\n5,1,2024-07-01T06:00Z\n6,,2024-07-01T06:05Z\n")
    assert list(p.frame.index) == [utc(2024, 7, 1, 6), utc(2024, 7, 1, 6, 5)]
    assert p.frame["air_temp_c"].tolist() == [5, 6]
    with pytest.raises(InputError, match="line 3: values without a time"):
        parse("air_temp_c,wind_speed_ms,time\n5,1,2024-07-01T06:00Z\n6,2,\n")
    with pytest.raises(InputError, match="line 3: 2 fields, the header has 3"):   # a cut line is refused
        parse("air_temp_c,wind_speed_ms,time\n5,1,2024-07-01T06:00Z\n6,2\n")


def test_short_lines_are_refused_like_long_ones():
    # a line with fewer fields than the header is cut (a logger stopped mid-write), not "missing values"
    with pytest.raises(InputError, match="line 2: 2 fields, the header has 3") as err:
        parse("time,air_temp_c,wind_speed_ms\n2024-07-01T06:00Z,5\n2024-07-01T06:05Z,6,2\n")
    assert err.value.line == 2
    p = parse("time,air_temp_c,wind_speed_ms\n2024-07-01T06:00Z,5,\n2024-07-01T06:05Z,6,2\n")
    assert np.isnan(p.frame["wind_speed_ms"].iloc[0]) and p.frame["wind_speed_ms"].iloc[1] == 2
