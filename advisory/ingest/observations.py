"""Station observations: read files, convert units, derive moisture, QC, store, load.

File format
-----------
A CSV file with one header line.  The canonical columns (DESIGN.md) are

================================  ===========================================
column                            stored as
================================  ===========================================
``time``                          ISO 8601 date-time; with a UTC offset
                                  (``2024-04-02T21:00:00-07:00``, ``...Z``) or
                                  naive, read in the station's zone
``time_utc``                      as ``time``, but a naive value is UTC
``air_temp_c`` / ``air_temp_f``   ``air_temp_c``
``dew_point_c`` / ``dew_point_f`` ``dew_point_c``
``rel_humidity_pct``              ``rel_humidity_pct``
``wind_speed_ms`` / ``_kmh`` /    ``wind_speed_ms``
``_mph`` / ``_kn``
``cloud_cover_pct`` /             ``cloud_cover_pct``
``cloud_cover_okta``
``upper_air_temp_c`` / ``_f``     ``upper_air_temp_c`` (tower sensor; its
                                  height is in the station's settings)
================================  ===========================================

Header names are matched without regard to case or surrounding spaces; other
columns are ignored (and listed in the summary).  An empty cell, ``NA`` or
``NaN`` is missing.  A station's ``column_map`` maps a logger's own headers to
these names (``{"TIMESTAMP": "time", "AirT_F": "air_temp_f"}``); its optional
``"_options"`` entry holds reading options for that logger (below).

Reading options
---------------
Set, from weakest to strongest, in the station's ``column_map["_options"]``,
in ``# key=value`` lines at the top of the file (before the header), or by the
caller (command-line options).  Other ``#`` lines at the top are comments.

``ambiguous``
    How to read a naive local time that occurs twice when clocks fall back:
    ``error`` (default: the file is refused, naming the lines), ``earliest``
    (the first occurrence, still on summer time), ``latest`` (the second, on
    standard time) or ``infer`` (in file order: the first reading of a wall
    time is the earlier instant, its repeat the later one).
``nonexistent``
    How to read a naive local time skipped when clocks spring forward:
    ``error`` (default), ``before`` (with the UTC offset in force before the
    change: a logger whose clock had not yet moved) or ``after`` (with the
    offset after it).
``utc_offset``
    Naive times are at this fixed offset from UTC (``-08:00``), not in the
    station's zone; for loggers kept on standard time all year.  No time is
    then ambiguous or missing.
``time_format``
    A ``strftime`` format for the time column (``%m/%d/%Y %H:%M``), or
    ``epoch`` for seconds since 1970-01-01 UTC.  Default ISO 8601.
``delimiter`` (default ``,``), ``decimal`` (default ``.``), ``encoding``
    (default ``utf-8``; a UTF-8 byte-order mark is allowed), ``missing``
    (extra missing-value markers, comma-separated: ``-9999,-6999``).

Moisture
--------
When a row has a dew point but no relative humidity, the humidity is derived
from the dew point and the air temperature, and the other way round, with the
Magnus form of Alduchov & Eskridge (1996) **over liquid water at all
temperatures**: hygrometers report relative humidity with respect to water,
also below 0 °C (WMO convention), so the dew point derived from it is a dew
point, not a frost point.  The frost point (over ice), where needed, comes from
:func:`advisory.physics.moisture.frost_point_c`.

Import
------
:func:`import_file` reads a whole file first; a malformed file raises
:class:`~advisory.errors.InputError` naming the file and its first bad lines
before anything is written.  Then, in one transaction, it merges the readings
with what is stored: a new time is inserted; a stored time whose values agree
is left alone (so importing a file twice adds nothing); a stored time missing
some values gets them filled in (overlapping files merge); a stored time that
holds a different value is a conflict, kept as stored and reported, unless
``replace=True``.  QC is recomputed over the merged series around the file so
that flags do not depend on how readings were split into files.

References
----------
.. [1] Alduchov, O. A. & Eskridge, R. E. (1996) Improved Magnus form
   approximation of saturation vapor pressure. J. Appl. Meteor. 35, 601-609.
.. [2] WMO (2018) Guide to Instruments and Methods of Observation, WMO-No. 8,
   Vol. I, ch. 4 (humidity with respect to water).
"""

from __future__ import annotations

import codecs
import csv
import datetime as dt
import hashlib
import io
import math
import re
import zoneinfo
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from sqlalchemy import Integer, and_, select, type_coerce
from sqlalchemy.orm import Session

from advisory.errors import InputError, NotFoundError
from advisory.ingest.qc import (
    ALL_FLAGS,
    DEFAULT_CONFIG,
    FLAG_NAMES,
    QC_COLUMNS,
    VALUE_COLUMNS,
    QcConfig,
    apply_qc,
    find_gaps,
    qc_arrays,
)
from advisory.physics.moisture import dew_point_c_from_rh, rel_humidity_pct_from_dew_point
from advisory.store.schema import Import, Observation, Station

__all__ = [
    "ImportSummary",
    "ParsedObservations",
    "ReadOptions",
    "StationInfo",
    "apply_qc",
    "import_file",
    "load_observations",
    "load_observations_many",
    "parse_observation_bytes",
    "read_observation_file",
    "station_info",
]

#: Source column -> (stored column, conversion to the stored unit or None).
SOURCE_COLUMNS: dict[str, tuple[str, Any]] = {
    "air_temp_c": ("air_temp_c", None),
    "air_temp_f": ("air_temp_c", lambda f: (f - 32.0) * (5.0 / 9.0)),
    "dew_point_c": ("dew_point_c", None),
    "dew_point_f": ("dew_point_c", lambda f: (f - 32.0) * (5.0 / 9.0)),
    "rel_humidity_pct": ("rel_humidity_pct", None),
    "wind_speed_ms": ("wind_speed_ms", None),
    "wind_speed_kmh": ("wind_speed_ms", lambda v: v / 3.6),
    "wind_speed_mph": ("wind_speed_ms", lambda v: v * 0.44704),  # exact: 1 mi = 1609.344 m
    "wind_speed_kn": ("wind_speed_ms", lambda v: v * (1852.0 / 3600.0)),  # exact: 1 nmi = 1852 m
    "cloud_cover_pct": ("cloud_cover_pct", None),
    "cloud_cover_okta": ("cloud_cover_pct", lambda v: v * 12.5),
    "upper_air_temp_c": ("upper_air_temp_c", None),
    "upper_air_temp_f": ("upper_air_temp_c", lambda f: (f - 32.0) * (5.0 / 9.0)),
}
#: Time columns: name -> True when a naive value is UTC (else the station zone).
TIME_COLUMNS: dict[str, bool] = {"time": False, "time_utc": True}

_OPTION_VALUES = {
    "ambiguous": ("error", "earliest", "latest", "infer"),
    "nonexistent": ("error", "before", "after"),
}
_OPTION_KEYS = ("ambiguous", "nonexistent", "utc_offset", "time_format", "delimiter", "decimal",
                "encoding", "missing")
#: How many bad lines an error message quotes.
MAX_BAD_LINES = 5
_INSERT_CHUNK = 50_000
_VALUE_TOLERANCE = 1e-9


# ----------------------------------------------------------------------------------------------
# Options and station information


@dataclass(frozen=True)
class ReadOptions:
    """How to read one observation file (see the module docstring)."""

    ambiguous: str = "error"
    nonexistent: str = "error"
    utc_offset: str | None = None
    time_format: str | None = None
    delimiter: str = ","
    decimal: str = "."
    encoding: str = "utf-8"
    missing: tuple[str, ...] = ()

    def updated(self, values: dict[str, Any], *, source: str, file: str | None = None,
                line: int | None = None) -> ReadOptions:
        """A copy with ``values`` applied, each checked; unknown keys are an error."""
        changes: dict[str, Any] = {}
        for key, value in values.items():
            if value is None:
                continue
            k = str(key).strip().lower().replace("-", "_")
            if k not in _OPTION_KEYS:
                raise InputError(f"unknown reading option {key!r} in {source}; known: "
                                 + ", ".join(_OPTION_KEYS), file=file, line=line, field=str(key))
            if k == "missing":
                items = value if isinstance(value, list | tuple) else str(value).split(",")
                changes[k] = tuple(str(v).strip() for v in items if str(v).strip())
                continue
            v = str(value).strip()
            if k in _OPTION_VALUES and v.lower() not in _OPTION_VALUES[k]:
                raise InputError(f"{k} must be one of {', '.join(_OPTION_VALUES[k])}, not {v!r} "
                                 f"(in {source})", file=file, line=line, field=k)
            if k in _OPTION_VALUES:
                v = v.lower()
            if k == "utc_offset":
                _parse_utc_offset(v, file=file, line=line)
            if k in ("delimiter", "decimal"):
                v = {"tab": "\t", "\\t": "\t", "semicolon": ";", "comma": ",", "space": " "}.get(v.lower(), v)
                if len(v) != 1:
                    raise InputError(f"{k} must be one character, not {value!r}", file=file, line=line,
                                     field=k)
            if k == "encoding":
                try:
                    codecs.lookup(v)
                except LookupError:
                    raise InputError(f"unknown encoding {v!r}", file=file, line=line, field=k) from None
            changes[k] = v
        return replace(self, **changes)


