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
notice goes out only when the change is material (:data:`MATERIAL_START_SHIFT_MIN`,
a level change, or the set of advised methods changing).
"""

from __future__ import annotations

import datetime as dt
import logging
from collections import defaultdict
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from sqlalchemy import func, select
from sqlalchemy.orm import Session, selectinload

from advisory import assessment as asm
from advisory import settings as settings_mod
from advisory.crops import thresholds
from advisory.forecast import calibration as calib
from advisory.forecast.evening import evening_states
from advisory.forecast.result import NightForecast, table_prob_below
from advisory.ingest.observations import load_observations_many
from advisory.notices import compose
from advisory.physics import moisture, sun
from advisory.risk import frost
from advisory.store.schema import (
    Block,
    Calibration,
    Farm,
    Forecast,
    Notice,
    RunRecord,
    Station,
    Verification,
)

log = logging.getLogger("advisory.pipeline")

#: An update notice goes out when the advised start time moves by at least this much [min] ...
MATERIAL_START_SHIFT_MIN = 30
#: ... or the median minimum moves by at least this much [°C] while protection is advised.
MATERIAL_MIN_SHIFT_C = 1.5
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


# --------------------------------------------------------------------------- loading

def _load_blocks(session: Session, block_ids: Sequence[int] | None, farm: str | None = None,
                 names: Sequence[str] | None = None) -> list[Block]:
    q = (select(Block).join(Farm)
         .options(selectinload(Block.farm), selectinload(Block.station), selectinload(Block.equipment),
                  selectinload(Block.recipients))
         .where(Block.active.is_(True)).order_by(Farm.name, Block.name))
    if block_ids is not None:
        q = q.where(Block.id.in_(list(block_ids)))
    if farm:
        q = q.where(Farm.name == farm)
    if names:
        q = q.where(Block.name.in_(list(names)))
    return list(session.scalars(q))


def _latest_calibrations(session: Session, station_ids: Sequence[int], kind: str = "night_min"
                         ) -> dict[int, calib.Calibration]:
    if not station_ids:
        return {}
    latest = (select(Calibration.station_id, func.max(Calibration.id).label("id"))
              .where(Calibration.kind == kind, Calibration.station_id.in_(list(station_ids)))
              .group_by(Calibration.station_id).subquery())
    rows = session.scalars(select(Calibration).join(latest, Calibration.id == latest.c.id))
    return {r.station_id: calib.Calibration.from_dict(r.params) for r in rows}


def _recent_verification(session: Session, block_ids: Sequence[int], before: dt.date
                         ) -> dict[int, list[dict]]:
    out: dict[int, list[dict]] = defaultdict(list)
    if not block_ids:
        return out
    rows = session.scalars(select(Verification)
                           .where(Verification.block_id.in_(list(block_ids)), Verification.kind == "frost",
                                  Verification.night < before)
                           .order_by(Verification.night.desc()))
    for v in rows:
        if len(out[v.block_id]) < VERIFICATION_SHOWN:
            out[v.block_id].append({"night": v.night.isoformat(), "forecast_c": v.forecast_c,
                                    "observed_c": v.observed_c, "error_c": v.error_c})
    return out


# --------------------------------------------------------------------------- the frost night

def _base_assessment(b: Block, night: dt.date, kind: str = "frost") -> asm.Assessment:
    ct = thresholds.critical_temps(b.crop, b.stage, b.t10_override_c, b.t90_override_c)
    return asm.Assessment(
        kind=kind, farm=b.farm.name, farm_tz=b.farm.timezone, units=b.farm.units, block_id=b.id,
        block=b.name, station=b.station.code, crop=b.crop, variety=b.variety, stage=b.stage,
        area_ha=b.area_ha, night=night, t10_c=ct.t10_c, t90_c=ct.t90_c, critical_source=ct.source)


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
    sub_phys = _subset_physical(fc, idx)
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


def _subset_physical(fc: NightForecast, idx: np.ndarray):
    """The forecast's physical-night arrays for a subset of blocks."""
    import copy

    phys = copy.copy(fc.physical)
    for name, value in vars(fc.physical).items():
        if isinstance(value, np.ndarray) and value.shape[:1] == (len(fc),):
            setattr(phys, name, value[idx])
    return phys


