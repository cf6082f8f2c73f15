"""Text the command line prints from what is stored: run sheets, farm summaries, verification skill.

Only reads: no run module is imported here (runs print through :mod:`advisory.runs.command_text`).
"""

from __future__ import annotations

import datetime as dt
from collections import defaultdict

import numpy as np
from sqlalchemy import select

from advisory import assessment as asm
from advisory.errors import InputError
from advisory.notices import render
from advisory.physics import sun
from advisory.risk import runsheet
from advisory.store import queries
from advisory.store.schema import Block, Farm, Forecast, Notice, Verification


def farm_zone(db, farm: str | None) -> str:
    """The IANA zone of the named farm (or of the first farm)."""
    with db.transaction() as s:
        q = select(Farm.timezone).order_by(Farm.name)
        if farm:
            q = q.where(Farm.name == farm)
        tz = s.scalar(q)
    if tz is None:
        raise InputError("no farm imported yet (use `advisory farm import FARM.toml`)" if not farm
                         else f"no farm named '{farm}'", field="--farm")
    return tz


def _default_night(db, farm: str | None, now: dt.datetime | None = None) -> dt.date:
    """Tonight (or, before noon, last night) in the zone of the first selected farm."""
    return sun.night_of(now or dt.datetime.now(dt.UTC), farm_zone(db, farm))


def block_ids_for(db, farm: str | None, names: list[str] | None) -> list[int] | None:
    if not names:
        return None
    with db.transaction() as s:
        return [queries.find_block(s, n, farm).id for n in names]


def summary_text(db, notice_ids: list[int], fmt: str = "text") -> list[str]:
    """Rendered farm summaries among the given notices."""
    out = []
    with db.transaction() as s:
        for n in s.scalars(select(Notice).where(Notice.id.in_(notice_ids), Notice.block_id.is_(None))
                           .order_by(Notice.id)):
            out.append(render.render(n.full_content, fmt))
    return out


def stored_assessments(session, farm: Farm, night: dt.date, kind: str = "frost") -> list[asm.Assessment]:
    """The latest stored assessment of each of a farm's blocks for a night."""
    rows = session.scalars(select(Forecast).join(Block)
                           .where(Block.farm_id == farm.id, Forecast.night == night, Forecast.kind == kind)
                           .order_by(Forecast.block_id, Forecast.revision))
    latest: dict[int, Forecast] = {}
    for r in rows:
        latest[r.block_id] = r
    return [asm.from_dict(r.payload) for r in latest.values() if r.payload]


def run_sheet(db, farm: str, night: dt.date, fmt: str = "text") -> str:
    with db.transaction() as s:
        f = queries.find_farm(s, farm)
        items = stored_assessments(s, f, night)
        if not items:
            raise InputError(f"no forecast stored for farm '{farm}' on the night of {night} "
                             "(run `advisory night run --date ...` first)", field="--date")
        sheet = runsheet.build_run_sheet(f.name, night, f.timezone,
                                         [a for a in items if a.status == asm.STATUS_OK], units=f.units)
    return {"text": runsheet.render_text, "markdown": runsheet.render_markdown,
            "csv": runsheet.render_csv}[fmt](sheet)


#: What ``advisory verify report`` covers, in its order.
REPORT_KINDS = ("frost", "heat")

_FROST_EVENT = "observed minimum at or below the stage's T10"
_FROST_WARNED = "the block was put on the run sheet (level at or above the farm's protect level)"
_HEAT_EVENT = "observed high (sunrise to sunset) at or above the crop's sunburn air temperature"
_HEAT_WARNED = "the note flagged fruit sunburn risk or advised evaporative cooling"


#: Bins of the frost probability (P of reaching T10) in the reliability table of ``verify report``.
RELIABILITY_BINS = (0.0, 0.1, 0.3, 0.5, 0.7, 0.9, 1.0)


def _crps(vs: list[Verification]) -> tuple[float | None, int]:
    """Mean CRPS [°C] of the checks that kept their 10th/50th/90th percentiles, and how many did.

    The stored three quantiles are read as a two-piece normal
    (:func:`advisory.forecast.result.two_piece_table`), then scored with
    :func:`advisory.forecast.result.table_crps`.
    """
    from advisory.forecast.result import table_crps, two_piece_table

    rows = [((v.detail or {}).get("p10_c"), v.forecast_c, (v.detail or {}).get("p90_c"), v.observed_c)
            for v in vs]
    rows = [r for r in rows if None not in r]
    if not rows:
        return None, 0
    a = np.array(rows, dtype=float)
    return float(np.mean(table_crps(two_piece_table(a[:, 0], a[:, 1], a[:, 2]), a[:, 3]))), len(rows)


