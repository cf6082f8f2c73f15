"""Farm files: idempotent import, stage history, every bad-input case leaves the database unchanged."""

from __future__ import annotations

import re
from pathlib import Path

import pytest
from sqlalchemy import func, select, text

from advisory.errors import InputError
from advisory.ingest.farm_file import import_farm_file, parse_farm_text
from advisory.store.schema import Base, Block, Equipment, StageRecord


def _dump(db) -> dict:
    """Every row of every table, for before/after comparisons."""
    out = {}
    with db.engine.connect() as conn:
        for name in sorted(Base.metadata.tables):
            out[name] = sorted(map(tuple, conn.execute(text(f"SELECT * FROM {name}")).all()), key=repr)
    return out


def test_import_demo_farm_twice_changes_nothing(db, demo_farm):
    first = import_farm_file(db, demo_farm / "farm.toml")
    assert first.changed
    before = _dump(db)
    second = import_farm_file(db, demo_farm / "farm.toml")
    assert not second.changed
    assert _dump(db) == before
    with db.transaction() as s:
        assert s.scalar(select(func.count()).select_from(Block)) == 6
        assert s.scalar(select(func.count()).select_from(Equipment)) == 5


def test_changed_stage_adds_to_history(db, demo_farm):
    path = demo_farm / "farm.toml"
    import_farm_file(db, path)
    text_ = path.read_text()
    text_ = text_.replace('stage = "first bloom"\nstage_date = 2026-04-04',
                          'stage = "full bloom"\nstage_date = 2026-04-09')
    path.write_text(text_)
    rep = import_farm_file(db, path)
    assert rep.stage_changes == ["Creek Bing: full bloom (2026-04-09)"]
    with db.transaction() as s:
        b = s.scalar(select(Block).where(Block.name == "Creek Bing"))
        assert (b.stage, b.stage_date.isoformat()) == ("full bloom", "2026-04-09")
        hist = [(r.stage, r.observed_on.isoformat()) for r in b.stage_history]
        assert hist == [("first bloom", "2026-04-04"), ("full bloom", "2026-04-09")]
    # Importing the same file again adds nothing more.
    assert not import_farm_file(db, path).changed
    with db.transaction() as s:
        assert s.scalar(select(func.count()).select_from(StageRecord)) == 7


def test_older_stage_in_file_does_not_override_newer_record(db, demo_farm):
    from advisory.ingest.farm_file import record_stage
    from advisory.store.queries import find_block
    import_farm_file(db, demo_farm / "farm.toml")
    with db.transaction() as s:
        import datetime as dt
        record_stage(s, find_block(s, "Creek Bing"), "full bloom", dt.date(2026, 4, 10), "command line")
    assert not import_farm_file(db, demo_farm / "farm.toml").changed
    with db.transaction() as s:
        assert find_block(s, "Creek Bing").stage == "full bloom"


def test_block_removed_from_file_is_set_inactive(db, demo_farm):
    path = demo_farm / "farm.toml"
    import_farm_file(db, path)
    text_ = path.read_text()
    start = text_.index('[[blocks]]\nname = "North Honeycrisp"')
    path.write_text(text_[:start])
    rep = import_farm_file(db, path)
    assert rep.deactivated == ["block North Honeycrisp"]


MINIMAL = """\
[farm]
name = "Test farm"
timezone = "America/Denver"

[[stations]]
id = "S1"
latitude = 40.0
longitude = -105.0
elevation_m = 1600

[[blocks]]
name = "A"
station = "S1"
latitude = 40.0
longitude = -105.0
elevation_m = 1600
area_ha = 2
crop = "apple"
stage = "tight cluster"
stage_date = 2026-04-01
"""


BAD_CASES = [
    # (replace this, with this, expected field, expected line, message fragment)
    ('crop = "apple"', 'crop = "mango"', "blocks[0].crop", 18, "mango"),
    ('stage = "tight cluster"', 'stage = "ripe"', "blocks[0].stage", 19, "ripe"),
    ("latitude = 40.0\nlongitude = -105.0\nelevation_m = 1600\narea_ha",
     "latitude = 95.0\nlongitude = -105.0\nelevation_m = 1600\narea_ha", "blocks[0].latitude", 14, "-90..90"),
    ("latitude = 40.0\nlongitude = -105.0\nelevation_m = 1600\n\n",
     "latitude = 40.0\nlongitude = -185.0\nelevation_m = 1600\n\n", "stations[0].longitude", 8, "-180..180"),
    ('timezone = "America/Denver"', 'timezone = "Mars/Olympus"', "farm.timezone", 3, "unknown time zone"),
    ('station = "S1"', 'station = "S9"', "blocks[0].station", 13, "S9"),
]


def test_minimal_file_is_valid():
    spec = parse_farm_text(MINIMAL, "farm.toml")
    assert spec.blocks[0].crop == "apple"


@pytest.mark.parametrize("old,new,field,line,fragment", BAD_CASES)
def test_bad_input_is_named_and_nothing_written(db, tmp_path, old, new, field, line, fragment):
    assert old in MINIMAL
    bad = tmp_path / "bad.toml"
    bad.write_text(MINIMAL.replace(old, new, 1))
    before = _dump(db)
    with pytest.raises(InputError) as err:
        import_farm_file(db, bad)
    e = err.value
    assert e.file == str(bad)
    assert e.field == field
    assert e.line == line
    assert fragment in str(e)
    assert _dump(db) == before