def _cdf(fc: NightForecast, idx: np.ndarray) -> Callable[[np.ndarray], np.ndarray]:
    q = fc.quantiles_c[idx]

    def cdf(x):
        x = np.asarray(x, float)
        return np.stack([table_prob_below(q, x[:, j]) for j in range(x.shape[1])], axis=1)

    return cdf


def assess_night(session: Session, blocks: list[Block], night: dt.date, *, as_of: dt.datetime | None = None,
                 update: bool = False) -> list[asm.Assessment]:
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
    obs = load_observations_many(session, station_ids, ref_min - pd.Timedelta(hours=LOOKBACK_H),
                                 ref_max + pd.Timedelta(minutes=1))
    station_keys = np.array([b.station_id for b in blocks], dtype=object)
    sun_rows = table.assign(night=night)
    states = evening_states(obs, sun_rows, station=station_keys, reference_offset_h=offset_h)
    states["station"] = station_keys
    cals = _latest_calibrations(session, station_ids)
    fc = calib.forecast_night(states, {k: v for k, v in cals.items()}, block=[b.id for b in blocks])
    ok = fc.ok & (table["status"].to_numpy(dtype=object) == sun.NORMAL)
    verif = _recent_verification(session, [b.id for b in blocks], night)

    out: list[asm.Assessment] = []
    for i, b in enumerate(blocks):
        a = _base_assessment(b, night)
        a.is_update = update
        st = table.iloc[i]
        a.sunset_utc = None if pd.isna(st["sunset"]) else st["sunset"].to_pydatetime()
        a.sunrise_utc = None if pd.isna(st["sunrise"]) else st["sunrise"].to_pydatetime()
        a.verification = verif.get(b.id, [])
        row = states.iloc[i]
        frame = obs.get(b.station_id)
        latest = None
        if frame is not None and len(frame):
            ref_i = row["reference_time"] if not pd.isna(row["reference_time"]) else ref_max
            valid = frame["air_temp_c"].notna() & (frame.index <= ref_i)
            latest = frame.index[valid].max() if valid.any() else None
        a.data_quality = {
            "latest_obs_utc": None if latest is None or pd.isna(latest) else latest.isoformat(),
            "obs_age_min": None if pd.isna(row["air_temp_age_min"]) else float(row["air_temp_age_min"]),
            "evening": {k: (None if pd.isna(row[k]) else float(row[k]))
                        for k in ("air_temp_c", "dew_point_c", "wind_speed_ms", "cloud_cover_pct",
                                  "upper_air_temp_c", "cooling_since_sunset_c")},
            "assumed": list(fc.assumed[i] or ()),
        }
        if st["status"] != sun.NORMAL:
            a.status = asm.STATUS_NO_NIGHT
            a.reason = ("the sun does not set tonight at this latitude: no nocturnal forecast"
                        if st["status"] == sun.POLAR_DAY else
                        "the sun does not rise tomorrow at this latitude: no nocturnal forecast")
        elif not ok[i]:
            a.status = asm.STATUS_NO_FORECAST
            a.reason = _silence_reason(b.station, latest, fc.reason[i], b.farm.timezone)
        if not pd.isna(row["reference_time"]):
            a.reference_time_utc = row["reference_time"].round("s").to_pydatetime()
        out.append(a)

    idx = np.flatnonzero(ok)
    if len(idx):
        curves = _curves_on_grid(fc, states, idx, elev)
        forecast = frost.MinTempForecast(fc.quantile(0.1)[idx], fc.quantile(0.5)[idx], fc.quantile(0.9)[idx],
                                         cdf=_cdf(fc, idx))
        setups = []
        for i in idx:
            b = blocks[i]
            a = out[i]
            upper = states["upper_air_temp_c"].iat[i]
            air = states["air_temp_c"].iat[i]
            setups.append(frost.BlockSetup(
                name=b.name, crop=b.crop, stage=b.stage, t10_c=a.t10_c, t90_c=a.t90_c, area_ha=b.area_ha,
                equipment=[{"kind": e.kind, **e.params} for e in b.equipment],
                upper_inversion_c=None if pd.isna(upper) or pd.isna(air) else float(upper - air),
                cloud_cover_pct=None if pd.isna(states["cloud_cover_pct"].iat[i])
                else float(states["cloud_cover_pct"].iat[i]),
                settings=frost.FrostSettings.from_mappings(b.farm.settings, b.settings,
                                                           where=f"block '{b.name}' settings")))
        risks = frost.plan_night(setups, curves, forecast)
        times_p50, temps_p50 = fc.curve(0.5)
        _, temps_p10 = fc.curve(0.1)
        _, temps_p90 = fc.curve(0.9)
        for k, i in enumerate(idx):
            a = out[i]
            fields = frost.assessment_fields(risks[k])
            for key, value in fields.items():
                setattr(a, key, value)
            a.model = str(fc.model[i])
            a.training_nights = int(fc.training_nights[i])
            dew = float(states["dew_point_c"].iat[i])
            pk = float(curves.pressure_kpa[k])
            pts = []
            for h in range(times_p50.shape[0]):
                t = times_p50[h, i]
                if np.isnat(t) or not np.isfinite(temps_p50[h, i]):
                    continue
                p50 = float(temps_p50[h, i])
                pts.append(asm.CurvePoint(
                    time_utc=pd.Timestamp(t).tz_localize("UTC").round("s").to_pydatetime(), p50_c=p50,
                    p10_c=float(temps_p10[h, i]), p90_c=float(temps_p90[h, i]),
                    wet_bulb_c=float(moisture.wet_bulb_c(p50, min(dew, p50), pk))))
            a.curve = pts
    return out


