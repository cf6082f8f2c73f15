"""`advisory notices list|show|resend`."""

from __future__ import annotations

import json

import pytest

from advisory import cli
from advisory.notices.deliver import deliver_notice
from tests.notices.conftest import store_notice


@pytest.fixture(autouse=True)
def _only_this_topic(monkeypatch):
    """Build the command tree from this topic alone, so other topics' imports do not matter here."""
    monkeypatch.setattr(cli, "TOPICS", ("notices",))


def main(argv):
    return cli.main(argv)


def _seed(farm_db, settings):
    with farm_db.transaction() as s:
        row, block = store_notice(s)
        deliver_notice(s, row, list(block.recipients), settings, channels=["outbox", "sms"])
        quiet, _ = store_notice(s, block_name="Bench Gala", level="nil", level_rank=0, plan=[], cautions=[],
                                critical_time_utc=None)
        return row.id, quiet.id


def test_list_show_resend(farm_db, farm_db_url, settings, capsys, monkeypatch):
    monkeypatch.setenv("ADVISORY_OUTBOX", str(settings.outbox))
    monkeypatch.setenv("ADVISORY_WEBHOOK_SECRET", "x")
    monkeypatch.delenv("ADVISORY_SMTP_HOST", raising=False)
    nid, qid = _seed(farm_db, settings)

    assert main(["--db", farm_db_url, "notices", "list"]) == 0
    out = capsys.readouterr().out
    assert "Creek Bing" in out and "Protect" in out and "outbox sent" in out and "sms queued" in out
    assert "Bench Gala" in out and "not delivered" in out

    assert main(["--db", farm_db_url, "notices", "list", "--block", "Bench Gala"]) == 0
    out = capsys.readouterr().out
    assert "Bench Gala" in out and "Creek Bing" not in out
    assert main(["--db", farm_db_url, "notices", "list", "--night", "2026-04-07"]) == 0
    assert "no notices match" in capsys.readouterr().out

    assert main(["--db", farm_db_url, "notices", "show", str(nid)]) == 0
    assert capsys.readouterr().out.startswith("PROTECT - Creek Bing")
    assert main(["--db", farm_db_url, "notices", "show", str(nid), "--format", "json"]) == 0
    assert json.loads(capsys.readouterr().out)["block"] == "Creek Bing"
    assert main(["--db", farm_db_url, "notices", "show", str(nid), "--format", "html"]) == 0
    assert 'src="data:image/png;base64,' in capsys.readouterr().out
    assert main(["--db", farm_db_url, "notices", "show", str(nid), "--format", "sms"]) == 0
    assert len(capsys.readouterr().out.strip()) <= 160

    assert main(["--db", farm_db_url, "notices", "resend", str(nid), "--channel", "sms"]) == 0
    out = capsys.readouterr().out
    assert "bypassed on purpose" in out and out.count("queued") == 2
    # e-mail cannot go out (no SMTP host): the resend says so and exits 1
    assert main(["--db", farm_db_url, "notices", "resend", str(nid), "--channel", "email"]) == 1
    assert "no SMTP host" in capsys.readouterr().out


def test_user_errors_exit_2(farm_db_url, capsys):
    assert main(["--db", farm_db_url, "notices", "show", "999"]) == 2
    assert "no notice with id 999" in capsys.readouterr().err
    assert main(["--db", farm_db_url, "notices", "list", "--night", "yesterday"]) == 2
    assert "not a date" in capsys.readouterr().err
