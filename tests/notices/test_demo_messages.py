"""The demo's text messages, as queued in the outbox: each one GSM message ending with its caution."""

from __future__ import annotations

import datetime as dt
import types

import pytest

from advisory import demo_heat
from advisory.notices import notice_parts, words
from advisory.runs import frost_night

NIGHT = dt.date(2026, 4, 8)      # the demo week's radiation-frost night
NOW = dt.datetime(2026, 4, 9, 5, 0, tzinfo=dt.UTC)


@pytest.fixture
def no_charts(monkeypatch):
    from advisory.notices import channels

    monkeypatch.setattr(channels, "_chart_for", lambda n: None)


def _messages(outbox):
    out = []
    for f in sorted(outbox.rglob("*.sms.txt")):
        lines = f.read_text(encoding="utf-8").splitlines()
        out.append((f.name, lines[2]))   # "To: ...", a blank line, the message
    return out


def test_demo_frost_and_heat_messages_fit_one_message_and_end_with_a_caution(spring_db, quiet_channels,
                                                                              demo_farm, no_charts):
    from advisory.ingest.observations import import_file

    frost_night.run_night(spring_db, NIGHT, now=NOW, sleep=lambda s: None)
    for code in ("QR-BENCH", "QR-CREEK"):
        import_file(spring_db, code, demo_farm / "stations" / f"{code}-summer.csv")
    demo_heat.demo_heat(types.SimpleNamespace(outbox=quiet_channels, farm_dir=demo_farm), spring_db, echo=lambda s: None)
    msgs = _messages(quiet_channels)
    kinds = {"frost": 0, "heat": 0}
    for name, text in msgs:
        kind = "heat" if "_heat_" in name else "frost"
        kinds[kind] += 1
        tail = notice_parts.SMS_CAUTION_HEAT if kind == "heat" else notice_parts.SMS_CAUTION_FROST
        assert text.endswith(" " + tail), (name, text)
        assert len(text) <= notice_parts.SMS_MAX, (name, len(text), text)
        assert all(ch in words._GSM7_BASIC for ch in text), text
        assert "..." not in text, text             # nothing had to be cut
        assert not any(w.isupper() and len(w) > 3 for w in text.split() if w.isalpha()), text  # sentence case
    assert kinds["frost"] >= 12 and kinds["heat"] >= 12
    longest = max(msgs, key=lambda m: len(m[1]))
    assert len(longest[1]) <= notice_parts.SMS_MAX