# --------------------------------------------------------------------------- storing and delivering

def _previous(session: Session, block_id: int, night: dt.date, kind: str) -> Forecast | None:
    return session.scalar(select(Forecast).where(Forecast.block_id == block_id, Forecast.kind == kind,
                                                 Forecast.night == night)
                          .order_by(Forecast.revision.desc()).limit(1))


def _last_noticed(session: Session, block_id: int, night: dt.date, kind: str) -> asm.Assessment | None:
    n = session.scalar(select(Notice).where(Notice.block_id == block_id, Notice.kind == kind,
                                            Notice.night == night)
                       .order_by(Notice.revision.desc()).limit(1))
    if n is None or n.forecast_id is None:
        return None
    f = session.get(Forecast, n.forecast_id)
    return asm.from_dict(f.payload) if f and f.payload else None


def _first_advised_start(a: asm.Assessment) -> dt.datetime | None:
    starts = [s.start_utc or s.ready_by_utc for s in a.plan if s.advised and (s.start_utc or s.ready_by_utc)]
    return min(starts) if starts else None


def material_change(new: asm.Assessment, old: asm.Assessment | None) -> list[str]:
    """Why an update deserves a new notice (empty: it does not).

    Material: a different status or risk level; the set of advised methods
    changes; the first advised start time moves by :data:`MATERIAL_START_SHIFT_MIN`
    or more; while protection is advised, the forecast minimum moves by
    :data:`MATERIAL_MIN_SHIFT_C` or more.
    """
    if old is None:
        return ["first notice of the night"]
    why = []
    if new.status != old.status:
        why.append(f"status {old.status} -> {new.status}")
    if new.level != old.level:
        why.append(f"level {old.level or '-'} -> {new.level or '-'}")
    adv_new = sorted(s.method for s in new.plan if s.advised)
    adv_old = sorted(s.method for s in old.plan if s.advised)
    if adv_new != adv_old:
        why.append("advised protection changed")
    s_new, s_old = _first_advised_start(new), _first_advised_start(old)
    if s_new and s_old and abs((s_new - s_old).total_seconds()) >= MATERIAL_START_SHIFT_MIN * 60:
        why.append(f"start time moved by {abs((s_new - s_old).total_seconds()) / 60:.0f} min")
    if adv_new and new.p50_c is not None and old.p50_c is not None \
            and abs(new.p50_c - old.p50_c) >= MATERIAL_MIN_SHIFT_C:
        why.append(f"forecast minimum moved by {abs(new.p50_c - old.p50_c):.1f} °C")
    return why