def _reliability(vs: list[Verification]) -> list[dict]:
    """Forecast probability of reaching T10 against how often it was reached, by probability bin."""
    pairs = [(float(v.detail["p_below_t10"]), bool(v.detail.get("event"))) for v in vs
             if (v.detail or {}).get("p_below_t10") is not None]
    out = []
    edges = RELIABILITY_BINS
    for lo, hi in zip(edges[:-1], edges[1:], strict=True):
        got = [(p, e) for p, e in pairs if lo <= p < hi or (hi == 1.0 and p == 1.0)]
        out.append({"bin": f"{lo:.1f}-{hi:.1f}", "nights": len(got),
                    "mean_forecast": float(np.mean([p for p, _ in got])) if got else None,
                    "observed_frequency": float(np.mean([e for _, e in got])) if got else None})
    return out


def _skill(vs: list[Verification]) -> dict:
    """MAE, bias, range coverage, CRPS and the 2x2 table of warnings against events over some checks."""
    err = np.array([v.error_c for v in vs if v.error_c is not None], float)
    warned = np.array([bool((v.detail or {}).get("warned")) for v in vs], bool)
    event = np.array([bool((v.detail or {}).get("event")) for v in vs], bool)
    ranged = [(v.detail["p10_c"], v.detail["p90_c"], v.observed_c) for v in vs
              if (v.detail or {}).get("p10_c") is not None and (v.detail or {}).get("p90_c") is not None
              and v.observed_c is not None]
    inside = sum(1 for lo, hi, o in ranged if lo <= o <= hi)
    crps, crps_n = _crps(vs)
    return {"count": len(vs), "crps_c": crps, "with_crps": crps_n,
            "mae_c": float(np.mean(np.abs(err))) if len(err) else None,
            "bias_c": float(np.mean(err)) if len(err) else None,
            "in_range": inside, "with_range": len(ranged),
            "range_coverage": inside / len(ranged) if ranged else None,
            "hits": int((warned & event).sum()), "misses": int((~warned & event).sum()),
            "false_alarms": int((warned & ~event).sum()), "quiet": int((~warned & ~event).sum())}


def verification_report(db, *, block: str | None = None, farm: str | None = None, kind: str = "all") -> dict:
    """Skill to date per block, for frost nights and heat days.

    Parameters
    ----------
    db : Database
    block, farm : str, optional
        Only this block / farm.
    kind : {"all", "frost", "heat"}
        Which checks to report.

    Returns
    -------
    dict
        One section per kind asked (``"frost"``, ``"heat"``), each with
        ``blocks`` (per block: ``block``, ``count``, ``mae_c``, ``bias_c``
        (forecast - observed), ``in_range``/``with_range``/``range_coverage``
        (observed inside the 10th-90th percentile range), ``hits``,
        ``misses``, ``false_alarms``, ``quiet`` and ``last``), ``all`` (the
        same over every block), ``event`` and ``warned`` (what is counted).
        Frost blocks also carry ``nights``, ``quiet_nights`` and ``last_night``;
        the heat section adds ``by_source`` (outlook or estimated high).
    """
    if kind not in ("all", *REPORT_KINDS):
        raise InputError(f"unknown kind '{kind}' (all, frost or heat)", field="--kind")
    kinds = REPORT_KINDS if kind == "all" else (kind,)
    with db.transaction() as s:
        q = select(Verification).join(Block).join(Farm).where(Verification.kind.in_(kinds))
        if farm:
            q = q.where(Farm.name == farm)
        if block:
            q = q.where(Block.id == queries.find_block(s, block, farm).id)
        per: dict[str, dict[int, list[Verification]]] = {k: defaultdict(list) for k in kinds}
        names = {}
        for v in s.scalars(q.order_by(Verification.night, Verification.block_id)):
            if v.block_id not in names:
                b = s.get(Block, v.block_id)
                names[v.block_id] = f"{b.farm.name} / {b.name}"
            per[v.kind][v.block_id].append(v)
        out = {}
        for k in kinds:
            rows = []
            for bid, vs in sorted(per[k].items(), key=lambda item: names[item[0]]):
                row = {"block": names[bid], **_skill(vs), "last": vs[-1].night.isoformat()}
                if k == "frost":
                    row.update(nights=row["count"], quiet_nights=row["quiet"], last_night=row["last"])
                rows.append(row)
            every = [v for vs in per[k].values() for v in vs]
            section = {"blocks": rows, "all": _skill(every) if every else None,
                       "event": _FROST_EVENT if k == "frost" else _HEAT_EVENT,
                       "warned": _FROST_WARNED if k == "frost" else _HEAT_WARNED}
            if k == "frost":
                section["reliability"] = _reliability(every)
            if k == "heat":
                est = [bool((v.detail or {}).get("estimated")) for v in every]
                section["by_source"] = {"outlook": _skill([v for v, e in zip(every, est, strict=True) if not e]),
                                        "estimated": _skill([v for v, e in zip(every, est, strict=True) if e])}
            out[k] = section
        return out


