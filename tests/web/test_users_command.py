"""`advisory users add|list|remove` and the session's signing secret."""

from __future__ import annotations

import io
import stat

from advisory.cli import main
from tests.web.conftest import HERE


def _run(monkeypatch, capsys, db_url, *args, stdin=""):
    monkeypatch.setattr("sys.stdin", io.StringIO(stdin))
    code = main(["--db", db_url, *args])
    out = capsys.readouterr()
    return code, out.out + out.err


def test_add_list_remove(db_url, demo_farm, quiet_channels, monkeypatch, capsys):
    assert main(["--db", db_url, "farm", "import", str(demo_farm / "farm.toml")]) == 0
    assert main(["--db", db_url, "farm", "import", str(HERE / "other_farm.toml")]) == 0
    code, out = _run(monkeypatch, capsys, db_url, "users", "add", "ines", "--role", "grower", "--farm",
                     "Larkspur Flat Vineyard", "--password-stdin", stdin="a-good-long-password\n")
    assert code == 0 and "grower of Larkspur Flat Vineyard" in out
    code, out = _run(monkeypatch, capsys, db_url, "users", "add", "wren", "--role", "agent", "--farm",
                     "Quillback Ridge Orchards", "--farm", "Larkspur Flat Vineyard", "--password-stdin",
                     stdin="another-long-password\n")
    assert code == 0
    code, out = _run(monkeypatch, capsys, db_url, "users", "list")
    assert code == 0 and "ines" in out and "Larkspur Flat Vineyard, Quillback Ridge Orchards" in out
    assert "password" not in out
    code, out = _run(monkeypatch, capsys, db_url, "users", "remove", "ines")
    assert code == 0 and "ines" not in _run(monkeypatch, capsys, db_url, "users", "list")[1]


def test_bad_input_exits_2_with_one_line(db_url, demo_farm, quiet_channels, monkeypatch, capsys):
    assert main(["--db", db_url, "farm", "import", str(demo_farm / "farm.toml")]) == 0
    cases = [
        (("users", "add", "x", "--role", "grower", "--password-stdin"), "exactly one farm"),
        (("users", "add", "x", "--role", "agent", "--password-stdin"), "--all-farms"),
        (("users", "add", "x", "--role", "agent", "--farm", "Nowhere Farm", "--password-stdin"), "no farm named"),
        (("users", "remove", "nobody"), "no user named"),
    ]
    for args, words in cases:
        code, out = _run(monkeypatch, capsys, db_url, *args, stdin="a-good-long-password\n")
        assert code == 2 and words in out and "Traceback" not in out, (args, out)
    code, out = _run(monkeypatch, capsys, db_url, "users", "add", "x", "--role", "agent", "--all-farms",
                     "--password-stdin", stdin="short\n")
    assert code == 2 and "at least 10 characters" in out
    code, out = _run(monkeypatch, capsys, db_url, "users", "add", "x", "--role", "agent", "--all-farms")
    assert code == 2 and "--password-stdin" in out  # no terminal, no default password
    _run(monkeypatch, capsys, db_url, "users", "add", "y", "--role", "agent", "--all-farms", "--password-stdin",
         stdin="a-good-long-password\n")
    code, out = _run(monkeypatch, capsys, db_url, "users", "add", "y", "--role", "agent", "--all-farms",
                     "--password-stdin", stdin="a-good-long-password\n")
    assert code == 2 and "exists already" in out


def test_web_refuses_a_bad_port(db_url, monkeypatch, capsys):
    code, out = _run(monkeypatch, capsys, db_url, "web", "--port", "70000")
    assert code == 2 and "not a port number" in out


def test_signing_secret(tmp_path, monkeypatch):
    from advisory.web.auth import signing_secret

    monkeypatch.delenv("ADVISORY_SETTINGS", raising=False)
    monkeypatch.setenv("ADVISORY_HOME", str(tmp_path / "home"))
    monkeypatch.setenv("ADVISORY_WEB_SECRET", "from-the-environment")
    assert signing_secret() == "from-the-environment"
    monkeypatch.delenv("ADVISORY_WEB_SECRET")
    made = signing_secret()
    file = tmp_path / "home" / "web-secret"
    assert len(made) >= 40 and file.read_text().strip() == made
    assert stat.S_IMODE(file.stat().st_mode) == 0o600
    assert signing_secret() == made  # kept between starts
    settings = tmp_path / "settings.toml"
    settings.write_text('[web]\nsecret = "from-the-settings-file"\n')
    monkeypatch.setenv("ADVISORY_SETTINGS", str(settings))
    assert signing_secret() == "from-the-settings-file"
