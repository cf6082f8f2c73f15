"""The nightly run's stage check and protection economics, for all blocks of a run at once.

Stage check: the heat since each block's recorded stage date (and since its
biofix) from its station's readings (one bulk read for the run's stations,
air temperature only), the stage that heat suggests
(:func:`advisory.crops.phenology.expected_from_recorded`), and the check
sentence when it is a stage or more from the recorded one.  The recorded stage
still drives the night's critical temperatures; :func:`expected_stage_risk`
gives the chance of losing 10 % or more at the expected stage's T10/T90, with
the same damage functions as the night's plan.

Economics: :func:`block_economics` applies
:func:`advisory.risk.economics.night_economics` to the methods of each block
with a crop value and costs (nothing for a block without them: never a guess).
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Sequence

import numpy as np
import pandas as pd
from sqlalchemy.orm import Session

from advisory.crops import phenology, thresholds
from advisory.errors import InputError
from advisory.ingest.observations import load_observations_many
from advisory.physics.sun import local_midnight_utc
from advisory.risk import damage, economics
from advisory.risk.frost_data import BlockRisk
from advisory.store.schema import Block


def _local_midnight_ns(day: dt.date, zone: str) -> int:
    return local_midnight_utc(day, zone).as_unit("ns").value


def stage_checks(session: Session, blocks: Sequence[Block], night: dt.date, end_utc: pd.Timestamp
                 ) -> list[dict | None]:
    """Each block's stage check as a details dict (None for a block without a recorded stage date).

    Parameters
    ----------
    session : Session
    blocks : sequence of Block
    night : date
        Local date of the evening (the day the expected stage is for).
    end_utc : Timestamp
        Readings before this instant count (the run's latest reference time).

    Returns
    -------
    list of dict or None
        Keys ``heat_since_stage_c``, ``heat_since_biofix_c``, ``base_c``,
        ``biofix``, ``lower_bound`` (readings start after the stage date),
        ``expected_stage``, ``expected_from_biofix``, ``stale`` and
        ``sentence`` (the check, or None when the stages agree).
    """
    n = len(blocks)
    out: list[dict | None] = [None] * n
    rows = [i for i, b in enumerate(blocks) if getattr(b, "stage_date", None) is not None
            and phenology.crop_heat(b.crop) is not None]
    if not rows:
        return out
    since_rec = np.empty(len(rows), np.int64)
    since_bio = np.empty(len(rows), np.int64)
    bio_dates = []
    for k, i in enumerate(rows):
        b = blocks[i]
        fs = b.farm.settings or {}
        zone = b.farm.timezone
        bio = phenology.biofix_date(night, b.latitude, (fs.get("biofix") or {}).get(b.crop), b.crop)
        bio_dates.append(bio)
        since_rec[k] = _local_midnight_ns(min(b.stage_date, night), zone)
        since_bio[k] = _local_midnight_ns(bio, zone)
    start = pd.Timestamp(int(min(since_rec.min(), since_bio.min())), tz="UTC")
    sids = np.array([blocks[i].station_id for i in rows], np.int64)
    obs = load_observations_many(session, sorted(set(sids.tolist())), start.to_pydatetime(),
                                 pd.Timestamp(end_utc).ceil("us").to_pydatetime(), columns=["air_temp_c"])
    crops = [blocks[i].crop for i in rows]
    heat = [phenology.crop_heat(c) for c in crops]
    base = np.array([h.base_c for h in heat])
    upper = np.array([h.upper_c for h in heat])
    g_rec = np.zeros(len(rows))
    g_bio = np.zeros(len(rows))
    first = np.full(len(rows), np.iinfo(np.int64).max)
    # One pass per station over the distinct (base, upper, since) windows of its blocks.
    for sid in np.unique(sids):
        frame = obs.get(int(sid))
        if frame is None or not len(frame):
            continue
        sel = np.flatnonzero(sids == sid)
        times = frame.index
        temp = frame["air_temp_c"].to_numpy(float)
        # window starts in whole seconds (exact as floats) for the distinct-window key
        keys = np.concatenate([np.stack([base[sel], upper[sel], (since_rec[sel] // 10**9).astype(float)], 1),
                               np.stack([base[sel], upper[sel], (since_bio[sel] // 10**9).astype(float)], 1)])
        uniq, inv = np.unique(keys, axis=0, return_inverse=True)
        inv = inv.reshape(-1)
        grid = np.broadcast_to(temp, (len(uniq), len(temp)))
        g, _h, f = phenology.degree_days_from_readings(
            times, grid, uniq[:, 0], uniq[:, 1], since_utc=(uniq[:, 2].astype(np.int64) * 10**9).astype("datetime64[ns]"))
        m = len(sel)
        g_rec[sel] = g[inv[:m]]
        g_bio[sel] = g[inv[m:]]
        f = f.astype(np.int64)
        first[sel] = np.where(f == np.iinfo(np.int64).min, np.iinfo(np.int64).max, f)[inv[:m]]
    stages = [blocks[i].stage for i in rows]
    est_rec = phenology.expected_from_recorded(crops, stages, g_rec)
    est_bio = phenology.expected_stage(crops, g_bio)
    rec_idx = phenology.stage_index(crops, stages)
    hour = np.int64(3600 * 10**9)
    for k, i in enumerate(rows):
        b = blocks[i]
        expected = phenology.stage_name(b.crop, int(est_rec.expected_idx[k]))
        sentence = phenology.stale_stage_sentence(b.stage, b.stage_date, int(rec_idx[k]), expected,
                                                  int(est_rec.expected_idx[k]))
        out[i] = {
            "heat_since_stage_c": round(float(g_rec[k]), 1), "heat_since_biofix_c": round(float(g_bio[k]), 1),
            "base_c": float(base[k]), "biofix": bio_dates[k].isoformat(),
            "lower_bound": bool(first[k] == np.iinfo(np.int64).max or first[k] - since_rec[k] > hour),
            "expected_stage": expected,
            "expected_from_biofix": phenology.stage_name(b.crop, int(est_bio.expected_idx[k])),
            "stale": sentence is not None, "sentence": sentence,
        }
    return out


def expected_stage_risk(checks: Sequence[dict | None], crops: Sequence[str], risks: Sequence[BlockRisk],
                        forecast: damage.MinTempForecast, n_quad: int = 100) -> None:
    """Add the risk at the expected stage to each stale check (in place), for blocks of one risk pass.

    The chance of losing 10 % or more and the expected loss at the expected
    stage's T10/T90, from the same distribution of the minimum and the same
    effective exposure (sustained minimum and duration) as the night's plan.
    Keys added: ``expected_t10_c``, ``expected_t90_c``, ``expected_p_kill_ge_10pct``,
    ``expected_kill_pct``.
    """
    n = len(risks)
    t10 = np.full(n, np.nan)
    t90 = np.full(n, np.nan)
    for i, c in enumerate(checks):
        if not c or not c.get("stale") or not c.get("expected_stage"):
            continue
        try:
            ct = thresholds.critical_temps(crops[i], c["expected_stage"])
        except InputError:
            continue
        t10[i], t90[i] = ct.t10_c, ct.t90_c
    have = np.isfinite(t10)
    if not have.any():
        return
    off = np.array([r.sustained_min_offset_c - r.duration_shift_c for r in risks], float)
    off = np.nan_to_num(off, nan=0.0)
    x10 = np.where(have, t10, 0.0)
    x90 = np.where(have, t90, -1.0)
    p10 = forecast.cdf_at(x10 - off)
    q = forecast.quantiles((np.arange(n_quad) + 0.5) / n_quad)
    ek = damage.kill_fraction(q + off[:, None], x10[:, None], x90[:, None]).mean(axis=1)
    for i in np.flatnonzero(have):
        checks[i].update({"expected_t10_c": float(t10[i]), "expected_t90_c": float(t90[i]),
                          "expected_p_kill_ge_10pct": float(p10[i]), "expected_kill_pct": 100.0 * float(ek[i])})


def block_economics(blocks: Sequence[Block], risks: Sequence[BlockRisk], gear: Sequence[list[dict]],
                    inversion_c: np.ndarray, gain_fraction: np.ndarray, forecast: damage.MinTempForecast,
                    n_quad: int = 50) -> list[list[dict] | None]:
    """Each block's protection economics for the methods its plan advises (or, with none advised on a
    night at risk, each usable method), best first; None for a block without a crop value, a farm
    currency, or a method with its costs.

    Returns
    -------
    list of (list of dict or None)
        Per block, dicts with ``method``, ``loss_without``, ``loss_with``, ``running_cost``,
        ``saving``, ``pays``, ``run_hours``, ``currency``.
    """
    n = len(blocks)
    out: list[list[dict] | None] = [None] * n
    pairs = []  # (block index, plan, params)
    for i, b in enumerate(blocks):
        value = (b.settings or {}).get("crop_value_per_ha")
        currency = (b.farm.settings or {}).get("currency")
        if value is None or not currency:
            continue
        r = risks[i]
        chosen = [p for p in r.plans if p.recommended and p.method != "none"]
        if not chosen and r.level_index >= 1:
            chosen = [p for p in r.plans if p.usable and p.method != "none"]
        by_kind = {e.get("kind"): e for e in gear[i]}
        for p in chosen:
            params = by_kind.get(p.method)
            hours = p.run_hours if p.run_hours is not None else p.run_hours_cold
            if params is None or params.get("running_cost_per_h") is None or hours is None:
                continue
            pairs.append((i, p, params, float(hours), float(value), currency))
    if not pairs:
        return out
    idx = np.array([x[0] for x in pairs])
    q = forecast.quantiles((np.arange(n_quad) + 0.5) / n_quad)[idx]
    off = np.nan_to_num(np.array([risks[i].sustained_min_offset_c - risks[i].duration_shift_c for i in idx]),
                        nan=0.0)
    lift = np.array([economics.method_protection_c(p.method, params, float(inversion_c[i]),
                                                   float(gain_fraction[i]))
                     for i, p, params, *_ in pairs])
    eco = economics.night_economics(
        q, off, np.array([risks[i].t10_c for i in idx]), np.array([risks[i].t90_c for i in idx]), lift,
        np.array([x[4] for x in pairs]), np.array([blocks[i].area_ha for i in idx], float),
        np.array([float(x[2]["running_cost_per_h"]) for x in pairs]), np.array([x[3] for x in pairs]),
        np.array([float(x[2].get("fixed_cost_per_night") or 0.0) for x in pairs]))
    for k, (i, p, _params, hours, _value, currency) in enumerate(pairs):
        if not np.isfinite(eco.saving[k]):
            continue
        out[i] = (out[i] or []) + [{
            "method": p.method, "loss_without": float(eco.loss_without[k]), "loss_with": float(eco.loss_with[k]),
            "running_cost": float(eco.running_cost[k]), "saving": float(eco.saving[k]),
            "pays": bool(eco.pays[k]), "run_hours": hours, "currency": currency}]
    for lst in out:
        if lst:
            lst.sort(key=lambda e: -e["saving"])
    return out