def _num(v, fmt: str) -> str:
    return "-" if v is None else format(v, fmt)


def _name_width(data: dict) -> int:
    return max([44, *(len(b["block"]) + 1 for b in data["blocks"])])


def _format_frost(data: dict) -> list[str]:
    wd = _name_width(data)
    lines = [f"{'block':<{wd}} {'nights':>6} {'MAE °C':>7} {'bias °C':>8} {'CRPS °C':>8} {'in 8-in-10 range':>17} "
             f"{'hits':>5} {'misses':>6} {'false alarms':>12}"]
    for b in data["blocks"]:
        lines.append(f"{b['block']:<{wd}} {b['count']:>6} {_num(b['mae_c'], '.2f'):>7} {_num(b['bias_c'], '+.2f'):>8} "
                     f"{_num(b.get('crps_c'), '.2f'):>8} {_coverage(b):>17} "
                     f"{b['hits']:>5} {b['misses']:>6} {b['false_alarms']:>12}")
    lines.append(f"event: {data['event']}; warned: {data['warned']}; bias = forecast - observed; "
                 "CRPS: continuous ranked probability score of the forecast range (lower is better; "
                 "for a single number it is the absolute error)")
    rel = [r for r in data.get("reliability", []) if r["nights"]]
    if rel:
        lines.append("chance of reaching T10, as forecast and as it came (all blocks):")
        lines.append(f"  {'forecast chance':>15} {'nights':>6} {'mean forecast':>13} {'reached':>8}")
        for r in data["reliability"]:
            if r["nights"]:
                lines.append(f"  {r['bin']:>15} {r['nights']:>6} {100 * r['mean_forecast']:>12.0f}% "
                             f"{100 * r['observed_frequency']:>7.0f}%")
    return lines


def _coverage(r: dict) -> str:
    if not r["with_range"]:
        return "-"
    return f"{r['in_range']}/{r['with_range']} ({100.0 * r['range_coverage']:.0f} %)"


def _format_heat(data: dict) -> list[str]:
    wd = _name_width(data)
    head = (f"{'block':<{wd}} {'days':>5} {'MAE °C':>7} {'bias °C':>8} {'in 8-in-10 range':>17} {'hits':>5} "
            f"{'misses':>6} {'false alarms':>12}")
    lines = [head]

    def row(name: str, r: dict) -> str:
        return (f"{name:<{wd}} {r['count']:>5} {_num(r['mae_c'], '.2f'):>7} {_num(r['bias_c'], '+.2f'):>8} "
                f"{_coverage(r):>17} {r['hits']:>5} {r['misses']:>6} {r['false_alarms']:>12}")

    for b in data["blocks"]:
        lines.append(row(b["block"], b))
    if len(data["blocks"]) > 1:
        lines.append(row("all blocks", data["all"]))
    src = data.get("by_source") or {}
    parts = [f"{label} {r['count']} day{'s' if r['count'] != 1 else ''}, MAE {_num(r['mae_c'], '.2f')} °C, "
             f"{_coverage(r)} in range"
             for label, r in (("from the outlook", src.get("outlook")), ("estimated from readings",
                                                                        src.get("estimated")))
             if r and r["count"]]
    if parts:
        lines.append("by source of the high: " + "; ".join(parts))
    lines.append(f"event: {data['event']}; warned: {data['warned']}; bias = forecast - observed; "
                 "8-in-10 range: between the 10th and 90th percentile of the forecast high "
                 "(about 8 days in 10 should fall inside)")
    return lines


def format_verification(data: dict) -> str:
    """The text of :func:`verification_report`: frost first, then heat."""
    frost, heat = data.get("frost"), data.get("heat")
    has_frost = bool(frost and frost["blocks"])
    has_heat = bool(heat and heat["blocks"])
    if not has_frost and not has_heat:
        if frost is not None and heat is not None:
            return ("no verified nights or heat days yet (the morning steps `advisory night verify` and "
                    "`advisory heat verify` store them)")
        if heat is not None:
            return "no verified heat days yet (the morning heat run or `advisory heat verify` stores them)"
        return "no verified nights yet (the morning step `advisory night verify` stores them)"
    both = has_frost and has_heat
    lines: list[str] = []
    if has_frost:
        if both:
            lines.append("Frost nights: the forecast minimum against the observed minimum")
        lines.extend(_format_frost(frost))
    if has_heat:
        if both:
            lines.append("")
        lines.append("Heat days: the forecast high against the observed high (sunrise to sunset)")
        lines.extend(_format_heat(heat))
    return "\n".join(lines)
