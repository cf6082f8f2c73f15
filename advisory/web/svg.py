"""Small inline SVG charts drawn on the server (no JavaScript): a block's night, a station's
readings, the reliability of the frost probability.  Every line is named in a legend beside it."""

from __future__ import annotations

import datetime as dt
import math
from collections.abc import Sequence
from html import escape
from zoneinfo import ZoneInfo

INK = "#1f2937"
GRID = "#d1d5db"
LINE = "#2e3862"
BAND = "#c7cce0"
T10 = "#8a3b12"
T90 = "#5b1a0a"
SECOND = "#0f766e"
START = "#6b21a8"


def _ticks(lo: float, hi: float, n: int = 6) -> list[float]:
    span = hi - lo
    if span <= 0:
        return [lo]
    raw = span / n
    mag = 10 ** math.floor(math.log10(raw))
    step = min((m * mag for m in (1, 2, 5, 10) if m * mag >= raw), default=raw)
    first = math.ceil(lo / step) * step
    out, v = [], first
    while v <= hi + 1e-9:
        out.append(round(v, 6))
        v += step
    return out


class _Frame:
    def __init__(self, x0: float, x1: float, y0: float, y1: float, w: int, h: int, pad=(48, 14, 16, 34)):
        self.x0, self.x1 = x0, x1 if x1 > x0 else x0 + 1
        if y1 - y0 < 1:
            y0, y1 = y0 - 1, y1 + 1
        self.y0, self.y1 = y0, y1
        self.w, self.h = w, h
        self.left, self.right, self.top, self.bottom = pad

    def x(self, v: float) -> float:
        return self.left + (v - self.x0) / (self.x1 - self.x0) * (self.w - self.left - self.right)

    def y(self, v: float) -> float:
        return self.h - self.bottom - (v - self.y0) / (self.y1 - self.y0) * (self.h - self.top - self.bottom)


def _path(frame: _Frame, pts: Sequence[tuple[float, float]]) -> str:
    return " ".join(f"{'M' if i == 0 else 'L'}{frame.x(x):.1f},{frame.y(y):.1f}" for i, (x, y) in enumerate(pts))


def time_chart(*, title: str, unit: str, tz: str, series: list[dict], band: dict | None = None,
               hlines: list[dict] | None = None, vlines: list[dict] | None = None,
               width: int = 640, height: int = 300) -> str:
    """A chart of values over time.

    ``series``: ``{"label", "points": [(datetime, value)], "colour", "dash"}``; ``band``: ``{"label",
    "points": [(datetime, lo, hi)]}``; ``hlines``: ``{"label", "value", "colour", "dash"}``;
    ``vlines``: ``{"label", "time", "colour"}``.  Values are in the unit shown.
    """
    hlines, vlines = hlines or [], vlines or []
    times = [t for s in series for t, _ in s["points"]] + ([t for t, _, _ in band["points"]] if band else [])
    vals = [v for s in series for _, v in s["points"]] + [h["value"] for h in hlines]
    if band:
        vals += [v for _, lo, hi in band["points"] for v in (lo, hi)]
    vals = [v for v in vals if v is not None and math.isfinite(v)]
    if len(times) < 2 or not vals:
        return ""
    ts = lambda t: t.timestamp()  # noqa: E731
    f = _Frame(ts(min(times)), ts(max(times)), min(vals), max(vals), width, height)
    zone = ZoneInfo(tz)
    out = [f'<svg class="chart" role="img" viewBox="0 0 {width} {height}" width="{width}" height="{height}" '
           f'xmlns="http://www.w3.org/2000/svg"><title>{escape(title)}</title>',
           f'<rect x="0" y="0" width="{width}" height="{height}" fill="#ffffff"/>']
    for v in _ticks(f.y0, f.y1):
        y = f.y(v)
        out.append(f'<line x1="{f.left}" x2="{width - f.right}" y1="{y:.1f}" y2="{y:.1f}" stroke="{GRID}"/>'
                   f'<text x="{f.left - 6}" y="{y + 4:.1f}" text-anchor="end" font-size="11" fill="{INK}">'
                   f'{v:g}</text>')
    span_h = (f.x1 - f.x0) / 3600
    step = 2 if span_h <= 16 else (3 if span_h <= 30 else 12)
    t = dt.datetime.fromtimestamp(f.x0, dt.UTC).astimezone(zone).replace(minute=0, second=0, microsecond=0)
    while t.timestamp() <= f.x1:
        if t.timestamp() >= f.x0 and t.hour % step == 0:
            x = f.x(t.timestamp())
            label = t.strftime("%H:%M") if span_h <= 30 else t.strftime("%d %b %H:%M")
            out.append(f'<line x1="{x:.1f}" x2="{x:.1f}" y1="{f.top}" y2="{height - f.bottom}" stroke="{GRID}"/>'
                       f'<text x="{x:.1f}" y="{height - f.bottom + 14}" text-anchor="middle" font-size="11" '
                       f'fill="{INK}">{label}</text>')
        t = (t + dt.timedelta(hours=1)).astimezone(zone)
    out.append(f'<text x="12" y="{f.top + 4}" font-size="11" fill="{INK}">{escape(unit)}</text>')
    if band:
        pts = [(ts(t), lo) for t, lo, hi in band["points"] if lo is not None and hi is not None]
        back = [(ts(t), hi) for t, lo, hi in reversed(band["points"]) if lo is not None and hi is not None]
        if pts:
            out.append(f'<path d="{_path(f, pts + back)} Z" fill="{BAND}" opacity="0.8"/>')
    for h in hlines:
        y = f.y(h["value"])
        out.append(f'<line x1="{f.left}" x2="{width - f.right}" y1="{y:.1f}" y2="{y:.1f}" '
                   f'stroke="{h.get("colour", T10)}" stroke-width="1.5" stroke-dasharray="{h.get("dash", "6 3")}"/>'
                   f'<text x="{width - f.right - 4}" y="{y - 4:.1f}" text-anchor="end" font-size="11" '
                   f'fill="{h.get("colour", T10)}">{escape(h["label"])}</text>')
    for v in vlines:
        x = f.x(ts(v["time"]))
        out.append(f'<line x1="{x:.1f}" x2="{x:.1f}" y1="{f.top}" y2="{height - f.bottom}" '
                   f'stroke="{v.get("colour", START)}" stroke-width="1.5" stroke-dasharray="2 2"/>'
                   f'<text x="{x + 4:.1f}" y="{f.top + 10}" font-size="11" fill="{v.get("colour", START)}">'
                   f'{escape(v["label"])}</text>')
    for s in series:
        pts = [(ts(t), v) for t, v in s["points"] if v is not None and math.isfinite(v)]
        if len(pts) >= 2:
            out.append(f'<path d="{_path(f, pts)}" fill="none" stroke="{s.get("colour", LINE)}" '
                       f'stroke-width="2" stroke-dasharray="{s.get("dash", "none")}"/>')
    out.append("</svg>")
    return "".join(out)