@dataclass(frozen=True)
class StationInfo:
    """The station fields the reader needs (a plain copy of a :class:`Station` row)."""

    id: int | None
    code: str
    timezone: str
    column_map: dict[str, Any] = field(default_factory=dict)
    inbox: str | None = None


def station_info(station: Any) -> StationInfo:
    """A :class:`StationInfo` from a :class:`Station` row or any object with the same fields."""
    if isinstance(station, StationInfo):
        return station
    return StationInfo(id=getattr(station, "id", None), code=str(getattr(station, "code", "")),
                       timezone=str(getattr(station, "timezone", "UTC") or "UTC"),
                       column_map=dict(getattr(station, "column_map", None) or {}),
                       inbox=getattr(station, "inbox", None))


def get_station(session: Session, code: str) -> Station:
    """The station with this code.

    Raises
    ------
    NotFoundError
        With the known codes in the message.
    """
    st = session.scalar(select(Station).where(Station.code == code))
    if st is None:
        known = session.scalars(select(Station.code).order_by(Station.code)).all()
        hint = f"; known stations: {', '.join(known)}" if known else "; no stations yet (import a farm file)"
        raise NotFoundError(f"no station with code {code!r}{hint}", field="STATION")
    return st


_OFFSET_RE = re.compile(r"^(?:UTC|GMT)?\s*([+-])(\d{1,2})(?::?(\d{2}))?$", re.IGNORECASE)


def _parse_utc_offset(text: str, *, file: str | None = None, line: int | None = None) -> dt.timedelta:
    t = text.strip()
    if t.upper() in ("Z", "UTC", "GMT", "+00:00", "0"):
        return dt.timedelta(0)
    m = _OFFSET_RE.match(t)
    if not m:
        raise InputError(f"utc_offset must look like -08:00 or +0530, not {text!r}", file=file, line=line,
                         field="utc_offset")
    hours, minutes = int(m.group(2)), int(m.group(3) or 0)
    if hours > 18 or minutes >= 60:
        raise InputError(f"utc_offset out of range: {text!r}", file=file, line=line, field="utc_offset")
    sign = -1 if m.group(1) == "-" else 1
    return sign * dt.timedelta(hours=hours, minutes=minutes)


# ----------------------------------------------------------------------------------------------
# Parsing


@dataclass
class ParsedObservations:
    """A file read into canonical, SI, UTC form (not yet quality-controlled).

    Attributes
    ----------
    file : str
        The file's name as given.
    sha256 : str
        Hash of the file's bytes.
    frame : DataFrame
        Indexed by ``time_utc`` (aware UTC DatetimeIndex, whole seconds, sorted,
        unique); columns :data:`~advisory.ingest.qc.VALUE_COLUMNS` as float
        (NaN = missing).
    rows_read : int
        Data lines holding a time.
    blank_rows : int
        Blank lines, or lines with a time and no value, skipped.
    duplicate_rows : int
        Repeated lines (same time, same values) dropped.
    columns : dict
        Stored column -> the file header it came from.
    derived : dict
        Stored column -> number of values derived (moisture).
    ignored_columns : list of str
        Headers not used.
    options : ReadOptions
        The options in force.
    """

    file: str
    sha256: str
    frame: pd.DataFrame
    rows_read: int
    blank_rows: int
    duplicate_rows: int
    columns: dict[str, str]
    derived: dict[str, int]
    ignored_columns: list[str]
    options: ReadOptions

    @property
    def t_s(self) -> np.ndarray:
        """Reading times [s since the epoch, UTC]."""
        return self.frame.index.as_unit("s").asi8.astype(np.int64)


def read_observation_file(path: str | Path, station: Any, **options: Any) -> ParsedObservations:
    """Read an observation file into canonical form; pure (no database).

    Parameters
    ----------
    path : path-like
        The CSV file.
    station : Station or StationInfo
        Supplies the zone for naive times and the column map.
    **options
        Reading options that win over the file's and the station's
        (``ambiguous``, ``nonexistent``, ``utc_offset``, ``time_format`` ...;
        None values are ignored).

    Returns
    -------
    ParsedObservations

    Raises
    ------
    InputError
        The file cannot be read, has no time column or no value column, is not
        valid text in its encoding, or has unparsable lines (the message names
        the first ones with their line numbers).
    """
    name = str(path)
    try:
        raw = Path(path).read_bytes()
    except IsADirectoryError:
        raise InputError("is a folder, not a file", file=name) from None
    except OSError as exc:
        raise InputError(f"cannot read the file: {exc.strerror or exc}", file=name) from None
    return parse_observation_bytes(raw, station, file_name=name, **options)


@dataclass
class _Problems:
    """Bad lines collected while reading, reported together."""

    file: str
    items: list[tuple[int, str]] = field(default_factory=list)
    total: int = 0

    def add(self, lines: np.ndarray, describe) -> None:
        lines = np.asarray(lines)
        self.total += len(lines)
        for ln in lines[:MAX_BAD_LINES]:
            self.items.append((int(ln), describe(int(ln))))

    def raise_if_any(self, what: str = "cannot be read") -> None:
        if not self.total:
            return
        self.items.sort()
        shown = self.items[:MAX_BAD_LINES]
        detail = "; ".join(f"line {ln}: {msg}" for ln, msg in shown)
        more = f" (first {len(shown)} shown)" if self.total > len(shown) else ""
        noun = "line" if self.total == 1 else "lines"
        raise InputError(f"{self.total} {noun} {what}{more}: {detail}", file=self.file, line=shown[0][0])


def _split_directives(raw: bytes, file: str) -> tuple[int, int, list[tuple[int, str, str]]]:
    """Find the header: returns (byte offset of header, its 1-based line, directives)."""
    pos = 0
    line_no = 0
    directives: list[tuple[int, str, str]] = []
    if raw.startswith(b"\xef\xbb\xbf"):
        pos = 3
    while pos < len(raw):
        end = raw.find(b"\n", pos)
        end = len(raw) if end < 0 else end + 1
        line = raw[pos:end]
        line_no += 1
        stripped = line.strip()
        if stripped.startswith(b"#"):
            body = stripped[1:].decode("latin-1").strip()
            if "=" in body:
                key, _, value = body.partition("=")
                directives.append((line_no, key.strip(), value.strip()))
        elif stripped:
            return pos, line_no, directives
        pos = end
    raise InputError("the file has no header line (no data at all)", file=file)


def _zone_label(opts: ReadOptions, tz_name: str, utc_column: bool) -> str:
    if utc_column:
        return "UTC"
    if opts.utc_offset:
        return f"UTC{opts.utc_offset}"
    return tz_name


