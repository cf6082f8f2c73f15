"""One night (or day) for a set of blocks: load, forecast, assess, compose, store, deliver.

All blocks due together go through the models as arrays in one pass.  The
database work of a batch is one transaction: forecasts, notices and the run
record are committed together, then the notices are delivered (each attempt
logged).  Every forecast, notice and run has an idempotency key, so a night
can be rerun, and the scheduler restarted mid-run, without a notice going out
twice:

* forecast: (block, kind, night, revision) is unique; the evening forecast is
  revision 0 and is never made twice;
* notice: :func:`advisory.notices.compose.notice_key` (kind, farm, block, night,
  revision) is unique;
* delivery: a notice already sent to a recipient on a channel is not sent again;
* run: the ``runs`` table records each planned run's key once it is stored and
  again once it is delivered.

Updates through the night re-forecast from the latest observations; a new
notice goes out only when the change is material (:func:`material_change`); a
protection run already under way is carried into the update
(:mod:`advisory.risk.continuity`).

Scale: a run reads what it needs with one query per table (blocks with their
farm, station, recipients and equipment; previous revisions; the notices
behind them; recent verifications), never one per block; forecasts and notices
are written with bulk INSERT statements; the models run on whole arrays, with far
apart time zones in separate passes so that no block is padded with another
continent's night; the notices just stored are delivered from memory, not read
back; Python's cyclic garbage collector is paused during the batch.  Each run
reports the wall time of its stages in :attr:`RunResult.timings`;
``benchmarks/bench_night.py`` measures a night of 10,000 blocks.  For such
numbers of blocks a lean outbox (``ADVISORY_OUTBOX_FORMATS``,
``ADVISORY_OUTBOX_CHARTS`` in :mod:`advisory.settings`) avoids drawing and
writing every notice in every format.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import gc
import logging
import math
import os
import time
from collections import defaultdict
from collections.abc import Callable, Collection, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from sqlalchemy import func, select
from sqlalchemy.orm import Session, selectinload

from advisory import assessment as asm
from advisory import settings as settings_mod
from advisory.crops import thresholds
from advisory.forecast import calibration as calib
from advisory.forecast import outlook_effect
from advisory.forecast.evening import evening_states
from advisory.forecast.result import NightForecast, table_prob_below, table_quantile
from advisory.ingest.night_outlook import load_night_outlooks
from advisory.ingest.observations import load_observations_many
from advisory.notices import compose
from advisory.physics import moisture, sun
from advisory.risk import continuity, frost
from advisory.store import bulk, jsoncodec
from advisory.store import db as db_mod
from advisory.store.schema import (
    Block,
    Calibration,
    Farm,
    Forecast,
    Notice,
    RunRecord,
    Station,
    Verification,
    with_data,
)

log = logging.getLogger("advisory.pipeline")

#: An update notice goes out when the advised start time comes at least this much earlier [min] ...
MATERIAL_START_SHIFT_MIN = 30
#: ... or at least this much later [min] ...
MATERIAL_LATER_SHIFT_MIN = 60
#: ... or the median minimum moves by at least this much [°C] while protection is advised.
MATERIAL_MIN_SHIFT_C = 1.5
#: A change towards less to do (a lower action band, a method or a start time dropped) goes out only when
#: the median minimum is at least this much warmer than in the last notice [°C] (see :func:`material_change`).
MATERIAL_STAND_DOWN_C = 0.5
#: Observations older than this before the reference time are not used for the evening state [h].
LOOKBACK_H = 30
#: History used to refit a station's calibration [days].
CALIBRATION_HISTORY_DAYS = 4 * 365
#: Recent verified nights shown in a notice.
VERIFICATION_SHOWN = 5


@dataclass
class RunResult:
    """What a run did, for the command line and the scheduler."""

    kind: str
    night: dt.date
    assessments: list[asm.Assessment] = field(default_factory=list)
    notices: list[int] = field(default_factory=list)
    deliveries: dict[str, int] = field(default_factory=dict)
    skipped: list[str] = field(default_factory=list)
    verified: list[dict] = field(default_factory=list)
    farm_summaries: dict[str, int] = field(default_factory=dict)
    #: Wall time of each stage of the run [s] (see :class:`StageTimes`).
    timings: dict[str, float] = field(default_factory=dict)


class StageTimes(dict):
    """Wall time per stage of a run [s]: ``lap(name)`` adds the time since the previous lap."""

    def __init__(self):
        super().__init__()
        self._t = time.perf_counter()

    def lap(self, name: str) -> None:
        now = time.perf_counter()
        self[name] = self.get(name, 0.0) + now - self._t
        self._t = now


def _lap(timings: StageTimes | None, name: str) -> None:
    if timings is not None:
        timings.lap(name)


# --------------------------------------------------------------------------- loading

def _load_blocks(session: Session, block_ids: Sequence[int] | None, farm: str | None = None,
                 names: Sequence[str] | None = None, *, equipment: bool = True) -> list[Block]:
    """Active blocks (all, or by id, farm or name), ordered by farm and block name.

    Each comes with its farm, station and recipients (and its equipment unless
    ``equipment=False``) already in place, read with one query per table
    rather than one per block.
    """
    blocks = list(session.scalars(_block_query(block_ids, farm, names)))
    if blocks:
        _populate(session, blocks, equipment=equipment)
    return blocks


def _block_query(block_ids: Sequence[int] | None, farm: str | None, names: Sequence[str] | None, *columns):
    """The active blocks (all, or by id, farm or name) ordered by farm and block name: ``Block``
    rows, or the given ``columns``."""
    q = select(*(columns or (Block,))).select_from(Block).join(Farm).where(Block.active.is_(True)) \
        .order_by(Farm.name, Block.name)
    if block_ids is not None:
        q = q.where(Block.id.in_(list(block_ids)))
    if farm:
        q = q.where(Farm.name == farm)
    if names:
        q = q.where(Block.name.in_(list(names)))
    return q


def _populate(session: Session, blocks: list[Block], *, equipment: bool) -> None:
    """Put the farm, station, recipients (and equipment) of ``blocks`` in place, in bulk.

    The values are set as loaded from the database (nothing becomes dirty), exactly what the
    relationships would load one block at a time.
    """
    from sqlalchemy.orm.attributes import set_committed_value

    from advisory.store.schema import BlockRecipient, Equipment, Recipient

    ids = [b.id for b in blocks]
    farms = {f.id: f for f in session.scalars(select(Farm).where(Farm.id.in_({b.farm_id for b in blocks})))}
    stations = {x.id: x for x in session.scalars(select(Station).where(
        Station.id.in_({b.station_id for b in blocks})))}
    links: dict[int, list[int]] = defaultdict(list)
    for chunk in _chunked(ids):
        for bid, rid in session.execute(select(BlockRecipient.block_id, BlockRecipient.recipient_id)
                                        .where(BlockRecipient.block_id.in_(chunk))
                                        .order_by(BlockRecipient.block_id, BlockRecipient.recipient_id)):
            links[bid].append(rid)
    wanted = sorted({r for rs in links.values() for r in rs})
    recipients = {}
    for chunk in _chunked(wanted):
        recipients.update({r.id: r for r in session.scalars(select(Recipient).where(Recipient.id.in_(chunk)))})
    gear: dict[int, list] = defaultdict(list)
    if equipment:
        for chunk in _chunked(ids):
            for e in session.scalars(select(Equipment).where(Equipment.block_id.in_(chunk)).order_by(Equipment.id)):
                gear[e.block_id].append(e)
    for b in blocks:
        set_committed_value(b, "farm", farms[b.farm_id])
        set_committed_value(b, "station", stations[b.station_id])
        set_committed_value(b, "recipients", [recipients[r] for r in links.get(b.id, ())])
        if equipment:
            set_committed_value(b, "equipment", gear.get(b.id, []))


@dataclass
class _BlockLinks:
    """What storing and delivering a block's notices needs of the block: its farm and recipients."""

    id: int
    farm_id: int
    recipients: list = field(default_factory=list)


def _block_links(session: Session, block_ids: Sequence[int]) -> dict[int, _BlockLinks]:
    """:class:`_BlockLinks` of ``block_ids`` (recipients in the order :func:`_populate` gives them)."""
    from advisory.store.schema import BlockRecipient, Recipient

    out: dict[int, _BlockLinks] = {}
    for chunk in _chunked(block_ids):
        out.update((i, _BlockLinks(i, f)) for i, f in session.execute(
            select(Block.id, Block.farm_id).where(Block.id.in_(chunk))))
    links: list[tuple[int, int]] = []
    for chunk in _chunked(block_ids):
        links += session.execute(select(BlockRecipient.block_id, BlockRecipient.recipient_id)
                                 .where(BlockRecipient.block_id.in_(chunk))
                                 .order_by(BlockRecipient.block_id, BlockRecipient.recipient_id)).all()
    recipients = {}
    for chunk in _chunked(sorted({r for _, r in links})):
        recipients.update({r.id: r for r in session.scalars(select(Recipient).where(Recipient.id.in_(chunk)))})
    for bid, rid in links:
        out[bid].recipients.append(recipients[rid])
    return out


def _equipment_of(session: Session, blocks: list[Block]) -> dict[int, list[dict]]:
    """Each block's protection equipment as ``{"kind": ..., **params}`` dicts, in id order (one query per
    5000 blocks; the ``equipment`` collections are used where already loaded)."""
    from sqlalchemy import inspect as sa_inspect

    from advisory.store.schema import Equipment

    out: dict[int, list[dict]] = {}
    missing = []
    for b in blocks:
        if "equipment" in sa_inspect(b).dict:
            out[b.id] = [{"kind": e.kind, **e.params} for e in b.equipment]
        else:
            missing.append(b.id)
    for chunk in _chunked(missing):
        for bid, kind, params in session.execute(select(Equipment.block_id, Equipment.kind, Equipment.params)
                                                 .where(Equipment.block_id.in_(chunk)).order_by(Equipment.id)):
            out.setdefault(bid, []).append({"kind": kind, **(params or {})})
    return out


def _latest_calibrations(session: Session, station_ids: Sequence[int], kind: str = "night_min",
                         before: dt.datetime | None = None) -> dict[int, calib.Calibration]:
    """Each station's newest calibration of ``kind`` (fitted at or before ``before`` when given,
    so that a past night run again is forecast only with what was known that evening)."""
    if not station_ids:
        return {}
    latest = (select(Calibration.station_id, func.max(Calibration.id).label("id"))
              .where(Calibration.kind == kind, Calibration.station_id.in_(list(station_ids)))
              .group_by(Calibration.station_id))
    if before is not None:
        latest = latest.where(Calibration.fitted_at <= before)
    latest = latest.subquery()
    rows = session.scalars(select(Calibration).join(latest, Calibration.id == latest.c.id))
    return {r.station_id: calib.Calibration.from_dict(r.params) for r in rows}


