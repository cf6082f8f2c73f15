"""Agents at work at the same time on one PostgreSQL database: a farm import, an observations import and a
night run at once; nothing is lost, and no deadlock or serialization error reaches anyone."""

from __future__ import annotations

import datetime as dt
import subprocess
import sys

import pytest
from sqlalchemy import func, select

from advisory.store.schema import Block, Delivery, Farm, Forecast, Notice, Observation, Station
from tests.test_multi_host import _env, write_region

NIGHT = dt.date(2026, 4, 8)


@pytest.mark.postgresql_only(reason="agents on several machines at once need a database server")
def test_farm_import_observations_import_and_night_run_at_once(db, tmp_path, quiet_channels):
    from advisory.ingest.farm_file import import_farm_file
    from advisory.ingest.observations import import_file

    folder = tmp_path / "region"
    files = write_region(folder, farms=3, per_farm=60)
    for path in files[:2]:  # two farms set up, with their readings
        import_farm_file(db, path)
    for csv in sorted(folder.glob("LB[12]-*.csv")):
        import_file(db, csv.stem, csv)
    # the third farm's file changes the stage of the first farm's blocks as well: an agent's edit
    edited = files[0].read_text().replace('stage_date = 2026-04-05', 'stage_date = 2026-04-06')
    files[0].write_text(edited)
    env = _env(tmp_path, quiet_channels)
    base = [sys.executable, "-m", "advisory.cli", "--db", db.url]
    agents = {
        "farm": base + ["farm", "import", str(files[2])],
        "farm edit": base + ["farm", "import", str(files[0])],
        "night": base + ["night", "run", "--date", NIGHT.isoformat(), "--allow-past"],
        "obs": base + ["obs", "import", "LB1-S1", str(folder / "LB1-S1.csv"), "--replace"],
    }
    procs = {name: subprocess.Popen(cmd, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
             for name, cmd in agents.items()}
    outs = {name: p.communicate(timeout=300) for name, p in procs.items()}
    for name, p in procs.items():
        _out, err = outs[name]
        assert p.returncode == 0, (name, err)
        assert "deadlock" not in err and "serialize" not in err and "Traceback" not in err, (name, err)
    # the third farm's stations get their readings now
    for csv in sorted(folder.glob("LB3-*.csv")):
        import_file(db, csv.stem, csv)
    # a second run takes the blocks the first did not see (the third farm, if it came later); nothing twice
    again = subprocess.run(agents["night"], env=env, capture_output=True, text=True, timeout=300)
    assert again.returncode == 0, again.stderr
    rows = sum(1 for _ in (folder / "LB1-S1.csv").open()) - 1
    with db.transaction() as s:
        farms = s.scalar(select(func.count()).select_from(Farm))
        blocks = s.scalar(select(func.count()).select_from(Block))
        per_station = dict(s.execute(select(Station.code, func.count()).join(Observation)
                                     .group_by(Station.code)).all())
        per_block = s.execute(select(Forecast.block_id, func.count()).where(
            Forecast.night == NIGHT, Forecast.revision == 0).group_by(Forecast.block_id)).all()
        evening = s.scalar(select(func.count()).select_from(Notice).where(
            Notice.night == NIGHT, Notice.block_id.is_not(None)))
        boxed = s.scalar(select(func.count(func.distinct(Delivery.notice_id))).where(
            Delivery.channel == "outbox", Delivery.status == "sent"))
        notices = s.scalar(select(func.count()).select_from(Notice))
        edited_dates = set(s.scalars(select(Block.stage_date).join(Farm).where(Farm.name == "Larkspur Bench 1")))
    assert farms == 3 and blocks == 180
    assert per_station == {f"LB{f}-S{k}": rows for f in (1, 2, 3) for k in (1, 2)}   # no reading lost
    assert len(per_block) == 180 and all(c == 1 for _b, c in per_block)             # every block once
    assert evening == 180 and boxed == notices                                       # every notice delivered
    assert edited_dates == {dt.date(2026, 4, 6)}                                     # the edit is kept
