"""Bulk inserts for the nightly run: thousands of rows in one statement, their new ids back.

On SQLite, rows that give every column are written with one ``executemany`` of
the driver, each value converted by its column's own SQLAlchemy type (so it is
stored exactly as the ORM stores it), several times faster than SQLAlchemy's
per-row statement building; the new ids are then read back by a unique key of
the rows.  Elsewhere, or without a key, SQLAlchemy's bulk ``INSERT ...
RETURNING`` is used.
"""

from __future__ import annotations

from collections.abc import Sequence

from sqlalchemy import insert, select
from sqlalchemy.orm import Session

#: Values per ``IN (...)`` list when ids are read back.
IN_CHUNK = 5000


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
        procs = [c.type._cached_bind_processor(conn.dialect) for c in cols]
        names = [c.key for c in cols]
        sql = (f"INSERT INTO {table.name} ({', '.join(c.name for c in cols)}) "
               f"VALUES ({', '.join('?' * len(cols))})")
        conn.exec_driver_sql(sql, [tuple(v if p is None else p(v) for v, p in zip(
            (r[n] for n in names), procs, strict=True)) for r in rows])
        return ids_by_key(session, table, tuple(key), rows)
    ids: list[int] = []
    for chunk in _chunks(rows, 2000):
        ids += session.scalars(insert(model).returning(model.id, sort_by_parameter_order=True), chunk).all()
    return ids


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
