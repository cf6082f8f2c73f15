"""Read a night outlook: the hour-by-hour point forecast for a station's night (sky cover, wind, temperature).

Growers read the weather service's hourly point forecast for the night ahead; an
agent copies the hours of the night into a spreadsheet and saves it as CSV
(comma, semicolon or tab separated), one row per station and hour::

    station,time,sky_cover_pct,wind_speed_kmh,air_temp_c
    QR-BENCH,2026-04-08T20:00-07:00,80,12,6
    QR-BENCH,2026-04-09T01:00-07:00,10,4,0

Columns (case and surrounding spaces ignored; spaces inside become ``_``):

* ``station`` -- the station's code as in the farm file (may be left out when
  the caller names one station for the whole file);
* ``time`` -- the hour the values are for, ISO 8601; with a UTC offset, or
  naive and then read in the station's zone (a local time that does not exist
  or happens twice at a clock change is refused);
* ``sky_cover_pct`` -- forecast sky cover, 0-100 % (``cloud_cover_pct``,
  ``sky_pct`` accepted; a trailing ``%`` is allowed);
* ``wind_speed_ms``, ``wind_speed_kmh`` or ``wind_speed_mph`` -- forecast wind
  at the usual 10 m;
* ``air_temp_c`` or ``air_temp_f`` -- forecast temperature of the hour
  (optional; the night's lowest is shown as the outlook's low).

An empty cell is missing.  A row needs a sky cover or a wind.  A line must have
as many fields as the header.  Lines starting with ``#`` and blank lines are
skipped.  Any problem raises :class:`advisory.errors.InputError` naming the
file, line and field; nothing is returned half-read.
:func:`import_night_outlook` stores a file (all or nothing) and
:func:`load_night_outlooks` reads the stored hours back for a run.
"""

from __future__ import annotations

import csv
import dataclasses
import math
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd

from advisory.errors import InputError
from advisory.ingest.outlook import _norm, _number, _sniff_delimiter, read_text, split_csv

__all__ = ["NIGHT_OUTLOOK_COLUMNS", "is_night_outlook_header", "parse_night_outlook_csv", "read_night_outlook_csv",
           "read_text", "localize_time", "NightOutlookImport", "import_night_outlook", "load_night_outlooks", "list_night_outlooks",
           "format_night_outlooks"]

#: Columns of the returned frame, in order.
NIGHT_OUTLOOK_COLUMNS = ("station", "time", "sky_cover_pct", "wind_speed_ms", "air_temp_c", "line")

_ALIASES = {
    "station": ("station", "station_name", "site"),
    "time": ("time", "valid_time", "hour", "datetime"),
    "sky_cover_pct": ("sky_cover_pct", "cloud_cover_pct", "sky_pct", "sky_cover"),
    "wind_speed_ms": ("wind_speed_ms", "wind_ms"),
    "wind_speed_kmh": ("wind_speed_kmh", "wind_kmh"),
    "wind_speed_mph": ("wind_speed_mph", "wind_mph"),
    "air_temp_c": ("air_temp_c", "temp_c", "temperature_c"),
    "air_temp_f": ("air_temp_f", "temp_f", "temperature_f"),
}
_WIND = {"wind_speed_ms": 1.0, "wind_speed_kmh": 1.0 / 3.6, "wind_speed_mph": 0.44704}
# Plausible ranges (common practice for screen-level forecasts).
_TEMP_RANGE_C = (-60.0, 60.0)
_WIND_MAX_MS = 75.0


def is_night_outlook_header(text: str) -> bool:
    """True when the first content line of a CSV names a ``time`` column (an hourly night outlook)."""
    delimiter = _sniff_delimiter(text)
    first = next((ln for ln in text.splitlines() if ln.strip() and not ln.lstrip().startswith("#")), "")
    headers = {_norm(h) for h in next(csv.reader([first], delimiter=delimiter), [])}
    return bool(headers & set(_ALIASES["time"]))


