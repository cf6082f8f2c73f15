"""The command line tells: exit 3 and one line per undelivered notice, refused dates, database paths."""

from __future__ import annotations

import datetime as dt
import sqlite3

import pytest
from sqlalchemy import func, select

from advisory import cli
from advisory.notices import retry_queue
from advisory.notices.receiver import SmtpReceiver
from advisory.store.schema import Delivery, Forecast, Notice

NIGHT = "2026-04-08"


def _counts(db):
    with db.transaction() as s:
        return tuple(s.scalar(select(func.count()).select_from(m)) for m in (Forecast, Notice, Delivery))


def test_undelivered_night_exits_3_and_a_rerun_retries(spring_db, quiet_channels, monkeypatch, capsys):
    url = spring_db.url
    assert cli.main(["--db", url, "night", "run", "--date", NIGHT, "--allow-past"]) == 3
    err = capsys.readouterr().err
    lines = [ln for ln in err.splitlines() if ln.startswith("undelivered: ")]
    # the agent has e-mail and a webhook only: no SMTP host, no webhook secret; each named with why
    assert lines and all("-> Wren Okonkwo-Hale by " in ln for ln in lines)
    assert any("by email" in ln and "ADVISORY_SMTP_HOST" in ln for ln in lines)
    assert any("by webhook" in ln and "ADVISORY_WEBHOOK_SECRET" in ln for ln in lines)
    assert "notices list --undelivered" in err
    # a mail server now answers: running the night again retries what failed (still within its deadline)
    monkeypatch.setattr(retry_queue, "deadline_utc", lambda *a, **k: dt.datetime.now(dt.UTC) + dt.timedelta(days=1))
    with SmtpReceiver() as mail:
        monkeypatch.setenv("ADVISORY_SMTP_HOST", mail.host)
        monkeypatch.setenv("ADVISORY_SMTP_PORT", str(mail.port))
        monkeypatch.setenv("ADVISORY_SMTP_TLS", "none")
        assert cli.main(["--db", url, "night", "run", "--date", NIGHT, "--allow-past"]) == 0
        out = capsys.readouterr()
        first = len(mail.messages)
        assert "already assessed" in out.out and first > 0
        assert cli.main(["--db", url, "night", "run", "--date", NIGHT, "--allow-past"]) == 0
        assert len(mail.messages) == first                          # never twice what was delivered


def test_run_summary_counts_deliveries_not_attempts(spring_db, quiet_channels, capsys):
    assert cli.main(["--db", spring_db.url, "night", "run", "--date", NIGHT, "--allow-past"]) == 3
    out = capsys.readouterr().out
    tally = next(ln for ln in out.splitlines() if ln.startswith("deliveries: "))
    with spring_db.transaction() as s:
        n_notices = s.scalar(select(func.count()).select_from(Notice))
    assert f"outbox sent {n_notices}" in tally


@pytest.mark.parametrize("day", ["1900-01-01", "9999-12-31"])
def test_far_dates_are_refused_and_nothing_is_written(spring_db, quiet_channels, capsys, day):
    before = _counts(spring_db)
    assert cli.main(["--db", spring_db.url, "night", "run", "--date", day]) == 2
    err = capsys.readouterr().err
    assert "--allow-past" in err or "--allow-future" in err or "outside the years this tool runs" in err
    assert cli.main(["--db", spring_db.url, "heat", "run", "--date", day]) == 2
    assert _counts(spring_db) == before
    assert not quiet_channels.exists()                              # no outbox file either


@pytest.mark.parametrize(("day", "flag"), [("9999-12-31", "--allow-future"), ("1899-12-31", "--allow-past")])
def test_dates_outside_the_years_are_refused_even_when_allowed(spring_db, quiet_channels, capsys, day, flag):
    # 9999-12-31 with --allow-future once wrote notices, tried their delivery, then stopped on an
    # overflow of the notice's deadline (an internal error)
    before = _counts(spring_db)
    for kind in ("night", "heat"):
        assert cli.main(["--db", spring_db.url, kind, "run", "--date", day, flag]) == 2
        assert "outside the years this tool runs (1900 to 2199)" in capsys.readouterr().err
    assert cli.main(["--db", spring_db.url, "serve", "--rehearse", day, flag]) == 2
    for argv in (["blocks", "stages", "--date", day], ["blocks", "list", "--date", day],
                 ["night", "verify", "--date", day], ["heat", "verify", "--date", day],
                 ["blocks", "set-stage", "Bench Gala", "full bloom", "--date", day]):
        assert cli.main(["--db", spring_db.url, *argv]) == 2, argv  # once an internal error (overflow)
        assert "outside the years this tool runs" in capsys.readouterr().err
    assert _counts(spring_db) == before
    assert not quiet_channels.exists()