def _recent_verification(session: Session, block_ids: Sequence[int], before: dt.date, kind: str = "frost"
                         ) -> dict[int, list[dict]]:
    """The latest :data:`VERIFICATION_SHOWN` verified nights (or heat days, ``kind="heat"``) of each
    block before ``before``, newest first.

    Only those rows are read (a window function ranks each block's nights in the database), so
    the cost does not grow with the season's history.
    """
    out: dict[int, list[dict]] = defaultdict(list)
    for chunk in _chunked(block_ids):
        rank = func.row_number().over(partition_by=Verification.block_id,
                                      order_by=Verification.night.desc()).label("rank")
        sub = (select(Verification.block_id, Verification.night, Verification.forecast_c, Verification.observed_c,
                      Verification.error_c, rank)
               .where(Verification.block_id.in_(chunk), Verification.kind == kind, Verification.night < before)
               .subquery())
        for r in session.execute(select(sub).where(sub.c.rank <= VERIFICATION_SHOWN)
                                 .order_by(sub.c.block_id, sub.c.rank)):
            out[r.block_id].append({"night": r.night.isoformat(), "forecast_c": r.forecast_c,
                                    "observed_c": r.observed_c, "error_c": r.error_c})
    return out


# --------------------------------------------------------------------------- the frost night

def _base_assessment(b: Block, night: dt.date, kind: str = "frost", *, critical: dict | None = None
                     ) -> asm.Assessment:
    """The block's fixed part of an assessment; ``critical`` memoises the critical temperatures."""
    ct = _critical(b, critical)
    return asm.Assessment(
        kind=kind, farm=b.farm.name, farm_tz=b.farm.timezone, units=b.farm.units, block_id=b.id,
        block=b.name, station=b.station.code, crop=b.crop, variety=b.variety, stage=b.stage,
        area_ha=b.area_ha, night=night, t10_c=ct.t10_c, t90_c=ct.t90_c, critical_source=ct.source,
        details={"stage_date": b.stage_date.isoformat()} if getattr(b, "stage_date", None) else {})


def _silence_reason(station: Station, latest: pd.Timestamp | None, reason: str | None, tz: str) -> str:
    if latest is None:
        return f"no forecast tonight: station {station.code} has sent no usable readings"
    local = latest.tz_convert(tz)
    return (f"no forecast tonight: station {station.code} silent since "
            f"{local:%a %d %b %H:%M} {local.tzname()}" + (f" ({reason})" if reason else ""))


def _curves_on_grid(fc: NightForecast, states: pd.DataFrame, idx: np.ndarray, elevation_m: np.ndarray
                    ) -> frost.NightCurves:
    """The forecast's median curves for blocks ``idx`` on one shared 15-minute UTC grid."""
    ref = fc.reference_time[idx].as_unit("ns")
    end = (fc.sunrise[idx] + pd.Timedelta(hours=2)).as_unit("ns")
    start = ref.min().floor("15min")
    grid = pd.date_range(start, end.max().ceil("15min"), freq="15min").as_unit("ns")
    hours = (grid.asi8[:, None] - ref.asi8[None, :]) / 3.6e12          # (H, n)
    sub_phys = fc.physical.subset(idx)
    tmin = fc.quantile(0.5)[idx]
    t_ref = fc.reference_temp_c[idx]
    from advisory.forecast.cooling import curve_fraction

    frac = curve_fraction(sub_phys, np.maximum(hours, 0.0))
    after = np.maximum(hours - sub_phys.hours_to_minimum, 0.0)
    temps = np.where(after > 0, tmin + sub_phys.warming_k_per_h * after, t_ref - (t_ref - tmin) * frac)
    inside = (hours >= 0) & (grid.asi8[:, None] <= end.asi8[None, :])
    temps = np.where(inside, temps, np.nan).T                            # (n, H)
    dew = states["dew_point_c"].to_numpy(float)[idx]
    wind = np.nan_to_num(states["wind_speed_ms"].to_numpy(float)[idx], nan=1.0)
    return frost.NightCurves(
        times_utc=grid, air_temp_c=temps,
        dew_point_c=np.minimum(dew[:, None], np.where(np.isfinite(temps), temps, dew[:, None])),
        wind_speed_ms=wind[:, None], sunrise_utc=fc.sunrise[idx],
        pressure_kpa=np.asarray(moisture.pressure_kpa_from_elevation(elevation_m[idx]), float))


#: Blocks whose reference times lie within this span share one risk pass (one time grid) [h].
GROUP_SPAN_H = 1.0


def _night_groups(fc: NightForecast, idx: np.ndarray, span_h: float | None = None) -> list[np.ndarray]:
    """Split blocks ``idx`` into groups whose reference times lie within ``span_h`` of each other.

    The risk model works on one shared 15-minute grid per call, from the earliest reference time to
    the latest end of the night; one call for farms on several continents would pad every block with
    a day of empty grid.  Each block's results do not depend on the grid's extent.
    """
    ref = fc.reference_time[idx].as_unit("ns").asi8
    order = np.argsort(ref, kind="stable")
    groups, start = [], 0
    limit = int((GROUP_SPAN_H if span_h is None else span_h) * 3600 * 10**9)
    for k in range(1, len(order) + 1):
        if k == len(order) or ref[order[k]] - ref[order[start]] > limit:
            groups.append(np.sort(idx[order[start:k]]))
            start = k
    return groups


def _cdf(fc: NightForecast, idx: np.ndarray) -> Callable[[np.ndarray], np.ndarray]:
    """P(minimum <= x) from the forecast's quantile table, for x of shape (n, g).

    Same values as :func:`advisory.forecast.result.table_prob_below` column by column; rows whose
    quantiles are finite and sorted (all in practice) are counted with one binary search per row
    instead of comparing every level with every x.
    """
    q = np.asarray(fc.quantiles_c[idx], float)
    sorted_rows = np.all(np.isfinite(q), axis=1)
    if q.shape[1] > 1:
        sorted_rows &= np.all(np.diff(q, axis=1) >= 0, axis=1)

    def cdf(x):
        x = np.asarray(x, float)
        if x.ndim != 2 or not sorted_rows.all():
            return np.stack([table_prob_below(q, x[:, j]) for j in range(x.shape[1])], axis=1)
        return _table_prob_below_sorted(q, x)

    return cdf


def _table_quantiles(fc: NightForecast, idx: np.ndarray) -> Callable[[np.ndarray], np.ndarray]:
    """Quantiles at probabilities q (k,) from the forecast's quantile table, shape (n, k): the exact
    inverse of :func:`_cdf` (linear between the table's levels; q within the table's levels)."""
    from advisory.forecast.result import LEVELS

    table = np.asarray(fc.quantiles_c[idx], float)

    def quantile(q):
        q = np.clip(np.asarray(q, float), LEVELS[0], LEVELS[-1])
        j = np.clip(np.searchsorted(LEVELS, q, side="right") - 1, 0, len(LEVELS) - 2)
        f = (q - LEVELS[j]) / (LEVELS[j + 1] - LEVELS[j])
        return table[:, j] * (1.0 - f) + table[:, j + 1] * f

    return quantile