def _columns(headers: list[str], name: str, line: int) -> dict[str, int]:
    normalised = [_norm(h) for h in headers]
    found: dict[str, int] = {}
    for canonical, aliases in _ALIASES.items():
        hits = [i for i, h in enumerate(normalised) if h in aliases]
        if len(hits) > 1:
            raise InputError(f"two columns mean '{canonical}': "
                             f"{', '.join(headers[i].strip() for i in hits)}; keep one",
                             file=name, line=line, field=canonical)
        if hits:
            found[canonical] = hits[0]
    if "time" not in found:
        raise InputError("no 'time' column (expected a header such as station,time,sky_cover_pct,wind_speed_ms)",
                         file=name, line=line, field="time")
    winds = [k for k in _WIND if k in found]
    if len(winds) > 1:
        raise InputError(f"give the wind in one unit: {', '.join(winds)} are all present",
                         file=name, line=line, field=winds[1])
    if "air_temp_c" in found and "air_temp_f" in found:
        raise InputError("give the temperature in one unit: both 'air_temp_c' and 'air_temp_f' are present",
                         file=name, line=line, field="air_temp_f")
    if "sky_cover_pct" not in found and not winds:
        raise InputError("the outlook needs a 'sky_cover_pct' or a wind column", file=name, line=line,
                         field="sky_cover_pct")
    return found


def parse_night_outlook_csv(text: str, *, name: str = "<night outlook>", station: str | None = None) -> pd.DataFrame:
    """Parse night-outlook CSV text.

    Parameters
    ----------
    text : str
        The file's content.
    name : str
        The file name used in error messages.
    station : str, optional
        The station for every row when the file has no ``station`` column (a
        default for empty cells when it has one).

    Returns
    -------
    pandas.DataFrame
        Columns :data:`NIGHT_OUTLOOK_COLUMNS`: ``station`` (str), ``time`` (the
        text as given, stripped; the caller reads naive times in the station's
        zone), ``sky_cover_pct``, ``wind_speed_ms`` [m s-1] and ``air_temp_c``
        (float, NaN where not given) and ``line``.

    Raises
    ------
    advisory.errors.InputError
        Empty file, missing columns, a line with too few or too many fields, an
        unreadable number or time, a value out of range, a row with neither sky
        nor wind, a station and hour given twice.
    """
    content, delimiter, header_line, headers = split_csv(text, name)
    cols = _columns(headers, name, header_line)
    if "station" not in cols and not station:
        raise InputError("no 'station' column; add one or name the station for the whole file",
                         file=name, line=header_line, field="station")
    wind_key = next((k for k in _WIND if k in cols), None)
    temp_key = "air_temp_c" if "air_temp_c" in cols else ("air_temp_f" if "air_temp_f" in cols else None)
    out = {k: [] for k in NIGHT_OUTLOOK_COLUMNS}
    seen: dict[tuple[str, str], int] = {}
    for line_no, line_text in content[1:]:
        cells = next(csv.reader([line_text], delimiter=delimiter))
        if len(cells) != len(headers):
            what = "fewer" if len(cells) < len(headers) else "more"
            raise InputError(f"the line has {len(cells)} fields, {what} than the header's {len(headers)} "
                             "(a line cut short or a stray separator)", file=name, line=line_no)

        def cell(key, cells=cells):
            i = cols.get(key)
            return cells[i].strip() if i is not None else ""

        st = cell("station") or (station or "")
        if not st:
            raise InputError("the station is empty", file=name, line=line_no, field="station")
        when = cell("time")
        if not when:
            raise InputError("the time is empty", file=name, line=line_no, field="time")
        try:
            pd.Timestamp(when)
        except (ValueError, TypeError):
            raise InputError(f"'{when}' is not a time in ISO 8601 (like 2026-04-08T22:00-07:00)",
                             file=name, line=line_no, field="time") from None
        sky = _number(cell("sky_cover_pct"), name=name, line=line_no, field="sky_cover_pct", unit="%")
        if not math.isnan(sky) and not 0.0 <= sky <= 100.0:
            raise InputError(f"sky cover {sky:g} % is not within 0-100 %", file=name, line=line_no,
                             field="sky_cover_pct")
        wind = math.nan
        if wind_key:
            wind = _number(cell(wind_key), name=name, line=line_no, field=wind_key) * _WIND[wind_key]
            if not math.isnan(wind) and not 0.0 <= wind <= _WIND_MAX_MS:
                raise InputError(f"wind {cell(wind_key)} is outside 0 to {_WIND_MAX_MS:g} m/s",
                                 file=name, line=line_no, field=wind_key)
        temp = math.nan
        if temp_key:
            temp = _number(cell(temp_key), name=name, line=line_no, field=temp_key)
            if temp_key == "air_temp_f" and not math.isnan(temp):
                temp = (temp - 32.0) * 5.0 / 9.0
            if not math.isnan(temp) and not _TEMP_RANGE_C[0] <= temp <= _TEMP_RANGE_C[1]:
                raise InputError(f"temperature {temp:.1f} °C is outside the plausible range "
                                 f"{_TEMP_RANGE_C[0]:.0f} to {_TEMP_RANGE_C[1]:.0f} °C",
                                 file=name, line=line_no, field=temp_key)
        if math.isnan(sky) and math.isnan(wind):
            raise InputError("the row gives neither a sky cover nor a wind", file=name, line=line_no,
                             field="sky_cover_pct" if "sky_cover_pct" in cols else wind_key)
        key = (st, when)
        if key in seen:
            raise InputError(f"station '{st}' and time {when} already given on line {seen[key]}",
                             file=name, line=line_no, field="time")
        seen[key] = line_no
        for k, v in (("station", st), ("time", when), ("sky_cover_pct", sky), ("wind_speed_ms", wind),
                     ("air_temp_c", temp), ("line", line_no)):
            out[k].append(v)
    if not out["time"]:
        raise InputError("the file has a header but no rows", file=name, line=header_line)
    frame = pd.DataFrame(out, columns=list(NIGHT_OUTLOOK_COLUMNS))
    for col in ("sky_cover_pct", "wind_speed_ms", "air_temp_c"):
        frame[col] = frame[col].astype(float)
    return frame