def parse_observation_bytes(raw: bytes, station: Any, *, file_name: str = "<data>",
                            **options: Any) -> ParsedObservations:
    """Like :func:`read_observation_file`, from the file's bytes."""
    st = station_info(station)
    name = file_name
    digest = hashlib.sha256(raw).hexdigest()
    if not raw.strip():
        raise InputError("the file is empty", file=name)
    nul = raw.find(b"\x00")
    if nul >= 0:
        raise InputError("holds NUL bytes: not a text CSV file", file=name, line=raw.count(b"\n", 0, nul) + 1)

    opts = ReadOptions()
    station_opts = st.column_map.get("_options") if isinstance(st.column_map, dict) else None
    if station_opts:
        if not isinstance(station_opts, dict):
            raise InputError(f"column_map '_options' of station {st.code} must be a table", field="_options")
        opts = opts.updated(station_opts, source=f"the column map of station {st.code}")
    header_pos, header_line, directives = _split_directives(raw, name)
    for ln, key, value in directives:
        opts = opts.updated({key: value}, source="the file", file=name, line=ln)
    opts = opts.updated({k: v for k, v in options.items() if v is not None}, source="the options")

    # Encoding: decode once to check, so a bad byte is reported with its line.
    try:
        raw.decode(opts.encoding)
    except UnicodeDecodeError as exc:
        line = raw.count(b"\n", 0, exc.start) + 1
        bad = raw[exc.start:exc.start + 1].hex()
        raise InputError(f"is not valid {opts.encoding} text (byte 0x{bad}); save it as UTF-8 or add a "
                         f"'# encoding=...' line before the header", file=name, line=line) from None
    body = raw[header_pos:]
    header_text = body.split(b"\n", 1)[0].decode(opts.encoding).rstrip("\r")
    try:
        headers = next(csv.reader([header_text], delimiter=opts.delimiter, skipinitialspace=True))
    except (csv.Error, StopIteration):
        raise InputError("cannot read the header line", file=name, line=header_line) from None
    headers = [h.strip() for h in headers]

    # Map headers to canonical names.
    cmap = {str(k).strip(): str(v).strip() for k, v in (st.column_map or {}).items()
            if not str(k).startswith("_") and isinstance(v, str)}
    cmap_lower = {k.lower(): v for k, v in cmap.items()}
    time_col: tuple[int, str, bool] | None = None
    value_cols: dict[str, tuple[int, str, Any]] = {}
    ignored: list[str] = []
    for i, h in enumerate(headers):
        target = cmap.get(h) or cmap_lower.get(h.lower()) or h
        t = target.strip().lower()
        if t in TIME_COLUMNS:
            if time_col is not None:
                raise InputError(f"two time columns: {headers[time_col[0]]!r} and {h!r}", file=name,
                                 line=header_line, field=h)
            time_col = (i, h, TIME_COLUMNS[t])
        elif t in SOURCE_COLUMNS:
            stored, conv = SOURCE_COLUMNS[t]
            if stored in value_cols:
                other = headers[value_cols[stored][0]]
                raise InputError(f"columns {other!r} and {h!r} both give {stored}; keep one", file=name,
                                 line=header_line, field=h)
            value_cols[stored] = (i, h, conv)
        else:
            if h in cmap or h.lower() in cmap_lower:
                raise InputError(f"the column map of station {st.code} maps {h!r} to {target!r}, which is not "
                                 f"a known column ({', '.join([*TIME_COLUMNS, *SOURCE_COLUMNS])})",
                                 file=name, line=header_line, field=h)
            ignored.append(h)
    if time_col is None:
        raise InputError(f"no time column (expected 'time' or 'time_utc', or a column-map entry; headers: "
                         f"{', '.join(repr(h) for h in headers)})", file=name, line=header_line)
    if not value_cols:
        raise InputError("no observation columns (expected e.g. air_temp_c, air_temp_f, dew_point_c, "
                         f"rel_humidity_pct, wind_speed_ms; headers: {', '.join(repr(h) for h in headers)})",
                         file=name, line=header_line)

    names = [f"c{i}" for i in range(len(headers))]
    first_data_line = header_line + 1
    problems = _Problems(name)
    read_kw = dict(sep=opts.delimiter, decimal=opts.decimal, encoding=opts.encoding, header=None, skiprows=1,
                   names=names, index_col=False, skip_blank_lines=False, skipinitialspace=True,
                   na_values=list(opts.missing) or None, engine="c", quotechar='"')
    value_idx = {stored: i for stored, (i, _h, _c) in value_cols.items()}
    values, times = _read_columns(body, opts, read_kw, names, time_col[0], value_idx, value_cols, header_line,
                                  name, problems)
    n_rows = len(times.missing)
    if n_rows == 0:
        problems.raise_if_any()
        raise InputError("the file has a header but no data lines", file=name, line=header_line)

    time_missing = times.missing
    any_value = np.zeros(n_rows, dtype=bool)
    for v in values.values():
        any_value |= ~np.isnan(v)
    no_time_with_values = time_missing & any_value
    if no_time_with_values.any():
        problems.add(np.flatnonzero(no_time_with_values) + first_data_line, lambda ln: "values without a time")
    blank = time_missing & ~any_value
    keep = ~time_missing
    t_ns = _resolve_times(times, keep, opts, st.timezone, time_col[2], name, first_data_line, problems)
    problems.raise_if_any()

    # Rows with a time but no value carry nothing.
    empty = keep & ~any_value
    keep &= any_value
    rows_read = int((~time_missing).sum())
    sel = np.flatnonzero(keep)
    if not len(sel):
        raise InputError("the file holds no readings (every line's values are empty)", file=name,
                         line=header_line)
    t_s = np.floor_divide(t_ns[sel], 1_000_000_000)
    lines = sel + first_data_line
    naive_rows = ~times.aware[sel]
    stored_vals: dict[str, np.ndarray] = {}
    for stored, (_i, _h, conv) in value_cols.items():
        x = values[stored][sel]
        stored_vals[stored] = conv(x) if conv is not None else x
    del values

    derived = _derive_moisture(stored_vals, len(sel))

    # Sort by time; identical repeats are dropped, differing repeats are an error.
    order = np.argsort(t_s, kind="stable")
    t_s = t_s[order]
    lines = lines[order]
    naive_rows = naive_rows[order]
    for k in list(stored_vals):
        stored_vals[k] = stored_vals[k][order]
    dup_next = np.flatnonzero(t_s[1:] == t_s[:-1]) + 1
    duplicates = 0
    if len(dup_next):
        same = np.ones(len(dup_next), dtype=bool)
        for x in stored_vals.values():
            a, b = x[dup_next], x[dup_next - 1]
            same &= (a == b) | (np.isnan(a) & np.isnan(b))
        differ = dup_next[~same]
        if len(differ):
            pairs = dict(zip(lines[differ].tolist(), lines[differ - 1].tolist(), strict=False))
            when = dict(zip(lines[differ].tolist(), t_s[differ].tolist(), strict=False))
            hint = (" (if these are local times repeated when clocks fall back, add '# ambiguous=infer' "
                    "before the header)") if naive_rows[differ].any() else ""
            problems.add(np.sort(lines[differ]), lambda ln: (
                f"time {_fmt_utc(when[ln])} already given on line {pairs[ln]} with other values"))
            problems.raise_if_any("repeat a time" + hint)
        drop = np.zeros(len(t_s), dtype=bool)
        drop[dup_next] = True
        duplicates = int(drop.sum())
        t_s = t_s[~drop]
        for k in list(stored_vals):
            stored_vals[k] = stored_vals[k][~drop]

    index = pd.DatetimeIndex(pd.to_datetime(t_s, unit="s", utc=True), name="time_utc")
    frame = pd.DataFrame({c: stored_vals.get(c, np.full(len(t_s), np.nan)) for c in VALUE_COLUMNS},
                         index=index)
    return ParsedObservations(
        file=name, sha256=digest, frame=frame, rows_read=rows_read,
        blank_rows=int(blank.sum() + empty.sum()), duplicate_rows=duplicates,
        columns={stored: h for stored, (_i, h, _c) in value_cols.items()} | {"time": time_col[1]},
        derived=derived, ignored_columns=ignored, options=opts)


def _clip(text: Any, n: int = 30) -> str:
    s = "" if text is None else str(text)
    return s if len(s) <= n else s[: n - 1] + "…"


def _fmt_utc(t_s: int) -> str:
    return dt.datetime.fromtimestamp(int(t_s), dt.UTC).strftime("%Y-%m-%d %H:%M:%SZ")


def _check_structure(body: bytes, opts: ReadOptions, n_fields: int, header_line: int,
                     problems: _Problems) -> None:
    """Lines with more fields than the header, or broken quoting (csv module; quoted files only)."""
    text = body.decode(opts.encoding, errors="replace")
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=opts.delimiter, quotechar='"', strict=True,
                        skipinitialspace=True)
    bad: list[int] = []
    counts: dict[int, int] = {}
    start = header_line
    try:
        next(reader, None)
        start = header_line + reader.line_num
        for fields in reader:
            line = start
            start = header_line + reader.line_num
            if len(fields) > n_fields:
                bad.append(line)
                counts[line] = len(fields)
    except csv.Error as exc:
        why = str(exc)
        problems.add(np.array([start]), lambda ln: f"broken quoting ({why})")
    if bad:
        problems.add(np.array(bad), lambda ln: f"{counts[ln]} fields, the header has {n_fields}")


def _raise_structure_error(body: bytes, opts: ReadOptions, n_fields: int, header_line: int, name: str,
                           exc: Exception) -> None:
    """pandas refused the file: name the lines, or pass pandas' reason on."""
    problems = _Problems(name)
    _check_structure(body, opts, n_fields, header_line, problems)
    if not problems.total:
        raise InputError(f"cannot read as CSV: {exc}", file=name) from None
    problems.raise_if_any()


@dataclass
class _Times:
    """The time column, split into what each row holds (all arrays one entry per data row)."""

    missing: np.ndarray     # bool: no time in the row
    unreadable: np.ndarray  # bool: a time that is not a date-time
    aware: np.ndarray       # bool: the time carries a UTC offset (``utc_ns`` holds it)
    utc_ns: np.ndarray      # int64 ns since the epoch, for aware rows
    wall_ns: np.ndarray     # int64 ns of the naive wall time, for naive rows
    text: Any               # rows -> list of the rows' original text (for messages)
    epoch: bool = False     # times were seconds since the epoch (always UTC)


_NAT = np.iinfo(np.int64).min
_FAST_ENCODINGS = {"utf-8", "ascii", "latin-1", "iso8859-1", "cp1252", "utf-8-sig", "iso8859-15"}


