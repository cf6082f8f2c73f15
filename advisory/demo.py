"""The main job on the demo farm, end to end.

Imports the invented demo farm (``demo-farm/``) and its station files into a
database, then runs every step that exists over the demo's nights and days,
printing what a grower, an extension agent and a crew lead would see.  Running
it twice gives the same result: by default it starts from a fresh database in
the demo folder.
"""

from __future__ import annotations

import datetime as dt
import shutil
from dataclasses import dataclass
from pathlib import Path

from advisory.ingest.farm_file import import_farm_file
from advisory.store.db import Database, upgrade

REPO = Path(__file__).resolve().parents[1]
DEMO_FARM = REPO / "demo-farm"
DEFAULT_OUT = REPO / "demo-output"

#: Local dates of the demo's spring nights and summer days.
SPRING_NIGHTS = [dt.date(2026, 4, 6) + dt.timedelta(days=i) for i in range(7)]
SUMMER_DAYS = [dt.date(2026, 7, 14) + dt.timedelta(days=i) for i in range(6)]


@dataclass
class DemoPaths:
    out: Path
    db_url: str
    outbox: Path


def prepare(out: Path = DEFAULT_OUT, db_url: str | None = None) -> DemoPaths:
    """Make the demo folder; a fresh SQLite database there unless a URL is given."""
    out = Path(out)
    if db_url is None:
        if out.exists():
            shutil.rmtree(out)
        out.mkdir(parents=True)
        db_url = f"sqlite:///{out / 'demo.sqlite'}"
    else:
        out.mkdir(parents=True, exist_ok=True)
        if (out / "outbox").exists():
            shutil.rmtree(out / "outbox")
    return DemoPaths(out=out, db_url=db_url, outbox=out / "outbox")


def run(paths: DemoPaths, echo=print) -> Database:
    """Run the demo; ``echo`` receives every line meant for the person watching."""
    before, after = upgrade(paths.db_url)
    echo(f"database: {paths.db_url} (schema {after})")
    db = Database(paths.db_url)
    report = import_farm_file(db, DEMO_FARM / "farm.toml")
    echo(report.text())
    return db
