"""`advisory outlook import|list`: all or nothing, idempotent, clear errors."""

from __future__ import annotations

import json

import pytest
from sqlalchemy import func, select

from advisory import cli
from advisory.ingest import outlook_import
from advisory.ingest.farm_file import import_farm_file
from advisory.store.schema import Outlook


@pytest.fixture
def farm_db(db, demo_farm, quiet_channels):
    import_farm_file(db, demo_farm / "farm.toml")
    return db


def _rows(db):
    with db.transaction() as s:
        return s.scalar(select(func.count()).select_from(Outlook))


def _run(db, *argv):
    return cli.main(["--db", db.url, "outlook", *argv])


def test_import_is_idempotent_and_updates_changed_rows(farm_db, demo_farm, tmp_path, capsys):
    path = demo_farm / "outlook-summer.csv"
    assert _run(farm_db, "import", str(path)) == 0
    assert "12 added, 0 updated, 0 unchanged" in capsys.readouterr().out
    assert _rows(farm_db) == 12
    assert _run(farm_db, "import", str(path)) == 0
    assert "0 added, 0 updated, 12 unchanged" in capsys.readouterr().out
    assert _rows(farm_db) == 12
    changed = tmp_path / "changed.csv"
    changed.write_text(path.read_text().replace("QR-BENCH,2026-07-16,38.5,18.5,19", "QR-BENCH,2026-07-16,39.5,18.5,"))
    assert _run(farm_db, "import", str(changed), "--json") == 0
    report = json.loads(capsys.readouterr().out)
    assert (report["added"], report["updated"], report["unchanged"]) == (0, 1, 11)
    assert report["stations"] == ["QR-BENCH", "QR-CREEK"]
    with farm_db.transaction() as s:
        o = s.scalar(select(Outlook).where(Outlook.high_c == 39.5))
        assert o is not None and o.min_rel_humidity_pct is None and o.low_c == 18.5


def test_unknown_station_names_line_and_field_and_writes_nothing(farm_db, tmp_path, capsys):
    path = tmp_path / "o.csv"
    path.write_text("station,date,high_c,low_c\nQR-BENCH,2026-07-21,30,14\nQR-NOWHERE,2026-07-21,31,15\n")
    assert _run(farm_db, "import", str(path)) == 2
    err = capsys.readouterr().err
    assert "line 3" in err and "field 'station'" in err and "QR-NOWHERE" in err and "QR-BENCH" in err
    assert _rows(farm_db) == 0


def test_station_option_for_a_file_without_station_column(farm_db, tmp_path, capsys):
    path = tmp_path / "bench.csv"
    path.write_text("date,high_f,low_f\n2026-07-21,95,59\n")
    assert _run(farm_db, "import", str(path), "--station", "QR-BENCH") == 0
    assert "1 added" in capsys.readouterr().out
    with farm_db.transaction() as s:
        o = s.scalar(select(Outlook))
        assert o.high_c == pytest.approx(35.0) and o.low_c == pytest.approx(15.0)   # (F - 32) * 5/9
    assert _run(farm_db, "import", str(path), "--station", "NOPE") == 2
    assert "--station" in capsys.readouterr().err
    assert _run(farm_db, "import", str(path)) == 2            # no station column and no --station
    assert "station" in capsys.readouterr().err


def test_a_row_without_high_is_refused(farm_db, tmp_path, capsys):
    path = tmp_path / "low-only.csv"
    path.write_text("station,date,high_c,low_c\nQR-BENCH,2026-07-21,30,14\nQR-BENCH,2026-07-22,,15\n")
    assert _run(farm_db, "import", str(path)) == 2
    err = capsys.readouterr().err
    assert "line 3" in err and "field 'high_c'" in err
    assert _rows(farm_db) == 0


def test_bad_file_is_an_input_error(farm_db, tmp_path, capsys):
    path = tmp_path / "bad.csv"
    path.write_text("station,date,high_c\nQR-BENCH,14/07/2026,30\n")
    assert _run(farm_db, "import", str(path)) == 2
    assert "line 2" in capsys.readouterr().err
    assert _run(farm_db, "import", str(tmp_path / "missing.csv")) == 2


def test_list(farm_db, demo_farm, capsys):
    assert _run(farm_db, "list") == 0
    assert "no outlook stored" in capsys.readouterr().out
    outlook_import.import_outlook(farm_db, demo_farm / "outlook-summer.csv")
    assert _run(farm_db, "list", "--station", "QR-CREEK", "--since", "2026-07-18") == 0
    out = capsys.readouterr().out.splitlines()
    assert len(out) == 4 and out[1].split()[:3] == ["QR-CREEK", "2026-07-18", "36.5"]
    assert _run(farm_db, "list", "--json") == 0
    rows = json.loads(capsys.readouterr().out)
    assert len(rows) == 12 and rows[0]["station"] == "QR-BENCH" and rows[0]["day"] == "2026-07-14"
    assert _run(farm_db, "list", "--station", "NOPE") == 2
    assert _run(farm_db, "list", "--since", "yesterday") == 2


def test_list_shows_night_outlooks_by_night(farm_db, demo_farm, tmp_path, capsys):
    night = tmp_path / "night.csv"
    rows = ["station,time,sky_cover_pct,wind_speed_ms,air_temp_c"]
    rows += [f"QR-BENCH,2026-04-08T{h:02d}:00,{90 if h < 24 else 10},2.0,6" for h in range(20, 24)]
    rows += [f"QR-BENCH,2026-04-09T{h:02d}:00,10,0.5,{-1 + h * 0.1:.1f}" for h in range(0, 7)]
    night.write_text("\n".join(rows) + "\n")
    assert _run(farm_db, "import", str(night)) == 0
    capsys.readouterr()
    assert _run(farm_db, "list") == 0  # only a night outlook stored: its table, by night
    out = capsys.readouterr().out.splitlines()
    assert len(out) == 2 and out[1].split()[:5] == ["QR-BENCH", "2026-04-08", "11", "20:00", "06:00"]
    assert out[1].split()[5:8] == ["10-90", "0.5-2.0", "-1.0"]
    outlook_import.import_outlook(farm_db, demo_farm / "outlook-summer.csv")
    assert _run(farm_db, "list") == 0  # both kinds: two tables
    text = capsys.readouterr().out
    assert "high °C" in text and "sky %" in text
    assert _run(farm_db, "list", "--kind", "night", "--json") == 0
    (row,) = json.loads(capsys.readouterr().out)
    assert row["kind"] == "night" and row["hours"] == 11 and row["low_c"] == -1.0
    assert _run(farm_db, "list", "--kind", "night", "--since", "2026-04-09") == 0
    assert "no night outlook stored" in capsys.readouterr().out