def _read_columns(body: bytes, opts: ReadOptions, read_kw: dict, names: list[str], time_idx: int,
                  value_idx: dict[str, int], value_cols: dict, header_line: int, name: str,
                  problems: _Problems) -> tuple[dict[str, np.ndarray], _Times]:
    """Read the value columns (pandas) and the time column (vectorised scan when possible)."""
    first_data_line = header_line + 1
    n_fields = len(names)
    # Unquoted files in an ASCII-compatible encoding are scanned with numpy (field counts, and the
    # time column when it is ISO 8601); others go through the csv module and pandas alone.
    scannable = (b'"' not in body and ord(opts.delimiter) < 128
                 and codecs.lookup(opts.encoding).name in _FAST_ENCODINGS)
    scan = _scan_lines(body, opts.delimiter, time_idx) if scannable else None
    if scan is not None:
        too_many = np.flatnonzero(scan.nfields > n_fields)
        if len(too_many):
            counts = dict(zip((too_many[:MAX_BAD_LINES] + first_data_line).tolist(),
                              scan.nfields[too_many[:MAX_BAD_LINES]].tolist(), strict=False))
            problems.add(too_many + first_data_line,
                         lambda ln: f"{counts[ln]} fields, the header has {n_fields}")
    else:
        # pandas drops extra fields of some lines silently (index_col=False), so count them first.
        _check_structure(body, opts, n_fields, header_line, problems)
    problems.raise_if_any()
    fast_times = scan is not None and opts.time_format is None
    usecols = sorted(value_idx.values())
    if not fast_times:
        usecols = sorted([*usecols, time_idx])
    values = _read_values(body, read_kw, names, usecols, None if fast_times else time_idx, value_idx,
                          value_cols, header_line, name, opts, problems)
    time_text = values.pop("__time__", None)
    n_rows = len(next(iter(values.values()))) if values else 0
    times = None
    if fast_times:
        # Where the scan and pandas disagree on rows, or a time has another layout, pandas reads it.
        times = _fast_iso_times(scan, opts.encoding) if len(scan.fs) == n_rows else None
        if times is None:
            time_text = _read_values(body, read_kw, names, [time_idx], time_idx, {}, {}, header_line, name,
                                     opts, problems)["__time__"]
    if times is None:
        times = _text_times(time_text, opts, name)
    return values, times


def _read_values(body: bytes, read_kw: dict, names: list[str], usecols: list[int], time_idx: int | None,
                 value_idx: dict[str, int], value_cols: dict, header_line: int, name: str, opts: ReadOptions,
                 problems: _Problems) -> dict[str, np.ndarray | pd.Series]:
    """Value columns as float arrays (and the time column as text under ``__time__``)."""
    first_data_line = header_line + 1
    cols = [names[i] for i in usecols]
    dtypes: dict[str, Any] = {names[i]: "float64" for i in value_idx.values()}
    if time_idx is not None:
        dtypes[names[time_idx]] = object
    full = len(usecols) == len(names)
    kw = dict(read_kw, usecols=None if full else cols)
    try:
        try:
            df = pd.read_csv(io.BytesIO(body), dtype=dtypes, **kw)
        except (ValueError, TypeError, OverflowError) as exc:
            if isinstance(exc, pd.errors.ParserError):
                raise
            # A value that is not a number: read as text to name the lines.
            df = pd.read_csv(io.BytesIO(body), dtype=object, **kw)
            for stored, i in value_idx.items():
                col = names[i]
                text = df[col].astype(object)
                norm = text.str.replace(opts.decimal, ".", regex=False) if opts.decimal != "." else text
                num = pd.to_numeric(norm, errors="coerce")
                bad = text.notna() & num.isna() & (text.astype(str).str.strip() != "")
                if bad.any():
                    rows = np.flatnonzero(bad.to_numpy())
                    lines = rows + first_data_line
                    src = value_cols[stored][1]
                    vals = dict(zip(lines[:MAX_BAD_LINES].tolist(), text.iloc[rows[:MAX_BAD_LINES]].tolist(),
                                    strict=False))
                    problems.add(lines, lambda ln, src=src, vals=vals:
                                 f"{src} {_clip(vals.get(ln))!r} is not a number")
                df[col] = num.astype("float64")
    except pd.errors.ParserError as exc:
        _raise_structure_error(body, opts, len(names), header_line, name, exc)
    except (UnicodeDecodeError, csv.Error) as exc:
        raise InputError(f"cannot read as CSV: {exc}", file=name) from None
    out: dict[str, Any] = {stored: df[names[i]].to_numpy(dtype=float) for stored, i in value_idx.items()}
    if time_idx is not None:
        out["__time__"] = df[names[time_idx]]
    return out


@dataclass
class _Scan:
    buf: np.ndarray
    nfields: np.ndarray
    fs: np.ndarray  # time field start (byte offset), per data line
    fe: np.ndarray  # time field end


def _scan_lines(body: bytes, delimiter: str, time_idx: int) -> _Scan | None:
    """Locate data lines, their field counts and the time field, vectorised (unquoted files only)."""
    buf = np.frombuffer(body, dtype=np.uint8)
    nl = np.flatnonzero(buf == 10)
    if not len(nl):
        z = np.zeros(0, dtype=np.int64)
        return _Scan(buf, z, z, z)
    starts = nl + 1
    ends = np.r_[nl[1:], len(buf)].astype(np.int64)
    if starts[-1] >= len(buf):
        starts, ends = starts[:-1], ends[:-1]
    if not len(starts):
        z = np.zeros(0, dtype=np.int64)
        return _Scan(buf, z, z, z)
    last = buf[np.maximum(ends - 1, 0)]
    ends = ends - ((ends > starts) & (last == 13))
    d = np.flatnonzero(buf == ord(delimiter))
    d_pad = np.r_[d, len(buf)]
    a = np.searchsorted(d, starts)
    b = np.searchsorted(d, ends)
    nfields = np.where(ends > starts, b - a + 1, 0)
    has = nfields > time_idx
    fs = starts.copy() if time_idx == 0 else d_pad[np.minimum(a + time_idx - 1, len(d))] + 1
    nxt = a + time_idx
    fe = np.where(nxt < b, d_pad[np.minimum(nxt, len(d))], ends)
    fs = np.where(has, fs, ends)
    fe = np.where(has, fe, ends)
    top = len(buf) - 1
    for _ in range(4):  # skip a few spaces around the field (not a per-row loop)
        fs = fs + ((fs < fe) & (buf[np.minimum(fs, top)] == 32))
        fe = fe - ((fe > fs) & (buf[np.maximum(fe - 1, 0)] == 32))
    return _Scan(buf, nfields, fs.astype(np.int64), fe.astype(np.int64))


def _days_from_civil(y: np.ndarray, m: np.ndarray, d: np.ndarray) -> np.ndarray:
    """Days since 1970-01-01 of proleptic Gregorian dates (H. Hinnant's algorithm)."""
    y = y - (m <= 2)
    era = np.floor_divide(y, 400)
    yoe = y - era * 400
    mp = (m + 9) % 12
    doy = (153 * mp + 2) // 5 + d - 1
    doe = yoe * 365 + yoe // 4 - yoe // 100 + doy
    return era * 146097 + doe - 719468


_DAYS_IN_MONTH = np.array([0, 31, 28, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31])


def _fast_iso_times(scan: _Scan, encoding: str) -> _Times | None:
    """Parse ``YYYY-MM-DD[T ]HH:MM[:SS][Z|±HH[[:]MM]]`` fields without Python objects.

    Works on byte columns gathered from the file buffer (one numpy gather per
    character position, never a loop per row).  Returns None when any
    non-empty field has another layout; the general parser then reads the
    column and names the bad lines.
    """
    buf, fs, fe = scan.buf, scan.fs, scan.fe
    n = len(fs)
    w = fe - fs
    missing = w <= 0
    present = ~missing
    if n == 0:
        z = np.zeros(0, dtype=np.int64)
        return _Times(missing, missing, missing, z, z, lambda rows: [])
    if (w > 25).any() or ((w < 16) & present).any():
        return None
    top = len(buf) - 1
    cache: dict[int, np.ndarray] = {}

    def col(c: int) -> np.ndarray:
        if c not in cache:
            x = buf[np.minimum(fs + c, top)]
            cache[c] = np.where(c < w, x, 0).astype(np.int16)
        return cache[c]

    def digit(c: int) -> np.ndarray:
        return col(c) - 48

    def isdig(c: int) -> np.ndarray:
        x = col(c)
        return (x >= 48) & (x <= 57)

    ok = present.copy()
    for c in (0, 1, 2, 3, 5, 6, 8, 9, 11, 12, 14, 15):
        ok &= isdig(c)
    ok &= (col(4) == 45) & (col(7) == 45) & (col(13) == 58)
    ok &= (col(10) == 84) | (col(10) == 32) | (col(10) == 116)
    has_sec = (col(16) == 58) & isdig(17) & isdig(18)
    rem = w - np.where(has_sec, 19, 16)

    def at(k: int) -> np.ndarray:  # character k after the seconds (or minutes)
        return np.where(has_sec, col(19 + k), col(16 + k))

    def dat(k: int) -> np.ndarray:
        return at(k) - 48

    def dig_at(*ks: int) -> np.ndarray:
        out = np.ones(n, dtype=bool)
        for k in ks:
            x = at(k)
            out &= (x >= 48) & (x <= 57)
        return out

    c0 = at(0)
    naive = rem == 0
    zulu = (rem == 1) & ((c0 == 90) | (c0 == 122))
    sign_ok = (c0 == 43) | (c0 == 45)
    f3 = (rem == 3) & sign_ok & dig_at(1, 2)
    f5 = (rem == 5) & sign_ok & dig_at(1, 2, 3, 4)
    f6 = (rem == 6) & sign_ok & dig_at(1, 2, 4, 5) & (at(3) == 58)
    ok &= naive | zulu | f3 | f5 | f6
    i64 = np.int64
    year = (digit(0).astype(i64) * 1000 + digit(1) * 100 + digit(2) * 10 + digit(3))
    month = (digit(5) * 10 + digit(6)).astype(i64)
    day = (digit(8) * 10 + digit(9)).astype(i64)
    hour = (digit(11) * 10 + digit(12)).astype(i64)
    minute = (digit(14) * 10 + digit(15)).astype(i64)
    sec = np.where(has_sec, digit(17) * 10 + digit(18), 0).astype(i64)
    offsets = f3 | f5 | f6
    off_h = np.where(offsets, dat(1) * 10 + dat(2), 0).astype(i64)
    off_m = np.where(f5, dat(3) * 10 + dat(4), np.where(f6, dat(4) * 10 + dat(5), 0)).astype(i64)
    leap = ((year % 4 == 0) & (year % 100 != 0)) | (year % 400 == 0)
    mc = np.clip(month, 0, 12)
    dim = _DAYS_IN_MONTH[mc] + ((mc == 2) & leap)
    ok &= (month >= 1) & (month <= 12) & (day >= 1) & (day <= dim) & (hour <= 23) & (minute <= 59)
    ok &= (sec <= 59) & (off_h <= 18) & (off_m <= 59)
    ok &= (year >= 1678) & (year <= 2261)  # nanoseconds since 1970 fit in int64
    if not (ok | missing).all():
        return None
    wall_s = _days_from_civil(year, month, day) * 86400 + hour * 3600 + minute * 60 + sec
    offset_s = np.where(offsets, np.where(c0 == 45, -1, 1) * (off_h * 3600 + off_m * 60), 0)
    aware = present & ~naive
    wall_ns = np.where(present & naive, wall_s * 1_000_000_000, _NAT)
    utc_ns = np.where(aware, (wall_s - offset_s) * 1_000_000_000, _NAT)

    def text(rows_: np.ndarray) -> list[str]:
        return [bytes(buf[fs[r]:fe[r]]).decode(encoding, "replace") for r in rows_]

    none = np.zeros(n, dtype=bool)
    return _Times(missing=missing, unreadable=none, aware=aware, utc_ns=utc_ns, wall_ns=wall_ns, text=text)