def reliability_chart(bins: list[dict], width: int = 360, height: int = 320) -> str:
    """Observed frequency of frost (below T10) against the forecast probability, by tenths."""
    f = _Frame(0.0, 1.0, 0.0, 1.0, width, height, pad=(48, 14, 16, 40))
    out = [f'<svg class="chart" role="img" viewBox="0 0 {width} {height}" width="{width}" height="{height}" '
           'xmlns="http://www.w3.org/2000/svg"><title>Reliability of the frost probability</title>',
           f'<rect x="0" y="0" width="{width}" height="{height}" fill="#ffffff"/>']
    for v in (0, 0.2, 0.4, 0.6, 0.8, 1.0):
        out.append(f'<line x1="{f.x(0):.1f}" x2="{f.x(1):.1f}" y1="{f.y(v):.1f}" y2="{f.y(v):.1f}" stroke="{GRID}"/>'
                   f'<text x="{f.left - 6}" y="{f.y(v) + 4:.1f}" text-anchor="end" font-size="11">{v:.1f}</text>'
                   f'<text x="{f.x(v):.1f}" y="{height - f.bottom + 14}" text-anchor="middle" font-size="11">'
                   f'{v:.1f}</text>')
    out.append(f'<line x1="{f.x(0):.1f}" y1="{f.y(0):.1f}" x2="{f.x(1):.1f}" y2="{f.y(1):.1f}" stroke="{INK}" '
               'stroke-dasharray="4 3"/>')
    out.append(f'<text x="{width / 2:.0f}" y="{height - 6}" text-anchor="middle" font-size="11">'
               'forecast probability of going below T10</text>')
    pts = [(b["mean_p"], b["observed"], b["n"]) for b in bins if b["n"]]
    if len(pts) >= 2:
        out.append(f'<path d="{_path(f, [(x, y) for x, y, _ in pts])}" fill="none" stroke="{LINE}" stroke-width="2"/>')
    for x, y, n in pts:
        r = 3 + min(6, math.sqrt(n))
        out.append(f'<circle cx="{f.x(x):.1f}" cy="{f.y(y):.1f}" r="{r:.1f}" fill="{LINE}">'
                   f'<title>{n} nights</title></circle>')
    out.append("</svg>")
    return "".join(out)
