"""The ``advisory`` command tree: parse, call, print.  No logic lives here.

Each topic registers its sub-commands from a module in :mod:`advisory.commands`.
User errors (and a database that is read-only or cannot be opened) print one
line and exit 2; internal faults exit 1 (set ``ADVISORY_DEBUG=1`` for the
traceback); a run that finished with notices undelivered exits 3.
"""

from __future__ import annotations

import argparse
import importlib
import importlib.util
import os
import sys
import traceback

from advisory import __version__
from advisory.errors import AdvisoryError, InputError, SchemaVersionError

#: Topic modules in the order their commands appear in --help.
TOPICS = ("db", "farm", "blocks", "obs", "outlook", "night", "heat", "verify", "notices", "hindcast",
          "calc", "serve", "users", "web", "demo")
#: Commands that serve until stopped (their runs retry on their own: :mod:`advisory.schedule`).
LONG_RUNNING = ("serve", "web", "demo")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="advisory",
        description="Frost and heat risk notices for orchard and vineyard blocks.")
    parser.add_argument("--db", metavar="URL", default=None,
                        help="database URL (default: $ADVISORY_DB, else an SQLite file in the data folder)")
    parser.add_argument("--version", action="version", version=f"advisory {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True
    for topic in TOPICS:
        name = f"advisory.commands.{topic}"
        if importlib.util.find_spec(name) is None:
            continue
        importlib.import_module(name).register(sub)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    from advisory import settings

    try:
        args.db_explicit = bool(args.db or os.environ.get("ADVISORY_DB"))
        args.db = settings.load(args.db).db_url
        if args.command in LONG_RUNNING:
            return int(args.func(args) or 0)
        from advisory.store.retry import with_retries

        # an import or a run is one transaction, or safe to repeat: what the server aborted runs again
        return int(with_retries(lambda: args.func(args), what=f"advisory {args.command}") or 0)
    except (InputError, SchemaVersionError) as exc:
        print(f"advisory: error: {exc}", file=sys.stderr)
        return 2
    except AdvisoryError as exc:
        print(f"advisory: error: {exc}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print("advisory: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        return 0
    except Exception as exc:
        msg = _database_problem(exc, getattr(args, "db", None))
        if msg is None:
            return _internal(exc)
        print(f"advisory: error: {msg}", file=sys.stderr)
        return 2


def _internal(exc: BaseException) -> int:
    """An internal fault: say so plainly."""
    if os.environ.get("ADVISORY_DEBUG"):
        traceback.print_exc()
    print(f"advisory: internal error: {type(exc).__name__}: {exc}\n"
          "(set ADVISORY_DEBUG=1 for the traceback and please report it)", file=sys.stderr)
    return 1


def _database_problem(exc: BaseException, url: str | None) -> str | None:
    """A message for a database that cannot be written or opened (the user's to fix), else None."""
    from sqlalchemy.exc import OperationalError

    if not isinstance(exc, OperationalError):
        return None
    from advisory.store.db import connection_problem, sqlite_file

    server = connection_problem(exc, url)
    if server is not None:
        return server
    text = str(getattr(exc, "orig", exc)).lower()

    path = sqlite_file(url) if url else None
    where = path or "the database"
    if "readonly" in text or "read-only" in text:
        return (f"the database {where} is read-only (the file, its folder or the file system): "
                "make it writable or point --db / ADVISORY_DB elsewhere")
    if "unable to open database file" in text:
        return (f"cannot open the database {where} (missing folder, or no permission): "
                "check the path and its permissions")
    return None


if __name__ == "__main__":
    sys.exit(main())
