"""`advisory db upgrade|status`."""

from __future__ import annotations

from advisory.store import db as store


def register(sub) -> None:
    p = sub.add_parser("db", help="create or upgrade the database schema")
    dsub = p.add_subparsers(dest="db_command", metavar="ACTION")
    dsub.required = True
    up = dsub.add_parser("upgrade", help="apply migrations up to this version's schema")
    up.set_defaults(func=upgrade)
    st = dsub.add_parser("status", help="show the database's schema revision")
    st.set_defaults(func=status)


def upgrade(args) -> int:
    before, after = store.upgrade(args.db)
    if before == after:
        print(f"database schema is current ({after})")
    else:
        print(f"database schema upgraded from {before or 'empty'} to {after}")
    return 0


def status(args) -> int:
    engine = store.make_engine(args.db)
    current, head = store.current_revision(engine), store.head_revision()
    print(f"database: {engine.url.render_as_string(hide_password=True)}")
    print(f"schema:   {current or 'none'} (this advisory expects {head})")
    return 0 if current == head else 2
