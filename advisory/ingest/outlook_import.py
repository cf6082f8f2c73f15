"""Day outlooks: import a grower's outlook file for a station into the store, list what is stored.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
from collections import defaultdict
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from sqlalchemy import select
from sqlalchemy.orm import Session

from advisory.errors import InputError
from advisory.ingest.outlook import read_outlook_csv
from advisory.runs.heat_refit import _f
from advisory.store.schema import Outlook, Station


@dataclass
class OutlookImport:
    """What an outlook import did."""

    file: str
    rows: int = 0
    added: int = 0
    updated: int = 0
    unchanged: int = 0
    stations: list[str] = field(default_factory=list)
    first_day: dt.date | None = None
    last_day: dt.date | None = None

    def text(self) -> str:
        span = f" for {self.first_day} to {self.last_day}" if self.first_day else ""
        return (f"{self.file}: {self.rows} outlook rows{span} ({', '.join(self.stations)}): "
                f"{self.added} added, {self.updated} updated, {self.unchanged} unchanged")

    def as_dict(self) -> dict:
        d = dataclasses.asdict(self)
        d["first_day"] = None if self.first_day is None else self.first_day.isoformat()
        d["last_day"] = None if self.last_day is None else self.last_day.isoformat()
        return d


def _resolve_stations(session: Session, names: set[str]) -> dict[str, Station]:
    """Station per name used in an outlook file: its code, else (case-insensitively) its code or name."""
    all_st = list(session.scalars(select(Station)))
    by_code = {s.code: s for s in all_st}
    by_lower: dict[str, list[Station]] = defaultdict(list)
    for s in all_st:
        by_lower[s.code.lower()].append(s)
        if s.name and s.name.lower() != s.code.lower():
            by_lower[s.name.strip().lower()].append(s)
    out = {}
    for name in names:
        if name in by_code:
            out[name] = by_code[name]
        elif len({s.id for s in by_lower.get(name.strip().lower(), [])}) == 1:
            out[name] = by_lower[name.strip().lower()][0]
    return out


def import_outlook(db, path, *, station: str | None = None, now: dt.datetime | None = None) -> OutlookImport:
    """Read an outlook CSV and upsert it into the ``outlooks`` table, all or nothing.

    Parameters
    ----------
    db : Database
    path : path-like
        The CSV (see :mod:`advisory.ingest.outlook`).
    station : str, optional
        Station code for a file without a ``station`` column (or for its empty cells).
    now : datetime, optional
        Import time stamp.

    Returns
    -------
    OutlookImport

    Raises
    ------
    InputError
        A malformed file, an unknown station or a row without a high (naming
        the line and field); nothing is written.
    """
    now = now or dt.datetime.now(dt.UTC)
    frame = read_outlook_csv(path, station=station)
    name = str(path)
    report = OutlookImport(file=Path(name).name)
    with db.transaction() as session:
        if station is not None:
            found = _resolve_stations(session, {station})
            if station not in found:
                known = ", ".join(session.scalars(select(Station.code).order_by(Station.code))) or "none"
                raise InputError(f"no station '{station}' (stations: {known})", field="--station")
        found = _resolve_stations(session, set(frame["station"]))
        for row in frame.itertuples(index=False):
            if row.station not in found:
                known = ", ".join(session.scalars(select(Station.code).order_by(Station.code))) or "none"
                raise InputError(f"no station '{row.station}' (stations: {known})", file=name,
                                 line=int(row.line), field="station")
            if not np.isfinite(row.high_c):
                raise InputError("the row gives no high: the heat note needs the day's high", file=name,
                                 line=int(row.line), field="high_c")
        ids = sorted({found[s].id for s in frame["station"]})
        existing = {(o.station_id, o.day): o for o in session.scalars(
            select(Outlook).where(Outlook.station_id.in_(ids), Outlook.day.in_(sorted(set(frame["date"])))))}
        for row in frame.itertuples(index=False):
            sid = found[row.station].id
            values = {"high_c": float(row.high_c), "low_c": _f(row.low_c),
                      "min_rel_humidity_pct": _f(row.min_rel_humidity_pct)}
            old = existing.get((sid, row.date))
            if old is None:
                o = Outlook(station_id=sid, day=row.date, imported_at=now, **values)
                session.add(o)
                existing[(sid, row.date)] = o
                report.added += 1
            elif all(_same(getattr(old, k), v) for k, v in values.items()):
                report.unchanged += 1
            else:
                for k, v in values.items():
                    setattr(old, k, v)
                old.imported_at = now
                report.updated += 1
        report.rows = len(frame)
        report.stations = sorted({found[s].code for s in frame["station"]})
        report.first_day, report.last_day = min(frame["date"]), max(frame["date"])
    return report


def _same(a, b) -> bool:
    if a is None or b is None:
        return a is None and b is None
    return abs(float(a) - float(b)) < 1e-9


def station_option(session, code: str) -> Station:
    """The station a ``--station`` option names (by the rule of :func:`_resolve_stations`); an unknown
    one raises :class:`InputError` listing the stations there are."""
    found = _resolve_stations(session, {code})
    if code not in found:
        known = ", ".join(session.scalars(select(Station.code).order_by(Station.code))) or "none"
        raise InputError(f"no station '{code}' (stations: {known})", field="--station")
    return found[code]


def list_outlooks(db, *, station: str | None = None, since: dt.date | None = None) -> list[dict]:
    """Stored outlook rows (station code, day, high, low, minimum humidity, imported), by station and day."""
    with db.transaction() as session:
        q = select(Outlook, Station.code).join(Station, Station.id == Outlook.station_id)
        if station is not None:
            q = q.where(Outlook.station_id == station_option(session, station).id)
        if since is not None:
            q = q.where(Outlook.day >= since)
        rows = session.execute(q.order_by(Station.code, Outlook.day)).all()
        return [{"station": code, "day": o.day.isoformat(), "high_c": o.high_c, "low_c": o.low_c,
                 "min_rel_humidity_pct": o.min_rel_humidity_pct,
                 "imported_at": o.imported_at.isoformat(timespec="seconds")} for o, code in rows]


def format_outlooks(rows: list[dict]) -> str:
    if not rows:
        return "no outlook stored (use `advisory outlook import FILE`)"
    lines = [f"{'station':<16} {'day':<10} {'high °C':>8} {'low °C':>7} {'min RH %':>9}  imported"]
    for r in rows:
        def num(v, fmt):
            return "-" if v is None else format(v, fmt)
        lines.append(f"{r['station']:<16} {r['day']:<10} {num(r['high_c'], '.1f'):>8} {num(r['low_c'], '.1f'):>7} "
                     f"{num(r['min_rel_humidity_pct'], '.0f'):>9}  {r['imported_at']}")
    return "\n".join(lines)
