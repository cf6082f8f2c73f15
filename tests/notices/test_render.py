"""Rendering composed notices in every format."""

from __future__ import annotations

import json
from html.parser import HTMLParser

import pytest

from advisory.errors import InputError
from advisory.notices.compose import compose_block
from advisory.notices.farm_summary import compose_farm
from advisory.notices.render import FORMATS, WIDTH, md_escape, render
from tests.notices import samples


class _TagBalance(HTMLParser):
    """Checks that block-level tags open and close in order."""

    CHECK = {"table", "tr", "td", "th", "div", "p", "ul", "li", "h2", "body", "html", "head", "span", "strong"}

    def __init__(self):
        super().__init__()
        self.stack: list[str] = []
        self.errors: list[str] = []

    def handle_starttag(self, tag, attrs):
        if tag in self.CHECK:
            self.stack.append(tag)

    def handle_endtag(self, tag):
        if tag in self.CHECK:
            if not self.stack or self.stack[-1] != tag:
                self.errors.append(f"unexpected </{tag}> with open {self.stack[-3:]}")
            else:
                self.stack.pop()


def balanced(html: str) -> bool:
    p = _TagBalance()
    p.feed(html)
    p.close()
    return not p.errors and not p.stack


@pytest.fixture
def frost():
    return compose_block(samples.frost_assessment())


def test_all_formats_from_object_and_from_stored_dict(frost):
    stored = json.loads(json.dumps(frost.to_dict()))
    for fmt in FORMATS:
        assert render(frost, fmt) == render(stored, fmt)


def test_sms_is_the_composed_message(frost):
    s = render(frost, "sms")
    assert s == frost.sms and len(s) <= 160
    assert s.startswith("Protect - Creek Bing 6 Apr: low -2.8C (-4.1 to -1.5C).")


def test_plain_text_top_lines_hold_the_decision(frost):
    text = render(frost, "text")
    top = text.splitlines()[:7]
    assert top[0] == "PROTECT - Creek Bing"
    assert top[1] == "Night of Mon 6 Apr 2026 - Quillback Ridge Orchards"
    joined = " ".join(top)
    assert "Low -2.8 °C" in joined and "01:50 PDT" in joined and "02:40 PDT" in joined
    assert all(len(line) <= WIDTH for line in text.splitlines()), "wrapped for e-mail"
    for title in ("WHAT IT MEANS FOR THE BUDS", "PROTECTION PLAN", "DATA BEHIND THIS NOTICE",
                  "HOW RECENT FORECASTS VERIFIED HERE", "SAFETY"):
        assert title in text
    assert "Over-tree sprinklers [RUN]" in text
    assert "extension service" in text


def test_numbers_stay_with_their_units(frost):
    for line in render(frost, "text").splitlines():
        assert not line.rstrip().endswith(("-2.8", "910", "01:50")), line
        assert not line.lstrip().startswith(("°C", "m³", "PDT")), line


def test_markdown(frost):
    md = render(frost, "markdown")
    assert md.startswith("# Protect: Creek Bing\n")
    assert "## Protection plan" in md
    assert "| Night | Forecast low | Observed | Forecast minus observed |" in md
    assert "- **Never stop sprinklers early.**" in md


def test_html_layout(frost):
    html = render(frost, "html")
    assert html.startswith("<!DOCTYPE html>")
    assert balanced(html)
    assert "<img" not in html                      # no chart source given
    assert frost.colour in html
    assert "Low -2.8 °C around 05:00 PDT" in html
    assert 'name="viewport"' in html and "max-width:600px" in html
    with_chart = render(frost, "html", chart_src="cid:chart-1@advisory.local")
    assert 'src="cid:chart-1@advisory.local"' in with_chart
    assert balanced(with_chart)


def test_json_is_the_whole_notice(frost):
    d = json.loads(render(frost, "json"))
    assert d == json.loads(json.dumps(frost.to_dict()))
    assert d["data"]["p50_c"] == -2.8 and d["type"] == "block"


def test_unknown_format():
    with pytest.raises(InputError):
        render(compose_block(samples.frost_assessment()), "pdf")


def test_every_status_and_kind_renders():
    cases = [
        samples.quiet_assessment(),
        samples.heat_assessment(),
        samples.heat_assessment(units="imperial"),
        samples.frost_assessment(status="no_forecast", reason="station silent", plan=[], curve=[], level=""),
        samples.frost_assessment(status="no_night", plan=[], curve=[], level=""),
        samples.frost_assessment(status="missed", plan=[], curve=[], level=""),
        samples.heat_assessment(status="no_forecast", plan=[], curve=[], level="", details={}),
        samples.frost_assessment(revision=1, is_update=True),
    ]
    for a in cases:
        n = compose_block(a)
        for fmt in FORMATS:
            out = render(n, fmt, chart_src="x.png")
            assert out.strip(), (a.status, fmt)
        assert balanced(render(n, "html"))


def test_imperial_html_shows_fahrenheit():
    html = render(compose_block(samples.frost_assessment(units="imperial")), "html")
    assert "27.0 °F" in html


def test_farm_summary_formats():
    s = compose_farm([samples.quiet_assessment(), samples.frost_assessment()])
    text = render(s, "text")
    assert text.startswith("QUILLBACK RIDGE ORCHARDS - Night of Mon 6 Apr 2026\nWorst: Protect\n")
    assert "PROTECT  Creek Bing" in text and "QUIET  Bench Gala" in text
    assert text.index("Creek Bing") < text.index("Bench Gala")
    md = render(s, "markdown")
    assert "| Protect | Creek Bing |" in md
    assert "## Crew run sheet, in start order" in md
    html = render(s, "html")
    assert balanced(html) and "Crew run sheet" in html
    assert json.loads(render(s, "json"))["type"] == "farm"
    assert len(render(s, "sms")) <= 160


def test_md_escape():
    assert md_escape("a*b_c|d") == r"a\*b\_c\|d"
    assert md_escape("# not a heading") == r"\# not a heading"
    assert md_escape("<b>") == "&lt;b&gt;"


def test_sms_gives_when_the_air_reaches_t10(frost):
    assert "Critical at 02:40." in render(frost, "sms")      # the T10 time, not the start (01:50)
