"""Unit tests for advisory.ingest.outlook (day outlook CSV)."""

import datetime as dt

import numpy as np
import pytest

from advisory.errors import InputError
from advisory.ingest.outlook import OUTLOOK_COLUMNS, parse_outlook_csv, read_outlook_csv

GOOD = """station,date,high_c,low_c,min_rel_humidity_pct
upper-bench,2025-07-15,36.0,18.5,
upper-bench,2025-07-14,34.5,17.0,28
river-flat,2025-07-14,33,,35%
"""


def test_good_file(tmp_path):
    p = tmp_path / "outlook.csv"
    p.write_text(GOOD)
    df = read_outlook_csv(p)
    assert tuple(df.columns) == OUTLOOK_COLUMNS
    assert list(df["station"]) == ["river-flat", "upper-bench", "upper-bench"]
    assert df.loc[1, "date"] == dt.date(2025, 7, 14)
    assert df.loc[1, "min_rel_humidity_pct"] == 28.0
    assert np.isnan(df.loc[0, "low_c"]) and df.loc[0, "min_rel_humidity_pct"] == 35.0
    assert list(df["line"]) == [4, 3, 2]


def test_fahrenheit_semicolon_and_aliases():
    text = "Station;Date;Max Temp F;Min Temp F\nupper-bench;2025/07/14;95;59\n"
    df = parse_outlook_csv(text)
    assert df.loc[0, "high_c"] == pytest.approx(35.0)
    assert df.loc[0, "low_c"] == pytest.approx(15.0)


def test_station_for_whole_file_and_comments():
    text = "# copied from the forecast page\n\ndate,high_c\n2025-07-14,31\n"
    df = parse_outlook_csv(text, station="upper-bench")
    assert df.loc[0, "station"] == "upper-bench"
    with pytest.raises(InputError) as e:
        parse_outlook_csv(text)
    assert e.value.field == "station"


def test_utf8_bom(tmp_path):
    p = tmp_path / "o.csv"
    p.write_bytes("\ufeffstation,date,high_c\nx,2025-07-14,30\n".encode())
    assert len(read_outlook_csv(p)) == 1


@pytest.mark.parametrize(("text", "line", "field", "words"), [
    ("station,high_c\nx,30\n", 1, "date", "no 'date' column"),
    ("station,date,low\nx,2025-07-14,3\n", 1, "high_c", "no high or low"),
    ("station,date,high_c,high_f\nx,2025-07-14,30,86\n", 1, "high_f", "one unit"),
    ("station,date,high_c\nx,2025-07-14,hot\n", 2, "high_c", "not a number"),
    ("station,date,high_c\nx,14/07/2025,30\n", 2, "date", "YYYY-MM-DD"),
    ("station,date,high_c\nx,2025-02-30,30\n", 2, "date", "not a valid date"),
    ("station,date,high_c,low_c\nx,2025-07-14,20,25\n", 2, "low_c", "above the high"),
    ("station,date,high_c\nx,2025-07-14,30\nx,2025-07-14,31\n", 3, "date", "already given on line 2"),
    ("station,date,high_c,min_rh_pct\nx,2025-07-14,30,120\n", 2, "min_rel_humidity_pct", "(0, 100]"),
    ("station,date,high_c,low_c\nx,2025-07-14,,\n", 2, "high_c", "neither a high nor a low"),
    ("station,date,high_f\nx,2025-07-14,300\n", 2, "high_f", "plausible range"),
    ("station,date,high_c\n,2025-07-14,30\n", 2, "station", "station is empty"),
])
def test_errors_name_line_and_field(text, line, field, words):
    with pytest.raises(InputError) as e:
        parse_outlook_csv(text, name="week.csv")
    err = e.value
    assert err.file == "week.csv" and err.line == line and err.field == field
    assert words in str(err)


def test_empty_and_missing_files(tmp_path):
    with pytest.raises(InputError, match="empty"):
        parse_outlook_csv("\n\n# only a comment\n", name="e.csv")
    with pytest.raises(InputError, match="no rows"):
        parse_outlook_csv("station,date,high_c\n", name="e.csv")
    with pytest.raises(InputError, match="no such file"):
        read_outlook_csv(tmp_path / "missing.csv")
