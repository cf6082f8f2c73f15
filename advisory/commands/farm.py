"""`advisory farm import FARM.toml`."""

from __future__ import annotations

from advisory.ingest.farm_file import import_farm_file
from advisory.store.db import Database


def register(sub) -> None:
    p = sub.add_parser("farm", help="farms: import a farm file")
    fsub = p.add_subparsers(dest="farm_command", metavar="ACTION")
    fsub.required = True
    imp = fsub.add_parser("import", help="create or update a farm, its stations, blocks and recipients")
    imp.add_argument("file", metavar="FARM.toml")
    imp.set_defaults(func=do_import)


def do_import(args) -> int:
    report = import_farm_file(Database(args.db), args.file)
    print(report.text())
    return 0
