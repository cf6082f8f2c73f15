"""Data-quality report of one station: coverage, gaps, QC flags, recent imports.

``advisory obs report STATION [--since D] [--until D] [--json]`` prints it.
:func:`station_report` returns both the plain data (JSON-ready) and the text.
Times are shown in the station's zone (and UTC in the data).
"""

from __future__ import annotations

import datetime as dt
import re
import zoneinfo
from dataclasses import dataclass
from typing import Any

import numpy as np
from sqlalchemy import select

from advisory.errors import InputError
from advisory.ingest.observations import fetch_arrays, get_station
from advisory.ingest.qc import (
    DEFAULT_CONFIG,
    FLAG_NAMES,
    QC_COLUMNS,
    VALUE_COLUMNS,
    QcConfig,
    find_gaps,
    typical_interval_s,
)
from advisory.store.schema import Import

_RELATIVE = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*([dh])\s*$", re.IGNORECASE)


@dataclass
class StationReport:
    """``data`` is JSON-ready; ``text`` is for people."""

    data: dict[str, Any]
    text: str


def parse_when(text: str | dt.date | dt.datetime | None, tz_name: str, *, latest_s: int | None = None,
               field: str = "--since") -> int | None:
    """A report bound as seconds since the epoch.

    Accepts an aware datetime, a date or ``YYYY-MM-DD`` (local midnight in the
    station's zone), an ISO 8601 date-time (naive = station zone), or ``7d`` /
    ``36h``: that long before the station's latest reading.
    """
    if text is None or text == "":
        return None
    zone = zoneinfo.ZoneInfo(tz_name)
    if isinstance(text, dt.datetime):
        when = text if text.tzinfo else text.replace(tzinfo=zone)
        return int(when.timestamp())
    if isinstance(text, dt.date):
        return int(dt.datetime.combine(text, dt.time(), zone).timestamp())
    m = _RELATIVE.match(str(text))
    if m:
        if latest_s is None:
            return None
        span = float(m.group(1)) * (86400 if m.group(2).lower() == "d" else 3600)
        return int(latest_s - span)
    try:
        if re.fullmatch(r"\d{4}-\d{2}-\d{2}", str(text).strip()):
            return int(dt.datetime.combine(dt.date.fromisoformat(str(text).strip()), dt.time(), zone).timestamp())
        when = dt.datetime.fromisoformat(str(text).strip())
    except ValueError:
        raise InputError(f"not a date, date-time or span (7d, 36h): {text!r}", field=field) from None
    if when.tzinfo is None:
        when = when.replace(tzinfo=zone)
    return int(when.timestamp())


def _fmt_local(t_s: int, zone: zoneinfo.ZoneInfo) -> str:
    return dt.datetime.fromtimestamp(int(t_s), zone).strftime("%Y-%m-%d %H:%M %Z")


def _utc(t_s: int) -> str:
    return dt.datetime.fromtimestamp(int(t_s), dt.UTC).isoformat().replace("+00:00", "Z")


