"""Farm files: TOML descriptions of farms, stations, blocks and recipients.

An extension agent keeps one TOML file per farm.  :func:`parse_farm_file`
validates it completely (pure; no database) and :func:`upsert_farm` writes it
in the caller's transaction, idempotently: importing the same file twice
changes nothing, a changed stage adds a row to the block's stage history, and
blocks no longer in the file are set inactive (never deleted: their forecasts
and notices stay).

File layout (see ``demo-farm/farm.toml`` for a full example)::

    [farm]
    name = "..."                 # unique
    timezone = "Area/City"       # IANA zone
    units = "metric"             # or "imperial" (°F in notices)
    fallback = ["name", ...]     # optional: recipients told when a notice could not be delivered
                                 # by its deadline (default: the recipients whose role names an agent)
    currency = "USD"             # optional: currency of crop values and costs (text, up to 8 characters);
                                 # needed for the protection economics
    crew_size = 3                # optional: blocks the crew can start and tend in one night
    chill_start = "10-01"        # optional: start of chill accumulation, MM-DD (default 1 October in
                                 # the north, 1 April in the south)
    [farm.biofix]                # optional: start of heat accumulation per crop, MM-DD
    apple = "01-01"              # (default 1 January in the north, 1 July in the south)
    [farm.settings]              # optional: risk thresholds and margins

    [[stations]]
    id = "ST-1"                  # unique code, used by `advisory obs import`
    name, latitude, longitude, elevation_m
    temp_sensor_height_m = 1.5   # optional
    upper_sensor_height_m = 10   # optional: tower sensor for inversions
    timezone = "..."             # optional, default the farm's
    inbox = "inbox/st-1"         # optional folder, relative to the farm file
    [stations.column_map]        # optional: logger header -> canonical column

    [[recipients]]
    name, role, email, webhook, sms   # channels are optional; the outbox always gets a copy

    [[blocks]]
    name, station, latitude, longitude, elevation_m, area_ha
    crop, variety, stage, stage_date
    recipients = ["name", ...]   # default: every recipient of the farm
    reference_offset_min = 120   # optional: evening reference time after sunset
    t10_override_c, t90_override_c   # optional
    crop_value_per_ha = 18000    # optional: value of the crop [farm currency per ha]
    [[blocks.protection]]
    kind = "wind_machine" | "overtree_sprinkler" | "undertree_sprinkler" | "heater" | "none"
    ...parameters of that kind
    running_cost_per_h = 120     # optional, any kind: fuel, water, power and labour for the block [currency/h]
    fixed_cost_per_night = 250   # optional, any kind: cost of starting a night's run [currency]
    protection_c = 1.5           # optional, any kind: rise of bud temperature the method gives [°C]
                                 # (a wind machine without it: half the measured inversion)

The values of the protection economics live in existing JSON columns: the
farm's ``currency``, ``crew_size``, ``chill_start`` and ``biofix`` in the
farm's settings, ``crop_value_per_ha`` in the block's settings, the costs and
``protection_c`` in the equipment's parameters.  Without them nothing is
estimated.
"""

from __future__ import annotations

import datetime as dt
import math
import re
import tomllib
import zoneinfo
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from advisory.crops import thresholds
from advisory.errors import InputError
from advisory.store.schema import Block, Equipment, Farm, Recipient, StageRecord, Station

#: Protection kinds and their parameters: name -> (required, type, minimum, maximum).
EQUIPMENT_PARAMS: dict[str, dict[str, tuple[bool, type, float | None, float | None]]] = {
    "wind_machine": {
        "count": (False, int, 1, 500),
        "hp_each": (False, float, 1, 1000),
        "hectares_each": (False, float, 0.5, 20),
        "min_inversion_c": (False, float, 0, 10),
        "max_wind_ms": (False, float, 0, 15),
    },
    "overtree_sprinkler": {
        "rate_mm_h": (True, float, 0.5, 10),
        "water_supply_m3": (False, float, 0, 1e7),
    },
    "undertree_sprinkler": {
        "rate_mm_h": (True, float, 0.5, 10),
        "water_supply_m3": (False, float, 0, 1e7),
    },
    "heater": {
        "count_per_ha": (True, float, 1, 500),
        "fuel_l_per_h_each": (False, float, 0, 20),
        "fuel_supply_l": (False, float, 0, 1e7),
    },
}

