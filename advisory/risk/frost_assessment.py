"""Bridges between a frost plan (:class:`advisory.risk.frost_data.BlockRisk`) and the runs'
:class:`advisory.assessment.Assessment` contract: protection steps, their start and stop rules in
words, the assessment's fields, and the plan read back from a stored assessment.
"""

from __future__ import annotations

from dataclasses import fields
from datetime import UTC, datetime
from functools import lru_cache

from advisory.risk import cautions
from advisory.risk.frost_data import BlockRisk, MethodPlan
from advisory.risk.levels import LEVELS
from advisory.risk.protection.equipment import _c

#: MethodPlan attribute -> ProtectionStep.quantities key.
_QUANTITY_KEYS = {
    "run_hours": "hours", "run_hours_cold": "hours_cold", "start_air_temp_c": "start_air_temp_c",
    "start_wet_bulb_c": "start_wet_bulb_c", "rate_mm_h": "rate_available_mm_h",
    "required_rate_mm_h": "rate_needed_mm_h", "water_m3": "water_m3", "water_m3_cold": "water_m3_cold",
    "water_l_per_ha": "water_l_per_ha", "fuel_l": "fuel_l", "fuel_l_cold": "fuel_l_cold",
    "inversion_c": "inversion_c",
}


def start_rule_text(risk: BlockRisk, plan: MethodPlan) -> str:
    """Plain-language start rule in °C, e.g. "when the wet bulb falls to -1.2 °C"."""
    if plan.method == "none":
        return ""
    if plan.start_wet_bulb_c is not None:
        return (f"when the wet bulb falls to {_c(plan.start_wet_bulb_c)} °C "
                f"(air about {_c(plan.start_air_temp_c)} °C at the forecast dew point)")
    return f"when the air falls to {_c(plan.start_air_temp_c)} °C"


def stop_rule_text(risk: BlockRisk, plan: MethodPlan) -> str:
    """Plain-language stop rule in °C."""
    if plan.method == "none":
        return ""
    if plan.method == "overtree_sprinkler":
        return (f"after sunrise, once the wet bulb is above {_c(risk.critical_c)} °C and the ice is "
                "melting; never earlier")
    return f"after sunrise, once the air is back above {_c(plan.start_air_temp_c)} °C"


def protection_steps(risk: BlockRisk) -> list:
    """The block's plans as :class:`advisory.assessment.ProtectionStep` objects.

    ``advised`` is the plan's ``recommended`` flag.  Numbers go to
    ``quantities`` (keys in :data:`_QUANTITY_KEYS`); ``ready_by_utc`` and
    ``stop_open`` are set when the ProtectionStep class has those fields, else
    kept as quantities ``ready_by_unix_s`` and ``stop_open_flag``.
    """
    from advisory.assessment import ProtectionStep

    have = _step_fields(ProtectionStep)
    out = []
    for p in risk.plans:
        q = {key: float(getattr(p, attr)) for attr, key in _QUANTITY_KEYS.items()
             if getattr(p, attr) is not None}
        kw = {}
        if "ready_by_utc" in have:
            kw["ready_by_utc"] = p.ready_by_utc
        elif p.ready_by_utc is not None:  # until ProtectionStep has the field: epoch seconds
            q["ready_by_unix_s"] = p.ready_by_utc.timestamp()
        if "stop_open" in have:
            kw["stop_open"] = p.stop_open
        elif p.stop_open:
            q["stop_open_flag"] = 1.0
        if "caution_keys" in have:
            kw["caution_keys"] = list(p.caution_keys)
        out.append(ProtectionStep(method=p.method, advised=p.recommended, start_utc=p.start_utc,
                                  stop_utc=p.stop_utc, start_rule=start_rule_text(risk, p),
                                  stop_rule=stop_rule_text(risk, p), quantities=q, notes=list(p.notes),
                                  estimated=p.inversion_estimated, **kw))
    return out


@lru_cache(maxsize=4)
def _step_fields(cls) -> frozenset[str]:
    return frozenset(f.name for f in fields(cls))