def _store(session: Session, assessments: list[asm.Assessment], *, revision_mode: str,
           now: dt.datetime) -> tuple[list[tuple[Notice, list]], list[str]]:
    """Store forecasts and notices; returns (notices to deliver, skipped messages)."""
    to_send: list[tuple[Notice, list]] = []
    skipped: list[str] = []
    by_farm: dict[int, list[tuple[asm.Assessment, Block]]] = defaultdict(list)
    for a in assessments:
        block = session.get(Block, a.block_id)
        prev = _previous(session, a.block_id, a.night, a.kind)
        if revision_mode in ("evening", "heat", "missed"):
            if prev is not None:
                skipped.append(f"{a.block}: {a.kind} {a.night} already assessed (revision {prev.revision})")
                continue
            a.revision = 0
        else:
            a.revision = 0 if prev is None else prev.revision + 1
            a.is_update = prev is not None
        row = Forecast(block_id=a.block_id, kind=a.kind, night=a.night, revision=a.revision, created_at=now,
                       reference_time=a.reference_time_utc, status=a.status, reason=a.reason, model=a.model,
                       training_nights=a.training_nights, min_p10_c=a.p10_c, min_p50_c=a.p50_c,
                       min_p90_c=a.p90_c, level=a.level, payload=asm.to_dict(a))
        session.add(row)
        session.flush()
        previous_noticed = _last_noticed(session, a.block_id, a.night, a.kind) if a.is_update else None
        if a.is_update:
            why = material_change(a, previous_noticed)
            if not why:
                continue
            a.details = {**a.details, "update_reasons": why}
            row.payload = asm.to_dict(a)
        notice = compose.compose_block(a, previous_noticed, data=row.payload)
        content = notice.to_dict()
        key = compose.notice_key(a.kind, a.farm, a.block_id, a.night, a.revision)
        nrow = Notice(key=key, farm_id=block.farm_id, block_id=a.block_id, forecast_id=row.id, kind=a.kind,
                      night=a.night, revision=a.revision, is_update=a.is_update, level=a.level,
                      subject=notice.subject, created_at=now, content=content)
        session.add(nrow)
        by_farm[block.farm_id].append((a, block))
        to_send.append((nrow, list(block.recipients)))
    # One farm summary per farm and run (only for the evening and heat runs and for updates with news).
    for farm_id, items in by_farm.items():
        farm_assessments = [a for a, _ in items]
        revision = max(a.revision for a in farm_assessments)
        if revision_mode in ("evening", "heat"):
            # the summary gathers every block of the farm assessed for this night, not only this batch
            farm_assessments = _all_farm_assessments(session, farm_id, farm_assessments[0].night,
                                                     farm_assessments[0].kind) or farm_assessments
        summary = compose.compose_farm(farm_assessments, revision=revision)
        key = compose.notice_key(farm_assessments[0].kind + "-summary", farm_assessments[0].farm, None,
                                 farm_assessments[0].night, revision) + f":{_batch_tag(items)}"
        if session.scalar(select(Notice.id).where(Notice.key == key)) is not None:
            continue
        content = summary.to_dict()
        nrow = Notice(key=key, farm_id=farm_id, block_id=None, forecast_id=None,
                      kind=farm_assessments[0].kind + "-summary", night=farm_assessments[0].night,
                      revision=revision, is_update=revision > 0, level=summary.level, subject=summary.subject,
                      created_at=now, content=content)
        session.add(nrow)
        recips = {r.id: r for _, b in items for r in b.recipients}
        to_send.append((nrow, list(recips.values())))
    session.flush()
    return to_send, skipped