#: Parameters every protection kind may carry, for the economics: name -> (required, type, min, max).
COST_PARAMS: dict[str, tuple[bool, type, float | None, float | None]] = {
    "running_cost_per_h": (False, float, 0, 1e7),
    "fixed_cost_per_night": (False, float, 0, 1e7),
    "protection_c": (False, float, 0, 15),
}
for _spec in EQUIPMENT_PARAMS.values():
    _spec.update(COST_PARAMS)

UNITS = ("metric", "imperial")


def _month_day(chk: _Checker, value, table: str, idx: int | None, key: str) -> str:
    """A ``MM-DD`` text, checked (29 February is refused: not every year has it)."""
    if isinstance(value, str) and re.fullmatch(r"\d{2}-\d{2}", value.strip()):
        m, d = (int(x) for x in value.strip().split("-"))
        try:
            dt.date(2001, m, d)
            return value.strip()
        except ValueError:
            pass
    chk.fail(f"'{key}' must be a month and day like \"01-01\" (MM-DD), got {value!r}", table, idx, key)
    raise AssertionError  # not reached


# --------------------------------------------------------------------------- line lookup

@dataclass
class _LineIndex:
    """Find the line of a key in a TOML file, for error messages.

    ``tomllib`` gives line numbers only for syntax errors; for a semantic error
    we locate the table (``[[blocks]]`` number *i*) and the key within it.
    """

    lines: list[str]

    def find(self, table: str, index: int | None, key: str | None) -> int | None:
        header = re.compile(r"^\s*\[\[\s*" + re.escape(table) + r"\s*\]\]\s*$") if index is not None \
            else re.compile(r"^\s*\[\s*" + re.escape(table) + r"\s*\]\s*$")
        count = -1
        start = None
        for n, text in enumerate(self.lines):
            if header.match(text):
                count += 1
                if index is None or count == index:
                    start = n
                    break
        if start is None:
            return None
        if key is None:
            return start + 1
        keypat = re.compile(r"^\s*\"?" + re.escape(key) + r"\"?\s*=")
        for n in range(start + 1, len(self.lines)):
            text = self.lines[n]
            stripped = text.strip()
            is_table = re.match(r"^\s*\[", text) is not None
            # stop at the next table that is not a sub-table of this one
            if is_table and not stripped.startswith((f"[{table}.", f"[[{table}.")):
                break
            if keypat.match(text):
                return n + 1
        return start + 1


# --------------------------------------------------------------------------- parsed model

@dataclass
class EquipmentSpec:
    kind: str
    params: dict[str, Any]


@dataclass
class StationSpec:
    code: str
    name: str
    latitude: float
    longitude: float
    elevation_m: float
    timezone: str
    temp_sensor_height_m: float = 1.5
    upper_sensor_height_m: float | None = None
    wind_sensor_height_m: float = 2.0
    column_map: dict[str, Any] = field(default_factory=dict)
    inbox: str | None = None


@dataclass
class RecipientSpec:
    name: str
    role: str
    channels: dict[str, str]


@dataclass
class BlockSpec:
    name: str
    station: str
    latitude: float
    longitude: float
    elevation_m: float
    area_ha: float
    crop: str
    variety: str | None
    stage: str
    stage_date: dt.date
    recipients: list[str] | None
    reference_offset_min: int
    t10_override_c: float | None
    t90_override_c: float | None
    equipment: list[EquipmentSpec]
    settings: dict[str, Any]


@dataclass
class FarmSpec:
    name: str
    timezone: str
    units: str
    settings: dict[str, Any]
    stations: list[StationSpec]
    recipients: list[RecipientSpec]
    blocks: list[BlockSpec]
    path: str = ""


# --------------------------------------------------------------------------- validation helpers