def _duration(seconds: float) -> str:
    seconds = int(round(seconds))
    if seconds < 3600:
        return f"{seconds // 60} min"
    if seconds < 86400 * 2:
        h, m = divmod(seconds // 60, 60)
        return f"{h} h {m:02d} min" if m else f"{h} h"
    return f"{seconds / 86400:.1f} days"


def _episodes(mask: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Start and end indices (inclusive) of runs of True."""
    if not mask.any():
        z = np.zeros(0, dtype=np.int64)
        return z, z
    padded = np.r_[False, mask, False].astype(np.int8)
    d = np.diff(padded)
    return np.flatnonzero(d == 1), np.flatnonzero(d == -1) - 1


def station_report(target: Any, station_code: str, *, since: Any = None, until: Any = None,
                   config: QcConfig = DEFAULT_CONFIG, max_items: int = 8) -> StationReport:
    """Coverage, gaps and QC flags of one station's readings.

    Parameters
    ----------
    target : Database or Session
        Where to read.
    station_code : str
        The station.
    since, until : str, date or datetime, optional
        Bounds, see :func:`parse_when` (default: all readings).
    config : QcConfig
        Decides what counts as a gap.
    max_items : int
        How many gaps and flagged stretches per variable the text lists.

    Returns
    -------
    StationReport
    """
    if hasattr(target, "transaction") and hasattr(target, "engine"):
        with target.transaction() as session:
            return station_report(session, station_code, since=since, until=until, config=config,
                                  max_items=max_items)
    session = target
    st = get_station(session, station_code)
    try:
        zone = zoneinfo.ZoneInfo(st.timezone)
    except (zoneinfo.ZoneInfoNotFoundError, ValueError):
        raise InputError(f"station {st.code} has an unknown time zone {st.timezone!r}") from None
    latest = _fetch_latest(session, st.id)
    t0 = parse_when(since, st.timezone, latest_s=latest, field="--since")
    t1 = parse_when(until, st.timezone, latest_s=latest, field="--until")
    cols = [*VALUE_COLUMNS, *QC_COLUMNS.values()]
    _ids, t, m = fetch_arrays(session, [st.id], t0, t1, cols)
    nv = len(VALUE_COLUMNS)
    vals = m[:, :nv]
    q = m[:, nv:].astype(np.int64)

    data: dict[str, Any] = {
        "station": {"code": st.code, "name": st.name, "timezone": st.timezone},
        "since_utc": _utc(t0) if t0 is not None else None,
        "until_utc": _utc(t1) if t1 is not None else None,
        "readings": int(len(t)),
    }
    imports = session.execute(
        select(Import.file_name, Import.imported_at, Import.rows_read, Import.rows_added, Import.rows_replaced,
               Import.conflicts).where(Import.station_id == st.id).order_by(Import.id.desc()).limit(max_items)
    ).all()
    data["imports"] = [{"file": r[0], "imported_at": r[1].isoformat() if r[1] else None, "rows_read": r[2],
                        "rows_added": r[3], "rows_replaced": r[4], "conflicts": r[5]} for r in imports]
    if len(t) == 0:
        data.update(first_utc=None, last_utc=None, interval_s=None, expected=0, coverage_pct=None,
                    gaps={"count": 0, "missing_readings": 0, "total_s": 0, "longest": []}, variables={})
        return StationReport(data, _text(data, zone, max_items))

    interval = typical_interval_s(t)
    expected = int(round((t[-1] - t[0]) / interval)) + 1 if interval else len(t)
    gaps = find_gaps(t, config, interval)
    data.update(
        first_utc=_utc(t[0]), last_utc=_utc(t[-1]), first_local=_fmt_local(t[0], zone),
        last_local=_fmt_local(t[-1], zone), interval_s=interval, expected=expected,
        coverage_pct=round(100.0 * len(t) / expected, 2) if expected else None,
        gaps={
            "count": len(gaps),
            "missing_readings": int(gaps["missing"].sum()) if len(gaps) else 0,
            "total_s": int(gaps["duration_s"].sum()) if len(gaps) else 0,
            "longest": [{"start_utc": _utc(r.start_utc.timestamp()), "end_utc": _utc(r.end_utc.timestamp()),
                         "start_local": _fmt_local(r.start_utc.timestamp(), zone),
                         "end_local": _fmt_local(r.end_utc.timestamp(), zone),
                         "duration_s": int(r.duration_s), "missing": int(r.missing)}
                        for r in gaps.head(max_items).itertuples()],
        })
    variables: dict[str, Any] = {}
    for j, col in enumerate(VALUE_COLUMNS):
        present = ~np.isnan(vals[:, j])
        if not present.any():
            continue
        qj = q[:, j]
        flagged = present & (qj != 0)
        entry: dict[str, Any] = {
            "readings": int(present.sum()),
            "flagged": int(flagged.sum()),
            "flagged_pct": round(100.0 * flagged.sum() / present.sum(), 2),
            "min": round(float(np.nanmin(np.where(present & ~flagged, vals[:, j], np.nan))), 2)
            if (present & ~flagged).any() else None,
            "max": round(float(np.nanmax(np.where(present & ~flagged, vals[:, j], np.nan))), 2)
            if (present & ~flagged).any() else None,
            "flags": {},
            "stretches": [],
        }
        rows_present = np.flatnonzero(present)
        for bit, name in FLAG_NAMES.items():
            hit = (qj[rows_present] & bit) != 0
            n_hit = int(hit.sum())
            entry["flags"][name] = n_hit
            if not n_hit:
                continue
            starts, ends = _episodes(hit)
            for a, b in zip(starts.tolist(), ends.tolist(), strict=True):
                ra, rb = rows_present[a], rows_present[b]
                entry["stretches"].append({
                    "flag": name, "start_utc": _utc(t[ra]), "end_utc": _utc(t[rb]),
                    "start_local": _fmt_local(t[ra], zone), "end_local": _fmt_local(t[rb], zone),
                    "readings": int(b - a + 1), "first_value": round(float(vals[ra, j]), 2)})
        entry["stretches"].sort(key=lambda e: e["start_utc"])
        variables[col] = entry
    data["variables"] = variables
    return StationReport(data, _text(data, zone, max_items))


def _fetch_latest(session, station_id: int) -> int | None:
    from sqlalchemy import Integer, func, type_coerce

    from advisory.store.schema import Observation

    col = type_coerce(Observation.__table__.c.time_utc, Integer)
    v = session.execute(select(func.max(col)).where(Observation.__table__.c.station_id == station_id)).scalar()
    return int(v) if v is not None else None


def _text(d: dict[str, Any], zone: zoneinfo.ZoneInfo, max_items: int) -> str:
    st = d["station"]
    out = [f"Station {st['code']} — {st['name']} ({st['timezone']})"]
    if d.get("since_utc") or d.get("until_utc"):
        out.append(f"  window: {d.get('since_utc') or 'start'} .. {d.get('until_utc') or 'end'} (UTC)")
    if not d["readings"]:
        out.append("  no readings stored" + (" in this window" if d.get("since_utc") or d.get("until_utc") else ""))
    else:
        interval = d["interval_s"]
        out.append(f"  readings: {d['readings']:,} from {d['first_local']} to {d['last_local']}")
        if interval:
            out.append(f"  typical interval {_duration(interval)}; coverage {d['coverage_pct']:.1f} % "
                       f"of {d['expected']:,} expected")
        g = d["gaps"]
        if g["count"]:
            out.append(f"  gaps: {g['count']} ({g['missing_readings']:,} readings missing, "
                       f"{_duration(g['total_s'])} in all); longest:")
            for x in g["longest"][:max_items]:
                out.append(f"    {x['start_local']} -> {x['end_local']}  ({_duration(x['duration_s'])}, "
                           f"{x['missing']} missing)")
        else:
            out.append("  gaps: none")
        out.append("  quality control (flagged values are kept out of the forecasts):")
        for col, v in d["variables"].items():
            flags = ", ".join(f"{name} {n}" for name, n in v["flags"].items() if n)
            rng = (f"; passed values {v['min']} .. {v['max']}" if v["min"] is not None else "")
            out.append(f"    {col}: {v['readings']:,} values, {v['flagged']:,} flagged "
                       f"({v['flagged_pct']:.2f} %){': ' + flags if flags else ''}{rng}")
            for s in v["stretches"][:max_items]:
                span = (s["start_local"] if s["readings"] == 1 else
                        f"{s['start_local']} -> {s['end_local']}")
                out.append(f"      {s['flag']}: {span} ({s['readings']} reading"
                           f"{'' if s['readings'] == 1 else 's'}, value {s['first_value']})")
            if len(v["stretches"]) > max_items:
                out.append(f"      ... and {len(v['stretches']) - max_items} more stretches (see --json)")
    if d["imports"]:
        out.append("  recent imports:")
        for imp in d["imports"]:
            when = imp["imported_at"][:16].replace("T", " ") if imp["imported_at"] else "?"
            out.append(f"    {when} UTC  {imp['file']}: {imp['rows_read']} rows read, {imp['rows_added']} added, "
                       f"{imp['rows_replaced']} replaced, {imp['conflicts']} conflicts")
    return "\n".join(out)

