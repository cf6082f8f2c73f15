"""A PNG chart of the night (frost) or day (heat) temperature curve for a notice.

Frost: the middle forecast (p50) with its 10-90 % band, the wet-bulb curve when
the block's plan starts on it (sprinklers), the stage's T10 and T90, each
advised plan's start temperature, the protection run shaded (never in green:
green would read as "safe"), the ready-by time and the time the air reaches T10,
sunset and sunrise marked.  Heat: the day curve with its band, heat index and WBGT estimate when
known, the thresholds, the sunburn and heavy-work windows.  The time axis is
the farm's local time; temperatures in the farm's units.

Drawn with matplotlib's Agg canvas on a private :class:`~matplotlib.figure.Figure`
(no pyplot, so no global figure list to leak and no GUI backend); every figure
is dropped when the function returns.  A chart takes about 0.1 s on a quiet core
(0.3-0.4 s on the shared two-core test machine), so callers draw it only when it is shown.
"""

from __future__ import annotations

import io
import math

from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.dates import AutoDateLocator, DateFormatter, HourLocator
from matplotlib.figure import Figure
from matplotlib.ticker import MaxNLocator

from advisory.notices import words as w
from advisory.notices.notice_data import BlockNotice, notice_from_dict

# Colours of our own.
INK = "#1f2933"
GRID = "#d8dcd3"
BAND_FROST = "#a9cbe8"
LINE_FROST = "#16365c"
WET_BULB = "#138a8a"
T10 = "#d97706"
T90 = "#b42318"
PROTECT = "#7a6fb0"   # a run band: a muted violet, not green (green would read as "safe")
START = "#3d4970"
READY = "#7a6fb0"
SUN = "#c99a06"
BAND_HEAT = "#f6c7a5"
LINE_HEAT = "#a3330f"
HEAT_INDEX = "#e07b00"
WBGT = "#6b3fa0"
THRESHOLD = "#7c2d12"
SUNBURN = "#f59e0b"
WORK = "#8a94a8"      # heavy-work hours: a neutral grey-blue


def _num(v, units):
    return float("nan") if v is None else (w.temp_value(v, units) if math.isfinite(v) else float("nan"))


def _plain(text: str) -> str:
    """Text for a legend entry: a dollar sign must not switch on math mode."""
    return str(text).replace("$", r"\$")