class _Checker:
    def __init__(self, path: str, text: str):
        self.path = path
        self.index = _LineIndex(text.splitlines())

    def fail(self, message: str, table: str, idx: int | None, key: str | None):
        line = self.index.find(table, idx, key)
        name = f"{table}[{idx}].{key}" if idx is not None and key else (f"{table}.{key}" if key else table)
        raise InputError(message, file=self.path, line=line, field=name)

    def get(self, obj: dict, key: str, table: str, idx: int | None, kind: type, *, required=True,
            default=None, lo: float | None = None, hi: float | None = None):
        if key not in obj:
            if required:
                where = f"{table}[{idx}].{key}" if idx is not None else f"{table}.{key}"
                raise InputError(f"'{key}' is required", file=self.path, line=self.index.find(table, idx, None),
                                 field=where)
            return default
        value = obj[key]
        if kind is float:
            if isinstance(value, bool) or not isinstance(value, int | float):
                self.fail(f"'{key}' must be a number, got {value!r}", table, idx, key)
            value = float(value)
            if not math.isfinite(value):
                self.fail(f"'{key}' must be finite", table, idx, key)
        elif kind is int:
            if isinstance(value, bool) or not isinstance(value, int):
                self.fail(f"'{key}' must be a whole number, got {value!r}", table, idx, key)
        elif kind is str:
            if not isinstance(value, str) or not value.strip():
                self.fail(f"'{key}' must be a non-empty text", table, idx, key)
            value = value.strip()
        elif kind is dt.date:
            if isinstance(value, dt.datetime):
                value = value.date()
            elif isinstance(value, str):
                try:
                    value = dt.date.fromisoformat(value)
                except ValueError:
                    self.fail(f"'{key}' must be a date like 2026-04-02, got {value!r}", table, idx, key)
            elif not isinstance(value, dt.date):
                self.fail(f"'{key}' must be a date like 2026-04-02", table, idx, key)
        elif kind is dict:
            if not isinstance(value, dict):
                self.fail(f"'{key}' must be a table", table, idx, key)
        elif kind is list and not isinstance(value, list):
            self.fail(f"'{key}' must be a list", table, idx, key)
        if lo is not None and value < lo:
            self.fail(f"'{key}' = {value} is below the smallest allowed value {lo}", table, idx, key)
        if hi is not None and value > hi:
            self.fail(f"'{key}' = {value} is above the largest allowed value {hi}", table, idx, key)
        return value

    def zone(self, obj: dict, key: str, table: str, idx: int | None, required=True, default=None):
        name = self.get(obj, key, table, idx, str, required=required, default=default)
        if name is None:
            return None
        try:
            zoneinfo.ZoneInfo(name)
        except (zoneinfo.ZoneInfoNotFoundError, ValueError):
            self.fail(f"unknown time zone {name!r} (use an IANA name such as 'America/Denver')",
                      table, idx, key)
        return name

    def latlon(self, obj: dict, table: str, idx: int | None):
        lat = self.get(obj, "latitude", table, idx, float)
        if not -90.0 <= lat <= 90.0:
            self.fail(f"latitude {lat} is outside -90..90", table, idx, "latitude")
        lon = self.get(obj, "longitude", table, idx, float)
        if not -180.0 <= lon <= 180.0:
            self.fail(f"longitude {lon} is outside -180..180", table, idx, "longitude")
        return lat, lon


KNOWN_KEYS = {
    "farm": {"name", "timezone", "units", "settings", "fallback", "currency", "crew_size", "chill_start",
             "biofix"},
    "stations": {"id", "name", "latitude", "longitude", "elevation_m", "temp_sensor_height_m",
                 "upper_sensor_height_m", "wind_sensor_height_m", "timezone", "inbox", "column_map"},
    "recipients": {"name", "role", "email", "webhook", "sms"},
    "blocks": {"name", "station", "latitude", "longitude", "elevation_m", "area_ha", "crop", "variety",
               "stage", "stage_date", "recipients", "reference_offset_min", "t10_override_c",
               "t90_override_c", "protection", "settings", "crop_value_per_ha"},
}


def _unknown_keys(chk: _Checker, obj: dict, table: str, idx: int | None) -> None:
    for key in obj:
        if key not in KNOWN_KEYS[table]:
            allowed = ", ".join(sorted(KNOWN_KEYS[table]))
            chk.fail(f"unknown key '{key}' (allowed: {allowed})", table, idx, key)


def _column_map(chk: _Checker, cmap: dict, idx: int) -> dict:
    """Logger header -> canonical column; an ``_options`` sub-table holds reading options."""
    out: dict = {}
    for key, value in cmap.items():
        if key == "_options":
            if not isinstance(value, dict):
                chk.fail("'_options' must be a table of reading options (e.g. time_format, utc_offset)",
                         "stations", idx, "_options")
            out[key] = dict(value)
        elif isinstance(value, str) and value.strip():
            out[str(key)] = value.strip()
        else:
            chk.fail(f"column map entry '{key}' must name a canonical column, got {value!r}",
                     "stations", idx, key)
    return out


