"""The time column of an observation file: ISO 8601 without Python objects, other layouts, zones.

Used by :mod:`advisory.ingest.obsfile`.  Unquoted files get a numpy scan of
their bytes (:func:`scan_lines`, :func:`fast_iso_times`): field positions are
found with ``np.flatnonzero`` and every character position is gathered as one
column, so a million times parse without a Python object per row.  Other
layouts (fractional seconds, ``time_format``, ``epoch``, quoted files) go
through pandas (:func:`text_times`).  Naive wall times are then placed in the
station's zone by :func:`localize`, with the reading options for times that
occur twice or not at all when clocks change.
"""

from __future__ import annotations

import datetime as dt
import re
import zoneinfo
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from advisory.errors import InputError

if TYPE_CHECKING:
    from advisory.ingest.obsfile import ReadOptions


#: How many bad lines an error message quotes.
MAX_BAD_LINES = 5


_OFFSET_RE = re.compile(r"^(?:UTC|GMT)?\s*([+-])(\d{1,2})(?::?(\d{2}))?$", re.IGNORECASE)


def parse_utc_offset(text: str, *, file: str | None = None, line: int | None = None) -> dt.timedelta:
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


@dataclass
class Problems:
    """Bad lines collected while reading, reported together (counted as lines: a line with
    two bad fields is one bad line)."""

    file: str
    items: list[tuple[int, str]] = field(default_factory=list)
    _lines: list[np.ndarray] = field(default_factory=list, repr=False)

    @property
    def total(self) -> int:
        """How many distinct lines are bad."""
        if not self._lines:
            return 0
        return int(len(np.unique(np.concatenate(self._lines))))

    def add(self, lines: np.ndarray, describe) -> None:
        lines = np.asarray(lines, dtype=np.int64).ravel()
        self._lines.append(lines)
        for ln in lines[:MAX_BAD_LINES]:
            self.items.append((int(ln), describe(int(ln))))

    def raise_if_any(self, what: str = "cannot be read") -> None:
        total = self.total
        if not total:
            return
        merged: dict[int, list[str]] = {}
        for ln, msg in sorted(self.items, key=lambda x: x[0]):
            if msg not in merged.setdefault(ln, []):
                merged[ln].append(msg)
        shown = [(ln, "; ".join(msgs)) for ln, msgs in sorted(merged.items())][:MAX_BAD_LINES]
        if total == 1:  # "file, line N: what is wrong"
            raise InputError(shown[0][1], file=self.file, line=shown[0][0])
        detail = "; ".join(f"line {ln}: {msg}" for ln, msg in shown)
        more = f" (first {len(shown)} shown)" if total > len(shown) else ""
        raise InputError(f"{total} lines {what}{more}: {detail}", file=self.file, line=shown[0][0])


def clip_text(text: Any, n: int = 30) -> str:
    s = "" if text is None else str(text)
    return s if len(s) <= n else s[: n - 1] + "…"


def fmt_utc(t_s: int) -> str:
    return dt.datetime.fromtimestamp(int(t_s), dt.UTC).strftime("%Y-%m-%d %H:%M:%SZ")


_NAT = np.iinfo(np.int64).min


@dataclass
class Times:
    """The time column, split into what each row holds (all arrays one entry per data row)."""

    missing: np.ndarray     # bool: no time in the row
    unreadable: np.ndarray  # bool: a time that is not a date-time
    aware: np.ndarray       # bool: the time carries a UTC offset (``utc_ns`` holds it)
    utc_ns: np.ndarray      # int64 ns since the epoch, for aware rows
    wall_ns: np.ndarray     # int64 ns of the naive wall time, for naive rows
    text: Any               # rows -> list of the rows' original text (for messages)
    epoch: bool = False     # times were seconds since the epoch (always UTC)


@dataclass
class _Scan:
    buf: np.ndarray
    nfields: np.ndarray
    fs: np.ndarray  # time field start (byte offset), per data line
    fe: np.ndarray  # time field end


def scan_lines(body: bytes, delimiter: str, time_idx: int) -> _Scan | None:
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


def fast_iso_times(scan: _Scan, encoding: str) -> Times | None:
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
        return Times(missing, missing, missing, z, z, lambda rows: [])
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
    return Times(missing=missing, unreadable=none, aware=aware, utc_ns=utc_ns, wall_ns=wall_ns, text=text)


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


def text_times(text: pd.Series, opts: ReadOptions, file: str) -> Times:
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
        return Times(missing, present & ~good, good, utc_ns, wall_ns, texts, epoch=True)
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
    return Times(missing, unreadable, has_off & ~unreadable, utc_ns, wall_ns, texts)


def resolve_times(times: Times, keep: np.ndarray, opts: ReadOptions, tz_name: str, utc_column: bool,
                   file: str, first_line: int, problems: Problems) -> np.ndarray:
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


def _add_bad_times(problems: Problems, bad: np.ndarray, text: Any, first_line: int, why: str) -> None:
    if not bad.any():
        return
    rows = np.flatnonzero(bad)
    vals = dict(zip((rows[:MAX_BAD_LINES] + first_line).tolist(), text(rows[:MAX_BAD_LINES]), strict=False))
    problems.add(rows + first_line, lambda ln: f"time {clip_text(vals.get(ln))!r} {why}")


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
        out[rows] = wall - int(parse_utc_offset(opts.utc_offset).total_seconds()) * 1_000_000_000
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


def _zone_label(opts: ReadOptions, tz_name: str, utc_column: bool) -> str:
    if utc_column:
        return "UTC"
    if opts.utc_offset:
        return f"UTC{opts.utc_offset}"
    return tz_name

