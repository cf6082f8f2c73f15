"""Bulk inserts for the nightly run: thousands of rows in one statement, their new ids back.

On SQLite, rows that give every column are written with one ``executemany`` of
the driver, each value converted by its column's own SQLAlchemy type (so it is
stored exactly as the ORM stores it), several times faster than SQLAlchemy's
per-row statement building.  The new ids are then known without reading the
rows back when SQLite numbered them as it usually does (each new row one more
than the largest id before it, see "ROWIDs and the INTEGER PRIMARY KEY" in the
SQLite documentation), which one count over the new id range confirms;
otherwise they are read back by a unique key of the rows.  On PostgreSQL a
large batch takes its ids from the table's sequence and goes in with one
``COPY`` (:func:`_copy_rows`).  Elsewhere, or for rows that do not give every
column, SQLAlchemy's bulk ``INSERT ... RETURNING`` is used.
"""

from __future__ import annotations

from collections.abc import Sequence

from sqlalchemy import JSON, func, insert, select
from sqlalchemy.orm import Session

#: Values per ``IN (...)`` list when ids are read back.
IN_CHUNK = 5000
#: From this many rows, PostgreSQL gets them with one ``COPY`` (fewer: ``INSERT ... RETURNING``).
COPY_FROM_ROWS = 200


def _chunks(values: Sequence, size: int):
    for k in range(0, len(values), size):
        yield values[k:k + size]


def insert_rows(session: Session, model, rows: list[dict], key: Sequence[str] | None = None) -> list[int]:
    """Insert ``rows`` (dicts of column values) into ``model``'s table; the new ids in order.

    Parameters
    ----------
    session : Session
        The caller's transaction.
    model : ORM class
    rows : list of dict
    key : sequence of str, optional
        Columns whose values identify each new row (unique among the table's rows,
        ``None`` compared as a value); needed for the driver-level path.
    """
    if not rows:
        return []
    table = model.__table__
    cols = [c for c in table.columns if not c.primary_key]
    conn = session.connection()
    if (conn.dialect.name == "sqlite" and key
            and all(len(r) == len(cols) for r in rows) and all(c.key in rows[0] for c in cols)):
        session.flush()
        names = [c.key for c in cols]
        columns = []  # each column's values, converted as its type binds them
        for c, name in zip(cols, names, strict=True):
            values = [r[name] for r in rows]
            proc = c.type._cached_bind_processor(conn.dialect)
            columns.append(values if proc is None else _converted(values, proc, isinstance(c.type, JSON)))
        sql = (f"INSERT INTO {table.name} ({', '.join(c.name for c in cols)}) "
               f"VALUES ({', '.join('?' * len(cols))})")
        before = _largest_id(conn, table)
        conn.exec_driver_sql(sql, list(zip(*columns, strict=True)))
        numbered = _numbered_after(conn, table, before, len(rows))
        return numbered if numbered is not None else ids_by_key(session, table, tuple(key), rows)
    if conn.dialect.name == "postgresql" and conn.dialect.driver == "psycopg" and len(rows) >= COPY_FROM_ROWS \
            and all(len(r) == len(cols) for r in rows) and all(c.key in rows[0] for c in cols):
        session.flush()
        return _copy_rows(conn, table, cols, rows)
    ids: list[int] = []
    for chunk in _chunks(rows, 2000):
        ids += session.scalars(insert(model).returning(model.id, sort_by_parameter_order=True), chunk).all()
    return ids


def _copy_rows(conn, table, cols, rows: list[dict]) -> list[int]:
    """PostgreSQL (psycopg 3): the rows' ids taken from the table's sequence first, then every row
    (with its id) in one ``COPY ... FROM STDIN``; the ids in the order of ``rows``.

    Each value is converted by its column's own SQLAlchemy type, as an ``INSERT`` would bind it.
    About three times faster than ``INSERT ... RETURNING`` for a night's forecasts and notices
    (``benchmarks/bench_night.py --db-url``).
    """
    pk = table.primary_key.columns.values()[0]
    dbapi = conn.connection.dbapi_connection
    with dbapi.cursor() as cur:
        cur.execute("SELECT nextval(pg_get_serial_sequence(%s, %s)) FROM generate_series(1, %s)",
                    (table.name, pk.name, len(rows)))
        ids = sorted(int(r[0]) for r in cur.fetchall())
        columns = [ids]
        for c in cols:
            values = [r[c.key] for r in rows]
            proc = c.type._cached_bind_processor(conn.dialect)
            columns.append(values if proc is None else _converted(values, proc, isinstance(c.type, JSON)))
        names = ", ".join([pk.name] + [c.name for c in cols])
        with cur.copy(f"COPY {table.name} ({names}) FROM STDIN") as copy:
            for row in zip(*columns, strict=True):
                copy.write_row(row)
    return ids


def _converted(values: list, proc, unique: bool) -> list:
    """``proc`` applied to each value; each distinct value converted once (a run's rows share their
    night, clock and kind), unless the values are ``unique`` (or not hashable)."""
    if unique:
        return list(map(proc, values))
    memo: dict = {}
    try:
        return [memo[v] if v in memo else memo.setdefault(v, proc(v)) for v in values]
    except TypeError:  # a value that cannot be a key
        return list(map(proc, values))


def _largest_id(conn, table) -> int:
    """The largest id of ``table`` now (0 when empty)."""
    pk = table.primary_key.columns.values()[0]
    return int(conn.scalar(select(func.max(pk))) or 0)


def _numbered_after(conn, table, before: int, n: int) -> list[int] | None:
    """The ids of the ``n`` rows just inserted, when they are exactly ``before + 1 .. before + n``.

    That holds when SQLite gave each new row one more than the largest id so far (its usual
    rule); the rows were inserted in order, so the ids follow the order of the rows.  Any other
    numbering (a row inserted or deleted by someone else meanwhile, ids taken at random after
    the largest possible one) shows in the count, and None is returned.
    """
    pk = table.primary_key.columns.values()[0]
    count, low, high = conn.execute(select(func.count(), func.min(pk), func.max(pk)).where(pk > before)).one()
    if count == n and low == before + 1 and high == before + n:
        return list(range(before + 1, before + n + 1))
    return None


def ids_by_key(session: Session, table, key: tuple[str, ...], rows: list[dict]) -> list[int]:
    """Ids of ``rows`` (just inserted) found by their ``key`` columns, in the order of ``rows``."""
    first = table.c[key[0]]
    found: dict[tuple, int] = {}
    for chunk in _chunks(sorted({r[key[0]] for r in rows}), IN_CHUNK):
        q = select(table.c.id, *(table.c[k] for k in key)).where(first.in_(chunk))
        for k in key[1:3]:  # narrow to this batch's values of the next two columns
            values = {r[k] for r in rows}
            if None not in values:
                q = q.where(table.c[k].in_(sorted(values)))
        for row in session.execute(q):
            found[tuple(row[1:])] = row[0]
    return [found[tuple(r[k] for k in key)] for r in rows]