def parse_farm_text(text: str, path: str = "<farm file>") -> FarmSpec:
    """Validate a farm file's text; pure.

    Raises
    ------
    InputError
        Naming the file, the line and the field of the first problem.
    """
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        m = re.search(r"line (\d+)", str(exc))
        raise InputError(f"not valid TOML: {exc}", file=path, line=int(m.group(1)) if m else None) from None
    chk = _Checker(path, text)

    farm = doc.get("farm")
    if not isinstance(farm, dict):
        raise InputError("a [farm] table is required", file=path, field="farm")
    for top in doc:
        if top not in KNOWN_KEYS:
            raise InputError(f"unknown table '{top}' (allowed: farm, stations, recipients, blocks)",
                             file=path, field=top, line=chk.index.find(top, None, None)
                             or chk.index.find(top, 0, None))
    _unknown_keys(chk, farm, "farm", None)
    farm_name = chk.get(farm, "name", "farm", None, str)
    farm_tz = chk.zone(farm, "timezone", "farm", None)
    units = chk.get(farm, "units", "farm", None, str, required=False, default="metric")
    if units not in UNITS:
        chk.fail(f"units must be one of {', '.join(UNITS)}, got {units!r}", "farm", None, "units")
    farm_settings = chk.get(farm, "settings", "farm", None, dict, required=False, default={})

    stations: list[StationSpec] = []
    raw_stations = doc.get("stations", [])
    if not isinstance(raw_stations, list):
        raise InputError("stations must be written as [[stations]] tables", file=path, field="stations")
    for i, st in enumerate(raw_stations):
        _unknown_keys(chk, st, "stations", i)
        code = chk.get(st, "id", "stations", i, str)
        if any(s.code == code for s in stations):
            chk.fail(f"station id '{code}' appears twice", "stations", i, "id")
        lat, lon = chk.latlon(st, "stations", i)
        cmap = chk.get(st, "column_map", "stations", i, dict, required=False, default={})
        stations.append(StationSpec(
            code=code,
            name=chk.get(st, "name", "stations", i, str, required=False, default=code),
            latitude=lat, longitude=lon,
            elevation_m=chk.get(st, "elevation_m", "stations", i, float, lo=-450, hi=9000),
            timezone=chk.zone(st, "timezone", "stations", i, required=False, default=farm_tz),
            temp_sensor_height_m=chk.get(st, "temp_sensor_height_m", "stations", i, float, required=False,
                                         default=1.5, lo=0.1, hi=30),
            upper_sensor_height_m=chk.get(st, "upper_sensor_height_m", "stations", i, float,
                                          required=False, lo=0.5, hi=100),
            wind_sensor_height_m=chk.get(st, "wind_sensor_height_m", "stations", i, float, required=False,
                                         default=2.0, lo=0.5, hi=100),
            column_map=_column_map(chk, cmap, i),
            inbox=chk.get(st, "inbox", "stations", i, str, required=False),
        ))
    codes = {s.code for s in stations}

    recipients: list[RecipientSpec] = []
    for i, rc in enumerate(doc.get("recipients", [])):
        _unknown_keys(chk, rc, "recipients", i)
        name = chk.get(rc, "name", "recipients", i, str)
        if any(r.name == name for r in recipients):
            chk.fail(f"recipient '{name}' appears twice", "recipients", i, "name")
        channels = {}
        for ch in ("email", "webhook", "sms"):
            v = chk.get(rc, ch, "recipients", i, str, required=False)
            if v is None:
                continue
            if ch == "email" and not re.fullmatch(r"[^@\s]+@[^@\s]+", v):
                chk.fail(f"'{v}' is not an e-mail address", "recipients", i, ch)
            if ch == "webhook" and not re.match(r"https?://", v):
                chk.fail(f"'{v}' is not an http(s) URL", "recipients", i, ch)
            channels[ch] = v
        recipients.append(RecipientSpec(name=name, role=chk.get(rc, "role", "recipients", i, str,
                                                               required=False, default=""),
                                        channels=channels))
    recipient_names = {r.name for r in recipients}
    fallback = chk.get(farm, "fallback", "farm", None, list, required=False)
    if fallback is not None:
        for r in fallback:
            if r not in recipient_names:
                chk.fail(f"recipient '{r}' is not defined in this file", "farm", None, "fallback")
        farm_settings = {**farm_settings, "fallback_recipients": list(fallback)}
    currency = chk.get(farm, "currency", "farm", None, str, required=False)
    if currency is not None:
        if len(currency) > 8:
            chk.fail(f"'currency' must be a short code such as \"USD\" (at most 8 characters), got {currency!r}",
                     "farm", None, "currency")
        farm_settings = {**farm_settings, "currency": currency}
    crew = chk.get(farm, "crew_size", "farm", None, int, required=False, lo=1, hi=1000)
    if crew is not None:
        farm_settings = {**farm_settings, "crew_size": crew}
    if "chill_start" in farm:
        farm_settings = {**farm_settings,
                         "chill_start": _month_day(chk, farm["chill_start"], "farm", None, "chill_start")}
    if "biofix" in farm:
        raw_biofix = chk.get(farm, "biofix", "farm", None, dict)
        biofix: dict[str, str] = {}
        for crop_name, mmdd in raw_biofix.items():
            try:
                crop_key = thresholds.normalise_crop(crop_name)
            except InputError as exc:
                chk.fail(exc.message, "farm.biofix", None, crop_name)
            biofix[crop_key] = _month_day(chk, mmdd, "farm.biofix", None, crop_name)
        farm_settings = {**farm_settings, "biofix": biofix}

    blocks: list[BlockSpec] = []
    for i, bl in enumerate(doc.get("blocks", [])):
        _unknown_keys(chk, bl, "blocks", i)
        name = chk.get(bl, "name", "blocks", i, str)
        if any(b.name == name for b in blocks):
            chk.fail(f"block name '{name}' appears twice in this farm", "blocks", i, "name")
        station = chk.get(bl, "station", "blocks", i, str)
        if station not in codes:
            known = ", ".join(sorted(codes)) or "none defined"
            chk.fail(f"station '{station}' is not defined in this file (stations: {known})",
                     "blocks", i, "station")
        lat, lon = chk.latlon(bl, "blocks", i)
        crop_raw = chk.get(bl, "crop", "blocks", i, str)
        try:
            crop = thresholds.normalise_crop(crop_raw)
        except InputError as exc:
            chk.fail(exc.message, "blocks", i, "crop")
        stage_raw = chk.get(bl, "stage", "blocks", i, str)
        try:
            stage = thresholds.normalise_stage(crop, stage_raw)
        except InputError as exc:
            chk.fail(exc.message, "blocks", i, "stage")
        t10 = chk.get(bl, "t10_override_c", "blocks", i, float, required=False, lo=-40, hi=5)
        t90 = chk.get(bl, "t90_override_c", "blocks", i, float, required=False, lo=-40, hi=5)
        try:
            thresholds.critical_temps(crop, stage, t10, t90)
        except InputError as exc:
            chk.fail(exc.message, "blocks", i, "t90_override_c" if t90 is not None else "t10_override_c")
        recips = chk.get(bl, "recipients", "blocks", i, list, required=False)
        if recips is not None:
            for r in recips:
                if r not in recipient_names:
                    chk.fail(f"recipient '{r}' is not defined in this file", "blocks", i, "recipients")
        block_settings = chk.get(bl, "settings", "blocks", i, dict, required=False, default={})
        value = chk.get(bl, "crop_value_per_ha", "blocks", i, float, required=False, lo=0, hi=1e8)
        if value is not None:
            block_settings = {**block_settings, "crop_value_per_ha": value}
        equipment: list[EquipmentSpec] = []
        for prot in bl.get("protection", []):
            equipment.extend(_parse_equipment(chk, prot, i))
        blocks.append(BlockSpec(
            name=name, station=station, latitude=lat, longitude=lon,
            elevation_m=chk.get(bl, "elevation_m", "blocks", i, float, lo=-450, hi=9000),
            area_ha=chk.get(bl, "area_ha", "blocks", i, float, lo=0.01, hi=10000),
            crop=crop, variety=chk.get(bl, "variety", "blocks", i, str, required=False),
            stage=stage, stage_date=chk.get(bl, "stage_date", "blocks", i, dt.date),
            recipients=recips,
            reference_offset_min=chk.get(bl, "reference_offset_min", "blocks", i, int, required=False,
                                         default=120, lo=0, hi=600),
            t10_override_c=t10, t90_override_c=t90, equipment=equipment,
            settings=block_settings,
        ))
    return FarmSpec(name=farm_name, timezone=farm_tz, units=units, settings=farm_settings,
                    stations=stations, recipients=recipients, blocks=blocks, path=path)


