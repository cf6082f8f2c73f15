"""Hostile names render as harmless text in every format."""

from __future__ import annotations

import re

from advisory.notices.charts import chart_png
from advisory.notices.compose import compose_block
from advisory.notices.farm_summary import compose_farm
from advisory.notices.render import render
from tests.notices import samples

EVIL = "<script>alert(1)</script>"
ATTR = '"><img src=x onerror=alert(2)>'


def _hostile(**kw):
    return samples.frost_assessment(block=EVIL, farm=f"Farm {ATTR}", station="<b>ST</b>", variety="<i>v</i>",
                                    **kw)


def test_block_named_script_is_harmless_in_html():
    n = compose_block(_hostile())
    html = render(n, "html", chart_src="cid:chart@x")
    assert "<script" not in html.lower()
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html
    assert "onerror=alert" not in html.replace("onerror=alert(2)&gt;", "")   # only as escaped text
    assert not re.search(r"<img[^>]*onerror", html, re.I)
    assert "<b>ST</b>" not in html and "<i>v</i>" not in html


def test_farm_summary_html_escapes_names():
    s = compose_farm([_hostile(), samples.quiet_assessment(farm=f"Farm {ATTR}")])
    html = render(s, "html")
    assert "<script" not in html.lower()
    assert not re.search(r"<img[^>]*onerror", html, re.I)


def test_markdown_does_not_pass_raw_html():
    n = compose_block(_hostile())
    md = render(n, "markdown")
    assert "<script" not in md.lower() and "<img" not in md.lower()
    s = render(compose_farm([_hostile()]), "markdown")
    assert "<script" not in s.lower()


def test_sms_and_chart_survive_odd_names():
    n = compose_block(samples.frost_assessment(block="$x_1$ {50%} \\ unbalanced $"))
    assert len(n.sms) <= 160
    png = chart_png(n)      # a dollar sign must not switch the title into math mode (and crash)
    assert png and png.startswith(b"\x89PNG")
