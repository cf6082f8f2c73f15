"""Station inbox sweeps: settled files imported and filed, bad ones rejected with a reason."""

from __future__ import annotations

import os
import time
from pathlib import Path

import pytest
from sqlalchemy import text

from advisory.ingest import inbox as inbox_mod
from advisory.ingest.inbox import sweep
from tests.ingest.conftest import db_state

GOOD = "time,air_temp_c\n2024-04-01T00:00:00Z,5.0\n2024-04-01T00:15:00Z,4.8\n"
GOOD2 = "time,air_temp_c\n2024-04-01T00:30:00Z,4.6\n2024-04-01T00:45:00Z,4.5\n"
BAD = "time,air_temp_c\n2024-04-01T00:00:00Z,5.0\nnot a time,4.8\n"


@pytest.fixture
def box(obs_db, tmp_path) -> Path:
    folder = tmp_path / "inbox-st1"
    folder.mkdir()
    with obs_db.transaction() as s:
        s.execute(text("UPDATE stations SET inbox = :p WHERE code = 'ST1'"), {"p": str(folder)})
    return folder


def put(folder: Path, name: str, content: str, age_s: float = 600.0) -> Path:
    p = folder / name
    p.write_text(content)
    t = time.time() - age_s
    os.utime(p, (t, t))
    return p


def rows(db) -> int:
    with db.transaction() as s:
        return s.execute(text("SELECT count(*) FROM observations")).scalar_one()


def test_settled_files_are_imported_and_moved_to_done(obs_db, box):
    put(box, "b.csv", GOOD2, age_s=300)
    put(box, "a.csv", GOOD, age_s=900)
    results = sweep(obs_db)
    assert [(Path(r.file).name, r.status) for r in results] == [("a.csv", "imported"), ("b.csv", "imported")]
    assert sorted(p.name for p in (box / "done").iterdir()) == ["a.csv", "b.csv"]
    assert not list(box.glob("*.csv"))
    assert rows(obs_db) == 4
    assert results[0].summary["rows_added"] == 2
    assert "2 added" in results[0].text()


def test_malformed_file_goes_to_rejected_with_a_reason(obs_db, box):
    put(box, "bad.csv", BAD)
    state = db_state(obs_db)
    [r] = sweep(obs_db)
    assert r.status == "rejected" and "line 3" in r.reason
    assert (box / "rejected" / "bad.csv").exists()
    reason = (box / "rejected" / "bad.csv.reason.txt").read_text()
    assert "line 3" in reason and "nothing from this file was stored" in reason
    assert db_state(obs_db) == state


def test_file_still_being_written_is_left_for_later(obs_db, box):
    put(box, "young.csv", GOOD, age_s=5)
    put(box, "upload.csv.part", GOOD, age_s=900)
    put(box, ".hidden.csv", GOOD, age_s=900)
    [r] = sweep(obs_db)
    assert (r.status, Path(r.file).name) == ("waiting", "young.csv")
    assert (box / "young.csv").exists() and rows(obs_db) == 0
    # A later sweep, after the file settled, takes it.
    [r] = sweep(obs_db, now=time.time() + 120)
    assert r.status == "imported"


def test_file_growing_during_the_read_is_left(obs_db, box, monkeypatch):
    p = put(box, "growing.csv", GOOD)
    real = Path.read_bytes

    def read_and_grow(self):
        data = real(self)
        if self == p:
            with open(self, "a") as fh:
                fh.write("2024-04-01T00:30:00Z,4.6\n")
        return data

    monkeypatch.setattr(Path, "read_bytes", read_and_grow)
    [r] = sweep(obs_db)
    assert r.status == "waiting" and "changed while being read" in r.reason
    assert rows(obs_db) == 0 and p.exists()


def test_same_file_again_is_filed_as_done_with_nothing_new(obs_db, box):
    put(box, "a.csv", GOOD)
    sweep(obs_db)
    put(box, "a.csv", GOOD)
    [r] = sweep(obs_db)
    assert r.status == "imported" and r.summary["already_imported"]
    assert "nothing new" in r.text()
    assert sorted(p.name for p in (box / "done").iterdir()) == ["a-2.csv", "a.csv"]


def test_internal_fault_leaves_the_file(obs_db, box, monkeypatch):
    put(box, "a.csv", GOOD)

    def boom(*a, **k):
        raise RuntimeError("database is locked")

    monkeypatch.setattr(inbox_mod, "import_file", boom)
    [r] = sweep(obs_db)
    assert r.status == "error" and "locked" in r.reason
    assert (box / "a.csv").exists()


def test_missing_inbox_folder_and_station_filter(obs_db, box, tmp_path):
    with obs_db.transaction() as s:
        s.execute(text("UPDATE stations SET inbox = :p WHERE code = 'SOUTH'"), {"p": str(tmp_path / "nowhere")})
    put(box, "a.csv", GOOD)
    results = sweep(obs_db)
    assert {(r.station_code, r.status) for r in results} == {("SOUTH", "no_inbox"), ("ST1", "imported")}
    assert sweep(obs_db, stations=["SOUTH"])[0].status == "no_inbox"


def test_now_must_be_aware(obs_db, box):
    import datetime as dt

    with pytest.raises(ValueError):
        sweep(obs_db, now=dt.datetime(2024, 1, 1))
    assert sweep(obs_db, now=dt.datetime.now(dt.UTC)) == []