def _parse_equipment(chk: _Checker, prot: dict, block_idx: int) -> list[EquipmentSpec]:
    table = "blocks"
    kind = prot.get("kind")
    if kind == "none":
        return []
    if kind not in EQUIPMENT_PARAMS:
        chk.fail(f"protection kind {kind!r} is not one of: {', '.join([*EQUIPMENT_PARAMS, 'none'])}",
                 table, block_idx, "kind")
    spec = EQUIPMENT_PARAMS[kind]
    params: dict[str, Any] = {}
    for key in prot:
        if key == "kind":
            continue
        if key not in spec:
            chk.fail(f"'{key}' is not a parameter of {kind} (parameters: {', '.join(spec)})",
                     table, block_idx, key)
    for key, (required, kind_t, lo, hi) in spec.items():
        v = chk.get(prot, key, table, block_idx, kind_t, required=required, lo=lo, hi=hi)
        if v is not None:
            params[key] = v
    return [EquipmentSpec(kind=kind, params=params)]


def parse_farm_file(path: str | Path) -> FarmSpec:
    """Read and validate a farm file; see :func:`parse_farm_text`."""
    p = Path(path)
    try:
        raw = p.read_bytes()
    except FileNotFoundError:
        raise InputError("file not found", file=str(p)) from None
    except OSError as exc:
        raise InputError(f"cannot read: {exc.strerror}", file=str(p)) from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        raise InputError("not UTF-8 text", file=str(p), line=line) from None
    spec = parse_farm_text(text, str(p))
    # Inbox folders are relative to the farm file.
    for st in spec.stations:
        if st.inbox and not Path(st.inbox).is_absolute():
            st.inbox = str((p.parent / st.inbox).resolve())
    return spec


