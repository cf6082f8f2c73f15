"""Station observations: import files (QC, merge, all or nothing) and load them for the models.

Files are read by :mod:`advisory.ingest.obsfile` (format, units, time zones, moisture) and
quality-controlled by :mod:`advisory.ingest.qc` (flag bits and thresholds).

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

Loading
-------
:func:`load_observations_many` reads many stations in one query and returns one
UTC-indexed frame per station, with QC-failed values as NaN by default.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from sqlalchemy import select
from sqlalchemy.orm import Session

from advisory.errors import NotFoundError
from advisory.ingest.obsfile import (
    ParsedObservations,
    ReadOptions,
    StationInfo,
    parse_observation_bytes,
    read_observation_file,
    station_info,
)
from advisory.ingest.obstimes import fmt_utc
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
from advisory.store.schema import Import, Observation, Station

__all__ = [
    "ImportSummary",
    "ParsedObservations",
    "QcConfig",
    "ReadOptions",
    "StationInfo",
    "apply_qc",
    "fetch_arrays",
    "get_station",
    "import_file",
    "load_observations",
    "load_observations_many",
    "parse_observation_bytes",
    "read_observation_file",
    "station_info",
    "store_parsed",
]


_INSERT_CHUNK = 50_000


_VALUE_TOLERANCE = 1e-9


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


_QC_NAMES = tuple(QC_COLUMNS.values())


_FETCH_ROWS = 100_000
#: Stands for NULL in fetched value columns, so that rows convert to floats without Python checks.
_NULL_SENTINEL = float(np.finfo(np.float64).min)


def fetch_arrays(session_or_conn: Any, station_ids: Sequence[int], t0: int | None, t1: int | None,
                 columns: Sequence[str], *, reject_mask: int | None = None
                 ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Stored readings of stations in [t0, t1) as arrays, ordered by station and time.

    Parameters
    ----------
    session_or_conn : Session or Connection
        Where to read (the session is flushed first).
    station_ids : sequence of int
        Stations; queried 500 at a time.
    t0, t1 : int or None
        Bounds [s since the epoch, UTC]; None for open.
    columns : sequence of str
        Value columns (:data:`~advisory.ingest.qc.VALUE_COLUMNS`) and/or QC
        columns, in the order wanted.
    reject_mask : int, optional
        When given, a value column's value is NaN where its QC mask has any of
        these bits (done in SQL, so the QC columns need not be fetched).

    Returns
    -------
    (station_ids, times, values)
        int64, int64 [s since the epoch] and a float matrix (NaN = missing)
        with one column per requested column.

    Notes
    -----
    Reads through the DBAPI cursor: plain tuples, converted by ``numpy.fromiter``
    (SQLAlchemy rows are much slower to turn into arrays).
    """
    qc_names = set(QC_COLUMNS.values())
    for c in columns:
        if c not in QC_COLUMNS and c not in qc_names:
            raise ValueError(f"unknown observation column {c!r}")
    if isinstance(session_or_conn, Session):
        session_or_conn.flush()
        conn = session_or_conn.connection()
    else:
        conn = session_or_conn
    ph = _placeholder(conn) or "?"
    exprs = []
    for c in columns:
        if c in qc_names:
            exprs.append(c)
            continue
        e = c if reject_mask is None else f"CASE WHEN ({QC_COLUMNS[c]} & {int(reject_mask)}) = 0 THEN {c} END"
        exprs.append(f"COALESCE({e}, {_NULL_SENTINEL!r})")
    width = 2 + len(columns)
    ids = list(dict.fromkeys(int(i) for i in station_ids))
    parts: list[np.ndarray] = []
    cur = conn.connection.cursor()
    try:
        for k in range(0, len(ids), 500):
            chunk = ids[k:k + 500]
            where = [f"station_id IN ({', '.join([ph] * len(chunk))})"]
            params: list[Any] = list(chunk)
            if t0 is not None:
                where.append(f"time_utc >= {ph}")
                params.append(int(t0))
            if t1 is not None:
                where.append(f"time_utc < {ph}")
                params.append(int(t1))
            cur.execute(f"SELECT station_id, time_utc, {', '.join(exprs)} FROM {_TABLE.name} "
                        f"WHERE {' AND '.join(where)} ORDER BY station_id, time_utc", params)
            while rows := cur.fetchmany(_FETCH_ROWS):  # in batches: bounded memory for Python rows
                parts.append(np.fromiter(itertools.chain.from_iterable(rows), dtype=float,
                                         count=len(rows) * width).reshape(len(rows), width))
    finally:
        cur.close()
    if not parts:
        return np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64), np.zeros((0, len(columns)))
    arr = np.concatenate(parts) if len(parts) > 1 else parts[0]
    vals = arr[:, 2:]
    vals[vals == _NULL_SENTINEL] = np.nan
    return arr[:, 0].astype(np.int64), arr[:, 1].astype(np.int64), vals


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
    _ids, ex_t, ex = fetch_arrays(session, [station.id], zone_lo - ctx, zone_hi + ctx + 1,
                                  [*VALUE_COLUMNS, *_QC_NAMES])
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
        replace=replace, first_utc=fmt_utc(new_t[0]), last_utc=fmt_utc(new_t[-1]),
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
            out.append({"time_utc": fmt_utc(t[r]), "column": VALUE_COLUMNS[j],
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
    if conn.dialect.name == "postgresql" and conn.dialect.driver == "psycopg":
        _copy_rows(conn, cols, station_id, import_id, t, v, q)
        return
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


#: Rows per block of PostgreSQL's binary COPY data built at once (bounded memory).
_COPY_ROWS = 100_000
#: Binary COPY big-endian field types of the PostgreSQL column types of the observations table.
_PG_BINARY = {"integer": ">i4", "bigint": ">i8", "smallint": ">i2", "double precision": ">f8"}


def _copy_rows(conn, cols: list[str], station_id: int, import_id: int, t: np.ndarray, v: np.ndarray,
               q: np.ndarray) -> None:
    """Insert new readings on PostgreSQL with one binary ``COPY ... FROM STDIN`` (psycopg 3).

    The binary rows are built by numpy, a block of rows at a time: every field is a 4-byte length then
    the value in network byte order (a NULL is the length -1 alone), so rows with the same missing
    values have one fixed layout; the rows are written in groups of one layout each (a table's rows
    have no order).  The field widths follow the columns' types as the database has them.
    """
    types = dict(conn.exec_driver_sql(
        "SELECT column_name, data_type FROM information_schema.columns "
        f"WHERE table_name = '{_TABLE.name}' AND table_schema = current_schema()").all())
    kinds = [np.dtype(_PG_BINARY[types[c]]) for c in cols]
    nv = v.shape[1]
    present = ~np.isnan(v)
    pattern = present @ (1 << np.arange(nv))  # which value columns a row has, as bits
    cur = conn.connection.cursor()
    try:
        unchecked = _check_references_once(cur, station_id, import_id)
        with cur.copy(f"COPY {_TABLE.name} ({', '.join(cols)}) FROM STDIN (FORMAT BINARY)") as copy:
            copy.write(b"PGCOPY\n\xff\r\n\x00" + b"\x00" * 8)  # signature, flags, no header extension
            for pat in np.unique(pattern):
                rows = np.flatnonzero(pattern == pat)
                has = [bool(int(pat) >> j & 1) for j in range(nv)]
                fields = [("n", ">i2")]
                for k, (c, kind) in enumerate(zip(cols, kinds, strict=True)):
                    fields.append((f"l{k}", ">i4"))
                    if not (2 <= k < 2 + nv) or has[k - 2]:
                        fields.append((c, kind))
                layout = np.dtype(fields)
                for sl in _chunks(len(rows), _COPY_ROWS):
                    r = rows[sl]
                    block = np.empty(len(r), dtype=layout)
                    block["n"] = len(cols)
                    for k, (c, kind) in enumerate(zip(cols, kinds, strict=True)):
                        if c in layout.names:
                            block[f"l{k}"] = kind.itemsize
                        else:
                            block[f"l{k}"] = -1
                    block["station_id"] = station_id
                    block["import_id"] = import_id
                    block["time_utc"] = t[r]
                    for j, c in enumerate(VALUE_COLUMNS):
                        if has[j]:
                            block[c] = v[r, j]
                    for j, c in enumerate(_QC_NAMES):
                        block[c] = q[r, j]
                    copy.write(block.tobytes())
            copy.write(b"\xff\xff")  # the end of the data
        if unchecked:  # the rest of the transaction is checked as usual
            cur.execute("SET LOCAL session_replication_role = origin")
    finally:
        cur.close()


def _check_references_once(cur, station_id: int, import_id: int) -> bool:
    """Check the rows' two references once, for all of them, instead of once per row; whether done.

    Every new row refers to the same station and import.  The server would check both foreign keys
    for each row (most of a COPY's time on this table); instead the station row and the import row
    (made by this transaction) are locked here as the server's own check locks them (``FOR KEY
    SHARE``: neither can be deleted before this transaction ends), and the per-row checks are switched
    off for the COPY alone (``SET LOCAL session_replication_role = replica``, then back to ``origin``;
    this table has no other triggers).  That setting needs a superuser, or from PostgreSQL 15 the privilege
    ``GRANT SET ON PARAMETER session_replication_role TO <role>``; without it the server checks
    every row as usual (same result, slower).
    """
    cur.execute(f"SELECT (SELECT 1 FROM stations WHERE id = {int(station_id)} FOR KEY SHARE), "
                f"(SELECT 1 FROM imports WHERE id = {int(import_id)} FOR KEY SHARE)")
    if cur.fetchone() != (1, 1):
        raise RuntimeError("the station or the import record of this import is gone")
    cur.execute("SAVEPOINT advisory_copy_checks")
    try:
        cur.execute("SET LOCAL session_replication_role = replica")
    except Exception as exc:  # no privilege: the server checks each row
        if getattr(exc, "sqlstate", None) != "42501":
            raise
        cur.execute("ROLLBACK TO SAVEPOINT advisory_copy_checks")
        return False
    cur.execute("RELEASE SAVEPOINT advisory_copy_checks")
    return True


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
    sid, t, m = fetch_arrays(session, ids, t0, t1, cols + (qcs if include_qc else []),
                             reject_mask=int(reject_mask) if qc_passed_only else None)
    if not len(t):
        return result
    k = len(cols)
    vals = m[:, :k]
    q = m[:, k:].astype(np.int64)
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