def read_night_outlook_csv(path, *, station: str | None = None) -> pd.DataFrame:
    """Read and parse a night-outlook CSV file (see :func:`parse_night_outlook_csv`)."""
    return parse_night_outlook_csv(read_text(path), name=str(path), station=station)


def localize_time(text: str, tz: str, *, name: str, line: int) -> pd.Timestamp:
    """The UTC instant of an outlook time: its own offset, or the station's zone for a naive time."""
    t = pd.Timestamp(text)
    if t.tzinfo is not None:
        return t.tz_convert("UTC")
    try:
        return t.tz_localize(tz, ambiguous="raise", nonexistent="raise").tz_convert("UTC")
    except Exception:  # pytz/zoneinfo raise different classes for the two cases
        raise InputError(f"local time {text} does not exist or happens twice in {tz} (a clock change); "
                         "give it with its UTC offset", file=name, line=line, field="time") from None


# --------------------------------------------------------------------------- storing and loading
@dataclass
class NightOutlookImport:
    """What a night-outlook import did."""

    file: str
    rows: int = 0
    added: int = 0
    updated: int = 0
    unchanged: int = 0
    stations: list[str] = field(default_factory=list)
    first_utc: str | None = None
    last_utc: str | None = None

    def text(self) -> str:
        span = f" from {self.first_utc} to {self.last_utc} UTC" if self.first_utc else ""
        return (f"{self.file}: {self.rows} night-outlook hours{span} ({', '.join(self.stations)}): "
                f"{self.added} added, {self.updated} updated, {self.unchanged} unchanged")

    def as_dict(self) -> dict:
        return dataclasses.asdict(self)