def test_dates_near_today_need_no_option(spring_db, quiet_channels):
    from advisory.commands.night import check_date_window

    class Args:
        allow_past = allow_future = False

    today = dt.date(2026, 12, 3)
    check_date_window(spring_db, today - dt.timedelta(days=3), None, Args, today=today)
    check_date_window(spring_db, today + dt.timedelta(days=3), None, Args, today=today)
    with pytest.raises(Exception, match="--allow-future"):
        check_date_window(spring_db, today + dt.timedelta(days=4), None, Args, today=today)
    Args.allow_past = True
    check_date_window(spring_db, dt.date(2026, 4, 8), None, Args, today=today)


def test_rehearsal_of_a_past_night_needs_allow_past(spring_db, quiet_channels, capsys):
    assert cli.main(["--db", spring_db.url, "serve", "--rehearse", "2026-04-10"]) == 2
    assert "--allow-past" in capsys.readouterr().err


@pytest.mark.sqlite_only(reason="database files made (or not) on disk by SQLite")
def test_read_commands_create_nothing(tmp_path, quiet_channels, capsys):
    missing = tmp_path / "typo" / "advisory.sqlite"
    for argv in (["blocks", "list"], ["notices", "list"], ["db", "status"], ["obs", "report", "X"]):
        assert cli.main(["--db", f"sqlite:///{missing}", *argv]) == 2, argv
        assert f"no database at {missing}" in capsys.readouterr().err
    assert not missing.parent.exists()


@pytest.mark.sqlite_only(reason="database files made (or not) on disk by SQLite")
def test_db_upgrade_builds_a_new_database_only_when_asked(tmp_path, quiet_channels, capsys):
    typo = tmp_path / "typo" / "deeper" / "advisory.sqlite"
    assert cli.main(["--db", f"sqlite:///{typo}", "db", "upgrade"]) == 2
    assert "--create" in capsys.readouterr().err and not (tmp_path / "typo").exists()
    assert cli.main(["--db", f"sqlite:///{typo}", "db", "upgrade", "--create"]) == 0
    assert typo.exists()
    # the default database in the data folder is made without asking
    assert cli.main(["db", "upgrade"]) == 0
    assert (tmp_path / "home" / "advisory.sqlite").exists()


@pytest.mark.sqlite_only(reason="a read-only SQLite file (the server's read-only roles are not set up here)")
def test_read_only_database_is_a_clear_error(db_url, quiet_channels, capsys, demo_farm):
    path = db_url.split("sqlite:///", 1)[1]
    sqlite3.connect(path).close()
    ro = f"sqlite:///file:{path}?mode=ro&uri=true"
    assert cli.main(["--db", ro, "blocks", "list"]) == 0                   # reading works
    capsys.readouterr()
    assert cli.main(["--db", ro, "farm", "import", str(demo_farm / "farm.toml")]) == 2
    err = capsys.readouterr().err
    assert f"the database {path} is read-only" in err and "internal error" not in err


def test_farm_file_missing_key_names_its_block(tmp_path):
    from advisory.errors import InputError
    from advisory.ingest.farm_file import parse_farm_text

    text = """[farm]
name = "F"
timezone = "UTC"
[[stations]]
id = "S"
latitude = 1.0
longitude = 1.0
elevation_m = 1
[[blocks]]
name = "A"
station = "S"
latitude = 1.0
longitude = 1.0
elevation_m = 1
area_ha = 1
crop = "apple"
stage = "full pink"
"""
    with pytest.raises(InputError) as err:
        parse_farm_text(text, "f.toml")
    assert err.value.field == "blocks[0].stage_date" and err.value.line == 9


