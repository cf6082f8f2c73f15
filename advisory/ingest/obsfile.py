"""Observation files: read a station CSV into canonical, SI, UTC form (no database).

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
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from advisory.errors import InputError
from advisory.ingest.obstimes import (
    MAX_BAD_LINES,
    Problems,
    Times,
    clip_text,
    fast_iso_times,
    fmt_utc,
    parse_utc_offset,
    resolve_times,
    scan_lines,
    text_times,
)
from advisory.ingest.qc import VALUE_COLUMNS
from advisory.physics.moisture import dew_point_c_from_rh, rel_humidity_pct_from_dew_point

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


_FAST_ENCODINGS = {"utf-8", "ascii", "latin-1", "iso8859-1", "cp1252", "utf-8-sig", "iso8859-15"}


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
                parse_utc_offset(v, file=file, line=line)
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


#: A reading this far ahead of the computer's clock is refused (more than clock skew) [s].
FUTURE_SKEW_S = 10 * 60


def parse_observation_bytes(raw: bytes, station: Any, *, file_name: str = "<data>",
                            now: dt.datetime | None = None, **options: Any) -> ParsedObservations:
    """Like :func:`read_observation_file`, from the file's bytes.

    ``now`` is the clock against which readings from the future are refused (default: this
    computer's clock; a reading more than :data:`FUTURE_SKEW_S` ahead is refused with its line).
    """
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
    problems = Problems(name)
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
    t_ns = resolve_times(times, keep, opts, st.timezone, time_col[2], name, first_data_line, problems)
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
    clock = (now or dt.datetime.now(dt.UTC)).timestamp()
    ahead = np.flatnonzero(t_s > clock + FUTURE_SKEW_S)
    if len(ahead):
        when = dict(zip(lines[ahead[:MAX_BAD_LINES]].tolist(), t_s[ahead[:MAX_BAD_LINES]].tolist(), strict=False))
        problems.add(lines[ahead], lambda ln: (
            f"time {fmt_utc(when[ln])} is in the future (more than {FUTURE_SKEW_S // 60} min ahead of this "
            "computer's clock): check the logger's clock and date"))
        problems.raise_if_any()
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
                f"time {fmt_utc(when[ln])} already given on line {pairs[ln]} with other values"))
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


def _check_structure(body: bytes, opts: ReadOptions, n_fields: int, header_line: int,
                     problems: Problems) -> None:
    """Lines with more or fewer fields than the header (a blank line is skipped), or broken quoting
    (csv module; quoted files only)."""
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
            if len(fields) > n_fields or (0 < len(fields) < n_fields and any(f.strip() for f in fields)):
                bad.append(line)
                counts[line] = len(fields)
    except csv.Error as exc:
        why = str(exc)
        problems.add(np.array([start]), lambda ln: f"broken quoting ({why})")
    if bad:
        problems.add(np.array(bad), lambda ln: f"{counts[ln]} field{'' if counts[ln] == 1 else 's'}, the header "
                                                f"has {n_fields}" + (" (a cut or incomplete line)"
                                                                     if counts[ln] < n_fields else ""))


def _raise_structure_error(body: bytes, opts: ReadOptions, n_fields: int, header_line: int, name: str,
                           exc: Exception) -> None:
    """pandas refused the file: name the lines, or pass pandas' reason on."""
    problems = Problems(name)
    _check_structure(body, opts, n_fields, header_line, problems)
    if not problems.total:
        raise InputError(f"cannot read as CSV: {exc}", file=name) from None
    problems.raise_if_any()


def _read_columns(body: bytes, opts: ReadOptions, read_kw: dict, names: list[str], time_idx: int,
                  value_idx: dict[str, int], value_cols: dict, header_line: int, name: str,
                  problems: Problems) -> tuple[dict[str, np.ndarray], Times]:
    """Read the value columns (pandas) and the time column (vectorised scan when possible)."""
    first_data_line = header_line + 1
    n_fields = len(names)
    # Unquoted files in an ASCII-compatible encoding are scanned with numpy (field counts, and the
    # time column when it is ISO 8601); others go through the csv module and pandas alone.
    scannable = (b'"' not in body and ord(opts.delimiter) < 128
                 and codecs.lookup(opts.encoding).name in _FAST_ENCODINGS)
    scan = scan_lines(body, opts.delimiter, time_idx) if scannable else None
    if scan is not None:
        too_many = np.flatnonzero(scan.nfields > n_fields)
        if len(too_many):
            counts = dict(zip((too_many[:MAX_BAD_LINES] + first_data_line).tolist(),
                              scan.nfields[too_many[:MAX_BAD_LINES]].tolist(), strict=False))
            problems.add(too_many + first_data_line,
                         lambda ln: f"{counts[ln]} fields, the header has {n_fields}")
        short = np.flatnonzero((scan.nfields > 0) & (scan.nfields < n_fields))
        if len(short):  # a cut line (a blank line is only skipped); few such lines: read them as text
            texts = body.split(b"\n")[1:]
            cut = [k for k in short.tolist() if k < len(texts) and texts[k].strip(b" \t\r")]
            if cut:
                got = {k + first_data_line: int(scan.nfields[k]) for k in cut[:MAX_BAD_LINES]}
                problems.add(np.array(cut) + first_data_line, lambda ln: (
                    f"{got.get(ln, '?')} field{'' if got.get(ln) == 1 else 's'}, the header has {n_fields} "
                    "(a cut or incomplete line)"))
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
        times = fast_iso_times(scan, opts.encoding) if len(scan.fs) == n_rows else None
        if times is None:
            time_text = _read_values(body, read_kw, names, [time_idx], time_idx, {}, {}, header_line, name,
                                     opts, problems)["__time__"]
    if times is None:
        times = text_times(time_text, opts, name)
    return values, times


def _read_values(body: bytes, read_kw: dict, names: list[str], usecols: list[int], time_idx: int | None,
                 value_idx: dict[str, int], value_cols: dict, header_line: int, name: str, opts: ReadOptions,
                 problems: Problems) -> dict[str, np.ndarray | pd.Series]:
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
                                 f"{src} {clip_text(vals.get(ln))!r} is not a number")
                df[col] = num.astype("float64")
    except pd.errors.ParserError as exc:
        _raise_structure_error(body, opts, len(names), header_line, name, exc)
    except (UnicodeDecodeError, csv.Error) as exc:
        raise InputError(f"cannot read as CSV: {exc}", file=name) from None
    out: dict[str, Any] = {stored: df[names[i]].to_numpy(dtype=float) for stored, i in value_idx.items()}
    if time_idx is not None:
        out["__time__"] = df[names[time_idx]]
    return out


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
            _fill(vals, derived, "dew_point_c", dew, rh, (rh > 0), air, dew_point_c_from_rh, n)
        if dew is not None:
            _fill(vals, derived, "rel_humidity_pct", rh, dew, True, air, rel_humidity_pct_from_dew_point, n)
    return derived


def _fill(vals, derived, name, target, source, usable, air, fn, n) -> None:
    """Where ``target`` is missing (or absent) and air and ``source`` are known, set it to ``fn(air, source)``."""
    need = ~np.isnan(air) & ~np.isnan(source) & (np.isnan(target) if target is not None else True) & usable
    if not need.any():
        return
    v = np.asarray(fn(air[need], source[need]), dtype=float)
    v = np.where(np.isfinite(v), v, np.nan)
    new = target.copy() if target is not None else np.full(n, np.nan)
    new[need] = v
    vals[name] = new
    derived[name] = int(np.count_nonzero(~np.isnan(v)))
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

