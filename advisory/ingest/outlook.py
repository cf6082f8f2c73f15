"""Read a day outlook: forecast daily highs and lows per station and date.

The file is what a grower copies from a weather service into a spreadsheet and
saves as CSV (comma, semicolon or tab separated), one row per station and date::

    station,date,high_c,low_c,min_rel_humidity_pct
    north-hill,2025-07-14,34.5,17.0,28
    north-hill,2025-07-15,36,18.5,

Columns (case and surrounding spaces ignored; spaces inside become ``_``):

* ``station`` -- the station's name as in the farm file (may be left out when
  the caller names one station for the whole file);
* ``date`` -- the local calendar date, ``YYYY-MM-DD`` (``YYYY/MM/DD`` is
  accepted);
* ``high_c`` or ``high_f`` -- the day's forecast maximum (``max_temp_c``,
  ``tmax_c`` and the ``_f`` forms are accepted too);
* ``low_c`` or ``low_f`` -- the forecast minimum of the morning (optional);
* ``min_rel_humidity_pct`` -- the day's forecast minimum relative humidity
  (optional; ``min_rh_pct`` accepted; a trailing ``%`` is allowed).

An empty cell is missing.  A row needs a high or a low.  Other columns are
ignored.  Lines starting with ``#`` and blank lines are skipped.  Any problem
raises :class:`advisory.errors.InputError` naming the file, line and field;
nothing is returned half-read.  Parsing only: the caller stores the result.
"""

from __future__ import annotations

import csv
import datetime as _dt
import math
import re
from pathlib import Path

import pandas as pd

from advisory.errors import InputError

__all__ = ["OUTLOOK_COLUMNS", "parse_outlook_csv", "read_outlook_csv", "read_text", "split_csv"]

#: Columns of the returned frame, in order.
OUTLOOK_COLUMNS = ("station", "date", "high_c", "low_c", "min_rel_humidity_pct", "line")

_ALIASES = {
    "station": ("station", "station_name", "site"),
    "date": ("date", "day", "local_date"),
    "high_c": ("high_c", "max_temp_c", "tmax_c", "high_temp_c"),
    "high_f": ("high_f", "max_temp_f", "tmax_f", "high_temp_f"),
    "low_c": ("low_c", "min_temp_c", "tmin_c", "low_temp_c"),
    "low_f": ("low_f", "min_temp_f", "tmin_f", "low_temp_f"),
    "min_rel_humidity_pct": ("min_rel_humidity_pct", "min_rh_pct", "min_rh", "min_humidity_pct"),
}
# Plausible ranges (common practice for screen-level air temperature).
_TEMP_RANGE_C = (-60.0, 60.0)
_DATE_RE = re.compile(r"^(\d{4})[-/](\d{1,2})[-/](\d{1,2})$")


def _norm(header: str) -> str:
    return re.sub(r"\s+", "_", header.strip().lstrip("\ufeff").strip().lower())


def _resolve_columns(headers: list[str], name: str) -> dict[str, int]:
    normalised = [_norm(h) for h in headers]
    found: dict[str, int] = {}
    for canonical, aliases in _ALIASES.items():
        hits = [i for i, h in enumerate(normalised) if h in aliases]
        if len(hits) > 1:
            raise InputError(f"two columns mean '{canonical}': "
                             f"{', '.join(headers[i].strip() for i in hits)}; keep one",
                             file=name, line=1, field=canonical)
        if hits:
            found[canonical] = hits[0]
    for kind in ("high", "low"):
        if f"{kind}_c" in found and f"{kind}_f" in found:
            raise InputError(f"give the {kind} in one unit: both '{kind}_c' and '{kind}_f' columns are present",
                             file=name, line=1, field=f"{kind}_f")
    if "date" not in found:
        raise InputError("no 'date' column (expected a header such as station,date,high_c,low_c)",
                         file=name, line=1, field="date")
    if not ({"high_c", "high_f", "low_c", "low_f"} & found.keys()):
        raise InputError("no high or low column: expected 'high_c' or 'high_f' (and optionally "
                         "'low_c'/'low_f')", file=name, line=1, field="high_c")
    return found