def _batch_tag(items) -> str:
    return "-".join(str(b.id) for _, b in sorted(items, key=lambda x: x[1].id))[:120]


def _all_farm_assessments(session: Session, farm_id: int, night: dt.date, kind: str) -> list[asm.Assessment]:
    rows = session.scalars(select(Forecast).join(Block).where(Block.farm_id == farm_id, Forecast.night == night,
                                                                Forecast.kind == kind, Forecast.revision == 0,
                                                                Block.active.is_(True)))
    return [asm.from_dict(r.payload) for r in rows if r.payload]


def _deliver(db, to_send: list[tuple[Notice, list]], settings, *, sleep=None) -> dict[str, int]:
    from advisory.notices import deliver as deliver_mod

    if not to_send:
        return {}
    kw = {} if sleep is None else {"sleep": sleep}
    counts: dict[str, int] = defaultdict(int)
    with db.transaction() as session:
        batch = [(session.get(Notice, n.id), [session.merge(r) for r in recips]) for n, recips in to_send]
        rows = deliver_mod.deliver_notices(session, batch, settings, **kw)
        for r in rows:
            counts[f"{r.channel} {r.status}"] += 1
    return dict(counts)


def _pending_notices(db, night: dt.date, kind_prefix: str, farm_ids: Sequence[int]) -> list[tuple[Notice, list]]:
    """A night's notices with no outbox delivery yet (new ones, or left by a crash before delivery)."""
    from advisory.store.schema import Delivery

    out = []
    if not farm_ids:
        return out
    with db.transaction() as session:
        delivered = select(Delivery.notice_id).where(Delivery.channel == "outbox", Delivery.status == "sent")
        rows = session.scalars(select(Notice).where(Notice.night == night, Notice.kind.like(f"{kind_prefix}%"),
                                                    Notice.farm_id.in_(list(farm_ids)),
                                                    Notice.id.not_in(delivered)).order_by(Notice.id))
        for n in rows:
            if n.block_id is not None:
                recips = list(session.get(Block, n.block_id).recipients)
            else:
                recips = list(session.get(Farm, n.farm_id).recipients)
            out.append((n, recips))
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


def run_night(db, night: dt.date, block_ids: Sequence[int] | None = None, *, now: dt.datetime | None = None,
              update: bool = False, key: str | None = None, farm: str | None = None,
              names: Sequence[str] | None = None, deliver: bool = True, settings=None,
              sleep=None) -> RunResult:
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
    state = _start_run(db, key, res.kind, night, now)
    if state == "finished":
        res.skipped.append(f"run {key} already done")
        return res
    if state == "new":
        with db.transaction() as session:
            blocks = _load_blocks(session, block_ids, farm, names)
            res.assessments = assess_night(session, blocks, night, as_of=now if update else None, update=update)
            stored, res.skipped = _store(session, res.assessments,
                                         revision_mode="update" if update else "evening", now=now)
            res.notices = [n.id for n, _ in stored]
            farm_ids = sorted({b.farm_id for b in blocks})
            _mark_run(session, key, "stored", now)
    else:  # stored before a crash or a stop: only delivery is left
        with db.transaction() as session:
            farm_ids = sorted({b.farm_id for b in _load_blocks(session, block_ids, farm, names)})
    if deliver:
        # New notices, and any of this night's notices that a crash left undelivered.
        res.deliveries = _deliver(db, _pending_notices(db, night, "frost", farm_ids), settings, sleep=sleep)
    _mark_run(db, key, "finished", now)
    return res


