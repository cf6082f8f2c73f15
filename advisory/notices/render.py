"""Render a composed notice as a text message, plain text, Markdown, HTML e-mail or JSON.

The words are written by :mod:`advisory.notices.compose` (in the farm's units
and local time); this module only lays them out, through the Jinja2 templates
in ``templates/``.  HTML templates are autoescaped, so any block, farm or
person name is shown as text, never run as markup; Markdown output escapes the
characters Markdown or embedded HTML would interpret.

Formats
-------
``sms``
    At most 160 characters of the GSM 03.38 basic set (one text message).
``text``
    Plain text, lines wrapped at 76 characters (e-mail body, outbox file).
``markdown``
    For chat tools and wikis.
``html``
    An HTML e-mail: inline CSS, one 600-pixel column that narrows on a phone.
    Pass ``chart_src`` (``cid:...`` in an e-mail, a file name in the outbox, a
    ``data:`` URI for a browser) to show the chart.
``json``
    The whole notice as data (words and numbers), for other systems; one
    compact line (:mod:`advisory.store.jsoncodec`, the form stored in the database).
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import jinja2

from advisory.errors import InputError
from advisory.notices import words as w
from advisory.notices.notice_data import BlockNotice, FarmSummary, json_file, notice_from_dict, stored_json
from advisory.store import jsoncodec

FORMATS = ("sms", "text", "markdown", "html", "json")
#: File-name endings of each format in the outbox.
EXTENSIONS = {"sms": "sms.txt", "text": "txt", "markdown": "md", "html": "html", "json": "json"}

TEMPLATES = Path(__file__).resolve().parent / "templates"
WIDTH = 76

_MD_SPECIAL = re.compile(r"([\\`*_\[\]|~])")
_MD_LINE_START = re.compile(r"^(\s*)([#+\-=]|\d+[.)])")


def md_escape(value: Any) -> str:
    """Escape text for Markdown (and for HTML a Markdown viewer might pass through).

    Emphasis, code, link and table characters get a backslash; ``& < >`` become
    entities, so a name like ``<script>`` shows as text; a leading ``#``, ``-``,
    ``+``, ``=`` or ``1.`` cannot start a heading or a list.
    """
    s = str(value)
    s = s.replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;")
    s = _MD_SPECIAL.sub(r"\\\1", s)
    return _MD_LINE_START.sub(lambda m: m.group(1) + "\\" + m.group(2), s)


def md_cell(value: Any) -> str:
    """Escape text for a Markdown table cell (one line; leading signs are harmless there)."""
    s = str(value).replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;")
    return _MD_SPECIAL.sub(r"\\\1", s).replace("\n", " ")


_KEEP_WITH_NUMBER = re.compile(r"(\d) (?=°[CF]|m³|mm/h|L/ha|L\b|h\b|%|m/s|min\b|[A-Z]{2,5}\b|[+-]\d\d\b)")


def wrap(value: Any, indent: str = "", first: str = "", width: int = WIDTH) -> str:
    """Wrap one paragraph; ``first`` is the first line's prefix, ``indent`` the others'.

    Greedy, on spaces only (like :func:`textwrap.fill` without hyphen breaks, but
    several times faster); a number is never separated from its unit or a
    time from its zone.
    """
    text = str(value)
    lead = first or indent
    if len(lead) + len(text) <= width and "\n" not in text:
        return lead + text
    words = _KEEP_WITH_NUMBER.sub("\\1\x00", " ".join(text.split())).split(" ")
    lines, cur = [], lead
    empty = True
    for word in words:
        if empty:
            cur += word
            empty = False
        elif len(cur) + 1 + len(word) <= width:
            cur += " " + word
        else:
            lines.append(cur)
            cur, empty = indent + word, False
    lines.append(cur)
    return "\n".join(lines).replace("\x00", " ")


def text_table(table: dict | None, indent: str = "  ") -> str:
    """A small table as aligned plain-text columns."""
    if not table or not table.get("rows"):
        return ""
    rows = [[str(c) for c in table["header"]]] + [[str(c) for c in r] for r in table["rows"]]
    n = max(len(r) for r in rows)
    rows = [r + [""] * (n - len(r)) for r in rows]
    widths = [max(len(r[i]) for r in rows) for i in range(n)]
    out = []
    for k, r in enumerate(rows):
        out.append(indent + "  ".join(c.ljust(widths[i]) for i, c in enumerate(r)).rstrip())
        if k == 0:
            out.append(indent + "  ".join("-" * widths[i] for i in range(n)))
    return "\n".join(out)


def _autoescape(name: str | None) -> bool:
    return bool(name) and name.endswith(".html.j2")


_env: jinja2.Environment | None = None


def environment() -> jinja2.Environment:
    """The shared template environment (built once)."""
    global _env
    if _env is None:
        env = jinja2.Environment(loader=jinja2.FileSystemLoader(str(TEMPLATES)), autoescape=_autoescape,
                                 trim_blocks=True, lstrip_blocks=True, keep_trailing_newline=True,
                                 undefined=jinja2.StrictUndefined, auto_reload=False)
        env.filters.update(md=md_escape, mdcell=md_cell, wrap=wrap, table=text_table)
        _env = env
    return _env


def as_notice(notice: BlockNotice | FarmSummary | dict) -> BlockNotice | FarmSummary:
    if isinstance(notice, BlockNotice | FarmSummary):
        return notice
    if isinstance(notice, dict):
        return notice_from_dict(notice)
    raise TypeError(f"not a notice: {type(notice).__name__}")


def when_label(n: BlockNotice | FarmSummary) -> str:
    return (f"Night of {w.day(n.night)}" if n.kind != "heat" else w.day(n.night))


def render(notice: BlockNotice | FarmSummary | dict, fmt: str, *, chart_src: str | None = None) -> str:
    """Render a notice.

    Parameters
    ----------
    notice : BlockNotice, FarmSummary or dict
        A composed notice, or its ``to_dict()`` form as stored in ``Notice.content``.
    fmt : {"sms", "text", "markdown", "html", "json"}
    chart_src : str, optional
        HTML only: the ``src`` of the chart image (``cid:...``, a file name or a
        ``data:`` URI).  Without it the HTML has no image.

    Returns
    -------
    str
    """
    if fmt not in FORMATS:
        raise InputError(f"unknown format '{fmt}' (choose from {', '.join(FORMATS)})", field="--format")
    n = as_notice(notice)
    if fmt == "sms":
        return n.sms
    if fmt == "json":
        if isinstance(n, BlockNotice):  # the same bytes the nightly run writes (see notice_data.json_file)
            return json_file(stored_json(n), jsoncodec.encode(n.data)).decode("utf-8")
        return jsoncodec.dumps(n) + "\n"
    kind = "farm" if isinstance(n, FarmSummary) else "block"
    ext = {"text": "txt", "markdown": "md", "html": "html"}[fmt]
    tpl = environment().get_template(f"{kind}.{ext}.j2")
    has_chart = bool(chart_src) and kind == "block" and n.chart is not None and bool(n.data.get("curve"))
    return tpl.render(n=n, when=when_label(n), chart_src=chart_src if has_chart else None,
                      width=WIDTH)