def test_farm_file_fallback_must_name_recipients(tmp_path):
    from advisory.errors import InputError
    from advisory.ingest.farm_file import parse_farm_text

    base = '[farm]\nname = "F"\ntimezone = "UTC"\nfallback = ["{who}"]\n[[recipients]]\nname = "Ana"\n'
    assert parse_farm_text(base.format(who="Ana")).settings["fallback_recipients"] == ["Ana"]
    with pytest.raises(InputError, match="recipient 'Bo' is not defined"):
        parse_farm_text(base.format(who="Bo"))


def test_stage_from_an_earlier_season_is_warned_in_the_night_run(spring_db, quiet_channels):
    from advisory.runs import frost_night
    from advisory.store.schema import Block

    with spring_db.transaction() as s:
        s.scalar(select(Block).where(Block.name == "Creek Bing")).stage_date = dt.date(2025, 4, 1)
    frost_night.run_night(spring_db, dt.date(2026, 4, 8), now=dt.datetime(2026, 4, 9, 4, 40, tzinfo=dt.UTC),
                       deliver=False)
    with spring_db.transaction() as s:
        leads = {b: n.content["lead"] for n, b in s.execute(
            select(Notice, Block.name).join(Block, Notice.block_id == Block.id))}
    assert leads["Creek Bing"][0].startswith("Check the stage:") and "2025-04-01" in leads["Creek Bing"][0]
    assert not any(line.startswith("Check the stage") for line in leads["Bench Gala"])


@pytest.mark.sqlite_only(reason="a SQLite file on read-only media")
def test_a_database_on_a_read_only_file_system_can_be_read(db_url, quiet_channels, capsys, demo_farm,
                                                            monkeypatch):
    # A database in write-ahead-log mode copied onto read-only media (a mounted backup, a read-only
    # share) could not be opened even to read: SQLite cannot make the log's shared-memory file there.
    import os
    import shutil
    from pathlib import Path

    assert cli.main(["--db", db_url, "farm", "import", str(demo_farm / "farm.toml")]) == 0
    path = Path(db_url.split("sqlite:///", 1)[1])
    media = path.parent / "media"
    media.mkdir()
    copy = media / path.name
    con = sqlite3.connect(path)
    con.execute("PRAGMA wal_autocheckpoint=0")
    con.execute("UPDATE blocks SET variety = 'Gala (copied)' WHERE name = 'Bench Gala'")
    con.commit()                                                     # a change held in the log only
    shutil.copy(path, copy)
    shutil.copy(path.with_name(path.name + "-wal"), media / (path.name + "-wal"))
    con.close()
    assert copy.read_bytes()[18] == 2                                  # the header says: WAL mode
    real = os.statvfs

    class ReadOnly:
        def __init__(self, st):
            self._st = st
            self.f_flag = st.f_flag | os.ST_RDONLY

    monkeypatch.setattr(os, "statvfs", lambda p: ReadOnly(real(p)) if Path(p) == media else real(p))
    os.chmod(copy, 0o444)
    os.chmod(media, 0o555)
    try:
        capsys.readouterr()
        # the log holds a change that reading the file alone would miss: refused, not read stale
        assert cli.main(["--db", f"sqlite:///{copy}", "blocks", "list"]) == 2
        assert "write-ahead log" in capsys.readouterr().err
        os.chmod(media, 0o755)
        os.chmod(copy, 0o644)
        merged = sqlite3.connect(copy)
        merged.execute("PRAGMA wal_checkpoint(TRUNCATE)")
        merged.close()
        os.chmod(copy, 0o444)
        os.chmod(media, 0o555)
        assert cli.main(["--db", f"sqlite:///{copy}", "blocks", "list"]) == 0
        assert "Gala (copied)" in capsys.readouterr().out
        assert not (media / (path.name + "-shm")).exists()            # nothing made beside it
        assert cli.main(["--db", f"sqlite:///{copy}", "blocks", "set-stage", "Bench Gala", "full bloom",
                         "--date", "2026-04-09"]) == 2
        assert "is read-only" in capsys.readouterr().err
    finally:
        os.chmod(media, 0o755)
        os.chmod(copy, 0o644)