# --------------------------------------------------------------------------- upsert

@dataclass
class UpsertReport:
    farm: str
    created: list[str] = field(default_factory=list)
    updated: list[str] = field(default_factory=list)
    deactivated: list[str] = field(default_factory=list)
    stage_changes: list[str] = field(default_factory=list)

    @property
    def changed(self) -> bool:
        return bool(self.created or self.updated or self.deactivated or self.stage_changes)

    def text(self) -> str:
        if not self.changed:
            return f"farm '{self.farm}': nothing changed"
        parts = [f"farm '{self.farm}':"]
        for label, items in (("created", self.created), ("updated", self.updated),
                             ("stage changed", self.stage_changes), ("set inactive", self.deactivated)):
            if items:
                parts.append(f"  {label}: " + "; ".join(items))
        return "\n".join(parts)


def _assign(obj, values: dict[str, Any]) -> bool:
    """Set attributes that differ; return whether anything changed."""
    changed = False
    for key, value in values.items():
        if getattr(obj, key) != value:
            setattr(obj, key, value)
            changed = True
    return changed


def record_stage(session: Session, block: Block, stage: str, observed_on: dt.date, source: str) -> bool:
    """Record a stage observation; returns whether anything changed.

    The observation is added to the block's stage history if it is new.  It
    becomes the block's current stage unless a later observation exists (an
    older farm file does not undo a stage set since at the command line).
    """
    changed = False
    if not any(r.stage == stage and r.observed_on == observed_on for r in block.stage_history):
        block.stage_history.append(StageRecord(stage=stage, observed_on=observed_on, source=source))
        changed = True
    latest = max(r.observed_on for r in block.stage_history)
    if observed_on >= latest and (block.stage, block.stage_date) != (stage, observed_on):
        block.stage, block.stage_date = stage, observed_on
        changed = True
    return changed


