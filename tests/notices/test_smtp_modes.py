"""SMTP: the TLS modes (starttls, implicit, none) and errors that name the setting to change."""

from __future__ import annotations

import pytest

from advisory import settings as settings_mod
from advisory.errors import InputError
from advisory.notices.deliver import RetryPolicy, deliver_notice
from advisory.notices.receiver import SmtpReceiver
from tests.notices.conftest import store_notice, with_smtp


def test_plain_relay_with_starttls_on_names_the_setting(farm_db, settings):
    with SmtpReceiver() as mail:
        cfg = with_smtp(settings, mail.port, starttls=True)
        with farm_db.transaction() as s:
            row, block = store_notice(s)
            made = deliver_notice(s, row, list(block.recipients), cfg, channels=["email"],
                                  retry=RetryPolicy(attempts=3), sleep=lambda _s: None, timeout_s=10)
        assert [(d.status, d.attempt) for d in made] == [("failed", 1)]     # not retried: a setting fixes it
        assert "does not offer STARTTLS" in made[0].error and "ADVISORY_SMTP_TLS=none" in made[0].error
        assert mail.messages == []
        with farm_db.transaction() as s:
            row, block = store_notice(s, revision=1)
            made = deliver_notice(s, row, list(block.recipients), with_smtp(settings, mail.port, tls="none"),
                                  channels=["email"], timeout_s=10)
        assert [d.status for d in made] == ["sent"] and len(mail.messages) == 1


def test_implicit_tls_against_a_plain_server_names_the_setting(farm_db, settings):
    with SmtpReceiver() as mail:
        cfg = with_smtp(settings, mail.port, tls="implicit")
        with farm_db.transaction() as s:
            row, block = store_notice(s)
            made = deliver_notice(s, row, list(block.recipients), cfg, channels=["email"], timeout_s=5,
                                  sleep=lambda _s: None)
    assert made[0].status == "failed" and "ADVISORY_SMTP_TLS" in made[0].error


def test_tls_settings(monkeypatch, tmp_path):
    monkeypatch.setenv("ADVISORY_HOME", str(tmp_path))
    for k in ("ADVISORY_SMTP_PORT", "ADVISORY_SMTP_STARTTLS", "ADVISORY_SMTP_TLS", "ADVISORY_SETTINGS"):
        monkeypatch.delenv(k, raising=False)
    cfg = settings_mod.load().smtp
    assert (cfg.tls_mode, cfg.port) == ("starttls", 587)
    monkeypatch.setenv("ADVISORY_SMTP_TLS", "implicit")
    assert (settings_mod.load().smtp.tls_mode, settings_mod.load().smtp.port) == ("implicit", 465)
    monkeypatch.setenv("ADVISORY_SMTP_TLS", "none")
    assert (settings_mod.load().smtp.tls_mode, settings_mod.load().smtp.port) == ("none", 25)
    monkeypatch.setenv("ADVISORY_SMTP_PORT", "2525")
    assert settings_mod.load().smtp.port == 2525
    monkeypatch.delenv("ADVISORY_SMTP_TLS")
    monkeypatch.setenv("ADVISORY_SMTP_STARTTLS", "false")                    # the older switch
    assert settings_mod.load().smtp.tls_mode == "none"
    monkeypatch.setenv("ADVISORY_SMTP_TLS", "ssl")
    with pytest.raises(InputError, match="ADVISORY_SMTP_TLS: 'ssl' is not one of starttls, implicit, none"):
        settings_mod.load()