def test_duplicate_block_name(db, tmp_path):
    second = MINIMAL[MINIMAL.index("[[blocks]]"):]
    bad = tmp_path / "dup.toml"
    bad.write_text(MINIMAL + "\n" + second)
    before = _dump(db)
    with pytest.raises(InputError, match="appears twice") as err:
        import_farm_file(db, bad)
    assert err.value.field == "blocks[1].name"
    assert err.value.line == MINIMAL.count("\n") + 3
    assert _dump(db) == before


def test_malformed_toml_names_the_line(db, tmp_path):
    bad = tmp_path / "broken.toml"
    bad.write_text(MINIMAL.replace('area_ha = 2', 'area_ha = = 2'))
    before = _dump(db)
    with pytest.raises(InputError, match="not valid TOML") as err:
        import_farm_file(db, bad)
    assert err.value.line == 17
    assert str(bad) in str(err.value)
    assert _dump(db) == before


def test_missing_file(db, tmp_path):
    with pytest.raises(InputError, match="file not found"):
        import_farm_file(db, tmp_path / "nope.toml")


def test_error_in_later_block_rolls_back_earlier_changes(db, demo_farm):
    """A stage change in one block and a bad value in another: nothing is written."""
    path = demo_farm / "farm.toml"
    import_farm_file(db, path)
    before = _dump(db)
    text_ = path.read_text().replace('stage = "first bloom"', 'stage = "full bloom"')
    text_ = text_.replace("rate_mm_h = 3.2", "rate_mm_h = 99")
    path.write_text(text_)
    with pytest.raises(InputError) as err:
        import_farm_file(db, path)
    assert err.value.field == "blocks[5].rate_mm_h"
    assert re.search(r"line \d+", str(err.value))
    assert _dump(db) == before


def test_unknown_protection_kind(tmp_path):
    text_ = MINIMAL + '[[blocks.protection]]\nkind = "smudge pots"\n'
    with pytest.raises(InputError, match="protection kind") as err:
        parse_farm_text(text_, "f.toml")
    assert err.value.line == MINIMAL.count("\n") + 2


def test_demo_farm_file_parses():
    root = Path(__file__).resolve().parents[2]
    spec = parse_farm_text((root / "demo-farm" / "farm.toml").read_text())
    assert {b.crop for b in spec.blocks} == {"apple", "sweet_cherry", "pear", "peach", "wine_grape"}


ECONOMICS = MINIMAL.replace('timezone = "America/Denver"\n', 'timezone = "America/Denver"\ncurrency = "USD"\n'
                            'crew_size = 2\nchill_start = "10-15"\n', 1).replace(
    'stage_date = 2026-04-01\n',
    'stage_date = 2026-04-01\ncrop_value_per_ha = 18000\n[[blocks.protection]]\nkind = "heater"\n'
    'count_per_ha = 80\nrunning_cost_per_h = 120\nfixed_cost_per_night = 250\nprotection_c = 1.5\n', 1) + (
    '\n[farm.biofix]\napple = "02-15"\n')


def test_economics_and_season_keys_are_read_into_the_json_columns():
    spec = parse_farm_text(ECONOMICS, "farm.toml")
    assert spec.settings["currency"] == "USD" and spec.settings["crew_size"] == 2
    assert spec.settings["chill_start"] == "10-15" and spec.settings["biofix"] == {"apple": "02-15"}
    assert spec.blocks[0].settings["crop_value_per_ha"] == 18000.0
    assert spec.blocks[0].equipment[0].params == {"count_per_ha": 80.0, "running_cost_per_h": 120.0,
                                                  "fixed_cost_per_night": 250.0, "protection_c": 1.5}


@pytest.mark.parametrize("old,new,field,fragment", [
    ('crew_size = 2', 'crew_size = 0', "farm.crew_size", "smallest"),
    ('currency = "USD"', 'currency = "US dollars please"', "farm.currency", "at most 8"),
    ('chill_start = "10-15"', 'chill_start = "10-45"', "farm.chill_start", "MM-DD"),
    ('apple = "02-15"', 'mango = "02-15"', "farm.biofix.mango", "mango"),
    ('apple = "02-15"', 'apple = "02-29"', "farm.biofix.apple", "MM-DD"),
    ('crop_value_per_ha = 18000', 'crop_value_per_ha = -5', "blocks[0].crop_value_per_ha", "smallest"),
    ('running_cost_per_h = 120', 'running_cost_per_h = "a lot"', "blocks[0].running_cost_per_h", "number"),
    ('protection_c = 1.5', 'protection_c = 40', "blocks[0].protection_c", "largest"),
])
def test_bad_economics_keys_are_named(old, new, field, fragment):
    assert old in ECONOMICS
    text = ECONOMICS.replace(old, new, 1)
    with pytest.raises(InputError) as err:
        parse_farm_text(text, "farm.toml")
    assert err.value.field == field
    assert fragment in err.value.message
    assert err.value.line == text.splitlines().index(new) + 1
