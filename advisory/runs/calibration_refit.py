"""Refit a station's night calibration from its verified history (and the weight of its night
outlooks), when due.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Sequence

import numpy as np
import pandas as pd
from sqlalchemy import func, select
from sqlalchemy.orm import Session

from advisory.forecast import calibration as calib
from advisory.forecast import outlook_effect
from advisory.forecast.result import table_quantile
from advisory.ingest.night_outlook import load_night_outlooks
from advisory.ingest.observations import load_observations_many
from advisory.store.schema import (
    Calibration,
    Station,
)

#: History used to refit a station's calibration [days].
CALIBRATION_HISTORY_DAYS = 4 * 365


#: A station's night calibration is refitted in the morning when it is this many days old ...
REFIT_EVERY_DAYS = 7
#: ... or every morning while it rests on fewer nights than this (a young station learns fast).
REFIT_DAILY_BELOW_NIGHTS = 60
#: Stations whose history is loaded at once by a refit (bounds the memory of a large set-up).
REFIT_STATIONS_AT_ONCE = 16


def stations_due_for_refit(session: Session, station_ids: Sequence[int], now: dt.datetime) -> list[int]:
    """The stations whose night calibration is due for a refit this morning.

    Due: no calibration yet; one fitted :data:`REFIT_EVERY_DAYS` days ago or more
    (one more night barely moves a fit on years of history, and a refit reads all of
    it); or one fitted on fewer than :data:`REFIT_DAILY_BELOW_NIGHTS` nights and not
    yet today.
    """
    if not station_ids:
        return []
    latest = (select(Calibration.station_id, func.max(Calibration.id).label("id"))
              .where(Calibration.kind == "night_min", Calibration.station_id.in_(list(station_ids)))
              .group_by(Calibration.station_id).subquery())
    last = {sid: (fitted, nights) for sid, fitted, nights in session.execute(
        select(Calibration.station_id, Calibration.fitted_at, Calibration.training_nights)
        .join(latest, Calibration.id == latest.c.id))}
    due = []
    for sid in station_ids:
        if sid not in last:
            due.append(sid)
            continue
        fitted, nights = last[sid]
        age_h = (now - fitted).total_seconds() / 3600.0
        if age_h >= REFIT_EVERY_DAYS * 24 - 1 or ((nights or 0) < REFIT_DAILY_BELOW_NIGHTS and age_h >= 12):
            due.append(sid)
    return due


def refit_calibrations(session: Session, station_ids: Sequence[int], now: dt.datetime) -> dict[int, int]:
    """Refit each station's night-minimum calibration from its observation history.

    Every past night with a complete evening state and a covered window gives
    one training row (evening predictors, observed minimum), as in the hindcast.
    Returns the number of training nights per station.
    """
    out = {}
    start = now - dt.timedelta(days=CALIBRATION_HISTORY_DAYS)
    station_ids = list(station_ids)
    for k in range(0, len(station_ids), REFIT_STATIONS_AT_ONCE):
        out.update(_refit_some(session, station_ids[k:k + REFIT_STATIONS_AT_ONCE], start, now))
    return out


def _refit_some(session: Session, station_ids: list[int], start: dt.datetime, now: dt.datetime) -> dict[int, int]:
    out = {}
    obs = load_observations_many(session, station_ids, start, now)
    for sid in station_ids:
        frame = obs.get(sid)
        if frame is None or len(frame) < 48:
            continue
        station = session.get(Station, sid)
        history = night_history(frame, station.latitude, station.longitude, station.timezone, now)
        if history.empty:
            continue
        cal = _fit_outlook_weight(session, calib.fit_calibration(history), history, station)
        session.add(Calibration(station_id=sid, kind="night_min", fitted_at=now,
                                training_nights=int(cal.training_nights),
                                params=cal.to_dict()))
        out[sid] = len(history)
    return out


def _fit_outlook_weight(session: Session, cal: calib.Calibration, history: pd.DataFrame,
                        station: Station) -> calib.Calibration:
    """The station's calibration with the weight of its night outlooks, fitted jointly on its verified nights.

    The outlook's physical change is a predictor of the night minimum next to the evening ones: the
    regression is refitted on the observed minima less the outlook's share, and the share on the
    residuals of that fit, a few times in turn (backfitting), so that the evening predictors do not
    soak up what the outlook explains.  Without enough nights carrying an outlook the calibration is
    returned as it was.
    """
    if cal.model != calib.CALIBRATED or history.empty:
        return cal
    ref = pd.DatetimeIndex(history["reference_time"])
    rise = pd.DatetimeIndex(history["sunrise"])
    hours = load_night_outlooks(session, [station.id], ref.min(), rise.max()).get(station.id)
    if hours is None:
        return cal
    means = [outlook_effect.outlook_means(hours, r, s, station.timezone) for r, s in zip(ref, rise, strict=True)]
    has = np.array([m.hours > 0 for m in means], dtype=bool)
    if has.sum() < outlook_effect.MIN_NIGHTS:
        cal.outlook_nights = int(has.sum())
        return cal
    from advisory.forecast.cooling import physical_night

    change = np.zeros(len(history))
    change[has] = outlook_effect.physical_change_c(
        physical_night(history[has]), [m.sky_cover_pct for m, h in zip(means, has, strict=True) if h],
        [m.wind_speed_ms for m, h in zip(means, has, strict=True) if h])
    recency = 0.5 ** ((has.sum() - 1 - np.arange(has.sum())) / calib.HALF_LIFE_NIGHTS)
    observed = history["observed_min_c"].to_numpy(float)
    weight = outlook_effect.DEFAULT_WEIGHT
    fitted = cal
    for _ in range(4):
        fitted = calib.fit_calibration(history.assign(observed_min_c=observed - weight * change))
        q, _, _, _ = calib.forecast_quantiles(history[has], fitted)
        residual = observed[has] - table_quantile(q, 0.5)
        new, nights = outlook_effect.fit_outlook_weight(change[has], residual, recency)
        if new is None:
            return cal
        done = abs(new - weight) < 0.01
        weight = new
        if done:
            break
    fitted.outlook_weight, fitted.outlook_nights = float(weight), int(nights)
    return fitted


def night_history(frame: pd.DataFrame, lat: float, lon: float, tz: str, now: dt.datetime) -> pd.DataFrame:
    """Evening states and observed minima of every complete past night in ``frame``.

    Exactly the hindcast's definition (:func:`advisory.forecast.hindcast.verified_nights`): nights whose
    window is broken or not yet closed at ``now`` are left out.
    """
    from advisory.forecast.hindcast import verified_nights

    return verified_nights(frame, lat, lon, tz, until=now)