def _has_offset(values: list) -> np.ndarray:
    """Whether each ISO 8601 string ends in a UTC offset (``Z``, ``±hh``, ``±hhmm``, ``±hh:mm``).

    Vectorised: the strings are joined into one byte buffer and the characters
    near each end are inspected with numpy.
    """
    n = len(values)
    if n == 0:
        return np.zeros(0, dtype=bool)
    joined = "\x00".join(values).encode("utf-8", "surrogatepass") + b"\x00"
    buf = np.frombuffer(joined, dtype=np.uint8)
    ends = np.flatnonzero(buf == 0)
    starts = np.r_[0, ends[:-1] + 1]
    # Ignore trailing blanks.
    for _ in range(4):
        ends = ends - ((ends > starts) & np.isin(buf[np.maximum(ends - 1, 0)], (32, 9, 13)))
    length = ends - starts

    def char_at(back: int) -> tuple[np.ndarray, np.ndarray]:
        ok = length - back >= 11  # after the date and the 'T' (YYYY-MM-DDT)
        return np.where(ok, buf[np.maximum(ends - back, 0)], 0), ok

    last, _ = char_at(1)
    out = (last == ord("Z")) | (last == ord("z"))
    for back in (3, 5, 6):  # ±hh, ±hhmm, ±hh:mm
        c, ok = char_at(back)
        out |= ok & ((c == ord("+")) | (c == ord("-")))
    return out


def _text_times(text: pd.Series, opts: ReadOptions, file: str) -> _Times:
    """The general time parser (pandas), for any layout, ``time_format`` and ``epoch``."""
    n = len(text)
    obj = text.astype(object)
    missing = obj.isna().to_numpy().copy()
    strs = obj.where(~missing, "").astype(str)
    missing |= (strs.str.strip() == "").to_numpy(dtype=bool)
    present = ~missing
    utc_ns = np.full(n, _NAT, dtype=np.int64)
    wall_ns = np.full(n, _NAT, dtype=np.int64)
    fmt = opts.time_format
    s = strs.where(present, None)

    def texts(rows: np.ndarray) -> list[str]:
        return strs.iloc[rows].tolist()

    if fmt and fmt.lower() == "epoch":
        num = pd.to_numeric(s, errors="coerce").to_numpy(dtype=float)
        with np.errstate(invalid="ignore"):
            good = present & np.isfinite(num) & (np.abs(num) < 9e9)  # nanoseconds fit in int64
        utc_ns[good] = (np.floor(num[good]) * 1e9).astype(np.int64)
        return _Times(missing, present & ~good, good, utc_ns, wall_ns, texts, epoch=True)
    kw: dict[str, Any] = {"format": fmt or "ISO8601", "errors": "coerce"}
    if fmt:
        has_off = present & (("%z" in fmt) or ("%Z" in fmt))
    else:
        has_off = np.zeros(n, dtype=bool)
        has_off[present] = _has_offset(strs[present].tolist())
    naive = present & ~has_off
    try:
        if has_off.any():
            a = pd.DatetimeIndex(pd.to_datetime(s.where(has_off, None), utc=True, **kw))
            utc_ns = np.where(has_off, _ns(a), _NAT)
        if naive.any():
            b = pd.DatetimeIndex(pd.to_datetime(s.where(naive, None), **kw))
            wall_ns = np.where(naive, _ns(b), _NAT)
    except (ValueError, TypeError, OverflowError) as exc:
        raise InputError(f"cannot read the time column: {exc}", file=file) from None
    unreadable = (has_off & (utc_ns == _NAT)) | (naive & (wall_ns == _NAT))
    return _Times(missing, unreadable, has_off & ~unreadable, utc_ns, wall_ns, texts)


def _resolve_times(times: _Times, keep: np.ndarray, opts: ReadOptions, tz_name: str, utc_column: bool,
                   file: str, first_line: int, problems: _Problems) -> np.ndarray:
    """UTC ns for every kept row; naive wall times are placed in their zone (bad rows -> problems)."""
    fmt = opts.time_format
    what = ("is not a number of seconds since 1970" if times.epoch else
            f"is not a date-time{' in the format ' + repr(fmt) if fmt else ' (ISO 8601)'}")
    _add_bad_times(problems, keep & times.unreadable, times.text, first_line, what)
    out = np.where(times.aware, times.utc_ns, 0)
    naive = keep & ~times.aware & ~times.unreadable
    if naive.any():
        local_ns, amb_bad, nonex_bad, dup_amb = _localize(times.wall_ns, naive, opts, tz_name, utc_column,
                                                          file)
        out = np.where(naive & (local_ns != _NAT), local_ns, out)
        zone = _zone_label(opts, tz_name, utc_column)
        _add_bad_times(problems, amb_bad, times.text, first_line,
                       f"occurs twice in {zone} (clocks fall back); add '# ambiguous=earliest', 'latest' or "
                       "'infer' before the header, or write times with a UTC offset")
        _add_bad_times(problems, dup_amb, times.text, first_line,
                       f"occurs more than twice in {zone}, cannot infer which instant is meant")
        _add_bad_times(problems, nonex_bad, times.text, first_line,
                       f"does not exist in {zone} (clocks spring forward); add '# nonexistent=before' or "
                       "'after' before the header, or write times with a UTC offset")
    return out


def _ns(idx: pd.DatetimeIndex) -> np.ndarray:
    """int64 nanoseconds since the epoch of a naive or aware index; NaT (int64 min) where missing or
    outside what nanoseconds can hold (years 1678-2261)."""
    if idx.tz is not None:
        idx = idx.tz_convert("UTC").tz_localize(None)
    secs = idx.as_unit("s").asi8
    ok = (secs != _NAT) & (np.abs(secs) < 9_000_000_000)
    out = np.full(len(idx), _NAT, dtype=np.int64)
    if ok.all():
        return idx.as_unit("ns").asi8.astype(np.int64)
    out[ok] = idx[ok].as_unit("ns").asi8
    return out


def _add_bad_times(problems: _Problems, bad: np.ndarray, text: Any, first_line: int, why: str) -> None:
    if not bad.any():
        return
    rows = np.flatnonzero(bad)
    vals = dict(zip((rows[:MAX_BAD_LINES] + first_line).tolist(), text(rows[:MAX_BAD_LINES]), strict=False))
    problems.add(rows + first_line, lambda ln: f"time {_clip(vals.get(ln))!r} {why}")