def import_night_outlook(db, path, *, station: str | None = None, now=None) -> NightOutlookImport:
    """Read a night-outlook CSV and upsert its hours into ``night_outlooks``, all or nothing.

    An hour already stored for the station is updated; naive times are read in
    the station's zone.  Raises :class:`advisory.errors.InputError` for a
    malformed file or an unknown station, naming the line and field; nothing
    is written then.
    """
    import datetime as _dt

    from sqlalchemy import select

    from advisory.store.schema import NightOutlook, Station

    now = now or _dt.datetime.now(_dt.UTC)
    frame = read_night_outlook_csv(path, station=station)
    name = str(path)
    report = NightOutlookImport(file=Path(name).name, rows=len(frame))
    with db.transaction() as session:
        from advisory.ingest.outlook_import import _resolve_stations

        found = _resolve_stations(session, set(frame["station"]) | ({station} if station else set()))

        def unknown(st, **where):
            known = ", ".join(session.scalars(select(Station.code).order_by(Station.code))) or "none"
            return InputError(f"no station '{st}' (stations: {known})", **where)

        if station is not None and station not in found:
            raise unknown(station, field="--station")
        times = []
        for row in frame.itertuples(index=False):
            if row.station not in found:
                raise unknown(row.station, file=name, line=int(row.line), field="station")
            st = found[row.station]
            times.append(localize_time(row.time, st.timezone, name=name, line=int(row.line)))
        frame = frame.assign(utc=times, station_id=[found[s].id for s in frame["station"]])
        dup = frame.duplicated(["station_id", "utc"], keep="first")
        if dup.any():
            r = frame[dup].iloc[0]
            first = frame[(frame["station_id"] == r.station_id) & (frame["utc"] == r.utc)].iloc[0]
            raise InputError(f"the same hour as line {int(first.line)} ({r.utc.isoformat()})", file=name,
                             line=int(r.line), field="time")
        ids = sorted(set(frame["station_id"]))
        lo, hi = min(times).to_pydatetime(), max(times).to_pydatetime()
        existing = {(o.station_id, o.valid_time): o for o in session.scalars(
            select(NightOutlook).where(NightOutlook.station_id.in_(ids), NightOutlook.valid_time >= lo,
                                       NightOutlook.valid_time <= hi))}
        for row in frame.itertuples(index=False):
            when = row.utc.to_pydatetime()
            values = {k: None if math.isnan(v) else float(v) for k, v in
                      (("sky_cover_pct", row.sky_cover_pct), ("wind_speed_ms", row.wind_speed_ms),
                       ("air_temp_c", row.air_temp_c))}
            old = existing.get((row.station_id, when))
            if old is None:
                o = NightOutlook(station_id=row.station_id, valid_time=when, imported_at=now, **values)
                session.add(o)
                existing[(row.station_id, when)] = o
                report.added += 1
            elif all((getattr(old, k) is None and v is None) or (getattr(old, k) is not None and v is not None
                                                                  and abs(getattr(old, k) - v) < 1e-9)
                     for k, v in values.items()):
                report.unchanged += 1
            else:
                for k, v in values.items():
                    setattr(old, k, v)
                old.imported_at = now
                report.updated += 1
        report.stations = sorted({found[s].code for s in frame["station"]})
        report.first_utc, report.last_utc = lo.isoformat(), hi.isoformat()
    return report


def load_night_outlooks(session, station_ids, start_utc, end_utc) -> dict[int, pd.DataFrame]:
    """Stored outlook hours per station in ``[start, end]``: frames indexed by UTC time.

    Columns ``sky_cover_pct``, ``wind_speed_ms``, ``air_temp_c`` (NaN where not
    given); a station without hours in the window is absent.
    """
    from sqlalchemy import select

    from advisory.store.schema import NightOutlook

    ids = list(station_ids)
    if not ids:
        return {}
    rows = session.execute(
        select(NightOutlook.station_id, NightOutlook.valid_time, NightOutlook.sky_cover_pct,
               NightOutlook.wind_speed_ms, NightOutlook.air_temp_c)
        .where(NightOutlook.station_id.in_(ids),
               NightOutlook.valid_time >= pd.Timestamp(start_utc).floor("us").to_pydatetime(),
               NightOutlook.valid_time <= pd.Timestamp(end_utc).ceil("us").to_pydatetime())
        .order_by(NightOutlook.station_id, NightOutlook.valid_time)).all()
    if not rows:
        return {}
    frame = pd.DataFrame(rows, columns=["station_id", "time", "sky_cover_pct", "wind_speed_ms", "air_temp_c"])
    frame["time"] = pd.to_datetime(frame["time"], utc=True)
    for c in ("sky_cover_pct", "wind_speed_ms", "air_temp_c"):
        frame[c] = frame[c].astype(float)
    return {int(sid): g.drop(columns="station_id").set_index("time") for sid, g in frame.groupby("station_id")}


