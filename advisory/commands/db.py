"""`advisory db upgrade|status`."""

from __future__ import annotations

from advisory.store import db as store


def register(sub) -> None:
    p = sub.add_parser("db", help="create or upgrade the database schema")
    dsub = p.add_subparsers(dest="db_command", metavar="ACTION")
    dsub.required = True
    up = dsub.add_parser("upgrade", help="apply migrations up to this version's schema",
                         description="Apply the migrations. A new database is created only in the default "
                                     "data folder ($ADVISORY_HOME) or with --create: a mistyped --db path "
                                     "is refused, not built.")
    up.add_argument("--create", action="store_true",
                    help="create the database (and its folder) if it does not exist yet")
    up.set_defaults(func=upgrade)
    st = dsub.add_parser("status", help="show the database's schema revision")
    st.set_defaults(func=status)


def upgrade(args) -> int:
    from pathlib import Path

    from advisory import settings
    from advisory.errors import InputError

    path = store.sqlite_file(args.db)
    if path is not None and not Path(path).exists() and not args.create:
        default = Path(settings.default_db_url().split("sqlite:///", 1)[1]).expanduser()
        if Path(path).resolve() != default.resolve():
            where = Path(path).parent
            raise InputError(f"no database at {path}"
                             + ("" if where.is_dir() else f" (and no folder {where})")
                             + ": add --create to make a new one there, or check the path", field="--db")
    before, after = store.upgrade(args.db)
    if before == after:
        print(f"database schema is current ({after})")
    else:
        print(f"database schema upgraded from {before or 'empty'} to {after}")
    return 0


def status(args) -> int:
    store.require_file(args.db)
    engine = store.make_engine(args.db)
    current, head = store.current_revision(engine), store.head_revision()
    print(f"database: {engine.url.render_as_string(hide_password=True)}")
    print(f"schema:   {current or 'none'} (this advisory expects {head})")
    return 0 if current == head else 2