def _localize(wall_ns: np.ndarray, mask: np.ndarray, opts: ReadOptions, tz_name: str, utc_column: bool,
              file: str) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Naive wall times (int64 ns) of the rows in ``mask`` -> UTC ns, by the ambiguous/nonexistent policy.

    Returns (ns, ambiguous-and-refused, nonexistent-and-refused, ambiguous-repeated-too-often),
    each one entry per row.
    """
    n = len(wall_ns)
    out = np.full(n, _NAT, dtype=np.int64)
    amb_bad = np.zeros(n, dtype=bool)
    nonex_bad = np.zeros(n, dtype=bool)
    dup_bad = np.zeros(n, dtype=bool)
    rows = np.flatnonzero(mask & (wall_ns != _NAT))
    wall = wall_ns[rows]
    if utc_column:
        out[rows] = wall
        return out, amb_bad, nonex_bad, dup_bad
    if opts.utc_offset:
        out[rows] = wall - int(_parse_utc_offset(opts.utc_offset).total_seconds()) * 1_000_000_000
        return out, amb_bad, nonex_bad, dup_bad
    try:
        zoneinfo.ZoneInfo(tz_name)
    except (zoneinfo.ZoneInfoNotFoundError, ValueError):
        raise InputError(f"the station's time zone {tz_name!r} is not an IANA zone name", file=file,
                         field="timezone") from None
    naive = pd.DatetimeIndex(wall.view("datetime64[ns]"))
    ones = np.ones(len(rows), dtype=bool)
    a = _ns(naive.tz_localize(tz_name, ambiguous=ones, nonexistent="NaT"))
    b = _ns(naive.tz_localize(tz_name, ambiguous=~ones, nonexistent="NaT"))
    nonexistent = a == _NAT
    ambiguous = ~nonexistent & (a != b)
    res = a.copy()
    if ambiguous.any():
        early = np.minimum(a, b)
        late = np.maximum(a, b)
        policy = opts.ambiguous
        if policy == "error":
            amb_bad[rows[ambiguous]] = True
        elif policy == "earliest":
            res = np.where(ambiguous, early, res)
        elif policy == "latest":
            res = np.where(ambiguous, late, res)
        else:  # infer: in file order, the first reading of a wall time is the earlier instant
            k = np.flatnonzero(ambiguous)
            occurrence = pd.Series(wall[k]).groupby(wall[k]).cumcount().to_numpy()
            res[k] = np.where(occurrence == 0, early[k], late[k])
            dup_bad[rows[k[occurrence >= 2]]] = True
    if nonexistent.any():
        k = np.flatnonzero(nonexistent)
        if opts.nonexistent == "error":
            nonex_bad[rows[k]] = True
        else:
            shift = "shift_backward" if opts.nonexistent == "before" else "shift_forward"
            moved = naive[k].tz_localize(tz_name, ambiguous=np.ones(len(k), dtype=bool), nonexistent=shift)
            offset = _ns(moved.tz_localize(None)) - _ns(moved.tz_convert("UTC"))
            res[k] = wall[k] - offset
    out[rows] = res
    return out, amb_bad, nonex_bad, dup_bad


def _derive_moisture(vals: dict[str, np.ndarray], n: int) -> dict[str, int]:
    """Fill dew point from RH and RH from dew point where a row has only one (in place)."""
    derived: dict[str, int] = {}
    air = vals.get("air_temp_c")
    if air is None:
        return derived
    dew = vals.get("dew_point_c")
    rh = vals.get("rel_humidity_pct")
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        if rh is not None:
            need = ~np.isnan(air) & ~np.isnan(rh) & (np.isnan(dew) if dew is not None else True)
            need &= rh > 0
            if need.any():
                d = np.asarray(dew_point_c_from_rh(air[need], rh[need]), dtype=float)
                d = np.where(np.isfinite(d), d, np.nan)
                new = dew.copy() if dew is not None else np.full(n, np.nan)
                new[need] = d
                vals["dew_point_c"] = new
                derived["dew_point_c"] = int(np.count_nonzero(~np.isnan(d)))
        if dew is not None:
            need = ~np.isnan(air) & ~np.isnan(dew) & (np.isnan(rh) if rh is not None else True)
            if need.any():
                r = np.asarray(rel_humidity_pct_from_dew_point(air[need], dew[need]), dtype=float)
                r = np.where(np.isfinite(r), r, np.nan)
                new = rh.copy() if rh is not None else np.full(n, np.nan)
                new[need] = r
                vals["rel_humidity_pct"] = new
                derived["rel_humidity_pct"] = int(np.count_nonzero(~np.isnan(r)))
    return derived


# ----------------------------------------------------------------------------------------------
# Import


@dataclass
class ImportSummary:
    """What one import did.  ``as_dict()`` is JSON-ready; ``text()`` is for people."""

    station_code: str
    file: str
    sha256: str
    import_id: int | None
    rows_read: int
    readings: int
    rows_added: int
    rows_filled: int
    rows_replaced: int
    rows_unchanged: int
    conflicts: int
    requalified: int
    already_imported: bool
    replace: bool
    first_utc: str | None
    last_utc: str | None
    columns: dict[str, str]
    derived: dict[str, int]
    ignored_columns: list[str]
    blank_rows: int
    duplicate_rows: int
    flags: dict[str, dict[str, int]]
    gaps: dict[str, Any]
    conflict_examples: list[dict[str, Any]]

    def as_dict(self) -> dict[str, Any]:
        from dataclasses import asdict

        return asdict(self)

    def text(self) -> str:
        lines = [f"{self.file} -> station {self.station_code}"
                 + (" (already imported: nothing new)" if self.already_imported else "")]
        lines.append(f"  {self.rows_read} rows read, {self.readings} readings {self.first_utc} .. {self.last_utc}")
        lines.append(f"  added {self.rows_added}, filled in {self.rows_filled}, replaced {self.rows_replaced}, "
                     f"unchanged {self.rows_unchanged}, conflicts {self.conflicts}")
        if self.derived:
            lines.append("  derived: " + ", ".join(f"{c} ({n})" for c, n in self.derived.items()))
        if self.ignored_columns:
            lines.append("  ignored columns: " + ", ".join(self.ignored_columns))
        if self.blank_rows or self.duplicate_rows:
            lines.append(f"  skipped {self.blank_rows} empty rows, {self.duplicate_rows} repeated rows")
        flagged = [f"{col} {name} {n}" for col, by in self.flags.items() for name, n in by.items()
                   if n and name != "values"]
        lines.append("  QC flags: " + (", ".join(flagged) if flagged else "none"))
        if self.gaps.get("count"):
            longest = self.gaps["longest"][0]
            lines.append(f"  gaps: {self.gaps['count']} ({self.gaps['missing_readings']} readings missing; "
                         f"longest {longest['start_utc']} .. {longest['end_utc']})")
        if self.requalified:
            lines.append(f"  QC of {self.requalified} stored neighbouring readings updated")
        if self.conflicts:
            verb = "replaced by the file" if self.replace else "kept as stored (use --replace to overwrite)"
            lines.append(f"  {self.conflicts} conflicting readings {verb}, e.g.:")
            for ex in self.conflict_examples[:5]:
                lines.append(f"    {ex['time_utc']} {ex['column']}: stored {ex['stored']}, file {ex['file']}")
        return "\n".join(lines)


def _is_database(obj: Any) -> bool:
    return hasattr(obj, "transaction") and hasattr(obj, "engine")


def import_file(target: Any, station_code: str, path: str | Path, *, replace: bool = False,
                config: QcConfig = DEFAULT_CONFIG, data: bytes | None = None, **options: Any) -> ImportSummary:
    """Import one observation file for a station: parse, QC, merge, all or nothing.

    Parameters
    ----------
    target : Database or Session
        With a :class:`~advisory.store.db.Database` the import runs in its own
        transaction (committed on success).  With a Session the caller owns the
        transaction; every check that can refuse the file runs before the
        first write, but on an unexpected error the caller must roll back.
    station_code : str
        The station's code.
    path : path-like
        The file.
    replace : bool, default False
        Overwrite stored readings that differ from the file's (conflicts);
        by default they are kept and reported.
    config : QcConfig
        QC thresholds.
    data : bytes, optional
        The file's content, already read (``path`` then only names it).
    **options
        Reading options (``ambiguous``, ``nonexistent``, ``utc_offset``,
        ``time_format`` ...), winning over the file's and the station's.

    Returns
    -------
    ImportSummary

    Raises
    ------
    InputError
        Malformed file (nothing is written); :class:`NotFoundError` for an
        unknown station.
    """
    def parse(info: StationInfo) -> ParsedObservations:
        if data is not None:
            return parse_observation_bytes(data, info, file_name=str(path), **options)
        return read_observation_file(path, info, **options)

    if _is_database(target):
        with target.transaction() as session:
            info = station_info(get_station(session, station_code))
        parsed = parse(info)
        with target.transaction() as session:
            _begin_write(session)
            station = get_station(session, station_code)
            return store_parsed(session, station, parsed, replace=replace, config=config)
    session: Session = target
    station = get_station(session, station_code)
    parsed = parse(station_info(station))
    return store_parsed(session, station, parsed, replace=replace, config=config)


def _begin_write(session: Session) -> None:
    """On SQLite take the write lock first, so concurrent imports wait instead of failing."""
    conn = session.connection()
    if conn.dialect.name == "sqlite":
        dbapi = conn.connection.driver_connection
        if not dbapi.in_transaction:
            conn.exec_driver_sql("BEGIN IMMEDIATE")


_TABLE = Observation.__table__
_time_col = type_coerce(_TABLE.c.time_utc, Integer)
_QC_NAMES = tuple(QC_COLUMNS.values())


def fetch_rows(session_or_conn: Any, station_ids: Sequence[int], t0: int | None, t1: int | None,
           columns: Sequence[str]) -> list[tuple]:
    """Rows (station_id, time_utc, *columns) for stations in [t0, t1), ordered."""
    cols = [_TABLE.c.station_id, _time_col.label("time_utc")] + [_TABLE.c[c] for c in columns]
    rows: list[tuple] = []
    ids = list(dict.fromkeys(int(i) for i in station_ids))
    for k in range(0, len(ids), 500):
        chunk = ids[k:k + 500]
        cond = [_TABLE.c.station_id.in_(chunk) if len(chunk) > 1 else _TABLE.c.station_id == chunk[0]]
        if t0 is not None:
            cond.append(_time_col >= t0)
        if t1 is not None:
            cond.append(_time_col < t1)
        stmt = select(*cols).where(and_(*cond)).order_by(_TABLE.c.station_id, _TABLE.c.time_utc)
        rows.extend(session_or_conn.execute(stmt).all())
    return rows


def rows_to_arrays(rows: list[tuple], columns: Sequence[str]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(station ids, times, matrix of the columns as float)."""
    if not rows:
        return (np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64), np.zeros((0, len(columns))))
    arr = np.array(rows, dtype=float)
    return arr[:, 0].astype(np.int64), arr[:, 1].astype(np.int64), arr[:, 2:]