def list_night_outlooks(db, *, station: str | None = None, since=None) -> list[dict]:
    """Stored night outlooks, one row per station and night (the local date of its evening: an hour
    before local noon belongs to the night that began the day before), by station and night.

    Each row: station, night, hours, first and last local time, sky cover and wind (lowest and
    highest), the lowest forecast temperature, and when the latest of its hours was imported.
    ``since`` (a date) keeps the nights from that evening on.  An unknown station raises
    :class:`advisory.errors.InputError` naming ``--station``.
    """
    from sqlalchemy import select

    from advisory.ingest.outlook_import import station_option
    from advisory.store.schema import NightOutlook, Station

    with db.transaction() as session:
        q = select(NightOutlook, Station.code, Station.timezone).join(Station, Station.id == NightOutlook.station_id)
        if station is not None:
            q = q.where(NightOutlook.station_id == station_option(session, station).id)
        groups: dict[tuple[str, str], list] = {}
        for o, code, tz in session.execute(q.order_by(Station.code, NightOutlook.valid_time)).all():
            local = pd.Timestamp(o.valid_time).tz_convert(tz)
            night = (local - pd.Timedelta(hours=12)).date()
            if since is not None and night < since:
                continue
            groups.setdefault((code, night.isoformat()), []).append((local, o))
    out = []
    for (code, night), hours in groups.items():
        sky, wind, temp = (_span([getattr(o, attr) for _, o in hours])
                           for attr in ("sky_cover_pct", "wind_speed_ms", "air_temp_c"))
        out.append({"station": code, "night": night, "hours": len(hours),
                    "first_local": hours[0][0].isoformat(), "last_local": hours[-1][0].isoformat(),
                    "sky_cover_min_pct": sky[0], "sky_cover_max_pct": sky[1],
                    "wind_min_ms": wind[0], "wind_max_ms": wind[1], "low_c": temp[0],
                    "imported_at": max(o.imported_at for _, o in hours).isoformat(timespec="seconds")})
    return out


def _span(values) -> tuple[float | None, float | None]:
    vals = [v for v in values if v is not None]
    return (min(vals), max(vals)) if vals else (None, None)


def format_night_outlooks(rows: list[dict]) -> str:
    """The rows of :func:`list_night_outlooks` as a table (local clock times, ranges as low-high)."""
    if not rows:
        return "no night outlook stored (use `advisory outlook import FILE`)"

    def rng(lo, hi, fmt):
        if lo is None:
            return "-"
        return format(lo, fmt) if abs(hi - lo) < 1e-9 else f"{format(lo, fmt)}-{format(hi, fmt)}"

    lines = [f"{'station':<16} {'night':<10} {'hours':>5} {'from':>5} {'to':>5} {'sky %':>7} {'wind m/s':>9} "
             f"{'low °C':>7}  imported"]
    for r in rows:
        low = "-" if r["low_c"] is None else f"{r['low_c']:.1f}"
        lines.append(f"{r['station']:<16} {r['night']:<10} {r['hours']:>5} {r['first_local'][11:16]:>5} "
                     f"{r['last_local'][11:16]:>5} {rng(r['sky_cover_min_pct'], r['sky_cover_max_pct'], '.0f'):>7} "
                     f"{rng(r['wind_min_ms'], r['wind_max_ms'], '.1f'):>9} {low:>7}  {r['imported_at']}")
    return "\n".join(lines)
