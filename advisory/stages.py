"""The stages report: recorded stage, expected stage, the heat and chill behind them (read-only).

Reads the blocks and their stations' readings; computes with the pure
functions of :mod:`advisory.crops.phenology` and :mod:`advisory.crops.chill`
(all blocks of a station at once).  Writes nothing.

Every figure says how many hours of readings are behind it; a sum whose
readings start after its period began is marked as a lower bound (missing
heat is never invented).
"""

from __future__ import annotations

import datetime as dt
import zoneinfo
from dataclasses import asdict, dataclass

import numpy as np
import pandas as pd

from advisory.crops import chill, phenology
from advisory.ingest.observations import load_observations_many
from advisory.physics.sun import local_midnight_utc
from advisory.store import queries
from advisory.store.schema import Block


@dataclass
class StageRow:
    farm: str
    block: str
    crop: str
    recorded_stage: str
    recorded_on: str
    biofix: str
    base_c: float | None
    gdd_since_biofix_c: float | None
    gdd_since_biofix_lower_bound: bool
    hours_since_biofix_h: float
    expected_from_biofix: str | None
    expected_range_from_biofix: str | None
    gdd_since_record_c: float | None
    gdd_since_record_lower_bound: bool
    hours_since_record_h: float
    expected_today: str | None
    expected_range_today: str | None
    check: str | None
    chill_start: str
    utah_cu: float | None
    chill_portions: float | None
    chill_hours_h: float
    chill_lower_bound: bool
    chill_need_cu: str | None
    chill_need_portions: str | None

    def as_dict(self) -> dict:
        return asdict(self)


def _range(crop: str, est: phenology.StageEstimate, i: int) -> str | None:
    lo, hi = phenology.stage_name(crop, int(est.early_idx[i])), phenology.stage_name(crop, int(est.late_idx[i]))
    if lo is None or hi is None:
        return None
    return lo if lo == hi else f"{lo} to {hi}"