def store_parsed(session: Session, station: Station, parsed: ParsedObservations, *, replace: bool = False,
                 config: QcConfig = DEFAULT_CONFIG) -> ImportSummary:
    """Merge parsed readings into the store (the core of :func:`import_file`)."""
    new_t = parsed.t_s
    new_v = parsed.frame[list(VALUE_COLUMNS)].to_numpy(dtype=float)
    n_new = len(new_t)
    # Flags of stored readings within `ctx` of the file can change; computing them exactly
    # needs another `ctx` of neighbours on each side.
    ctx = int(np.ceil(config.context_s))
    zone_lo, zone_hi = int(new_t[0]) - ctx, int(new_t[-1]) + ctx
    rows = fetch_rows(session, [station.id], zone_lo - ctx, zone_hi + ctx + 1, [*VALUE_COLUMNS, *_QC_NAMES])
    _ids, ex_t, ex = rows_to_arrays(rows, [*VALUE_COLUMNS, *_QC_NAMES])
    del rows
    nv = len(VALUE_COLUMNS)
    ex_v = ex[:, :nv]
    ex_q = ex[:, nv:].astype(np.int64)

    # Match file readings to stored ones.
    pos = np.searchsorted(ex_t, new_t)
    pos_c = np.minimum(pos, max(len(ex_t) - 1, 0))
    matched = (len(ex_t) > 0) & (ex_t[pos_c] == new_t) if len(ex_t) else np.zeros(n_new, dtype=bool)
    mi = np.flatnonzero(matched)
    ei = pos_c[mi]
    old = ex_v[ei]
    new = new_v[mi]
    both = ~np.isnan(old) & ~np.isnan(new)
    with np.errstate(invalid="ignore"):
        differs = both & (np.abs(old - new) > _VALUE_TOLERANCE * np.maximum(1.0, np.abs(old)))
    fills = np.isnan(old) & ~np.isnan(new)
    conflict = differs.any(axis=1)
    fill = ~conflict & fills.any(axis=1)
    merged = old.copy()
    merged[fills] = new[fills]
    if replace:
        take_new = np.where(conflict[:, None], ~np.isnan(new), fills)
        # Moisture is one measurement: take both of the file's values together.
        moist = [VALUE_COLUMNS.index("dew_point_c"), VALUE_COLUMNS.index("rel_humidity_pct")]
        file_moist = ~np.isnan(new[:, moist]).all(axis=1) & conflict
        take_new[:, moist] |= file_moist[:, None]
        merged = np.where(take_new, new, old)
    else:
        merged = np.where(conflict[:, None], old, merged)
    changed_rows = fill | (conflict & replace)

    # The merged series around the file, QC'd as a whole.
    add = np.flatnonzero(~matched)
    all_t = np.concatenate([ex_t, new_t[add]])
    all_v = np.concatenate([ex_v.copy(), new_v[add]])
    all_v[ei] = merged
    order = np.argsort(all_t, kind="stable")
    all_t = all_t[order]
    all_v = all_v[order]
    flags = qc_arrays(all_t, {c: all_v[:, j] for j, c in enumerate(VALUE_COLUMNS)}, config)
    q = np.column_stack([flags[c] for c in _QC_NAMES]) if len(all_t) else np.zeros((0, len(_QC_NAMES)),
                                                                                    dtype=np.int64)
    inv = np.empty_like(order)
    inv[order] = np.arange(len(order))
    n_ex = len(ex_t)
    q_ex = q[inv[:n_ex]]
    q_add = q[inv[n_ex:]]

    # Stored rows to update: changed values, or changed QC within the zone the file can influence.
    values_changed = np.zeros(n_ex, dtype=bool)
    values_changed[ei[changed_rows]] = True
    in_zone = (ex_t >= zone_lo) & (ex_t <= zone_hi)
    qc_changed = in_zone & (q_ex != ex_q).any(axis=1)
    upd = np.flatnonzero(values_changed | qc_changed)
    requalified = int(np.count_nonzero(qc_changed & ~values_changed))

    already = session.scalar(select(Import.id).where(Import.station_id == station.id,
                                                     Import.sha256 == parsed.sha256).limit(1)) is not None
    nothing = len(add) == 0 and len(upd) == 0
    conflict_examples = _conflict_examples(new_t[mi], old, new, differs, conflict)
    n_conf = int(conflict.sum())

    # QC of the file's readings (final, as stored).
    file_q = np.zeros((n_new, len(_QC_NAMES)), dtype=np.int64)
    file_q[add] = q_add
    file_q[mi] = q_ex[ei]
    file_vals = new_v.copy()
    file_vals[mi] = merged
    flag_counts = _flag_counts(file_q, file_vals)
    gaps = find_gaps(new_t, config)
    gap_info = {
        "count": len(gaps),
        "missing_readings": int(gaps["missing"].sum()) if len(gaps) else 0,
        "longest": [{"start_utc": r.start_utc.isoformat(), "end_utc": r.end_utc.isoformat(),
                     "duration_s": int(r.duration_s), "missing": int(r.missing)}
                    for r in gaps.head(5).itertuples()],
    }
    summary = ImportSummary(
        station_code=station.code, file=parsed.file, sha256=parsed.sha256, import_id=None,
        rows_read=parsed.rows_read, readings=n_new, rows_added=len(add), rows_filled=int(fill.sum()),
        rows_replaced=int((conflict & replace).sum()),
        rows_unchanged=int((~conflict & ~fill).sum()),
        conflicts=n_conf, requalified=requalified, already_imported=bool(already and nothing),
        replace=replace, first_utc=_fmt_utc(new_t[0]), last_utc=_fmt_utc(new_t[-1]),
        columns=dict(parsed.columns), derived=dict(parsed.derived), ignored_columns=list(parsed.ignored_columns),
        blank_rows=parsed.blank_rows, duplicate_rows=parsed.duplicate_rows, flags=flag_counts, gaps=gap_info,
        conflict_examples=conflict_examples)
    if already and nothing:
        return summary

    record = Import(station_id=station.id, file_name=Path(parsed.file).name[:500], sha256=parsed.sha256,
                    rows_read=parsed.rows_read, rows_added=summary.rows_added,
                    rows_replaced=summary.rows_replaced, conflicts=n_conf, summary={})
    session.add(record)
    session.flush()
    summary.import_id = record.id
    record.summary = {k: v for k, v in summary.as_dict().items() if k not in ("import_id",)}

    conn = session.connection()
    if len(add):
        _insert_rows(conn, station.id, record.id, new_t[add], new_v[add], q_add)
    if len(upd):
        final_v = ex_v.copy()
        final_v[ei] = merged
        imp = np.where(values_changed[upd], record.id, -1)
        _update_rows(conn, station.id, ex_t[upd], final_v[upd], q_ex[upd], imp)
    session.flush()
    return summary


def _conflict_examples(t: np.ndarray, old: np.ndarray, new: np.ndarray, differs: np.ndarray,
                       conflict: np.ndarray, limit: int = 10) -> list[dict[str, Any]]:
    out: list[dict[str, Any]] = []
    for r in np.flatnonzero(conflict)[:limit]:
        for j in np.flatnonzero(differs[r]):
            out.append({"time_utc": _fmt_utc(t[r]), "column": VALUE_COLUMNS[j],
                        "stored": round(float(old[r, j]), 4), "file": round(float(new[r, j]), 4)})
            if len(out) >= limit:
                return out
    return out


def _flag_counts(q: np.ndarray, vals: np.ndarray) -> dict[str, dict[str, int]]:
    out: dict[str, dict[str, int]] = {}
    for j, col in enumerate(VALUE_COLUMNS):
        present = ~np.isnan(vals[:, j])
        if not present.any():
            continue
        by = {"values": int(present.sum())}
        for bit, name in FLAG_NAMES.items():
            by[name] = int(np.count_nonzero(q[:, j] & bit))
        out[col] = by
    return out