def upsert_farm(session: Session, spec: FarmSpec) -> UpsertReport:
    """Write a validated farm into the session's transaction, idempotently."""
    rep = UpsertReport(farm=spec.name)
    farm = session.scalar(select(Farm).where(Farm.name == spec.name))
    if farm is None:
        farm = Farm(name=spec.name, timezone=spec.timezone, units=spec.units, settings=spec.settings)
        session.add(farm)
        session.flush()
        rep.created.append(f"farm {spec.name}")
    elif _assign(farm, {"timezone": spec.timezone, "units": spec.units, "settings": spec.settings}):
        rep.updated.append(f"farm {spec.name}")

    stations: dict[str, Station] = {}
    for st in spec.stations:
        row = session.scalar(select(Station).where(Station.code == st.code))
        values = dict(name=st.name, latitude=st.latitude, longitude=st.longitude,
                      elevation_m=st.elevation_m, timezone=st.timezone,
                      temp_sensor_height_m=st.temp_sensor_height_m,
                      upper_sensor_height_m=st.upper_sensor_height_m,
                      wind_sensor_height_m=st.wind_sensor_height_m, column_map=st.column_map,
                      inbox=st.inbox)
        if row is None:
            row = Station(code=st.code, farm=farm, **values)
            session.add(row)
            rep.created.append(f"station {st.code}")
        else:
            if row.farm_id != farm.id:
                raise InputError(f"station id '{st.code}' already belongs to another farm",
                                 file=spec.path, field="stations.id")
            if _assign(row, values):
                rep.updated.append(f"station {st.code}")
        stations[st.code] = row

    recipients: dict[str, Recipient] = {}
    for rc in spec.recipients:
        row = session.scalar(select(Recipient).where(Recipient.farm_id == farm.id,
                                                     Recipient.name == rc.name))
        if row is None:
            row = Recipient(farm=farm, name=rc.name, role=rc.role, channels=rc.channels)
            session.add(row)
            rep.created.append(f"recipient {rc.name}")
        elif _assign(row, {"role": rc.role, "channels": rc.channels}):
            rep.updated.append(f"recipient {rc.name}")
        recipients[rc.name] = row
    session.flush()

    seen = set()
    for bs in spec.blocks:
        seen.add(bs.name)
        row = session.scalar(select(Block).where(Block.farm_id == farm.id, Block.name == bs.name))
        values = dict(station=stations[bs.station], latitude=bs.latitude, longitude=bs.longitude,
                      elevation_m=bs.elevation_m, area_ha=bs.area_ha, crop=bs.crop, variety=bs.variety,
                      reference_offset_min=bs.reference_offset_min, t10_override_c=bs.t10_override_c,
                      t90_override_c=bs.t90_override_c, settings=bs.settings, active=True)
        wanted_recips = [recipients[n] for n in (bs.recipients if bs.recipients is not None
                                                 else [r.name for r in spec.recipients])]
        if row is None:
            row = Block(farm=farm, name=bs.name, stage=bs.stage, stage_date=bs.stage_date, **values)
            session.add(row)
            row.stage_history.append(StageRecord(stage=bs.stage, observed_on=bs.stage_date,
                                                 source="farm file"))
            row.equipment = [Equipment(kind=e.kind, params=e.params) for e in bs.equipment]
            row.recipients = wanted_recips
            rep.created.append(f"block {bs.name}")
            continue
        changed = _assign(row, values)
        current_eq = [(e.kind, e.params) for e in row.equipment]
        if current_eq != [(e.kind, e.params) for e in bs.equipment]:
            row.equipment = [Equipment(kind=e.kind, params=e.params) for e in bs.equipment]
            changed = True
        if sorted(r.name for r in row.recipients) != sorted(r.name for r in wanted_recips):
            row.recipients = wanted_recips
            changed = True
        if record_stage(session, row, bs.stage, bs.stage_date, "farm file"):
            rep.stage_changes.append(f"{bs.name}: {bs.stage} ({bs.stage_date.isoformat()})")
        if changed:
            rep.updated.append(f"block {bs.name}")
    for row in session.scalars(select(Block).where(Block.farm_id == farm.id, Block.active.is_(True))):
        if row.name not in seen:
            row.active = False
            rep.deactivated.append(f"block {row.name}")
    session.flush()
    return rep


def import_farm_file(db, path: str | Path) -> UpsertReport:
    """Validate then upsert a farm file in one transaction."""
    spec = parse_farm_file(path)
    with db.transaction() as session:
        return upsert_farm(session, spec)
