"""The station data-quality report, and the `obs` commands that print it."""

from __future__ import annotations

import argparse
import json

import pytest

from advisory.commands import obs as obs_cmd
from advisory.errors import InputError, NotFoundError
from advisory.ingest.observations import import_file
from advisory.ingest.report import parse_when, station_report


def series_csv() -> str:
    """Two days of 15-minute readings with a spike, a stuck stretch and a 3-hour gap."""
    lines = ["time,air_temp_c,rel_humidity_pct"]
    for i in range(192):
        if 100 <= i < 112:  # 3 h missing
            continue
        h, m = divmod(i * 15, 60)
        day, h = divmod(h, 24)
        air = 8.0 + 0.01 * i
        if i == 40:
            air = 30.0  # spike
        rh = 50 + (i % 7) if not 140 <= i < 170 else 71  # humidity stuck 7 h 15 min
        lines.append(f"2024-04-{1 + day:02d}T{h:02d}:{m:02d}:00Z,{air:.2f},{rh}")
    return "\n".join(lines) + "\n"


@pytest.fixture
def loaded(obs_db, csv_file):
    import_file(obs_db, "ST1", csv_file(series_csv(), name="april.csv"))
    return obs_db


def test_report_counts_coverage_gaps_and_flags(loaded):
    r = station_report(loaded, "ST1")
    d = r.data
    assert d["readings"] == 180 and d["expected"] == 192 and d["interval_s"] == 900
    assert d["coverage_pct"] == pytest.approx(93.75)
    assert d["gaps"]["count"] == 1 and d["gaps"]["missing_readings"] == 12
    gap = d["gaps"]["longest"][0]
    assert (gap["start_utc"], gap["end_utc"]) == ("2024-04-02T00:45:00Z", "2024-04-02T04:00:00Z")
    assert gap["start_local"] == "2024-04-01 20:45 EDT"
    air = d["variables"]["air_temp_c"]
    assert air["flags"]["spike"] == 1 and air["flagged"] == 1
    assert air["stretches"] == [{"flag": "spike", "start_utc": "2024-04-01T10:00:00Z",
                                 "end_utc": "2024-04-01T10:00:00Z", "start_local": "2024-04-01 06:00 EDT",
                                 "end_local": "2024-04-01 06:00 EDT", "readings": 1, "first_value": 30.0}]
    rh = d["variables"]["rel_humidity_pct"]
    assert rh["flags"]["stuck"] == 30
    [stuck] = [s for s in rh["stretches"] if s["flag"] == "stuck"]
    assert stuck["readings"] == 30 and stuck["first_value"] == 71
    assert d["imports"][0]["file"] == "april.csv"
    json.dumps(d)  # JSON-ready
    assert "coverage 93.8 %" in r.text and "spike: 2024-04-01 06:00 EDT" in r.text
    assert "stuck: 2024-04-02 07:00 EDT -> 2024-04-02 14:15 EDT (30 readings, value 71.0)" in r.text


def test_report_window(loaded):
    d = station_report(loaded, "ST1", since="2024-04-02").data  # local midnight, New York
    assert d["since_utc"] == "2024-04-02T04:00:00Z"
    assert d["readings"] == 192 - 112
    d = station_report(loaded, "ST1", since="6h").data  # before the latest reading
    assert d["readings"] == 25  # the bound is inclusive: 6 h of 15-minute readings, both ends
    assert station_report(loaded, "ST1", until="2024-04-01T00:00:00Z").data["readings"] == 0
    with pytest.raises(InputError, match="--since"):
        station_report(loaded, "ST1", since="last tuesday")


def test_report_without_data_and_unknown_station(obs_db):
    r = station_report(obs_db, "SOUTH")
    assert r.data["readings"] == 0 and "no readings stored" in r.text
    with pytest.raises(NotFoundError):
        station_report(obs_db, "NOPE")


def test_parse_when():
    assert parse_when(None, "UTC") is None
    assert parse_when("2024-01-01T00:00:00+01:00", "UTC") == 1704063600
    assert parse_when("2d", "UTC", latest_s=200_000) == 200_000 - 172_800


def run(argv: list[str], db_url: str) -> int:
    parser = argparse.ArgumentParser(prog="advisory")
    obs_cmd.register(parser.add_subparsers(dest="command"))
    args = parser.parse_args(argv)
    args.db = db_url
    return args.func(args)


def test_obs_commands(obs_db, csv_file, tmp_path, capsys):
    url = obs_db.url
    path = csv_file(series_csv())
    assert run(["obs", "import", "ST1", str(path)], url) == 0
    out = capsys.readouterr().out
    assert "added 180" in out and "spike 1" in out
    assert run(["obs", "import", "ST1", str(path), "--json"], url) == 0
    assert json.loads(capsys.readouterr().out)["already_imported"] is True
    assert run(["obs", "report", "ST1", "--since", "2024-04-02"], url) == 0
    assert "readings: 80" in capsys.readouterr().out
    assert run(["obs", "report", "ST1", "--json"], url) == 0
    assert json.loads(capsys.readouterr().out)["readings"] == 180
    assert run(["obs", "sweep"], url) == 0
    assert "no station inbox holds a file" in capsys.readouterr().out
    bad = csv_file("time,air_temp_c\n2024-11-03 01:30,1\n")
    with pytest.raises(InputError, match="occurs twice"):
        run(["obs", "import", "ST1", str(bad)], url)
    assert run(["obs", "import", "ST1", str(bad), "--ambiguous", "latest"], url) == 0