def assessment_fields(risk: BlockRisk) -> dict:
    """Values for the risk fields of :class:`advisory.assessment.Assessment`.

    Returns a dict with keys p10_c, p50_c, p90_c, t10_c, t90_c, level, level_rank,
    p_below_t10, p_below_t90, expected_kill_pct, p_kill_ge_10pct,
    critical_time_utc, hours_below_t10, plan (ProtectionStep list), cautions
    (caution keys of the advised plans) and details (the remaining figures).
    """
    keys: list[str] = []
    for p in risk.recommended:
        keys.extend(p.caution_keys)
    return {
        "p10_c": risk.min_p10_c, "p50_c": risk.min_p50_c, "p90_c": risk.min_p90_c,
        "t10_c": risk.t10_c, "t90_c": risk.t90_c, "level": risk.level, "level_rank": risk.level_index,
        "p_below_t10": risk.p_min_below_t10, "p_below_t90": risk.p_min_below_t90,
        "expected_kill_pct": 100.0 * risk.expected_kill, "p_kill_ge_10pct": risk.p_kill_10,
        "critical_time_utc": risk.critical_time_utc, "hours_below_t10": risk.hours_below_t10,
        "plan": protection_steps(risk), "cautions": list(dict.fromkeys(keys)),
        "details": {
            "p_kill_ge_90pct": risk.p_kill_90, "needs_protection": risk.needs_protection,
            "critical_c": risk.critical_c, "hours_below_t10_cold": risk.hours_below_t10_cold,
            "sustained_min_offset_c": risk.sustained_min_offset_c,
            "duration_shift_c": risk.duration_shift_c, "near_min_hours": risk.near_min_hours,
            "time_of_min_utc": risk.time_of_min_utc.isoformat() if risk.time_of_min_utc else None,
        },
    }


def _ready_by(step) -> datetime | None:
    t = getattr(step, "ready_by_utc", None)
    if t is None and (step.quantities or {}).get("ready_by_unix_s") is not None:
        t = datetime.fromtimestamp(float(step.quantities["ready_by_unix_s"]), tz=UTC)
    return t


def risk_from_assessment(a) -> BlockRisk:
    """Rebuild a :class:`BlockRisk` from a stored frost Assessment (for reprinting run sheets).

    Figures the Assessment does not keep are NaN.
    """
    nan = float("nan")
    d = a.details or {}
    plans = []
    for st in a.plan:
        q = st.quantities or {}
        kw = {attr: q.get(key) for attr, key in _QUANTITY_KEYS.items()}
        keys = getattr(st, "caution_keys", None)
        if not keys:
            keys = list(cautions.cautions_for_method(st.method))
            if st.method == "overtree_sprinkler" and not st.advised and (
                    q.get("rate_needed_mm_h") is None
                    or (q.get("rate_available_mm_h") or 0.0) < q.get("rate_needed_mm_h", 0.0)):
                keys.insert(0, "sprinkler_rate_short")
            if st.method == "wind_machine" and st.estimated:
                keys.insert(0, "inversion_estimated")
        plans.append(MethodPlan(
            method=st.method, usable=bool(st.advised), recommended=bool(st.advised),
            start_utc=st.start_utc, ready_by_utc=_ready_by(st), stop_utc=st.stop_utc,
            stop_open=bool(getattr(st, "stop_open", False) or q.get("stop_open_flag")),
            inversion_estimated=bool(st.estimated),
            notes=tuple(st.notes), caution_keys=tuple(dict.fromkeys(keys)), **kw))
    t_min = d.get("time_of_min_utc")
    level = a.level if a.level in LEVELS else LEVELS[0]
    needs = d.get("needs_protection")
    if needs is None:
        needs = any(p.recommended for p in plans)
    return BlockRisk(
        block=a.block, crop=a.crop, stage=a.stage, t10_c=a.t10_c if a.t10_c is not None else nan,
        t90_c=a.t90_c if a.t90_c is not None else nan,
        critical_c=d.get("critical_c", a.t10_c if a.t10_c is not None else nan),
        min_p10_c=a.p10_c if a.p10_c is not None else nan, min_p50_c=a.p50_c if a.p50_c is not None else nan,
        min_p90_c=a.p90_c if a.p90_c is not None else nan,
        time_of_min_utc=datetime.fromisoformat(t_min) if isinstance(t_min, str) else t_min,
        sustained_min_offset_c=d.get("sustained_min_offset_c", nan), duration_shift_c=d.get("duration_shift_c", nan),
        near_min_hours=d.get("near_min_hours", nan),
        hours_below_t10=a.hours_below_t10 if a.hours_below_t10 is not None else nan,
        hours_below_t10_cold=d.get("hours_below_t10_cold", nan),
        expected_kill=(a.expected_kill_pct / 100.0) if a.expected_kill_pct is not None else nan,
        p_kill_10=a.p_kill_ge_10pct if a.p_kill_ge_10pct is not None else nan,
        p_kill_90=d.get("p_kill_ge_90pct", nan), level=level, needs_protection=bool(needs),
        plans=tuple(plans), p_min_below_t10=a.p_below_t10 if a.p_below_t10 is not None else nan,
        p_min_below_t90=a.p_below_t90 if a.p_below_t90 is not None else nan,
        critical_time_utc=a.critical_time_utc)