def chart_png(notice: BlockNotice | dict, *, width_px: int = 480, height_px: int = 340, dpi: int = 100, scale: float = 2.0) -> bytes | None:
    """Draw the notice's curve.

    Parameters
    ----------
    notice : BlockNotice or dict
        A composed block notice (or its stored ``content``).
    width_px, height_px : int
        Image size [pixels].
    dpi : int
        Dots per inch of the layout (text sizes are in points).
    scale : float
        The PNG has ``scale`` times the pixels (sharp on phone screens); the
        HTML shows it at ``width_px``.

    Returns
    -------
    bytes or None
        PNG image, or None when the notice has no curve to draw (no forecast).
    """
    n = notice if isinstance(notice, BlockNotice) else notice_from_dict(notice)
    if not isinstance(n, BlockNotice) or n.chart is None:
        return None
    pts = [p for p in n.data.get("curve") or [] if p.get("p50_c") is not None and w.parse_time(p.get("time_utc"))]
    if len(pts) < 2:
        return None
    units, tz = n.units, w.zone(n.farm_tz)
    heat = n.kind == "heat"
    times = [w.parse_time(p["time_utc"]) for p in pts]

    def series(key):
        return [_num(p.get(key), units) for p in pts]

    p50, p10, p90 = series("p50_c"), series("p10_c"), series("p90_c")

    fig = Figure(figsize=(width_px / dpi, height_px / dpi), dpi=dpi)
    FigureCanvasAgg(fig)
    n_items = len(n.chart.lines) + len(n.chart.windows) + sum(m.get("role") in ("ready", "critical")
                                                              for m in n.chart.marks) + 3
    ax = fig.add_axes((0.13, 0.40, 0.80, 0.50) if n_items > 6 else (0.13, 0.33, 0.80, 0.57))
    ax.set_facecolor("#ffffff")
    ax.grid(True, color=GRID, linewidth=0.6)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    ax.tick_params(colors=INK, labelsize=10)

    t0, t1 = times[0], times[-1]
    for win in n.chart.windows:
        s, e = w.parse_time(win.get("start_utc")), w.parse_time(win.get("stop_utc"))
        if not s or not e or e <= s:
            continue
        s, e = max(s, t0), min(e, t1)
        if e <= s:
            continue
        role = win.get("role")
        colour = {"protect": PROTECT, "sunburn": SUNBURN, "work": WORK}.get(role, PROTECT)
        ax.axvspan(s, e, color=colour, alpha=0.18, linewidth=0,
                   label=_plain(("run " if role == "protect" else "") + str(win.get("label", ""))))

    band_ok = all(math.isfinite(v) for v in p10 + p90)
    if band_ok:
        ax.fill_between(times, p10, p90, color=BAND_HEAT if heat else BAND_FROST, alpha=0.55, linewidth=0,
                        label="8 in 10 range")
    ax.plot(times, p50, color=LINE_HEAT if heat else LINE_FROST, linewidth=2.2, label="middle forecast")
    if not heat:
        wb = series("wet_bulb_c")
        if "wet_bulb" in (n.chart.curves or []) and any(math.isfinite(v) for v in wb):
            ax.plot(times, wb, color=WET_BULB, linewidth=1.3, linestyle=(0, (4, 2)), label="wet bulb")
    else:
        hi = series("heat_index_c")
        if any(math.isfinite(v) for v in hi):
            ax.plot(times, hi, color=HEAT_INDEX, linewidth=1.4, label="heat index")
        wg = series("wbgt_c")
        if any(math.isfinite(v) for v in wg):
            ax.plot(times, wg, color=WBGT, linewidth=1.3, linestyle=(0, (4, 2)), label="WBGT (est.)")

    for line in n.chart.lines:
        v = line.get("value_c")
        if v is None or not math.isfinite(v):
            continue
        role = line.get("role")
        colour = {"t10": T10, "t90": T90, "start": START}.get(role, THRESHOLD)
        style = {"t90": "-.", "start": (0, (1, 1.5))}.get(role, "--")
        ax.axhline(w.temp_value(v, units), color=colour, linewidth=1.2, linestyle=style,
                   label=_plain(line.get("label", "")))

    for mark in n.chart.marks:
        t = w.parse_time(mark.get("time_utc"))
        if not t or t < t0 or t > t1:
            continue
        role = mark.get("role")
        if role in ("ready", "critical"):  # plan marks: a line with its label in the legend
            ax.axvline(t, color=READY if role == "ready" else T10, linewidth=1.3,
                       linestyle=(0, (5, 2)) if role == "ready" else (0, (2, 2)), label=_plain(mark.get("label", "")))
            continue
        ax.axvline(t, color=SUN, linewidth=1.1, linestyle=":")
        right = (t - t0) > 0.75 * (t1 - t0)
        ax.annotate(mark.get("label", ""), xy=(t, 1.0), xycoords=("data", "axes fraction"),
                    xytext=(-3 if right else 3, -10), textcoords="offset points", fontsize=9, color=INK,
                    ha="right" if right else "left", parse_math=False)

    ax.set_xlim(t0, t1)
    span_h = (t1 - t0).total_seconds() / 3600.0
    ax.xaxis.set_major_locator(HourLocator(interval=2 if span_h <= 16 else 3, tz=tz)
                               if span_h <= 30 else AutoDateLocator(tz=tz))
    ax.xaxis.set_major_formatter(DateFormatter("%H:%M", tz=tz))
    abbrs = sorted({t.astimezone(tz).strftime("%Z") for t in (t0, t1)})
    ax.set_xlabel(f"local time ({'/'.join(abbrs)})", fontsize=10, color=INK)
    ax.yaxis.set_major_locator(MaxNLocator(nbins=6, integer=True))
    ax.set_ylabel(w.temp_unit(units), fontsize=10, color=INK, labelpad=2)
    ax.set_title(n.chart.title or n.block, fontsize=11, color=INK, loc="left", parse_math=False)

    handles, labels = ax.get_legend_handles_labels()
    if handles:
        many = len(handles) > 6  # a plan's start line and marks: two narrower columns, so nothing is cut
        fig.legend(handles, labels, loc="lower center", ncol=2 if many else min(3, len(handles)),
                   fontsize=8 if many else 9, frameon=False, bbox_to_anchor=(0.5, 0.0))
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi * scale, facecolor="#ffffff", metadata={"Software": None})
    return buf.getvalue()


def data_uri(png: bytes) -> str:
    """The PNG as a ``data:`` URI (for an HTML file opened in a browser)."""
    import base64

    return "data:image/png;base64," + base64.b64encode(png).decode("ascii")