def record_missed(db, night: dt.date, block_ids: Sequence[int], *, key: str, run_at: dt.datetime,
                  now: dt.datetime, settings=None) -> RunResult:
    """The evening run was missed beyond the grace time: tell the manager, once."""
    settings = settings or settings_mod.load(db.url)
    res = RunResult(kind="missed", night=night)
    if _start_run(db, key, "missed", night, now) == "finished":
        return res
    with db.transaction() as session:
        blocks = _load_blocks(session, block_ids)
        out = []
        for b in blocks:
            a = _base_assessment(b, night)
            a.status = asm.STATUS_MISSED
            local = run_at.astimezone(pd.Timestamp(run_at).tz_convert(b.farm.timezone).tzinfo)
            a.reason = (f"the evening run due at {local:%H:%M %Z} was missed (the scheduler was not running "
                        f"until {now.astimezone(local.tzinfo):%H:%M %Z}); no forecast was made for tonight. "
                        "Check the block yourself or run `advisory night run` by hand.")
            a.reference_time_utc = run_at
            out.append(a)
        stored, res.skipped = _store(session, out, revision_mode="missed", now=now)
        res.notices = [n.id for n, _ in stored]
        farm_ids = sorted({b.farm_id for b in blocks})
        res.assessments = out
        _mark_run(session, key, "stored", now)
    res.deliveries = _deliver(db, _pending_notices(db, night, "frost", farm_ids), settings)
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
            refit_calibrations(session, station_ids, now)
        _mark_run(session, key, "finished", now)
    return res


def refit_calibrations(session: Session, station_ids: Sequence[int], now: dt.datetime) -> dict[int, int]:
    """Refit each station's night-minimum calibration from its observation history.

    Every past night with a complete evening state and a covered window gives
    one training row (evening predictors, observed minimum), as in the hindcast.
    Returns the number of training nights per station.
    """
    out = {}
    start = now - dt.timedelta(days=CALIBRATION_HISTORY_DAYS)
    obs = load_observations_many(session, station_ids, start, now)
    for sid in station_ids:
        frame = obs.get(sid)
        if frame is None or len(frame) < 48:
            continue
        station = session.get(Station, sid)
        history = night_history(frame, station.latitude, station.longitude, station.timezone, now)
        if history.empty:
            continue
        cal = calib.fit_calibration(history)
        session.add(Calibration(station_id=sid, kind="night_min", fitted_at=now,
                                training_nights=int(cal.to_dict().get("n_nights", len(history))),
                                params=cal.to_dict()))
        out[sid] = len(history)
    return out


def night_history(frame: pd.DataFrame, lat: float, lon: float, tz: str, now: dt.datetime) -> pd.DataFrame:
    """Evening states and observed minima of every complete past night in ``frame``."""
    first = sun.night_of(frame.index.min(), tz)
    last = sun.night_of(pd.Timestamp(now) - pd.Timedelta(hours=12), tz)
    nights = pd.date_range(first, last, freq="D").date
    if len(nights) == 0:
        return pd.DataFrame()
    table = sun.sun_times_batch(lat, lon, nights, tz).assign(night=nights)
    table = table[table["status"] == sun.NORMAL].reset_index(drop=True)
    states = evening_states(frame, table)
    ok = states["status"].to_numpy(dtype=object) == "ok"
    mins = np.full(len(states), np.nan)
    s = frame["air_temp_c"].dropna()
    for i in np.flatnonzero(ok):
        v = observed_minimum(s.to_frame(), states["reference_time"].iat[i],
                             states["sunrise"].iat[i] + pd.Timedelta(hours=1))
        if v is not None and states["sunrise"].iat[i] + pd.Timedelta(hours=1) <= pd.Timestamp(now):
            mins[i] = v
    states["observed_min_c"] = mins
    return states[ok & np.isfinite(mins)].reset_index(drop=True)


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
