"""What the pipeline knows about one block for one night (or day): the contract
between the models and the notices.

The pipeline fills these plain dataclasses from the forecast, the frost or heat
risk and the protection plan; :mod:`advisory.notices.compose` turns them into
notices; :func:`to_dict` / :func:`from_dict` make them JSON for the database
(``forecasts.payload``) and for other systems.  Times are timezone-aware UTC;
temperatures are °C.  Conversion to the farm's zone and units happens only
when a notice is rendered.
"""

from __future__ import annotations

import copyreg
import dataclasses
import datetime as dt
from dataclasses import dataclass, field
from typing import Any

#: Status of a block-night.
STATUS_OK = "ok"                  # a forecast was made
STATUS_NO_FORECAST = "no_forecast"  # data missing or stale: reason says why
STATUS_NO_NIGHT = "no_night"      # the sun does not set (or rise) there that night
STATUS_MISSED = "missed"          # the evening run did not happen in time


@dataclass
class CurvePoint:
    """One hour of the night curve (or of the day curve for heat)."""

    time_utc: dt.datetime
    p50_c: float
    p10_c: float | None = None
    p90_c: float | None = None
    wet_bulb_c: float | None = None
    #: For heat: heat index and WBGT estimate of that hour.
    heat_index_c: float | None = None
    wbgt_c: float | None = None


@dataclass
class ProtectionStep:
    """One protection method on a block and what the plan says about it tonight."""

    #: wind_machine | overtree_sprinkler | undertree_sprinkler | heater | none | evaporative_cooling
    method: str
    #: Whether the plan advises running it tonight.
    advised: bool
    start_utc: dt.datetime | None = None
    stop_utc: dt.datetime | None = None
    #: Plain-language start and stop rules, e.g. "when the wet bulb reaches -1.2 °C".
    start_rule: str = ""
    stop_rule: str = ""
    #: Numbers for the crew: hours, water_m3, water_l_per_ha, rate_needed_mm_h, rate_available_mm_h,
    #: fuel_l, inversion_c ... (keys end in their unit).
    quantities: dict[str, float] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)
    #: True where an input was estimated (e.g. an inversion without an upper sensor).
    estimated: bool = False
    #: Start in the cold (10th-percentile) case when the central forecast never reaches the start rule.
    ready_by_utc: dt.datetime | None = None
    #: The stop rule is not met before the curve ends: stop time and run figures are lower bounds.
    stop_open: bool = False
    #: Keys into advisory.risk.cautions for this method.
    caution_keys: list[str] = field(default_factory=list)
    #: In an update: when an earlier notice of the night had this method start (the crew should have it
    #: running by now); the update keeps it running (see :mod:`advisory.risk.continuity`).
    started_utc: dt.datetime | None = None


def pickle_by_fields(cls) -> None:
    """Pickle instances of the dataclass ``cls`` as its class and field values in order (not a
    dict of its state): about half the time, for the hundreds of thousands of curve points a
    large run's worker processes hand back."""
    names = tuple(f.name for f in dataclasses.fields(cls))

    def reduce(obj):
        return cls, tuple(getattr(obj, n) for n in names)

    copyreg.pickle(cls, reduce)


pickle_by_fields(CurvePoint)
pickle_by_fields(ProtectionStep)


@dataclass
class Assessment:
    """One block, one night (kind "frost") or one day (kind "heat")."""

    kind: str
    farm: str
    farm_tz: str
    units: str
    block_id: int
    block: str
    station: str
    crop: str
    variety: str | None
    stage: str
    area_ha: float
    night: dt.date
    revision: int = 0
    is_update: bool = False
    status: str = STATUS_OK
    reason: str = ""
    #: Evening reference time (frost) or morning issue time (heat).
    reference_time_utc: dt.datetime | None = None
    sunset_utc: dt.datetime | None = None
    sunrise_utc: dt.datetime | None = None
    model: str = ""
    training_nights: int = 0
    #: Forecast minimum (frost) or maximum (heat) quantiles [°C].
    p10_c: float | None = None
    p50_c: float | None = None
    p90_c: float | None = None
    #: Critical temperatures for the stage [°C] and their source.
    t10_c: float | None = None
    t90_c: float | None = None
    critical_source: str = ""
    #: Risk level key (see advisory.risk) and its rank (0 = lowest).
    level: str = ""
    level_rank: int = 0
    #: Probabilities in 0..1 and expected damage in %.
    p_below_t10: float | None = None
    p_below_t90: float | None = None
    expected_kill_pct: float | None = None
    p_kill_ge_10pct: float | None = None
    #: When the median curve first reaches the critical temperature (+ margin), and hours below T10.
    critical_time_utc: dt.datetime | None = None
    hours_below_t10: float | None = None
    curve: list[CurvePoint] = field(default_factory=list)
    plan: list[ProtectionStep] = field(default_factory=list)
    #: latest_obs_utc, obs_age_min, flags (list of text), evening state values.
    data_quality: dict[str, Any] = field(default_factory=dict)
    #: Recent verified nights at this block: night, forecast_c, observed_c, error_c.
    verification: list[dict[str, Any]] = field(default_factory=list)
    #: Kind-specific details (heat: sunburn hours, crew work windows...).
    details: dict[str, Any] = field(default_factory=dict)
    #: Keys into advisory.risk.cautions (the notice renders their texts).
    cautions: list[str] = field(default_factory=list)


def _encode(value):
    if isinstance(value, dt.datetime):
        return value.astimezone(dt.UTC).isoformat()
    if isinstance(value, dt.date):
        return value.isoformat()
    if dataclasses.is_dataclass(value):
        return {f.name: _encode(getattr(value, f.name)) for f in dataclasses.fields(value)}
    if isinstance(value, dict):
        return {k: _encode(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_encode(v) for v in value]
    if hasattr(value, "item"):  # numpy scalar
        return value.item()
    if isinstance(value, float) and value != value:  # NaN -> null
        return None
    return value


def to_dict(a: Assessment) -> dict[str, Any]:
    """A JSON-able dict (ISO 8601 UTC times)."""
    return _encode(a)


_TIME_FIELDS = {"reference_time_utc", "sunset_utc", "sunrise_utc", "critical_time_utc", "time_utc",
                "start_utc", "stop_utc", "ready_by_utc", "started_utc"}


def _dt(v):
    return None if v is None else dt.datetime.fromisoformat(v)


def from_dict(d: dict[str, Any]) -> Assessment:
    """Inverse of :func:`to_dict`."""
    d = dict(d)
    for k in _TIME_FIELDS & d.keys():
        d[k] = _dt(d[k])
    d["night"] = dt.date.fromisoformat(d["night"])
    d["curve"] = [CurvePoint(**{k: (_dt(v) if k == "time_utc" else v) for k, v in p.items()})
                  for p in d.get("curve", [])]
    d["plan"] = [ProtectionStep(**{k: (_dt(v) if k in _TIME_FIELDS else v) for k, v in s.items()})
                 for s in d.get("plan", [])]
    return Assessment(**d)