def _placeholder(conn) -> str | None:
    style = conn.dialect.paramstyle
    return {"qmark": "?", "format": "%s", "pyformat": "%s"}.get(style)


#: Rows per INSERT statement: several rows per statement roughly halve SQLite's per-row cost.
_ROWS_PER_STATEMENT = 50


def _insert_rows(conn, station_id: int, import_id: int, t: np.ndarray, v: np.ndarray, q: np.ndarray) -> None:
    """Insert new readings with multi-row INSERT statements through the DBAPI cursor.

    Parameters are built by numpy (an object array per chunk), never by a
    Python loop per row.  What is the same for every row is written into the
    statement instead of bound: the station and import ids, value columns the
    file does not have (NULL) and, for rows that passed every QC test, the QC
    masks (0).  SQLite stores a bound NaN as NULL; other databases get None.
    """
    cols = ["station_id", "time_utc", *VALUE_COLUMNS, *_QC_NAMES, "import_id"]
    ph = _placeholder(conn)
    if ph is None:  # pragma: no cover - other DBAPI parameter styles: plain Core executemany
        for sl in _chunks(len(t)):
            obj = _param_block(t[sl], v[sl], q[sl], nan_to_none=True)
            conn.execute(_TABLE.insert(), [dict(zip(cols, (station_id, *r, import_id), strict=True))
                                           for r in obj.tolist()])
        return
    has_value = ~np.isnan(v).all(axis=0)
    vcols = np.flatnonzero(has_value)
    head = f"INSERT INTO {_TABLE.name} ({', '.join(cols)}) VALUES "
    nan_none = conn.dialect.name != "sqlite"
    clean = ~(q != 0).any(axis=1)

    def row_sql(bind_qc: bool) -> str:
        parts = [str(int(station_id)), ph]
        parts += [ph if has_value[j] else "NULL" for j in range(v.shape[1])]
        parts += [ph if bind_qc else "0"] * q.shape[1]
        parts.append(str(int(import_id)))
        return "(" + ", ".join(parts) + ")"

    k = _ROWS_PER_STATEMENT
    cur = conn.connection.cursor()
    try:
        for bind_qc in (False, True):
            rows = np.flatnonzero(clean != bind_qc)
            if not len(rows):
                continue
            one = row_sql(bind_qc)
            many_sql = head + ", ".join([one] * k)
            for sl in _chunks(len(rows)):
                r = rows[sl]
                obj = _param_block(t[r], v[np.ix_(r, vcols)], q[r] if bind_qc else q[r][:, :0],
                                   nan_to_none=nan_none)
                width = obj.shape[1]
                full = len(obj) // k * k
                if full:
                    cur.executemany(many_sql, obj[:full].reshape(-1, width * k).tolist())
                if full < len(obj):
                    cur.executemany(head + one, obj[full:].tolist())
    finally:
        cur.close()


def _param_block(t: np.ndarray, v: np.ndarray, q: np.ndarray, *, nan_to_none: bool) -> np.ndarray:
    """Rows of (time, values..., qc...) as Python objects, in an object array."""
    obj = np.empty((len(t), 1 + v.shape[1] + q.shape[1]), dtype=object)
    obj[:, 0] = t
    vals = obj[:, 1:1 + v.shape[1]]
    vals[:] = v
    if nan_to_none:
        vals[np.isnan(v)] = None
    obj[:, 1 + v.shape[1]:] = q
    return obj


def _chunks(n: int, size: int = _INSERT_CHUNK) -> Iterator[slice]:
    for k in range(0, n, size):
        yield slice(k, min(n, k + size))


def _update_rows(conn, station_id: int, t: np.ndarray, v: np.ndarray, q: np.ndarray,
                 import_ids: np.ndarray) -> None:
    """Update values and QC of stored readings; ``import_id`` only where ``import_ids >= 0``."""
    ph = _placeholder(conn) or "?"
    sets = ", ".join(f"{c} = {ph}" for c in (*VALUE_COLUMNS, *_QC_NAMES))
    sql = (f"UPDATE {_TABLE.name} SET {sets}, import_id = COALESCE({ph}, import_id) "
           f"WHERE station_id = {int(station_id)} AND time_utc = {ph}")
    cur = conn.connection.cursor()
    try:
        for sl in _chunks(len(t)):
            block = _param_block(t[sl], v[sl], q[sl], nan_to_none=True)
            imp = np.where(import_ids[sl] >= 0, import_ids[sl], 0).astype(object)
            imp[import_ids[sl] < 0] = None
            params = np.column_stack([block[:, 1:], imp, block[:, 0]])
            cur.executemany(sql, params.tolist())
    finally:
        cur.close()


# ----------------------------------------------------------------------------------------------
# Loading for the models


def _to_epoch(t: Any, name: str) -> int:
    """Whole seconds since the epoch, rounded up (times are stored in whole seconds)."""
    ts = pd.Timestamp(t)
    if ts.tzinfo is None:
        raise ValueError(f"{name} must be timezone-aware")
    return int(math.ceil(ts.timestamp()))


def _empty_frame(columns: Sequence[str]) -> pd.DataFrame:
    return pd.DataFrame({c: np.zeros(0, dtype=np.int64 if c.endswith("_qc") else float) for c in columns},
                        index=pd.DatetimeIndex([], tz="UTC", name="time_utc"))


def load_observations_many(session: Any, station_ids: Iterable[int], start_utc: Any, end_utc: Any, *,
                           qc_passed_only: bool = True, reject_mask: int = ALL_FLAGS,
                           columns: Sequence[str] | None = None,
                           include_qc: bool = False) -> dict[int, pd.DataFrame]:
    """Readings of many stations in [start, end), one query per 500 stations.

    Parameters
    ----------
    session : Session, Connection or Database
        Where to read.
    station_ids : iterable of int
        Station ids.
    start_utc, end_utc : datetime or Timestamp, timezone-aware
        Half-open interval [start, end).
    qc_passed_only : bool, default True
        Values whose QC mask has any bit of ``reject_mask`` set become NaN.
    reject_mask : int, default all bits
        Which QC bits make a value unusable (see :mod:`advisory.ingest.qc`).
    columns : sequence of str, optional
        Value columns to return (default all of
        :data:`~advisory.ingest.qc.VALUE_COLUMNS`).
    include_qc : bool, default False
        Also return the ``*_qc`` columns of the returned values.

    Returns
    -------
    dict of int to DataFrame
        For every requested id (empty frame when no data): indexed by
        ``time_utc`` (aware UTC, sorted), value columns as float [SI units
        in the names].
    """
    if _is_database(session):
        with session.transaction() as s:
            return load_observations_many(s, station_ids, start_utc, end_utc, qc_passed_only=qc_passed_only,
                                          reject_mask=reject_mask, columns=columns, include_qc=include_qc)
    ids = [int(i) for i in station_ids]
    cols = list(columns) if columns is not None else list(VALUE_COLUMNS)
    unknown = [c for c in cols if c not in QC_COLUMNS]
    if unknown:
        raise ValueError(f"unknown observation columns: {unknown}")
    qcs = [QC_COLUMNS[c] for c in cols]
    t0 = _to_epoch(start_utc, "start_utc")
    t1 = _to_epoch(end_utc, "end_utc")
    out_cols = cols + (qcs if include_qc else [])
    result = {i: _empty_frame(out_cols) for i in ids}
    if not ids or t1 <= t0:
        return result
    rows = fetch_rows(session, ids, t0, t1, [*cols, *qcs])
    sid, t, m = rows_to_arrays(rows, [*cols, *qcs])
    del rows
    if not len(t):
        return result
    k = len(cols)
    vals = m[:, :k]
    q = m[:, k:].astype(np.int64)
    if qc_passed_only:
        vals = np.where((q & int(reject_mask)) != 0, np.nan, vals)
    bounds = np.flatnonzero(np.r_[True, sid[1:] != sid[:-1], True])
    for a, b in zip(bounds[:-1], bounds[1:], strict=True):
        idx = pd.DatetimeIndex(pd.to_datetime(t[a:b], unit="s", utc=True), name="time_utc")
        data = {c: vals[a:b, j] for j, c in enumerate(cols)}
        if include_qc:
            data.update({c: q[a:b, j] for j, c in enumerate(qcs)})
        result[int(sid[a])] = pd.DataFrame(data, index=idx)
    return result


def load_observations(session: Any, station_id: int, start_utc: Any, end_utc: Any, *,
                      qc_passed_only: bool = True, reject_mask: int = ALL_FLAGS,
                      columns: Sequence[str] | None = None, include_qc: bool = False) -> pd.DataFrame:
    """Readings of one station in [start, end); see :func:`load_observations_many`."""
    return load_observations_many(session, [station_id], start_utc, end_utc, qc_passed_only=qc_passed_only,
                                  reject_mask=reject_mask, columns=columns,
                                  include_qc=include_qc)[int(station_id)]