def _number(text: str, *, name: str, line: int, field: str, unit: str = ""):
    text = text.strip()
    if text == "":
        return math.nan
    raw = text[:-1].strip() if unit == "%" and text.endswith("%") else text
    try:
        value = float(raw)
    except ValueError:
        raise InputError(f"'{text}' is not a number", file=name, line=line, field=field) from None
    if not math.isfinite(value):
        raise InputError(f"'{text}' is not a finite number", file=name, line=line, field=field)
    return value


def _date(text: str, *, name: str, line: int) -> _dt.date:
    text = text.strip()
    m = _DATE_RE.match(text)
    if not m:
        raise InputError(f"'{text}' is not a date in the form YYYY-MM-DD", file=name, line=line, field="date")
    try:
        return _dt.date(int(m.group(1)), int(m.group(2)), int(m.group(3)))
    except ValueError as exc:
        raise InputError(f"'{text}' is not a valid date ({exc})", file=name, line=line, field="date") from None


def _sniff_delimiter(sample: str) -> str:
    first = next((ln for ln in sample.splitlines() if ln.strip() and not ln.lstrip().startswith("#")), "")
    counts = {d: first.count(d) for d in (",", ";", "\t")}
    best = max(counts, key=counts.get)
    return best if counts[best] else ","


def split_csv(text: str, name: str):
    """The content lines of an outlook CSV (blank and ``#`` lines skipped), its delimiter and its header.

    Returns ``(content, delimiter, header_line, headers)``: ``content`` is a list of ``(line number, text)``
    with the header first; raises :class:`InputError` for an empty file.
    """
    rows = [(i + 1, ln) for i, ln in enumerate(text.splitlines())]
    content = [(n, ln) for n, ln in rows if ln.strip() and not ln.lstrip().startswith("#")]
    if not content:
        raise InputError("the file is empty", file=name)
    delimiter = _sniff_delimiter(text)
    header_line, header_text = content[0]
    return content, delimiter, header_line, next(csv.reader([header_text], delimiter=delimiter))


