"""The morning check of heat days: the forecast high against the highest reading of the
block's station from sunrise to sunset, stored once as a ``Verification`` of kind ``heat``.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Sequence

import numpy as np
import pandas as pd
from sqlalchemy import exists, func, select
from sqlalchemy.orm import Session, selectinload

from advisory import assessment as asm
from advisory.ingest.observations import load_observations_many
from advisory.physics.sun import local_midnight_utc
from advisory.risk import heat as risk_heat
from advisory.runs.blocks import _chunked
from advisory.runs.heat_refit import _f, _ts
from advisory.runs.record import RunResult, _mark_run, _start_run
from advisory.store.schema import Forecast, Verification

#: Days before a heat run's day whose forecasts the run checks first, if not checked yet [days].
CHECK_LOOKBACK_DAYS = 7
#: The daylight window counts as read when readings come within this of both ends and no gap
#: between them is longer [min] (the rule of :func:`advisory.runs.morning_check.observed_minimum`).
CHECK_MAX_GAP_MIN = 90.0
#: A day is checked from its sunset + this on [h].
CHECK_AFTER_SUNSET_H = 1.0


def observed_maximum(frame: pd.DataFrame | None, start: pd.Timestamp, end: pd.Timestamp, *,
                     max_gap_min: float = CHECK_MAX_GAP_MIN) -> float | None:
    """Highest QC-passed air temperature in [start, end], or None if the window is not covered.

    The counterpart of :func:`advisory.runs.morning_check.observed_minimum`, with the
    same coverage rule.

    Parameters
    ----------
    frame : pandas.DataFrame or None
        A station's readings (aware UTC index, ``air_temp_c`` [°C], QC-failed
        values already NaN as :func:`advisory.ingest.observations.load_observations_many`
        returns them).
    start, end : pandas.Timestamp
        The window (aware), both ends included.
    max_gap_min : float
        The window counts as covered when a reading lies within this of
        each end [min] and no two successive readings are further apart.

    Returns
    -------
    float or None
        The highest reading in the window [°C]; None when the window is not covered.
    """
    if frame is None or not len(frame) or "air_temp_c" not in frame:
        return None
    gap = pd.Timedelta(minutes=max_gap_min)
    s = frame["air_temp_c"].dropna()
    s = s[(s.index >= start - gap) & (s.index <= end + pd.Timedelta(minutes=1))]
    inside = s[(s.index >= start) & (s.index <= end)]
    if len(inside) == 0:
        return None
    times = s.index.as_unit("ns")
    if times.min() > start + gap or times.max() < end - gap:
        return None
    steps_min = np.diff(times.asi8) / 6e10
    if len(steps_min) and steps_min.max() > max_gap_min:
        return None
    return float(inside.max())


def daylight_window(payload: dict) -> tuple[pd.Timestamp, pd.Timestamp]:
    """The daylight of a stored heat forecast: its sunrise to its sunset (aware UTC).

    Where the sun does not rise or set that day (polar day), the missing end is
    the local midnight that starts or ends the day.
    """
    day = dt.date.fromisoformat(str(payload["night"]))
    tz = payload.get("farm_tz") or "UTC"
    rise, down = _ts(payload.get("sunrise_utc")), _ts(payload.get("sunset_utc"))
    start = rise if rise is not None else local_midnight_utc(day, tz)
    end = down if down is not None else local_midnight_utc(day + dt.timedelta(days=1), tz)
    return start, end


def heat_flags(payload: dict) -> dict:
    """What a stored heat note told the grower, for the check.

    Returns
    -------
    dict
        ``warned``: the note flagged fruit sunburn risk (crop level above
        the lowest level) or advised evaporative cooling -- the warning scored against the
        sunburn event; ``crew_warned``: the crew level was above the lowest;
        ``threshold_c``: the crop's sunburn air temperature [°C] (None if the
        note has none); ``estimated``: the high was estimated from the morning
        readings (no outlook).
    """
    details = payload.get("details") or {}
    calm = (risk_heat.LEVELS[0], "quiet")  # "quiet": the lowest level's key in payloads stored before it was renamed
    crop_level = details.get("crop_level", calm[0])
    cooling = any(bool(step.get("advised")) for step in payload.get("plan") or []
                  if step.get("method") == "evaporative_cooling")
    return {"warned": bool(crop_level not in calm or cooling),
            "crew_warned": details.get("crew_level", calm[0]) not in calm,
            "threshold_c": _f((details.get("sunburn") or {}).get("threshold_c")),
            "estimated": bool(details.get("max_estimated"))}


def check_heat_days(session: Session, days: Sequence[dt.date], block_ids: Sequence[int] | None = None, *,
                    now: dt.datetime) -> tuple[list[dict], list[str]]:
    """Check the unchecked heat forecasts of ``days`` against the observed high; add the rows to the session.

    Every revision-0 heat forecast with status ok, no ``Verification`` yet and
    a day that is over (sunset + :data:`CHECK_AFTER_SUNSET_H` before ``now``)
    gets a ``Verification`` of kind ``"heat"``: the forecast high (median),
    the observed maximum over the day's daylight (:func:`observed_maximum`,
    sunrise to sunset) and their difference, with ``detail`` holding the
    80 % range (``p10_c``, ``p90_c``), ``level``, ``warned`` and
    ``crew_warned`` (:func:`heat_flags`), ``threshold_c``, ``event`` (the
    observed high reached the crop's sunburn air temperature), ``estimated``
    and ``model``.  Checked forecasts are never checked again.

    Parameters
    ----------
    session : Session
        The caller commits.
    days : sequence of date
        Local dates of the days to check.
    block_ids : sequence of int, optional
        Only these blocks (default all).
    now : datetime
        The clock: days not over by then are left for later; readings from
        then on are not used.

    Returns
    -------
    checked : list of dict
        One per new row: ``block``, ``day``, ``forecast_c``, ``p10_c``,
        ``p90_c``, ``observed_c``, ``error_c``, ``event``, ``warned``,
        ``estimated``.
    not_checked : list of str
        Why a forecast was left unchecked (day not over, readings missing).
    """
    days = sorted(set(days))
    if not days:
        return [], []
    now_ts = _ts(now)
    base = (select(Forecast).options(selectinload(Forecast.block))
            .where(Forecast.kind == "heat", Forecast.night.in_(days), Forecast.revision == 0,
                   Forecast.status == asm.STATUS_OK,
                   ~exists().where(Verification.forecast_id == Forecast.id)))
    if block_ids is None:
        forecasts = list(session.scalars(base))
    else:
        forecasts = [f for chunk in _chunked(list(block_ids)) for f in session.scalars(
            base.where(Forecast.block_id.in_(chunk)))]
    forecasts.sort(key=lambda f: (f.night, f.block.name, f.id))
    todo, not_checked = [], []
    for f in forecasts:
        p = f.payload or {}
        start, end = daylight_window(p)
        ready = end + pd.Timedelta(hours=CHECK_AFTER_SUNSET_H)
        if ready > now_ts:
            local = ready.tz_convert(p.get("farm_tz") or "UTC")
            not_checked.append(f"{f.block.name}: heat {f.night}: the day is not over yet "
                               f"(checked from {local:%Y-%m-%d %H:%M %Z})")
            continue
        todo.append((f, p, start, end))
    if not todo:
        return [], not_checked
    gap = pd.Timedelta(minutes=CHECK_MAX_GAP_MIN + 1)
    t0 = min(x[2] for x in todo) - gap
    t1 = min(max(x[3] for x in todo) + pd.Timedelta(minutes=2), now_ts)
    obs = load_observations_many(session, sorted({f.block.station_id for f, *_ in todo}), t0, t1,
                                 columns=("air_temp_c",))
    highs: dict[tuple, float | None] = {}
    checked = []
    for f, p, start, end in todo:
        where = (f.block.station_id, start, end)
        if where not in highs:    # blocks of a station share the day's reading
            highs[where] = observed_maximum(obs.get(f.block.station_id), start, end)
        obs_max = highs[where]
        if obs_max is None:
            tz = p.get("farm_tz") or "UTC"
            not_checked.append(f"{f.block.name}: heat {f.night}: the readings do not cover the daylight hours "
                               f"({start.tz_convert(tz):%H:%M} to {end.tz_convert(tz):%H:%M}; no gap over "
                               f"{CHECK_MAX_GAP_MIN:.0f} min allowed)")
            continue
        flags = heat_flags(p)
        thr = flags["threshold_c"]
        event = thr is not None and obs_max >= thr
        err = None if f.min_p50_c is None else f.min_p50_c - obs_max
        session.add(Verification(
            forecast_id=f.id, block_id=f.block_id, kind="heat", night=f.night, observed_c=obs_max,
            forecast_c=f.min_p50_c, error_c=err, verified_at=now,
            detail={"p10_c": f.min_p10_c, "p90_c": f.min_p90_c, "level": f.level, "warned": flags["warned"],
                    "crew_warned": flags["crew_warned"], "threshold_c": thr, "event": bool(event),
                    "estimated": flags["estimated"], "model": f.model}))
        checked.append({"block": f.block.name, "day": f.night, "forecast_c": f.min_p50_c, "p10_c": f.min_p10_c,
                        "p90_c": f.min_p90_c, "observed_c": obs_max, "error_c": err, "event": bool(event),
                        "warned": flags["warned"], "estimated": flags["estimated"]})
    session.flush()
    return checked, not_checked


def verify_day(db, day: dt.date, block_ids: Sequence[int] | None = None, *, now: dt.datetime | None = None,
               key: str | None = None) -> RunResult:
    """Check a day's heat forecasts against the observed high (see :func:`check_heat_days`).

    Parameters
    ----------
    db : Database
    day : date
        Local date of the day.
    block_ids : sequence of int, optional
        Only these blocks (default all).
    now : datetime, optional
        The clock (default the real time).
    key : str, optional
        A run key: a finished keyed run is not run again.

    Returns
    -------
    advisory.runs.record.RunResult
        ``kind`` "heat-check", ``verified`` the new rows (dicts as
        :func:`check_heat_days` returns them), ``skipped`` why forecasts were
        left unchecked.  A rerun adds nothing.
    """
    now = now or dt.datetime.now(dt.UTC)
    res = RunResult(kind="heat-check", night=day)
    if _start_run(db, key, "heat-check", day, now) == "finished":
        res.skipped.append(f"run {key} already done")
        return res
    with db.transaction() as session:
        res.verified, res.skipped = check_heat_days(session, [day], block_ids, now=now)
        _mark_run(session, key, "finished", now)
    return res


def checked_count(db, day: dt.date, block_ids: Sequence[int] | None = None) -> int:
    """How many of the day's heat forecasts already have their check."""
    with db.transaction() as s:
        q = (select(func.count()).select_from(Verification)
             .where(Verification.kind == "heat", Verification.night == day))
        if block_ids is not None:
            q = q.where(Verification.block_id.in_(list(block_ids)))
        return int(s.scalar(q) or 0)


def check_summary_line(checked: list[dict]) -> str:
    """One line on forecasts just checked against the observed high (``checked`` from :func:`check_heat_days`)."""
    days = sorted({c["day"] for c in checked})
    span = f"{days[0]}" if len(days) == 1 else f"{days[0]} to {days[-1]}"
    err = np.array([c["error_c"] for c in checked if c["error_c"] is not None], float)
    inside = sum(1 for c in checked if c["p10_c"] is not None and c["p90_c"] is not None
                 and c["p10_c"] <= c["observed_c"] <= c["p90_c"])
    miss = f"typical miss {np.mean(np.abs(err)):.1f} °C, mean {np.mean(err):+.1f} °C" if len(err) else "no high"
    return (f"checked heat day {span}: {len(checked)} forecast high{'s' if len(checked) != 1 else ''} against "
            f"the observed high ({miss} (forecast - observed); {inside} of {len(checked)} inside the "
            "8-in-10 range)")