def _table_prob_below_sorted(q: np.ndarray, x: np.ndarray) -> np.ndarray:
    """:func:`~advisory.forecast.result.table_prob_below` for rows of finite, sorted quantiles ``q`` (n, k)
    at thresholds ``x`` (n, g); returns (n, g)."""
    from advisory.forecast.result import LEVELS

    n, k = q.shape
    below = np.empty(x.shape, dtype=np.int64)
    for i in range(n):  # count of q[i] <= x[i] (q[i] sorted): one binary search per row
        below[i] = np.searchsorted(q[i], x[i], side="right")
    j = np.clip(below, 1, k - 1)
    lo = np.take_along_axis(q, j - 1, axis=1)
    hi = np.take_along_axis(q, j, axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        f = np.where(hi > lo, (x - lo) / (hi - lo), 1.0)
    p = LEVELS[j - 1] + np.clip(f, 0.0, 1.0) * (LEVELS[j] - LEVELS[j - 1])
    p = np.where(below == 0, 0.0, np.where(below >= k, 1.0, p))
    return np.where(np.isfinite(x), p, np.nan)


def _critical(b: Block, cache: dict | None):
    """The block's critical temperatures (memoised per crop, stage and overrides within one run)."""
    key = (b.crop, b.stage, b.t10_override_c, b.t90_override_c)
    if cache is None or key not in cache:
        ct = thresholds.critical_temps(b.crop, b.stage, b.t10_override_c, b.t90_override_c)
        if cache is None:
            return ct
        cache[key] = ct
    return cache[key]


def _frost_settings(b: Block, cache: dict) -> frost.FrostSettings:
    """The block's frost settings (farm's, overridden by the block's), memoised per distinct pair."""
    key = (b.farm_id, repr(b.farm.settings), repr(b.settings))
    if key not in cache:
        cache[key] = frost.FrostSettings.from_mappings(b.farm.settings, b.settings,
                                                       where=f"block '{b.name}' settings")
    return cache[key]


def _nullable(values: np.ndarray) -> list:
    """Floats as a list, NaN as None."""
    return [None if v != v else v for v in np.asarray(values, float).tolist()]


def _pydatetimes(values) -> list:
    """Aware UTC datetimes (None for NaT) from datetime64 values."""
    idx = pd.DatetimeIndex(values)
    if idx.tz is None:
        idx = idx.tz_localize("UTC")
    py = idx.to_pydatetime()
    return [None if m else v for v, m in zip(py, idx.isna(), strict=True)]


def _latest_valid(obs: dict[int, pd.DataFrame], station_ids: np.ndarray, ref_ns: np.ndarray) -> list:
    """Time of each block's latest valid air temperature at or before its reference time (None: none)."""
    out: list = [None] * len(station_ids)
    order = np.argsort(station_ids, kind="stable")
    keys = station_ids[order]
    bounds = np.flatnonzero(np.r_[True, keys[1:] != keys[:-1], True])
    stamps: dict[int, pd.Timestamp] = {}
    for a, z in zip(bounds[:-1], bounds[1:], strict=True):
        frame = obs.get(int(keys[a]))
        if frame is None or not len(frame):
            continue
        t = frame.index.as_unit("ns").asi8[frame["air_temp_c"].notna().to_numpy()]
        rows = order[a:z]
        pos = np.searchsorted(t, ref_ns[rows], side="right") - 1
        for r, p in zip(rows.tolist(), pos.tolist(), strict=True):
            if p >= 0:
                v = int(t[p])
                if v not in stamps:
                    stamps[v] = pd.Timestamp(v, tz="UTC")
                out[r] = stamps[v]
    return out


_EVENING_KEYS = ("air_temp_c", "dew_point_c", "wind_speed_ms", "cloud_cover_pct", "upper_air_temp_c",
                 "cooling_since_sunset_c")


def _assessments(blocks: list[Block], night: dt.date, update: bool, table: pd.DataFrame, states: pd.DataFrame,
                 obs: dict[int, pd.DataFrame], fc: NightForecast, ok: np.ndarray, verif: dict,
                 ref_max: pd.Timestamp) -> list[asm.Assessment]:
    """Every block's assessment before the risk: sun times, data quality, status and reason.

    Works on whole columns; the only Python loop per block fills the dataclasses.
    """
    sunsets = _pydatetimes(table["sunset"])
    sunrises = _pydatetimes(table["sunrise"])
    status = table["status"].to_numpy(dtype=object)
    ref = pd.DatetimeIndex(states["reference_time"])
    ref_ns = np.where(ref.isna(), pd.Timestamp(ref_max).as_unit("ns").value, ref.as_unit("ns").asi8)
    latest = _latest_valid(obs, np.array([b.station_id for b in blocks], np.int64), ref_ns)
    refs = _pydatetimes(ref.round("s"))
    age = _nullable(states["air_temp_age_min"].to_numpy(float))
    evening = {k: _nullable(states[k].to_numpy(float)) for k in _EVENING_KEYS}
    crit: dict = {}
    out: list[asm.Assessment] = []
    for i, b in enumerate(blocks):
        a = _base_assessment(b, night, critical=crit)
        a.is_update = update
        a.sunset_utc = sunsets[i]
        a.sunrise_utc = sunrises[i]
        a.verification = verif.get(b.id, [])
        last = latest[i]
        a.data_quality = {
            "latest_obs_utc": None if last is None else last.isoformat(),
            "obs_age_min": age[i],
            "evening": {k: v[i] for k, v in evening.items()},
            "assumed": list(fc.assumed[i] or ()),
        }
        if status[i] != sun.NORMAL:
            a.status = asm.STATUS_NO_NIGHT
            a.reason = ("the sun does not set tonight at this latitude: no nocturnal forecast"
                        if status[i] == sun.POLAR_DAY else
                        "the sun does not rise tomorrow at this latitude: no nocturnal forecast")
        elif not ok[i]:
            a.status = asm.STATUS_NO_FORECAST
            a.reason = _silence_reason(b.station, last, fc.reason[i], b.farm.timezone)
        if refs[i] is not None:
            a.reference_time_utc = refs[i]
        out.append(a)
    return out


def _set_curves(out: list[asm.Assessment], fc: NightForecast, states: pd.DataFrame, idx: np.ndarray,
                pressure_kpa: np.ndarray) -> None:
    """The hourly night curve of blocks ``idx`` (median, 10th and 90th percentile, wet bulb), in one pass."""
    times, p50 = fc.curve(0.5)
    _, p10 = fc.curve(0.1)
    _, p90 = fc.curve(0.9)
    # (blocks, hours), row-major: each block's points in time order
    times, p50, p10, p90 = (x[:, idx].T for x in (times, p50, p10, p90))
    valid = ~np.isnat(times) & np.isfinite(p50)
    dew = states["dew_point_c"].to_numpy(float)[idx][:, None]
    pk = np.broadcast_to(np.asarray(pressure_kpa, float)[:, None], p50.shape)
    wet = np.asarray(moisture.wet_bulb_c(p50[valid], np.minimum(dew, p50)[valid], pk[valid]), float)
    # one datetime object per distinct hour, shared by every block's curve (the blocks of a pass share
    # one time grid): fewer objects to make, keep, encode and hand back from a worker process
    hours, which = np.unique(times[valid], return_inverse=True)
    shared = pd.DatetimeIndex(hours).tz_localize("UTC").round("s").to_pydatetime()
    when = [shared[k] for k in which.tolist()]
    # Hundredths of a degree are kept: finer digits mean nothing and would only fill the
    # stored payloads, notices and outbox files of every block.
    rows = zip(when, *(np.round(x, 2).tolist() for x in (p50[valid], p10[valid], p90[valid], wet)), strict=True)
    points = [asm.CurvePoint(time_utc=t, p50_c=a, p10_c=b, p90_c=c, wet_bulb_c=w) for t, a, b, c, w in rows]
    ends = np.cumsum(valid.sum(axis=1))
    start = 0
    for i, end in zip(idx, ends.tolist(), strict=True):
        out[i].curve = points[start:end]
        start = end


def _apply_night_outlooks(session: Session, fc: NightForecast, states: pd.DataFrame, blocks: list[Block],
                          cals: Mapping, station_ids: list[int]) -> list:
    """Shift each block's forecast by its station's night outlook, where one is stored; its sentence per block.

    See :mod:`advisory.forecast.outlook_effect`.  Without an outlook nothing changes.
    """
    ref = pd.DatetimeIndex(states["reference_time"])
    rise = pd.DatetimeIndex(states["sunrise"])
    valid = ~(ref.isna() | rise.isna())
    if not valid.any():
        return [None] * len(blocks)
    hours = load_night_outlooks(session, station_ids, ref[valid].min(), rise[valid].max())
    if not hours:
        return [None] * len(blocks)
    means = [outlook_effect.outlook_means(hours.get(b.station_id), ref[i], rise[i], b.farm.timezone)
             for i, b in enumerate(blocks)]
    weights = [getattr(cals.get(b.station_id), "outlook_weight", None) for b in blocks]
    delta, notes = outlook_effect.outlook_shifts(states, means, weights)
    fc.quantiles_c[:] = fc.quantiles_c + delta[:, None]
    return notes


def assess_night(session: Session, blocks: list[Block], night: dt.date, *, as_of: dt.datetime | None = None,
                 update: bool = False, timings: StageTimes | None = None) -> list[asm.Assessment]:
    """Forecast and assess ``night`` for ``blocks`` (pure reads; nothing is written).

    Parameters
    ----------
    session : Session
    blocks : list of Block
    night : date
        Local date of the evening.
    as_of : datetime, optional
        For an update: re-forecast from the observations up to this instant
        (the reference time becomes ``as_of``).  Default: the evening
        reference time of each block (sunset + its offset).
    update : bool
        Mark the assessments as updates.
    """
    if not blocks:
        return []
    lat = np.array([b.latitude for b in blocks], float)
    lon = np.array([b.longitude for b in blocks], float)
    tzs = np.array([b.farm.timezone for b in blocks], dtype=object)
    elev = np.array([b.elevation_m for b in blocks], float)
    table = sun.sun_times_batch(lat, lon, night, tzs)
    offset_h = np.array([b.reference_offset_min / 60.0 for b in blocks], float)
    if as_of is not None:
        since_sunset_h = (pd.Timestamp(as_of).tz_convert("UTC") - table["sunset"]).dt.total_seconds() / 3600
        offset_h = np.where(np.isfinite(since_sunset_h), np.maximum(since_sunset_h.to_numpy(float), offset_h),
                            offset_h)
    station_ids = sorted({b.station_id for b in blocks})
    ref_max = table["sunset"].max() + pd.Timedelta(hours=float(np.nanmax(offset_h)) + 0.5)
    if pd.isna(ref_max):  # polar everywhere
        ref_max = pd.Timestamp(dt.datetime.combine(night, dt.time(23), dt.UTC))
    ref_min = table["sunset"].min()
    if pd.isna(ref_min):
        ref_min = ref_max
    _lap(timings, "sun+evening state")
    obs = load_observations_many(session, station_ids, ref_min - pd.Timedelta(hours=LOOKBACK_H),
                                 ref_max + pd.Timedelta(minutes=1))
    _lap(timings, "load observations")
    station_keys = np.array([b.station_id for b in blocks], dtype=object)
    sun_rows = table.assign(night=night)
    states = evening_states(obs, sun_rows, station=station_keys, reference_offset_h=offset_h)
    states["station"] = station_keys
    _lap(timings, "sun+evening state")
    cals = _latest_calibrations(session, station_ids, before=pd.Timestamp(ref_max).floor("us").to_pydatetime())
    fc = calib.forecast_night(states, {k: v for k, v in cals.items()}, block=[b.id for b in blocks])
    outlook_notes = _apply_night_outlooks(session, fc, states, blocks, cals, station_ids)
    ok = fc.ok & (table["status"].to_numpy(dtype=object) == sun.NORMAL)
    verif = _recent_verification(session, [b.id for b in blocks], night)
    _lap(timings, "forecast")

    out = _assessments(blocks, night, update, table, states, obs, fc, ok, verif, ref_max)
    for i, note in enumerate(outlook_notes):
        if note and ok[i]:
            out[i].details["night_outlook"] = note
    idx = np.flatnonzero(ok)
    if len(idx):
        upper = states["upper_air_temp_c"].to_numpy(float)
        air = states["air_temp_c"].to_numpy(float)
        cloud = states["cloud_cover_pct"].to_numpy(float)
        inversion = upper - air
        frost_settings: dict = {}
        gear = _equipment_of(session, [blocks[i] for i in idx])
        # Blocks whose nights overlap share one time grid; far-apart zones get their own, so the
        # grid of each pass is not padded with the hours of the other side of the world.
        for group in _night_groups(fc, idx):
            curves = _curves_on_grid(fc, states, group, elev)
            forecast = frost.MinTempForecast(fc.quantile(0.1)[group], fc.quantile(0.5)[group],
                                             fc.quantile(0.9)[group], cdf=_cdf(fc, group),
                                             quantile=_table_quantiles(fc, group))
            setups = []
            for i in group:
                b = blocks[i]
                a = out[i]
                setups.append(frost.BlockSetup(
                    name=b.name, crop=b.crop, stage=b.stage, t10_c=a.t10_c, t90_c=a.t90_c, area_ha=b.area_ha,
                    equipment=gear.get(b.id, []),
                    upper_inversion_c=None if np.isnan(inversion[i]) else float(inversion[i]),
                    cloud_cover_pct=None if np.isnan(cloud[i]) else float(cloud[i]),
                    settings=_frost_settings(b, frost_settings)))
            risks = frost.plan_night(setups, curves, forecast)
            for k, i in enumerate(group):
                a = out[i]
                for key, value in frost.assessment_fields(risks[k]).items():
                    setattr(a, key, {**(a.details or {}), **value} if key == "details" else value)
                a.model = str(fc.model[i])
                a.training_nights = int(fc.training_nights[i])
        pressure = np.asarray(moisture.pressure_kpa_from_elevation(elev[idx]), float)
        _set_curves(out, fc, states, idx, pressure)
    _lap(timings, "risk/plan")
    return out


# --------------------------------------------------------------------------- storing and delivering

#: Ids per ``IN (...)`` list (well below SQLite's limit on bound parameters).
_IN_CHUNK = 5000


def _chunked(values: Sequence, size: int = _IN_CHUNK):
    values = list(values)
    for k in range(0, len(values), size):
        yield values[k:k + size]


def _previous_revisions(session: Session, block_ids: Sequence[int], night: dt.date, kind: str) -> dict[int, int]:
    """Latest stored forecast revision of each block for a night (blocks without one are absent).

    One query per :data:`_IN_CHUNK` blocks, answered from the unique index on
    (block, kind, night, revision).
    """
    out: dict[int, int] = {}
    for chunk in _chunked(sorted(set(block_ids))):
        out.update(session.execute(select(Forecast.block_id, func.max(Forecast.revision))
                                   .where(Forecast.block_id.in_(chunk), Forecast.kind == kind,
                                          Forecast.night == night)
                                   .group_by(Forecast.block_id)).all())
    return out


def _last_noticed_many(session: Session, block_ids: Sequence[int], night: dt.date, kind: str
                       ) -> dict[int, asm.Assessment]:
    """The assessment behind each block's latest notice of the night (blocks without one are absent)."""
    wanted = set(block_ids)
    if not wanted:
        return {}
    latest: dict[int, tuple[int, int | None]] = {}
    for bid, rev, fid in session.execute(select(Notice.block_id, Notice.revision, Notice.forecast_id)
                                         .where(Notice.kind == kind, Notice.night == night,
                                                Notice.block_id.is_not(None))):
        if bid in wanted and (bid not in latest or rev > latest[bid][0]):
            latest[bid] = (rev, fid)
    by_forecast = {fid: bid for bid, (_, fid) in latest.items() if fid is not None}
    out: dict[int, asm.Assessment] = {}
    for chunk in _chunked(sorted(by_forecast)):
        for fid, payload in session.execute(select(Forecast.id, Forecast.payload).where(Forecast.id.in_(chunk))):
            if payload:
                out[by_forecast[fid]] = asm.from_dict(payload)
    return out


def _first_advised(a: asm.Assessment, attr: str) -> dt.datetime | None:
    times = [getattr(s, attr) for s in a.plan if s.advised and getattr(s, attr) is not None]
    return min(times) if times else None


def action_band(a: asm.Assessment) -> int:
    """What the grower has to do, in three steps: 0 nothing (the two lowest levels), 1 have protection
    ready, 2 protect (the block's own protect level, ``details["needs_protection"]``, or above);
    -1 for a night without a forecast."""
    if a.status != asm.STATUS_OK:
        return -1
    if (a.details or {}).get("needs_protection"):
        return 2
    return 1 if (a.level_rank or 0) >= 2 else 0


def material_change(new: asm.Assessment, old: asm.Assessment | None) -> list[str]:
    """Why an update deserves a new notice (empty: it does not).

    ``old`` is the assessment behind the last notice sent for the block that
    night; the update's clock is ``new.reference_time_utc``.  A notice at
    night wakes someone, so a change is material when it changes what the
    crew does, and a change towards doing less must hold by a margin: near a
    level's edge the forecast would otherwise flip it back and forth every
    hour, and crews would stop and start on the flips.  Material:

    * a different status (a forecast, or none);
    * a higher :func:`action_band` (nothing to do, have protection ready,
      protect); a lower one only when the forecast minimum is at least
      :data:`MATERIAL_STAND_DOWN_C` warmer than in the last notice.  A level
      change within a band is not material;
    * a method (or "no usable protection") newly advised; a method no longer
      advised, with the same margin as above (a run already under way is
      kept by :func:`advisory.risk.continuity.carry_started` before this
      check);
    * while the last notice's first firm start is still ahead: a start
      :data:`MATERIAL_START_SHIFT_MIN` or more earlier, or
      :data:`MATERIAL_LATER_SHIFT_MIN` or more later; a firm start where
      there was only "be ready"; no firm start any more, with the margin.
      Once the noticed start has passed the crew is running, and the new
      plan's later "start" is not news.  Without firm starts, a "ready by"
      time :data:`MATERIAL_START_SHIFT_MIN` or more earlier;
    * while protection is advised, the forecast minimum moves by
      :data:`MATERIAL_MIN_SHIFT_C` or more.
    """
    if old is None:
        return ["first notice of the night"]
    why = []
    warmer = (new.p50_c - old.p50_c) if new.p50_c is not None and old.p50_c is not None else math.inf
    stand_down = warmer >= MATERIAL_STAND_DOWN_C
    band_new, band_old = action_band(new), action_band(old)
    if new.status != old.status:
        why.append(f"status {old.status} -> {new.status}")
    elif band_new > band_old or (band_new < band_old and stand_down):
        why.append(f"level {old.level or '-'} -> {new.level or '-'}")
    adv_new = {s.method for s in new.plan if s.advised}
    adv_old = {s.method for s in old.plan if s.advised}
    if adv_new - adv_old or (adv_old - adv_new and stand_down):
        why.append("advised protection changed")
    now = new.reference_time_utc
    earlier = dt.timedelta(minutes=MATERIAL_START_SHIFT_MIN)
    later = dt.timedelta(minutes=MATERIAL_LATER_SHIFT_MIN)
    s_new, s_old = _first_advised(new, "start_utc"), _first_advised(old, "start_utc")
    if s_old is not None and now is not None and s_old <= now:
        pass  # under way: the crew started at the noticed time
    elif s_new is not None and s_old is None:
        why.append("start time set")
    elif s_new is None and s_old is not None:
        if stand_down:
            why.append("no start time on the middle forecast")
    elif s_new is not None:
        if s_old - s_new >= earlier:
            why.append(f"start time {(s_old - s_new).total_seconds() / 60:.0f} min earlier")
        elif s_new - s_old >= later:
            why.append(f"start time {(s_new - s_old).total_seconds() / 60:.0f} min later")
    else:
        r_new, r_old = _first_advised(new, "ready_by_utc"), _first_advised(old, "ready_by_utc")
        if r_new is not None and r_old is not None and (now is None or r_old > now) and r_old - r_new >= earlier:
            why.append(f"ready-by time {(r_old - r_new).total_seconds() / 60:.0f} min earlier")
    if adv_new and new.p50_c is not None and old.p50_c is not None \
            and abs(new.p50_c - old.p50_c) >= MATERIAL_MIN_SHIFT_C:
        why.append(f"forecast minimum moved by {abs(new.p50_c - old.p50_c):.1f} °C")
    return why


@dataclass(frozen=True)
class StoredNotice:
    """A stored notice row as the run and the delivery read it (no database session needed).

    :func:`advisory.notices.deliver.deliver_notices` reads only ``id``, ``key``
    and ``content`` of a notice row, so this stands in for the ORM row.
    """

    id: int
    key: str
    farm_id: int
    block_id: int | None
    #: The composed notice (:class:`~advisory.notices.compose.BlockNotice` or
    #: :class:`~advisory.notices.compose.FarmSummary`) when the run that stored it
    #: still has it, else ``Notice.content`` as stored (plain data).
    content: Any = field(repr=False, default_factory=dict)

    @property
    def full_content(self) -> Any:
        """The notice whole, as delivery reads it (``Notice.full_content`` of a stored row)."""
        return self.content


@dataclass
class Prepared:
    """What a batch will store: the assessments to store, their payloads and composed notices."""

    #: Assessments to store (revision set), in the batch's order.
    todo: list[asm.Assessment]
    #: The stored payload of each (``advisory.assessment.to_dict`` form), as encoded JSON.
    payloads: list[bytes]
    #: ``(key, subject, notice)`` of each block's notice, or None where no notice is due.
    composed: list[tuple | None]
    #: Messages for assessments not stored (already assessed).
    skipped: list[str]
    #: Keys of the block notices whose outbox files the worker process that composed them handed
    #: to the outbox writer itself (see :meth:`_Staging.write_share`).
    staged: list[str] = field(default_factory=list)


def _prepare(session: Session, assessments: list[asm.Assessment], *, revision_mode: str,
             timings: StageTimes | None = None) -> Prepared:
    """Revisions, payloads and notices of a batch (reads the database, writes nothing).

    See :func:`_store` for ``revision_mode``.
    """
    skipped: list[str] = []
    if not assessments:
        return Prepared([], [], [], skipped)
    kinds = {a.kind for a in assessments}
    nights = {a.night for a in assessments}
    prev: dict[tuple, int] = {}
    for kind in kinds:
        for night in nights:
            ids = [a.block_id for a in assessments if a.kind == kind and a.night == night]
            prev.update({(bid, kind, night): rev
                         for bid, rev in _previous_revisions(session, ids, night, kind).items()})
    todo: list[asm.Assessment] = []
    for a in assessments:
        p = prev.get((a.block_id, a.kind, a.night))
        if revision_mode in ("evening", "heat", "missed"):
            if p is not None:
                skipped.append(f"{a.block}: {a.kind} {a.night} already assessed (revision {p})")
                continue
            a.revision = 0
        else:
            a.revision = 0 if p is None else p + 1
            a.is_update = p is not None
        todo.append(a)
    noticed: dict = {}
    if revision_mode == "update":
        for kind in kinds:
            for night in nights:
                ids = [a.block_id for a in todo if a.is_update and a.kind == kind and a.night == night]
                noticed.update({(bid, kind, night): v
                                for bid, v in _last_noticed_many(session, ids, night, kind).items()})
    payloads: list[bytes] = []
    composed: list[tuple | None] = []
    for a in todo:
        previous_noticed = noticed.get((a.block_id, a.kind, a.night)) if a.is_update else None
        notice = None
        why: list[str] = []
        if a.is_update:
            if previous_noticed is not None and a.reference_time_utc is not None:
                a.plan = continuity.carry_started(a.plan, previous_noticed.plan, a.reference_time_utc)
            why = material_change(a, previous_noticed)
            if why:
                a.details = {**a.details, "update_reasons": why}
        # advisory.assessment.to_dict(a), encoded once: stored as the forecast's payload, and the
        # notice's data (parsed only if the notice is drawn or rendered from it)
        encoded = jsoncodec.encode(a)
        if not a.is_update or why:
            n = compose.compose_block(a, previous_noticed, data=jsoncodec.Encoded(encoded))
            # stored without its data (the forecast's payload, stored once)
            notice = (n.key, n.subject, n, compose.stored_json(n))
        payloads.append(encoded)
        composed.append(notice)
    _lap(timings, "compose")
    return Prepared(todo, payloads, composed, skipped)


def _store(session: Session, assessments: list[asm.Assessment], *, revision_mode: str,
           now: dt.datetime, timings: StageTimes | None = None, prepared: Prepared | None = None,
           workers: int = 1, stage: Callable[[list], Any] | None = None,
           known_blocks: Mapping[int, Block] | None = None) -> tuple[list[tuple[StoredNotice, list]], list[str]]:
    """Store forecasts and notices; returns (notices to deliver, skipped messages).

    The rows are written with a few bulk INSERT statements (the database hands back
    the new ids in order); what was stored before is read with one query per
    table, not one per block.

    Parameters
    ----------
    session : Session
        The run's transaction (the caller commits).
    assessments : list of Assessment
    revision_mode : {"evening", "heat", "missed", "update"}
        ``evening``, ``heat`` and ``missed`` store revision 0 of a block-night
        once (a block already assessed is skipped); ``update`` stores the next
        revision and a notice only when :func:`material_change` says so.
    now : datetime
        The run's clock (``created_at``).
    prepared : Prepared, optional
        :func:`_prepare` of ``assessments`` when already made (by the run's worker processes).
    workers : int
        Processes that may compose the farm summaries of a large run (see :mod:`advisory.forking`).
    known_blocks : mapping, optional
        The assessed blocks by id (or their :class:`_BlockLinks`), when the caller has them
        (else each is looked up).
    stage : callable, optional
        Called with ``[(key, block notice, (stored JSON, payload JSON))]``, ``[(key, farm
        summary)]`` and the keys of the block notices worker processes handed over themselves,
        once every notice of the batch is composed, before anything is written (see
        :meth:`_Staging.hand_over`).
    """
    if prepared is None:
        prepared = _prepare(session, assessments, revision_mode=revision_mode, timings=timings)
    todo, payloads, composed, skipped = prepared.todo, prepared.payloads, prepared.composed, prepared.skipped
    if not todo:
        return [], skipped
    loaded = known_blocks or {}
    blocks = {a.block_id: loaded.get(a.block_id) or session.get(Block, a.block_id) for a in todo}
    by_farm: dict[int, list[tuple[asm.Assessment, Block]]] = defaultdict(list)
    for a, notice in zip(todo, composed, strict=True):
        if notice is not None:
            by_farm[blocks[a.block_id].farm_id].append((a, blocks[a.block_id]))
    # One farm summary per farm and run (only for the evening and heat runs and for updates with news).
    batch: dict[int, list[asm.Assessment]] = defaultdict(list)  # this batch's assessments by farm
    for a in todo:
        batch[blocks[a.block_id].farm_id].append(a)
    wanted = []  # (farm id, its assessments, revision, key, recipients) of each summary to compose
    for farm_id, items in by_farm.items():
        farm_assessments = [a for a, _ in items]
        a0 = farm_assessments[0]
        revision = max(a.revision for a in farm_assessments)
        if revision_mode in ("evening", "heat"):
            # the summary gathers every block of the farm assessed for this night, not only this batch
            farm_assessments = _farm_payloads(session, farm_id, a0.night, a0.kind, batch[farm_id]) \
                or farm_assessments
        elif revision_mode == "update":
            # the farm's whole picture: the blocks with news as now, the others as last sent
            farm_assessments = _farm_last_noticed(session, farm_id, a0.night, a0.kind, farm_assessments)
        key = compose.notice_key(a0.kind + "-summary", a0.farm, None, a0.night, revision) + f":{_batch_tag(items)}"
        if session.scalar(select(Notice.id).where(Notice.key == key)) is not None:
            continue
        recips = {r.id: r for _, b in items for r in b.recipients}
        wanted.append((farm_id, farm_assessments, revision, key, list(recips.values())))
    # Large farms' summaries are composed by several processes (each a farm at a time).
    from advisory import forking

    share = workers if sum(len(x[1]) for x in wanted) >= PARALLEL_FROM_BLOCKS else 1
    news = {a.block_id for a, notice in zip(todo, composed, strict=True) if notice is not None}
    composed_summaries = forking.fork_map(
        lambda x: compose.compose_farm(x[1], revision=x[2], changed=news if x[2] else None), wanted, share)
    _lap(timings, "compose summaries")
    if stage is not None:  # every notice is composed: its outbox files can be written ahead
        stage([(c[0], c[2], (c[3], p)) for c, p in zip(composed, payloads, strict=True) if c],
              [(x[3], summary) for x, summary in zip(wanted, composed_summaries, strict=True)],
              prepared.staged)
        _lap(timings, "hand over to the outbox writer")
    forecast_ids = _insert_returning_ids(session, Forecast, [
        {"block_id": a.block_id, "kind": a.kind, "night": a.night, "revision": a.revision, "created_at": now,
         "reference_time": a.reference_time_utc, "status": a.status, "reason": a.reason, "model": a.model,
         "training_nights": a.training_nights, "min_p10_c": a.p10_c, "min_p50_c": a.p50_c,
         "min_p90_c": a.p90_c, "level": a.level, "payload": jsoncodec.Fragment(payload)}
        for a, payload in zip(todo, payloads, strict=True)])
    _lap(timings, "store forecasts")
    rows, sent, notices = [], [], []
    for a, notice, fid in zip(todo, composed, forecast_ids, strict=True):
        if notice is None:
            continue
        block = blocks[a.block_id]
        key, subject, content, stored = notice
        rows.append({"key": key, "farm_id": block.farm_id, "block_id": a.block_id, "forecast_id": fid,
                     "kind": a.kind, "night": a.night, "revision": a.revision, "is_update": a.is_update,
                     "level": a.level, "subject": subject, "created_at": now,
                     "content": jsoncodec.Fragment(stored)})  # without its data: the forecast's payload
        notices.append(content)
        sent.append(list(block.recipients))
    for (farm_id, _, revision, key, recips), summary in zip(wanted, composed_summaries, strict=True):
        rows.append({"key": key, "farm_id": farm_id, "block_id": None, "forecast_id": None,
                     "kind": summary.kind + "-summary", "night": dt.date.fromisoformat(summary.night),
                     "revision": revision, "is_update": revision > 0, "level": summary.level,
                     "subject": summary.subject, "created_at": now, "content": summary})
        notices.append(summary)
        sent.append(recips)
    notice_ids = _insert_returning_ids(session, Notice, rows)
    to_send = [(StoredNotice(nid, r["key"], r["farm_id"], r["block_id"], n), recips)
               for nid, r, n, recips in zip(notice_ids, rows, notices, sent, strict=True)]
    _lap(timings, "store notices")
    return to_send, skipped


#: Columns that identify a new row of these tables (a unique constraint), to find its id.
_ROW_KEYS = {"forecasts": ("block_id", "kind", "night", "revision"), "notices": ("key",)}


def _insert_returning_ids(session: Session, model, rows: list[dict]) -> list[int]:
    """Bulk ``INSERT`` of ``rows``; the new ids in the order of ``rows`` (see :func:`advisory.store.bulk.insert_rows`)."""
    return bulk.insert_rows(session, model, rows, _ROW_KEYS.get(model.__table__.name))


def _batch_tag(items) -> str:
    return "-".join(str(b.id) for _, b in sorted(items, key=lambda x: x[1].id))[:120]


def _farm_payloads(session: Session, farm_id: int, night: dt.date, kind: str,
                   ours: Sequence[asm.Assessment]) -> list[asm.Assessment | dict]:
    """Every active block's revision-0 forecast of the farm for the night (assessment or payload).

    Those stored before come first (as stored payloads, in the order they were stored), then
    ``ours``: the batch's own assessments of the farm (not stored yet), as they are.
    """
    mine = {a.block_id for a in ours}
    stored = [fid for fid, bid in session.execute(
        select(Forecast.id, Forecast.block_id).join(Block).where(
            Block.farm_id == farm_id, Forecast.night == night, Forecast.kind == kind, Forecast.revision == 0,
            Block.active.is_(True)).order_by(Forecast.id)) if bid not in mine]
    found: dict[int, dict] = {}
    for chunk in _chunked(stored):
        found.update(session.execute(select(Forecast.id, Forecast.payload).where(Forecast.id.in_(chunk))).all())
    return [found[fid] for fid in stored if found.get(fid)] + [a for a in ours if a.revision == 0]


def _farm_last_noticed(session: Session, farm_id: int, night: dt.date, kind: str,
                       news: Sequence[asm.Assessment]) -> list[asm.Assessment]:
    """Every active block of the farm as its latest notice of the night told it, in block order, with
    ``news`` (this update's assessments with a new notice) in their place."""
    mine = {a.block_id: a for a in news}
    ids = session.scalars(select(Block.id).where(Block.farm_id == farm_id, Block.active.is_(True))).all()
    told = _last_noticed_many(session, [i for i in ids if i not in mine], night, kind)
    told.update(mine)
    return [told[bid] for bid in sorted(told)]


def _outbox_plan(batch: list[tuple[Notice, list]], settings, wanted: set[str]) -> list[tuple[list, dict]]:
    """Split a batch by what the outbox gets (see ``outbox_formats`` and ``outbox_charts`` in
    :mod:`advisory.settings`): ``[(part of the batch, keyword arguments for deliver_notices)]``.

    With the default settings (every format; charts "auto") the batch stays whole.  Otherwise the
    farm summaries get every format; a block notice gets the configured formats, and its chart (with
    the HTML that shows it) when the setting asks for one: "always", "never", "email" (the notice goes
    out by e-mail in this run) or "auto" (by e-mail, or at "stand by" or worse).
    """
    from advisory.notices import deliver as deliver_mod

    full = tuple(deliver_mod.OUTBOX_FORMATS)
    formats = tuple(getattr(settings, "outbox_formats", None) or full)
    charts = getattr(settings, "outbox_charts", None) or "auto"
    if formats == full and charts == "auto":
        return [(batch, {})]
    by_mail = "email" in wanted
    summaries, charted, plain = [], [], []
    for n, recips in batch:
        if n.block_id is None:
            summaries.append((n, recips))
            continue
        mailed = by_mail and any((r.channels or {}).get("email") for r in recips)
        content = n.content or {}
        if isinstance(content, dict):
            status, rank = content.get("status"), content.get("level_rank")
        else:
            status, rank = getattr(content, "status", None), getattr(content, "level_rank", None)
        serious = status == "ok" and (rank or 0) >= 2
        draw = charts == "always" or (charts in ("email", "auto") and mailed) or (charts == "auto" and serious)
        (charted if draw else plain).append((n, recips))
    with_html = formats + (() if "html" in formats else ("html",))
    parts = [(summaries, {"outbox_formats": full, "outbox_chart": "auto"}),
             (charted, {"outbox_formats": with_html, "outbox_chart": True}),
             (plain, {"outbox_formats": formats, "outbox_chart": False})]
    return [(part, kw) for part, kw in parts if part]


def _deliver(db, to_send: list[tuple[Notice | StoredNotice, list]], settings, *, sleep=None,
             staged: str | None = None, published: Collection[str] = frozenset()) -> dict[str, int]:
    """Deliver stored notices (as returned by :func:`_pending_notices`) in one transaction.

    The rows are attached to the delivery session as they are (no reload); the outbox is written
    as the settings say (:func:`_outbox_plan`), using the files written ahead with token ``staged``
    (:class:`_Staging`; those of the notices whose keys are in ``published`` are already at their
    own names); the other channels follow in one pass, so that the
    retry pauses are shared by the whole batch.
    """
    from advisory.notices import deliver as deliver_mod

    if not to_send:
        return {}
    kw = {} if sleep is None else {"sleep": sleep}
    if staged:
        kw["staged"] = staged
    if published:
        kw["published"] = published
    counts: dict[str, int] = defaultdict(int)
    with db.transaction() as session:
        batch = _attached(session, to_send)
        wanted = set(deliver_mod.CHANNELS)
        parts = _outbox_plan(batch, settings, wanted)
        rows = []
        if len(parts) == 1 and not parts[0][1]:
            rows += deliver_mod.deliver_notices(session, batch, settings, **kw)
        else:  # one call for the whole outbox (its writers share all of it), each part in its own form
            form = {id(n): (opts["outbox_formats"], opts["outbox_chart"]) for part, opts in parts for n, _ in part}
            rows += deliver_mod.deliver_notices(session, [x for part, _ in parts for x in part], settings,
                                                channels=("outbox",), outbox_options=lambda n: form[id(n)], **kw)
            addressed = [(n, rs) for n, rs in batch if any(r.channels for r in rs)]
            if addressed:
                rows += deliver_mod.deliver_notices(session, addressed, settings,
                                                    channels=sorted(wanted - {"outbox"}), **kw)
        last = {}  # each delivery's outcome (its last attempt), not each attempt
        for r in rows:
            last[(r.notice_id, r.recipient_id, r.channel)] = r
        for r in last.values():
            counts[f"{r.channel} {r.status}"] += 1
    return dict(counts)


#: A run for at least this many blocks has their outbox files written ahead (see :class:`_Staging`).
STAGE_OUTBOX_FROM = 2000
#: Block notices handed over to the writer at a time.
_STAGE_CHUNK = 500
#: Memory shared with the writer for each block's JSON file [bytes] (address space, taken only as
#: used; a notice is about 10 kB; the files that do not fit go through the pipe).
_ARENA_PER_BLOCK = 32 * 1024


class _Staging:
    """A large run's outbox files, written ahead by a forked copy of the run's process.

    Started once the run knows its blocks (while the process is still small: the copy
    shares its memory, and a page either process changes afterwards is copied), the copy
    is handed each share's block notices as soon as they are composed (by this process,
    the JSON through shared memory; by each worker, through an inbox of its own) and then
    the farm summaries, and writes them while the run goes on: the block notices' JSON and
    short text, and every file of the farm summaries (rendered there), all under hidden
    names (:func:`advisory.notices.deliver.staged_path`).  After the commit it moves them to
    their own names (:meth:`publish`) and copies the run's SQLite log into the database
    file (:meth:`checkpoint`); the delivery records what is in place and writes whatever is
    missing.  The other formats of a block notice take templates (and a chart, which
    depends on how each notice goes out): the delivery's writers render those, in parallel.

    A copy rather than a thread: a thread of this process would share one interpreter
    lock with the inserts, and slowed them by more than it saved.  Nothing the copy
    writes is visible before the delivery publishes it; a run that fails removes its
    own hidden files, and a stopped run's are removed by the next run that writes ahead
    once they are an hour old.
    """

    def __init__(self, settings, formats: tuple[str, ...], blocks: int, feeders: int = 0):
        import secrets

        from advisory import forking
        from advisory.notices import deliver as deliver_mod

        self.outbox, self.formats, self.token = str(settings.outbox), formats, secrets.token_hex(6)
        #: Outbox folders given files (for :meth:`discard`).
        self.folders: set[str] = set()
        #: Files the copy wrote and the time it spent writing [s] (known after :meth:`wait`).
        self.files, self.seconds = 0, 0.0
        #: Whether :meth:`wait` was called (by the delivery, or after a failed run).
        self.used = False
        self._token: str | None = None
        # the copy's own record of the folders it swept and of the files it wrote
        swept: set[str] = set()
        written: list[tuple[str, str]] = []
        #: The block notices' JSON files, placed where the copy reads them (not sent through the pipe).
        self._arena = forking.Arena(blocks * _ARENA_PER_BLOCK)
        arena = self._arena
        self._spooler = forking.Spooler(
            lambda files: deliver_mod.stage_outbox(files, swept, written, arena),
            {"publish": lambda token: deliver_mod.publish_staged(written, token), "checkpoint": db_mod.checkpoint},
            feeders=feeders)
        #: Worker inboxes not settled yet (see :meth:`settle`).
        self._feeders = set(range(1, feeders + 1))
        #: The run's database connection whose automatic checkpoints wait (see :meth:`defer_checkpoints`).
        self._deferred: tuple[Any, int] | None = None
        self._db_file: str | None = None
        self._checkpointing = False
        self._handed: set[str] = set()  # keys of the block notices handed over or written by workers

    def write_share(self, k: int, blocks: list[tuple[str, Any, tuple[bytes, bytes]]]) -> bool:
        """In worker process ``k`` (1, 2, ...): hand its own block notices to the writer through the
        worker's own inbox, as :meth:`hand_over` does for the run's process; whether all went (if not,
        the run's process hands them over)."""
        from advisory.notices import deliver as deliver_mod

        if not self.formats or k not in self._feeders:
            return False
        feeder = self._spooler.feeder(k)
        try:
            self._send_blocks(feeder, [deliver_mod.stage_item(key, n, self._json(parts)) for key, n, parts in blocks])
            feeder.done()
        except (OSError, ValueError) as exc:  # the writer is gone: the run's process finds out too
            log.warning("a worker could not hand its outbox files to the writer (%s)", exc)
            return False
        return True

    def _json(self, parts: tuple[bytes, bytes]) -> bytes:
        """A block notice's JSON file from its stored JSON and its payload's (empty without JSON)."""
        return compose.json_file(*parts) if "json" in self.formats else b""

    def _send_blocks(self, inbox, items: list) -> None:
        """Have the writer write ``items`` (stage items), a few hundred at a time, through ``inbox``
        (the spooler, or a worker's feeder)."""
        from advisory.notices import deliver as deliver_mod

        for j in range(0, len(items), _STAGE_CHUNK):
            inbox.call(deliver_mod.staged_block_files, self.outbox, items[j:j + _STAGE_CHUNK], self.formats,
                       self.token)

    def settle(self, fed: Collection[int]) -> None:
        """The workers are back: stop waiting for those that did not hand their files over (``fed``
        are those that did and said so)."""
        for k in sorted(self._feeders - set(fed)):
            self._spooler.release(k)
        self._feeders.clear()

    def hand_over(self, blocks: list[tuple[str, Any, tuple[bytes, bytes]]],
                  summaries: list[tuple[str, Any]] = (), fed: Collection[str] = ()) -> None:
        """Give the writer composed notices (as soon as they are composed; each once): ``blocks`` are
        each block notice's key, the notice, and its stored JSON and its payload's (joined by
        :func:`advisory.notices.compose.json_file`); ``summaries`` each farm summary's key and the
        summary; ``fed`` the keys of notices worker processes handed over themselves
        (:meth:`write_share`), which are left out, as are those handed over before."""
        from advisory.notices import deliver as deliver_mod
        from advisory.notices import words

        self._handed |= set(fed)
        nights = {n.night for _, n, _ in blocks} | {n.night for _, n in summaries}
        self.folders |= {os.path.join(self.outbox, words.slug(night, 10, "undated")) for night in nights}
        if self.formats:  # plain values, quick to send; the names are made there
            put, handed = self._arena.put, self._handed
            items = []
            for key, n, parts in blocks:
                if key in handed:
                    continue
                handed.add(key)
                data = self._json(parts)
                items.append(deliver_mod.stage_item(key, n, put(data) or data))
            self._send_blocks(self._spooler, items)
        if summaries:  # rendered there
            self._spooler.call(deliver_mod.staged_summary_files, self.outbox, list(summaries), self.token)

    def wait(self) -> str | None:
        """Wait for the writer; the token of its files, or None when it failed (the delivery then
        writes every file itself)."""
        if not self.used:
            self.used = True
            self.settle(())  # (after a failure before the workers were back: nothing more will come)
            self.files, self.seconds, error = self._spooler.status()
            if error is not None:
                log.warning("outbox files written ahead are not used (%s); the delivery writes them", error)
                self.discard()
            else:
                self._token = self.token
        return self._token

    def publish(self) -> None:
        """Have the writer move its files to their own names (the notices are stored); see :meth:`published`."""
        if self._token:
            self._spooler.ask("publish", self._token)

    def published(self) -> set[str]:
        """After :meth:`publish`: the keys of the notices all of whose files written ahead are published
        (none, if the writer failed: the delivery then moves or writes each file itself)."""
        if not self._token:
            return set()
        ok, keys = self._spooler.answer()
        if not ok:
            log.warning("outbox files written ahead: publishing failed (%s); the delivery does it", keys)
            return set()
        return keys

    def defer_checkpoints(self, session: Session, url: str) -> None:
        """Keep the run's SQLite connection from copying its write-ahead log into the database file
        at its commits (about as much as the run wrote: a tenth of a second on a RAM disk, more on a
        disk): the writer does it after the commit, while the delivery goes on (:meth:`checkpoint`).
        Put back by :meth:`discard`."""
        self._db_file = db_mod.sqlite_file(url)
        if self._db_file is None:
            return
        raw = session.connection().connection.dbapi_connection
        before = raw.execute("PRAGMA wal_autocheckpoint").fetchone()[0]
        raw.execute("PRAGMA wal_autocheckpoint=0")
        self._deferred = (raw, int(before))

    def checkpoint(self) -> None:
        """After the commit: have the writer copy the log into the database file (see
        :func:`advisory.store.db.checkpoint`); its answer is read by :meth:`discard`."""
        if self._deferred is not None:
            self._spooler.ask("checkpoint", self._db_file)
            self._checkpointing = True

    def discard(self) -> None:
        """Let the writer end (after its checkpoint), put the connection's checkpoints back, and
        remove whatever the delivery did not use (nothing, when every notice was delivered)."""
        from advisory.notices import deliver as deliver_mod

        if self._checkpointing:
            self._checkpointing = False
            ok, answer = self._spooler.answer()
            if not ok:
                log.warning("checkpoint after the run failed (%s); the next commit does it", answer)
        if self._deferred is not None:
            raw, before = self._deferred
            self._deferred = None
            with contextlib.suppress(Exception):  # the connection may be gone with a failed run
                raw.execute(f"PRAGMA wal_autocheckpoint={int(before)}")
        self._spooler.close()
        self._arena.close()
        for folder in self.folders:
            deliver_mod.discard_staged(folder, self.token)


def _start_staging(n_blocks: int, settings) -> _Staging | None:
    """A :class:`_Staging` for a run of ``n_blocks`` blocks, when it is large enough and may fork."""
    from advisory import forking
    from advisory.notices import deliver as deliver_mod

    if n_blocks < STAGE_OUTBOX_FROM or not forking.can_fork():
        return None
    formats = deliver_mod.stageable(tuple(getattr(settings, "outbox_formats", None) or deliver_mod.OUTBOX_FORMATS))
    workers = int(getattr(settings, "workers", 1) or 1)
    return _Staging(settings, formats, n_blocks, feeders=max(0, workers - 1))


def _attached(session: Session, to_send: list[tuple[Notice, list]]) -> list[tuple[Notice, list]]:
    """The batch, ready for delivery in ``session`` without reloading anything that is at hand.

    Notices and recipients are only read by the delivery.  Notice rows detached from an earlier
    session are re-attached (no query: reading ``full_content`` may load the forecast); recipients
    (only their columns are read) and :class:`StoredNotice` views are used as they are; anything
    else with an ``id`` is loaded in bulk.
    """
    from sqlalchemy import inspect as sa_inspect

    from advisory.store.schema import Recipient

    def usable(obj, model):
        if model is Notice and isinstance(obj, StoredNotice):
            return True
        if not isinstance(obj, model):
            return False
        if model is Recipient:  # the delivery reads only its columns, loaded already (no lazy loads)
            return True
        state = sa_inspect(obj)
        if state.detached and session.identity_map.get(state.key) is None:
            session.add(obj)
        return True

    want_notices = {n.id for n, _ in to_send if not usable(n, Notice)}
    want_recips = {r.id for _, rs in to_send for r in rs if not usable(r, Recipient)}
    notices, recipients = {}, {}
    for chunk in _chunked(sorted(want_notices)):
        notices.update({x.id: x for x in session.scalars(select(Notice).where(Notice.id.in_(chunk)))})
    for chunk in _chunked(sorted(want_recips)):
        recipients.update({x.id: x for x in session.scalars(select(Recipient).where(Recipient.id.in_(chunk)))})
    return [(n if isinstance(n, Notice | StoredNotice) else notices[n.id],
             [r if isinstance(r, Recipient) else recipients[r.id] for r in rs]) for n, rs in to_send]


def _pending_notices(db, night: dt.date, kind_prefix: str, farm_ids: Sequence[int], *,
                     known: Mapping[int, tuple[StoredNotice, list]] | None = None
                     ) -> list[tuple[StoredNotice, list]]:
    """A night's notices with no outbox delivery yet (new ones, or left by a crash before delivery).

    Each comes with its recipients: the block's for a block notice, the farm's for a farm summary
    (read in bulk, ordered by id).  The notices are :class:`StoredNotice` views of the rows;
    ``known`` maps notice ids to ``(StoredNotice, recipients)`` where the caller has them at
    hand (the run that just stored them), so that neither is read back.
    """
    from advisory.store.schema import BlockRecipient, Delivery, Recipient

    out = []
    if not farm_ids:
        return out
    known = known or {}
    with db.transaction() as session:
        delivered = select(Delivery.notice_id).where(Delivery.channel == "outbox", Delivery.status == "sent")
        rows = session.execute(select(Notice.id, Notice.key, Notice.farm_id, Notice.block_id)
                               .where(Notice.night == night, Notice.kind.like(f"{kind_prefix}%"),
                                      Notice.farm_id.in_(list(farm_ids)), Notice.id.not_in(delivered))
                               .order_by(Notice.id)).all()
        left = [r for r in rows if r.id not in known]  # stored by an earlier run that stopped
        contents: dict[int, dict] = {}
        for chunk in _chunked([r.id for r in left]):
            for nid, content, payload in session.execute(
                    select(Notice.id, Notice.content, Forecast.payload)
                    .outerjoin(Forecast, Forecast.id == Notice.forecast_id).where(Notice.id.in_(chunk))):
                contents[nid] = with_data(content, payload)
        by_block: dict[int, list] = defaultdict(list)
        for chunk in _chunked(sorted({r.block_id for r in left if r.block_id is not None})):
            for bid, rc in session.execute(select(BlockRecipient.block_id, Recipient)
                                           .join(Recipient, Recipient.id == BlockRecipient.recipient_id)
                                           .where(BlockRecipient.block_id.in_(chunk))
                                           .order_by(BlockRecipient.block_id, Recipient.id)):
                by_block[bid].append(rc)
        by_farm: dict[int, list] = defaultdict(list)
        summary_farms = sorted({r.farm_id for r in left if r.block_id is None})
        if summary_farms:
            for rc in session.scalars(select(Recipient).where(Recipient.farm_id.in_(summary_farms))
                                      .order_by(Recipient.id)):
                by_farm[rc.farm_id].append(rc)
        for r in rows:
            if r.id in known:
                n, recips = known[r.id]
            else:
                n = StoredNotice(r.id, r.key, r.farm_id, r.block_id, contents[r.id])
                recips = by_block[r.block_id] if r.block_id is not None else by_farm[r.farm_id]
            out.append((n, list(recips)))
    return out


# --------------------------------------------------------------------------- runs

def _start_run(db, key: str | None, kind: str, night: dt.date, now: dt.datetime) -> str:
    """Record the start of a keyed run; returns its state before: "new", "stored" or "finished"."""
    if key is None:
        return "new"
    with db.transaction() as s:
        row = s.scalar(select(RunRecord).where(RunRecord.key == key))
        if row is None:
            s.add(RunRecord(key=key, kind=kind, night=night, started_at=now, status="running"))
            return "new"
        return {"stored": "stored", "finished": "finished"}.get(row.status, "new")


def _mark_run(session_or_db, key: str | None, status: str, now: dt.datetime, detail: dict | None = None) -> None:
    if key is None:
        return

    def _do(s):
        row = s.scalar(select(RunRecord).where(RunRecord.key == key))
        if row is not None:
            row.status = status
            if status == "finished":
                row.finished_at = now
            if detail:
                row.detail = {**(row.detail or {}), **detail}

    if isinstance(session_or_db, Session):
        _do(session_or_db)
    else:
        with session_or_db.transaction() as s:
            _do(s)


def finished_run_keys(db, keys: Sequence[str]) -> set[str]:
    if not keys:
        return set()
    with db.transaction() as s:
        out = set()
        keys = list(keys)
        for k in range(0, len(keys), 500):
            out |= set(s.scalars(select(RunRecord.key).where(RunRecord.key.in_(keys[k:k + 500]),
                                                              RunRecord.status == "finished")))
        return out


@contextlib.contextmanager
def _batch_gc():
    """Pause Python's cyclic garbage collector while a batch is computed and stored.

    A run for thousands of blocks keeps hundreds of thousands of small objects
    alive (assessments, curves, notices); every automatic collection of the
    oldest generation walks all of them again, which costs a fifth of the
    computation and frees almost nothing.  Reference counting still frees
    memory as usual; the collector is switched back on afterwards (unless it
    was off before).  Not for the delivery: drawing charts leaves reference
    cycles that only the collector frees.

    The objects made meanwhile are then moved out of the collector's sight
    (:func:`gc.freeze`): switched on again, it would otherwise walk all of them
    at once (about a second for 10,000 blocks).  The caller puts them back with
    :func:`gc.unfreeze` when the run is done (see :func:`run_night`), so that
    any reference cycles among them are still collected later.
    """
    was_enabled = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if was_enabled:
            gc.freeze()
            gc.enable()


@contextlib.contextmanager
def _frozen_heap():
    """Let the cyclic garbage collector see only the objects made from now on.

    For the delivery: the run's assessments and notices stay alive through it
    and need not be walked again and again, while the cycles that drawing
    charts leaves behind are still collected.  (:func:`gc.freeze` moves every
    object alive now out of the collector's sight; :func:`gc.unfreeze` puts them
    back afterwards.)
    """
    gc.freeze()
    try:
        yield
    finally:
        gc.unfreeze()


#: A run with at least this many blocks shares its forecasting and composing among
#: ``settings.workers`` processes (see :func:`_assess_prepared`).
PARALLEL_FROM_BLOCKS = 2000
#: The run's own process takes this many times a worker's share of the blocks: a worker
#: also loads its blocks again and sends its results back, while this process loads every
#: block, hands its own notices to the outbox writer and takes the workers' results in
#: (measured at 10,000 blocks with ``benchmarks/bench_night.py``: both shares then end together).
OWN_SHARE_WEIGHT = 1.5


def _assess_prepared(db, session: Session, block_ids: list[int], night: dt.date, *, now: dt.datetime,
                     update: bool, workers: int = 1, timings: StageTimes | None = None,
                     staging: _Staging | None = None, load: Callable[[], list[Block]] | None = None
                     ) -> tuple[list[asm.Assessment], Prepared, dict[int, Any]]:
    """Load and assess the blocks ``block_ids`` (in that order) and prepare what to store
    (:func:`assess_night`, then :func:`_prepare`); also the blocks by id (those assessed by workers
    as :class:`_BlockLinks`).

    A large run (:data:`PARALLEL_FROM_BLOCKS` blocks or more, ``workers`` > 1, a database
    other processes can open, and no other thread in this process) is cut into
    ``workers`` consecutive shares of the block list: this process does the first, forked
    processes the others, each reading the database on its own connection (forked before
    this process loads the blocks, so that they start at once).  Nothing is written until
    every share is back, and the shares are joined in the order of the blocks, so the
    result is the one a single process gives.  A share that fails raises here, and the
    run stores nothing.  With ``staging``, a worker also writes its own notices' outbox
    files ahead (:meth:`_Staging.write_share`) before it hands them back.  ``load()`` loads
    the blocks of a run in one process (default: by their ids).
    """
    from advisory import forking

    mode = "update" if update else "evening"
    as_of = now if update else None
    n_workers = min(int(workers or 1), len(block_ids) // max(1, PARALLEL_FROM_BLOCKS // 2))
    load = load or (lambda: _load_blocks(session, block_ids, equipment=False) if block_ids else [])
    if n_workers < 2 or not _shared_database(db) or not forking.can_fork():
        blocks = load() if block_ids else []
        if staging is not None:
            staging.settle(())
        assessments = assess_night(session, blocks, night, as_of=as_of, update=update, timings=timings)
        return (assessments, _prepare(session, assessments, revision_mode=mode, timings=timings),
                {b.id: b for b in blocks})
    bounds = forking.share_bounds(len(block_ids), n_workers, OWN_SHARE_WEIGHT)
    home = os.getpid()
    known: dict[int, Any] = {}

    def share(k: int) -> tuple[list[asm.Assessment], Prepared]:
        a, b = bounds[k]
        if os.getpid() == home:  # this process: its own share (or that of a worker that stopped)
            mine = _load_blocks(session, block_ids[a:b], equipment=False)
            if [x.id for x in mine] != list(block_ids[a:b]):
                raise RuntimeError("the blocks changed while the run started; run it again")
            known.update((x.id, x) for x in mine)
            _lap(timings, "load blocks")
            own = assess_night(session, mine, night, as_of=as_of, update=update, timings=timings)
            p = _prepare(session, own, revision_mode=mode, timings=timings)
            if staging is not None:  # the writer starts on these while the workers finish
                staging.hand_over([(c[0], c[2], (c[3], payload))
                                   for c, payload in zip(p.composed, p.payloads, strict=True) if c])
                _lap(timings, "hand over to the outbox writer")
            return own, p
        return _assess_share(db.url, list(block_ids[a:b]), night, now, update, staging, k)

    results = forking.fork_map(share, list(range(n_workers)), n_workers, own_weight=1.0 + 1e-9)
    if staging is not None:  # a worker that handed its files over said so; a stopped one did not
        staging.settle([k for k, (_, p) in enumerate(results) if k and p.staged])
    _lap(timings, "wait for workers")
    assessments: list[asm.Assessment] = []
    prepared = Prepared([], [], [], [])
    for share_assessments, p in results:
        assessments += share_assessments
        prepared = Prepared(prepared.todo + p.todo, prepared.payloads + p.payloads,
                            prepared.composed + p.composed, prepared.skipped + p.skipped,
                            prepared.staged + p.staged)
    # the workers' blocks: only what storing and delivering their notices needs
    known.update(_block_links(session, [i for i in block_ids if i not in known]))
    return assessments, prepared, known


def _shared_database(db) -> bool:
    """Whether another process can open the run's database (not an in-memory SQLite)."""
    from sqlalchemy.engine import make_url

    return make_url(db.url).get_backend_name() != "sqlite" or db_mod.sqlite_file(db.url) is not None


def _assess_share(url: str, block_ids: list[int], night: dt.date, now: dt.datetime, update: bool,
                  staging: _Staging | None = None, k: int = 1) -> tuple[list[asm.Assessment], Prepared]:
    """One worker's share of :func:`_assess_prepared` (runs in a forked process; reads the database,
    and with ``staging`` writes its notices' outbox files ahead)."""
    from advisory.store.db import Database

    db = Database(url, check=False)
    try:
        with db.transaction() as session:
            blocks = _load_blocks(session, block_ids, equipment=False)
            assessments = assess_night(session, blocks, night, as_of=now if update else None, update=update)
            p = _prepare(session, assessments, revision_mode="update" if update else "evening")
    finally:
        db.engine.dispose()
    # each notice goes back as the bytes already made of it (read again only where it is rendered)
    composed = [c if c is None else (c[0], c[1], compose.EncodedBlockNotice.of(c[2], c[3], payload), c[3])
                for c, payload in zip(p.composed, p.payloads, strict=True)]
    mine = [(c[0], c[2], (c[3], payload)) for c, payload in zip(composed, p.payloads, strict=True) if c]
    fed = staging is not None and staging.write_share(k, mine)
    return assessments, Prepared(p.todo, p.payloads, composed, p.skipped, [key for key, _, _ in mine] if fed else [])


def _run_stages(db, res: RunResult, staged: list, state: str, night: dt.date, block_ids, farm, names, *,
                now: dt.datetime, update: bool, key: str | None, deliver: bool, settings, sleep,
                timings: StageTimes) -> None:
    """The stages of :func:`run_night` after its start: assess and store (one transaction), then deliver."""
    known: dict[int, tuple] = {}  # the notices stored by this run and their recipients (not read back)
    if state == "new":
        with _batch_gc(), db.transaction() as session:
            timings.lap("start")
            # the blocks' ids first: a large run's workers start on theirs while this process loads its own
            rows = session.execute(_block_query(block_ids, farm, names, Block.id, Block.name, Block.farm_id)).all()
            farm_ids = sorted({r.farm_id for r in rows})
            done_before: list[str] = []
            if not update:  # a block already assessed tonight is not assessed again (a rerun)
                before = _previous_revisions(session, [r.id for r in rows], night, "frost")
                done_before = [f"{r.name}: frost {night} already assessed (revision {before[r.id]})"
                               for r in rows if r.id in before]
                rows = [r for r in rows if r.id not in before]
            if deliver:
                staging = _start_staging(len(rows), settings)
                if staging is not None:
                    staged.append(staging)
                    staging.defer_checkpoints(session, db.url)
            timings.lap("load blocks")
            wanted = {r.id for r in rows}
            res.assessments, prepared, known_blocks = _assess_prepared(
                db, session, [r.id for r in rows], night, now=now, update=update,
                workers=getattr(settings, "workers", 1), timings=timings, staging=staged[0] if staged else None,
                load=lambda: [b for b in _load_blocks(session, block_ids, farm, names, equipment=False)
                              if b.id in wanted])
            stored, res.skipped = _store(session, res.assessments,
                                         revision_mode="update" if update else "evening", now=now,
                                         timings=timings, prepared=prepared,
                                         workers=getattr(settings, "workers", 1),
                                         stage=staged[0].hand_over if staged else None,
                                         known_blocks=known_blocks)
            res.skipped = done_before + res.skipped
            res.notices = [n.id for n, _ in stored]
            known = {n.id: (n, recips) for n, recips in stored}
            _mark_run(session, key, "stored", now)
        timings.lap("commit")
    else:  # stored before a crash or a stop: only delivery is left
        with db.transaction() as session:
            farm_ids = sorted({b.farm_id for b in _load_blocks(session, block_ids, farm, names, equipment=False)})
    if deliver:
        # New notices, and any of this night's notices that a crash left undelivered.
        staging = staged[0] if staged else None
        token = staging.wait() if staging is not None else None
        if staging is not None:
            timings.lap("wait for outbox writer")
        if token:
            timings["outbox files written ahead"] = staging.seconds  # by the writer, meanwhile
            staging.publish()  # the notices are stored: the writer moves its files to their names meanwhile
            staging.checkpoint()  # and then copies the run's writes into the database file
        with _frozen_heap():
            pending = _pending_notices(db, night, "frost", farm_ids, known=known)
            res.deliveries = _deliver(db, pending, settings, sleep=sleep, staged=token,
                                      published=staging.published() if token else frozenset())
        timings.lap("outbox delivery")


def run_night(db, night: dt.date, block_ids: Sequence[int] | None = None, *, now: dt.datetime | None = None,
              update: bool = False, key: str | None = None, farm: str | None = None,
              names: Sequence[str] | None = None, deliver: bool = True, settings=None,
              sleep=None, timings: StageTimes | None = None) -> RunResult:
    """The evening run (or an update) for a night.

    Parameters
    ----------
    db : Database
    night : date
        Local date of the evening.
    block_ids, farm, names : optional
        Which active blocks (default all).
    now : datetime, optional
        The run's clock (default: the real time).  For an update the
        observations up to ``now`` are used.
    update : bool
        An update through the night instead of the evening run.
    key : str, optional
        The planned run's key (restart safety).
    deliver : bool
        Deliver the notices (always to the outbox; mail and webhook when set up).
    """
    now = now or dt.datetime.now(dt.UTC)
    settings = settings or settings_mod.load(db.url)
    res = RunResult(kind="update" if update else "evening", night=night)
    timings = timings if timings is not None else StageTimes()
    state = _start_run(db, key, res.kind, night, now)
    if state == "finished":
        res.skipped.append(f"run {key} already done")
        return res
    staged: list[_Staging] = []  # outbox files written ahead while the run stores
    try:
        _run_stages(db, res, staged, state, night, block_ids, farm, names, now=now, update=update, key=key,
                    deliver=deliver, settings=settings, sleep=sleep, timings=timings)
    finally:
        staging = staged[0] if staged else None
        if staging is not None:  # what the delivery did not use (or all of it, if the run failed before)
            if not staging.used:
                staging.wait()
            staging.discard()
        gc.unfreeze()  # the run's objects, hidden from the collector by _batch_gc
    _mark_run(db, key, "finished", now)
    timings.lap("finish")
    res.timings = dict(timings)
    return res


def record_missed(db, night: dt.date, block_ids: Sequence[int], *, key: str, run_at: dt.datetime,
                  now: dt.datetime, settings=None) -> RunResult:
    """The evening run was missed beyond the grace time: tell the manager, once."""
    settings = settings or settings_mod.load(db.url)
    res = RunResult(kind="missed", night=night)
    if _start_run(db, key, "missed", night, now) == "finished":
        return res
    with db.transaction() as session:
        blocks = _load_blocks(session, block_ids, equipment=False)
        out = []
        crit: dict = {}
        for b in blocks:
            a = _base_assessment(b, night, critical=crit)
            a.status = asm.STATUS_MISSED
            local = run_at.astimezone(pd.Timestamp(run_at).tz_convert(b.farm.timezone).tzinfo)
            a.reason = (f"the evening run due at {local:%H:%M %Z} was missed (the scheduler was not running "
                        f"until {now.astimezone(local.tzinfo):%H:%M %Z}); no forecast was made for tonight. "
                        "Check the block yourself or run `advisory night run` by hand.")
            a.reference_time_utc = run_at
            out.append(a)
        stored, res.skipped = _store(session, out, revision_mode="missed", now=now)
        res.notices = [n.id for n, _ in stored]
        known = {n.id: (n, recips) for n, recips in stored}
        farm_ids = sorted({b.farm_id for b in blocks})
        res.assessments = out
        _mark_run(session, key, "stored", now)
    res.deliveries = _deliver(db, _pending_notices(db, night, "frost", farm_ids, known=known), settings)
    _mark_run(db, key, "finished", now)
    return res


# --------------------------------------------------------------------------- morning

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


def run_planned(db, kind: str, night: dt.date, block_ids: list[int], *, run_at: dt.datetime, key: str) -> None:
    """Entry point of the scheduler's jobs.

    The planned time is the run's logical clock: an update uses the readings up
    to ``run_at`` even when the job fires a little late, which makes a rerun
    after a restart give the same result.
    """
    if kind == "evening":
        run_night(db, night, block_ids, key=key, now=run_at)
    elif kind == "update":
        run_night(db, night, block_ids, key=key, now=run_at, update=True)
    elif kind == "morning":
        verify_night(db, night, block_ids, key=key, now=run_at)
    elif kind == "heat":
        from advisory import heat_pipeline

        heat_pipeline.run_heat(db, night, block_ids, key=key, now=run_at)
    else:
        raise ValueError(f"unknown run kind {kind!r}")