def parse_outlook_csv(text: str, *, name: str = "<outlook>", station: str | None = None) -> pd.DataFrame:
    """Parse outlook CSV text.

    Parameters
    ----------
    text : str
        The file's content.
    name : str
        The file name used in error messages.
    station : str, optional
        The station for every row when the file has no ``station`` column.  If
        the file has one, rows must name a station (this argument is then
        only a default for empty cells).

    Returns
    -------
    pandas.DataFrame
        Columns :data:`OUTLOOK_COLUMNS`: ``station`` (str), ``date``
        (``datetime.date``, local), ``high_c``, ``low_c`` and
        ``min_rel_humidity_pct`` (float, NaN where not given) and ``line`` (the
        1-based source line), sorted by station and date.

    Raises
    ------
    advisory.errors.InputError
        Empty file, missing columns, an unreadable number or date, a value out
        of range, a low above the high, a duplicate station and date.
    """
    content, delimiter, header_line, headers = split_csv(text, name)
    try:
        cols = _resolve_columns(headers, name)
    except InputError as exc:
        exc.line = header_line
        raise InputError(exc.message, file=name, line=header_line, field=exc.field) from None
    if "station" not in cols and not station:
        raise InputError("no 'station' column; add one or name the station for the whole file",
                         file=name, line=header_line, field="station")

    out = {k: [] for k in OUTLOOK_COLUMNS}
    seen: dict[tuple[str, _dt.date], int] = {}
    for line_no, line_text in content[1:]:
        cells = next(csv.reader([line_text], delimiter=delimiter))

        def cell(key, cells=cells):
            i = cols.get(key)
            return cells[i] if i is not None and i < len(cells) else ""

        st = cell("station").strip() or (station or "")
        if not st:
            raise InputError("the station is empty", file=name, line=line_no, field="station")
        day = _date(cell("date"), name=name, line=line_no)
        values = {}
        for kind in ("high", "low"):
            if f"{kind}_c" in cols:
                values[kind] = _number(cell(f"{kind}_c"), name=name, line=line_no, field=f"{kind}_c")
                field = f"{kind}_c"
            elif f"{kind}_f" in cols:
                f = _number(cell(f"{kind}_f"), name=name, line=line_no, field=f"{kind}_f")
                values[kind] = (f - 32.0) * 5.0 / 9.0
                field = f"{kind}_f"
            else:
                values[kind] = math.nan
                field = f"{kind}_c"
            v = values[kind]
            if not math.isnan(v) and not (_TEMP_RANGE_C[0] <= v <= _TEMP_RANGE_C[1]):
                raise InputError(f"{kind} {v:.1f} °C is outside the plausible range "
                                 f"{_TEMP_RANGE_C[0]:.0f} to {_TEMP_RANGE_C[1]:.0f} °C",
                                 file=name, line=line_no, field=field)
        if math.isnan(values["high"]) and math.isnan(values["low"]):
            field = "high_c" if "high_c" in cols else ("high_f" if "high_f" in cols else "low_c")
            raise InputError("the row gives neither a high nor a low", file=name, line=line_no, field=field)
        if values["low"] > values["high"] + 0.05:
            field = "low_c" if "low_c" in cols else "low_f"
            raise InputError(f"the low ({values['low']:.1f} °C) is above the high ({values['high']:.1f} °C)",
                             file=name, line=line_no, field=field)
        rh = _number(cell("min_rel_humidity_pct"), name=name, line=line_no,
                     field="min_rel_humidity_pct", unit="%")
        if not math.isnan(rh) and not (0.0 < rh <= 100.0):
            raise InputError(f"minimum relative humidity {rh:g} % is not in (0, 100]",
                             file=name, line=line_no, field="min_rel_humidity_pct")
        key = (st, day)
        if key in seen:
            raise InputError(f"station '{st}' and date {day.isoformat()} already given on line {seen[key]}",
                             file=name, line=line_no, field="date")
        seen[key] = line_no
        out["station"].append(st)
        out["date"].append(day)
        out["high_c"].append(values["high"])
        out["low_c"].append(values["low"])
        out["min_rel_humidity_pct"].append(rh)
        out["line"].append(line_no)
    if not out["date"]:
        raise InputError("the file has a header but no rows", file=name, line=header_line)
    frame = pd.DataFrame(out, columns=list(OUTLOOK_COLUMNS))
    for col in ("high_c", "low_c", "min_rel_humidity_pct"):
        frame[col] = frame[col].astype(float)
    return frame.sort_values(["station", "date"], kind="stable").reset_index(drop=True)


def read_text(path) -> str:
    """A CSV file's text (UTF-8, with or without BOM, or cp1252), or an InputError naming the file."""
    p = Path(path)
    name = str(path)
    try:
        raw = p.read_bytes()
    except FileNotFoundError:
        raise InputError("no such file", file=name) from None
    except IsADirectoryError:
        raise InputError("this is a folder, not a file", file=name) from None
    except OSError as exc:
        raise InputError(f"cannot read the file ({exc.strerror})", file=name) from None
    for encoding in ("utf-8-sig", "cp1252"):
        try:
            return raw.decode(encoding)
        except UnicodeDecodeError:
            continue
    raise InputError("the file is not text (UTF-8 expected)", file=name)  # pragma: no cover


def read_outlook_csv(path, *, station: str | None = None) -> pd.DataFrame:
    """Read and parse an outlook CSV file (see :func:`parse_outlook_csv`).

    Parameters
    ----------
    path : path-like
    station : str, optional

    Returns
    -------
    pandas.DataFrame
    """
    return parse_outlook_csv(read_text(path), name=str(path), station=station)
