"""The morning check of a frost night: the observed minimum against the forecast (a
``Verification`` per block), then the calibration refit of the stations due.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Sequence

import numpy as np
import pandas as pd
from sqlalchemy import select
from sqlalchemy.orm import selectinload

from advisory import assessment as asm
from advisory.ingest.observations import load_observations_many
from advisory.runs.calibration_refit import refit_calibrations, stations_due_for_refit
from advisory.runs.record import RunResult, _mark_run, _start_run
from advisory.store.schema import (
    Block,
    Forecast,
    Verification,
)


def observed_minimum(frame: pd.DataFrame, start: pd.Timestamp, end: pd.Timestamp, *,
                     max_gap_min: float = 90.0) -> float | None:
    """Lowest QC-passed air temperature in [start, end], or None if the window is not covered.

    The window counts as covered when readings exist within ``max_gap_min``
    of both ends and no gap inside is longer than that.
    """
    if frame is None or not len(frame):
        return None
    s = frame["air_temp_c"].dropna()
    s = s[(s.index >= start - pd.Timedelta(minutes=max_gap_min)) & (s.index <= end + pd.Timedelta(minutes=1))]
    inside = s[(s.index >= start) & (s.index <= end)]
    if len(inside) == 0:
        return None
    times = s.index.as_unit("ns")
    if times.min() > start + pd.Timedelta(minutes=max_gap_min) or times.max() < end - pd.Timedelta(
            minutes=max_gap_min):
        return None
    gaps = np.diff(times.asi8) / 6e10
    if len(gaps) and gaps.max() > max_gap_min:
        return None
    return float(inside.min())


def verify_night(db, night: dt.date, block_ids: Sequence[int] | None = None, *, now: dt.datetime | None = None,
                 key: str | None = None, refit: bool = True) -> RunResult:
    """Morning step: store observed minima against the night's forecasts, then refit calibrations."""
    now = now or dt.datetime.now(dt.UTC)
    res = RunResult(kind="morning", night=night)
    if _start_run(db, key, "morning", night, now) == "finished":
        return res
    with db.transaction() as session:
        q = (select(Forecast).join(Block).options(selectinload(Forecast.block).selectinload(Block.farm))
             .where(Forecast.night == night, Forecast.kind == "frost", Forecast.revision == 0,
                    Forecast.status == asm.STATUS_OK))
        if block_ids is not None:
            q = q.where(Forecast.block_id.in_(list(block_ids)))
        forecasts = list(session.scalars(q))
        done = set(session.scalars(select(Verification.forecast_id).where(
            Verification.forecast_id.in_([f.id for f in forecasts]))))
        station_ids = sorted({f.block.station_id for f in forecasts})
        if forecasts:
            t0 = min(f.reference_time for f in forecasts) - dt.timedelta(hours=2)
            obs = load_observations_many(session, station_ids, t0, t0 + dt.timedelta(hours=24))
        for f in forecasts:
            if f.id in done:
                continue
            a = asm.from_dict(f.payload)
            end = pd.Timestamp(a.sunrise_utc) + pd.Timedelta(hours=1)
            if end > pd.Timestamp(now):
                res.skipped.append(f"{f.block.name}: the night is not over yet")
                continue
            obs_min = observed_minimum(obs.get(f.block.station_id), pd.Timestamp(f.reference_time), end)
            if obs_min is None:
                res.skipped.append(f"{f.block.name}: readings do not cover the night")
                continue
            warned = bool((a.details or {}).get("needs_protection"))
            event = a.t10_c is not None and obs_min <= a.t10_c
            v = Verification(forecast_id=f.id, block_id=f.block_id, kind="frost", night=night, observed_c=obs_min,
                             forecast_c=f.min_p50_c, error_c=None if f.min_p50_c is None else f.min_p50_c - obs_min,
                             verified_at=now,
                             detail={"p10_c": f.min_p10_c, "p90_c": f.min_p90_c, "t10_c": a.t10_c,
                                     "level": a.level, "warned": warned, "event": bool(event),
                                     "p_below_t10": a.p_below_t10, "model": a.model})
            session.add(v)
            res.verified.append({"block": f.block.name, "forecast_c": f.min_p50_c, "observed_c": obs_min})
        if refit and station_ids:
            refit_calibrations(session, stations_due_for_refit(session, station_ids, now), now)
        _mark_run(session, key, "finished", now)
    return res