def stage_rows(session, blocks: list[Block], today: dt.date | None = None) -> list[StageRow]:
    """One :class:`StageRow` per block, for the farm's local ``today`` (default: now)."""
    out: list[tuple[int, StageRow]] = []
    order = {b.id: k for k, b in enumerate(blocks)}
    by_station: dict[int, list[Block]] = {}
    for b in blocks:
        by_station.setdefault(b.station_id, []).append(b)
    plans = []
    for sid, group in by_station.items():
        rows = []
        for b in group:
            zone = b.farm.timezone
            day = today or dt.datetime.now(zoneinfo.ZoneInfo(zone)).date()
            fs = b.farm.settings or {}
            biofix = phenology.biofix_date(day, b.latitude, (fs.get("biofix") or {}).get(b.crop), b.crop)
            cstart = chill.chill_start_date(day, b.latitude, fs.get("chill_start"))
            rows.append((b, day, biofix, cstart, zone))
        start = min(local_midnight_utc(min(r[2], r[3], min(r[0].stage_date, r[1])), r[4]) for r in rows)
        end = max(local_midnight_utc(r[1] + dt.timedelta(days=1), r[4]) for r in rows)
        plans.append((sid, rows, start, end))
    frames = {}
    for sid, _rows, start, end in plans:
        frames.update(load_observations_many(session, [sid], start.to_pydatetime(), end.to_pydatetime(),
                                             columns=["air_temp_c"]))
    for sid, rows, _start, _end in plans:
        frame = frames.get(sid)
        times = frame.index if frame is not None and len(frame) else pd.DatetimeIndex([], tz="UTC")
        temp = frame["air_temp_c"].to_numpy(float) if frame is not None and len(frame) else np.zeros(0)
        n = len(rows)
        crops = [r[0].crop for r in rows]
        heat = [phenology.crop_heat(c) for c in crops]
        base = np.array([h.base_c if h else np.nan for h in heat])
        upper = np.array([h.upper_c if h else np.inf for h in heat])
        ends = np.array([local_midnight_utc(r[1] + dt.timedelta(days=1), r[4]).to_datetime64() for r in rows])
        bio = np.array([local_midnight_utc(r[2], r[4]).to_datetime64() for r in rows])
        rec = np.array([local_midnight_utc(r[0].stage_date, r[4]).to_datetime64() for r in rows])
        grid = np.broadcast_to(temp, (n, len(temp)))
        g_bio, h_bio, f_bio = phenology.degree_days_from_readings(times, grid, np.nan_to_num(base), upper,
                                                                  since_utc=bio, until_utc=ends)
        g_rec, h_rec, f_rec = phenology.degree_days_from_readings(times, grid, np.nan_to_num(base), upper,
                                                                  since_utc=rec, until_utc=ends)
        est_bio = phenology.expected_stage(crops, np.where(np.isfinite(base), g_bio, np.nan))
        est_rec = phenology.expected_from_recorded(crops, [r[0].stage for r in rows],
                                                   np.where(np.isfinite(base), g_rec, np.nan))
        rec_idx = phenology.stage_index(crops, [r[0].stage for r in rows])
        # Chill: hourly means on one grid for the station, each block from its chill start.
        cs = min(local_midnight_utc(r[3], r[4]) for r in rows)
        hours, hourly = chill.hourly_grid(times, temp, cs, max(pd.Timestamp(e).tz_localize("UTC") for e in ends))
        hmask = np.array([(hours >= local_midnight_utc(r[3], r[4]))
                          & (hours < pd.Timestamp(ends[i]).tz_localize("UTC")) for i, r in enumerate(rows)])
        block_hourly = np.where(hmask, np.broadcast_to(hourly, hmask.shape), np.nan)
        utah, _low = chill.utah_chill_units(block_hourly)
        portions = chill.dynamic_chill_portions(block_hourly)
        chill_hours = np.isfinite(block_hourly).sum(axis=1)
        reqs = chill.requirements()
        for i, (b, _day, biofix, cstart, zone) in enumerate(rows):
            covered = heat[i] is not None
            first_h = hours[np.isfinite(block_hourly[i])]
            expected = phenology.stage_name(b.crop, int(est_rec.expected_idx[i]))
            req = reqs.get(b.crop)
            out.append((order[b.id], StageRow(
                farm=b.farm.name, block=b.name, crop=b.crop, recorded_stage=b.stage,
                recorded_on=b.stage_date.isoformat(), biofix=biofix.isoformat(),
                base_c=heat[i].base_c if covered else None,
                gdd_since_biofix_c=round(float(g_bio[i]), 1) if covered else None,
                gdd_since_biofix_lower_bound=_late_start(f_bio[i], bio[i]),
                hours_since_biofix_h=round(float(h_bio[i]), 1),
                expected_from_biofix=phenology.stage_name(b.crop, int(est_bio.expected_idx[i])),
                expected_range_from_biofix=_range(b.crop, est_bio, i),
                gdd_since_record_c=round(float(g_rec[i]), 1) if covered else None,
                gdd_since_record_lower_bound=_late_start(f_rec[i], rec[i]),
                hours_since_record_h=round(float(h_rec[i]), 1),
                expected_today=expected, expected_range_today=_range(b.crop, est_rec, i),
                check=phenology.stale_stage_sentence(b.stage, b.stage_date, int(rec_idx[i]), expected,
                                                     int(est_rec.expected_idx[i])),
                chill_start=cstart.isoformat(),
                utah_cu=round(float(utah[i]), 1) if chill_hours[i] else None,
                chill_portions=round(float(portions[i]), 1) if chill_hours[i] else None,
                chill_hours_h=float(chill_hours[i]),
                chill_lower_bound=(not len(first_h)) or first_h[0] > local_midnight_utc(cstart, zone)
                + pd.Timedelta(hours=1),
                chill_need_cu=f"{req.utah_cu_low:.0f}-{req.utah_cu_high:.0f}" if req else None,
                chill_need_portions=f"{req.portions_low:.0f}-{req.portions_high:.0f}" if req else None,
            )))
    return [row for _k, row in sorted(out, key=lambda kv: kv[0])]


def _late_start(first: np.datetime64, since: np.datetime64) -> bool:
    """True when the first reading counted came more than an hour after the period began (or none came)."""
    if np.isnat(first):
        return True
    return bool(first - since > np.timedelta64(1, "h"))


def stages_report(session, farm: str | None = None, today: dt.date | None = None) -> list[StageRow]:
    """The stages report of every active block (of one farm)."""
    blocks = list(session.scalars(queries.blocks_query(farm)))
    return stage_rows(session, blocks, today)
