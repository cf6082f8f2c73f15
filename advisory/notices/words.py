"""The words and numbers of a notice: level names, method names, units and local times.

Everything a notice shows to a person is formatted here, in one place, so the
plain text, Markdown, HTML, text-message and run-sheet outputs all say the same
thing the same way.  Inside the program temperatures are °C and times UTC;
these helpers turn them into the farm's units ("metric" -> °C, "imperial" ->
°F) and the farm's local time with the zone's abbreviation ("02:40 PDT").

Risk levels arrive as keys (``Assessment.level``) from :mod:`advisory.risk`;
:data:`LEVELS` maps each key to the name and colour a reader sees.  The names
are this program's own and deliberately unlike any weather-service product.
"""

from __future__ import annotations

import datetime as dt
import math
import re
import unicodedata
from dataclasses import dataclass
from functools import lru_cache
from zoneinfo import ZoneInfo


@dataclass(frozen=True)
class LevelStyle:
    """How one risk level looks in a notice.

    Attributes
    ----------
    name : str
        Display name (a few words; also used in text messages).
    meaning : str
        One sentence: what the level means for the grower.
    colour : str
        Background colour of the level band (white text stays readable on it).
    """

    name: str
    meaning: str
    colour: str


#: Colours by rank 0..4: one hue (a slate indigo of our own) in steps of intensity, darker for more
#: risk; the level's word is always printed beside or on it, so the colour never carries the meaning alone.
#: White text stays readable on every step.
RANK_COLOURS = ("#5e6b8a", "#4d5a7d", "#3d4970", "#2e3862", "#1f2754")
STATUS_COLOUR = "#4b5563"

_EASY = "No heat damage or unusual crew heat risk expected."
_HOT = "Sunburn possible on exposed fruit; plan crew breaks for the afternoon."
_VERY_HOT = "Sunburn likely on exposed fruit; move heavy work to cooler hours."
_SCORCHING = "Fruit damage likely; stop heavy work in the hottest hours."

#: Display of the risk levels by kind ("frost" nights, "heat" days) and level key.
LEVELS: dict[str, dict[str, LevelStyle]] = {
    "frost": {
        "nil": LevelStyle("Quiet", "No bud damage expected tonight.", RANK_COLOURS[0]),
        "slight": LevelStyle("Keep an eye", "A small chance of bud damage: check thermometers late.",
                             RANK_COLOURS[1]),
        "marked": LevelStyle("Stand by", "Damage is possible: have protection ready to start.",
                             RANK_COLOURS[2]),
        "serious": LevelStyle("Protect", "Damage is likely without protection.", RANK_COLOURS[3]),
        "grave": LevelStyle("Protect: grave", "Heavy bud loss is likely without protection.",
                            RANK_COLOURS[4]),
    },
    "heat": {
        # keys of advisory.risk.heat
        "easy": LevelStyle("Easy day", _EASY, RANK_COLOURS[0]),
        "hot": LevelStyle("Hot", _HOT, RANK_COLOURS[2]),
        "very_hot": LevelStyle("Very hot", _VERY_HOT, RANK_COLOURS[3]),
        "scorching": LevelStyle("Scorching", _SCORCHING, RANK_COLOURS[4]),
        # the frost-style keys, should a heat model use them
        "nil": LevelStyle("Easy day", _EASY, RANK_COLOURS[0]),
        "slight": LevelStyle("Warm", "Warm afternoon: water and shade for crews as usual.", RANK_COLOURS[1]),
        "marked": LevelStyle("Hot", "Fruit sunburn possible; plan crew breaks for the afternoon.",
                             RANK_COLOURS[2]),
        "serious": LevelStyle("Very hot", _VERY_HOT, RANK_COLOURS[3]),
        "grave": LevelStyle("Scorching", _SCORCHING, RANK_COLOURS[4]),
    },
}
#: Heat level keys of notices stored before the keys were renamed, and the key each is now.
_OLD_HEAT_KEYS = {"quiet": "easy", "elevated": "hot", "high": "very_hot", "acute": "scorching"}

#: Names shown for a frost level whose block has no usable protection tonight: the level's own name
#: ("Protect") would read as an order that cannot be carried out.
UNPROTECTED_NAMES = {"serious": "Unprotected: at risk", "grave": "Unprotected: grave"}
UNPROTECTED_MEANING = ("No usable protection tonight: check the buds, call your adviser tonight and "
                       "record the stage.")

#: Names shown instead of a level when there is no forecast.
STATUS_NAMES = {
    "no_forecast": "No forecast",
    "no_night": "No night",
    "missed": "Run missed",
}

#: Display names of protection methods (plural where the crew runs several).
METHOD_NAMES = {
    "wind_machine": "wind machines",
    "overtree_sprinkler": "over-tree sprinklers",
    "undertree_sprinkler": "under-tree sprinklers",
    "heater": "heaters",
    "evaporative_cooling": "evaporative cooling",
    "none": "no protection equipment",
}


def level_style(kind: str, level: str, rank: int = 0, status: str = "ok") -> LevelStyle:
    """The display of a level key; unknown keys get a tidy name and the colour of their rank."""
    if status != "ok":
        return LevelStyle(STATUS_NAMES.get(status, status.replace("_", " ").capitalize()),
                          "", STATUS_COLOUR)
    table = LEVELS.get(kind, LEVELS["frost"])
    if kind == "heat":
        level = _OLD_HEAT_KEYS.get(level, level)
    if level in table:
        return table[level]
    rank = max(0, min(int(rank or 0), len(RANK_COLOURS) - 1))
    name = level.replace("_", " ").strip().capitalize() or "Unrated"
    return LevelStyle(name, "", RANK_COLOURS[rank])


def unprotected_style(kind: str, level: str, rank: int = 0, status: str = "ok") -> LevelStyle:
    """The display of a frost level for a block with no usable protection (see :data:`UNPROTECTED_NAMES`)."""
    style = level_style(kind, level, rank, status)
    if status != "ok" or kind == "heat" or level not in UNPROTECTED_NAMES:
        return style
    return LevelStyle(UNPROTECTED_NAMES[level], UNPROTECTED_MEANING, style.colour)


def method_name(method: str) -> str:
    return METHOD_NAMES.get(method, method.replace("_", " "))


def crop_name(crop: str) -> str:
    return crop.replace("_", " ")


# --------------------------------------------------------------------------------------------------
# Units
# --------------------------------------------------------------------------------------------------

def imperial(units: str | None) -> bool:
    known = _UNITS.get(units)  # the usual spellings first
    return known if known is not None else (units or "").strip().lower() == "imperial"


_UNITS = {"imperial": True, "metric": False}


def temp_value(temp_c: float | None, units: str) -> float | None:
    """A temperature in the farm's units (°C or °F)."""
    if temp_c is None or not math.isfinite(temp_c):
        return None
    return temp_c * 1.8 + 32.0 if imperial(units) else temp_c


def temp_unit(units: str) -> str:
    return "°F" if imperial(units) else "°C"


def temp(temp_c: float | None, units: str, *, unit: bool = True, ascii_only: bool = False) -> str:
    """Format a temperature: ``-2.8 °C`` or ``27.0 °F`` (``-2.8C`` with ``ascii_only``)."""
    v = temp_value(temp_c, units)
    if v is None:
        return "n/a"
    s = f"{v:.1f}"
    if s == "-0.0":
        s = "0.0"
    if not unit:
        return s
    if ascii_only:
        return s + ("F" if imperial(units) else "C")
    return f"{s} {temp_unit(units)}"


def temp_range(lo_c: float | None, hi_c: float | None, units: str, *, ascii_only: bool = False) -> str:
    """``-4.1 to -1.5 °C``."""
    lo, hi = temp(lo_c, units, unit=False), temp(hi_c, units, unit=False)
    u = ("F" if imperial(units) else "C") if ascii_only else " " + temp_unit(units)
    return f"{lo} to {hi}{u}"


def temp_delta(delta_c: float | None, units: str, *, signed: bool = False) -> str:
    """A temperature difference (1 °C = 1.8 °F, no offset)."""
    if delta_c is None or not math.isfinite(delta_c):
        return "n/a"
    v = delta_c * 1.8 if imperial(units) else delta_c
    s = f"{v:+.1f}" if signed else f"{v:.1f}"
    if s in ("-0.0", "+0.0"):
        s = "0.0" if not signed else "+0.0"
    return f"{s} {temp_unit(units)}"


def pct(p: float | None, *, fraction: bool = True) -> str:
    """A probability (0..1) or a percentage as ``62 %``; below 1 % shows ``<1 %``."""
    if p is None or not math.isfinite(p):
        return "n/a"
    v = 100.0 * p if fraction else p
    if 0 < v < 1:
        return "<1 %"
    if 99 < v < 100:
        return ">99 %"
    return f"{v:.0f} %"


def hours(h: float | None) -> str:
    if h is None or not math.isfinite(h):
        return "n/a"
    return f"{h:.1f} h"


# Quantities in protection steps: key -> label.  The key's ending gives the unit.
_QUANTITY_LABELS = {
    "hours": "run time",
    "hours_cold": "run time if colder",
    "run_hours": "run time",
    "run_hours_cold": "run time if colder",
    "water_m3": "water",
    "water_m3_cold": "water if colder",
    "water_l_per_ha": "water per hectare",
    "rate_needed_mm_h": "rate needed",
    "required_rate_mm_h": "rate needed",
    "rate_available_mm_h": "system rate",
    "rate_mm_h": "system rate",
    "fuel_l": "fuel",
    "fuel_l_cold": "fuel if colder",
    "inversion_c": "inversion",
    "start_air_temp_c": "start at air temperature",
    "start_wet_bulb_c": "start at wet bulb",
    "air_temp_c": "air",
    "dew_point_c": "dew point",
    "wet_bulb_c": "wet bulb",
    "rel_humidity_pct": "humidity",
    "wind_speed_ms": "wind",
    "cloud_cover_pct": "cloud",
    "upper_air_temp_c": "air at the tower sensor",
}
#: Temperature keys that are differences, not readings.
_DELTA_KEYS = {"inversion_c", "margin_c", "start_margin_c"}

_GAL_PER_M3 = 264.172  # US gallons per cubic metre
_GAL_PER_L = 0.264172
_ACRE_PER_HA = 2.47105
_MM_PER_IN = 25.4


def quantity_label(key: str) -> str:
    if key in _QUANTITY_LABELS:
        return _QUANTITY_LABELS[key]
    cold = key.endswith("_cold")
    base = key[: -len("_cold")] if cold else key
    base = re.sub(r"_(c|m3|l|l_per_ha|mm_h|mm|h|ms|pct|kpa|ha|m)$", "", base)
    return base.replace("_", " ") + (" if colder" if cold else "")


def quantity(key: str, value, units: str) -> str:
    """Format one quantity by the unit its key ends in (metric, with US units added for imperial farms)."""
    if isinstance(value, bool) or not isinstance(value, int | float):
        return str(value)
    if not math.isfinite(value):
        return "n/a"
    imp = imperial(units)
    if key.endswith("_cold"):
        key = key[: -len("_cold")]
    if key.endswith("_c"):
        return temp_delta(value, units) if (key in _DELTA_KEYS or key.endswith("_delta_c")) else temp(value, units)
    if key.endswith("_l_per_ha"):
        s = f"{value:,.0f} L/ha"
        return s + (f" ({value * _GAL_PER_L / _ACRE_PER_HA:,.0f} gal/acre)" if imp else "")
    if key.endswith("_m3"):
        s = f"{value:,.0f} m³"
        return s + (f" ({value * _GAL_PER_M3:,.0f} gal)" if imp else "")
    if key.endswith("_l"):
        s = f"{value:,.0f} L"
        return s + (f" ({value * _GAL_PER_L:,.0f} gal)" if imp else "")
    if key.endswith("_mm_h"):
        s = f"{value:.1f} mm/h"
        return s + (f" ({value / _MM_PER_IN:.2f} in/h)" if imp else "")
    if key.endswith("_ms"):
        s = f"{value:.1f} m/s"
        return s + (f" ({value * 2.23694:.0f} mph)" if imp else "")
    if key == "hours" or key.endswith("_h") or key.endswith("_hours"):
        return hours(value)
    if key.endswith("_pct"):
        return f"{value:.0f} %"
    return f"{value:g}"


# --------------------------------------------------------------------------------------------------
# Times
# --------------------------------------------------------------------------------------------------

@lru_cache(maxsize=64)
def zone(name: str) -> dt.tzinfo:
    try:
        return ZoneInfo(name)
    except Exception:  # an unknown zone name: show UTC rather than fail a notice
        return dt.UTC


def parse_time(value) -> dt.datetime | None:
    """A tz-aware datetime from a datetime or ISO 8601 text (None for anything else)."""
    if value is None or value == "":
        return None
    if isinstance(value, dt.datetime):
        t = value
    else:
        try:
            t = dt.datetime.fromisoformat(str(value))
        except ValueError:
            return None
    return t if t.tzinfo is not None else t.replace(tzinfo=dt.UTC)


def iso(value) -> str | None:
    if type(value) is dt.datetime and value.tzinfo is dt.UTC:  # the common case: an instant of the run
        return value.isoformat()
    t = parse_time(value)
    return None if t is None else t.astimezone(dt.UTC).isoformat()


def local(value, tz: str) -> dt.datetime | None:
    t = parse_time(value)
    return None if t is None else t.astimezone(zone(tz))


def _remembered(fn):
    """``fn(value, tz)`` remembered for recent (instant, zone) pairs: a night's notices for
    thousands of blocks repeat the same few dozen instants."""
    cached = lru_cache(maxsize=16384)(fn)

    def wrapper(value, tz: str) -> str:
        try:
            return cached(value, tz)
        except TypeError:  # an unhashable value
            return fn(value, tz)

    wrapper.__doc__, wrapper.__name__, wrapper.__wrapped__ = fn.__doc__, fn.__name__, fn
    return wrapper


#: Day and month names in the notices (English whatever the machine's locale; ``strftime`` is slower too).
_DAYS = ("Mon", "Tue", "Wed", "Thu", "Fri", "Sat", "Sun")
_MONTHS = ("Jan", "Feb", "Mar", "Apr", "May", "Jun", "Jul", "Aug", "Sep", "Oct", "Nov", "Dec")


def _hm_zone(t: dt.datetime) -> str:
    """``02:40 PDT`` (what ``strftime("%H:%M %Z")`` gives)."""
    return f"{t.hour:02d}:{t.minute:02d} {t.tzname() or ''}".rstrip()


@_remembered
def clock(value, tz: str) -> str:
    """``02:40 PDT``."""
    t = local(value, tz)
    return "n/a" if t is None else _hm_zone(t)


@_remembered
def clock_day(value, tz: str) -> str:
    """``Tue 02:40 PDT``."""
    t = local(value, tz)
    return "n/a" if t is None else f"{_DAYS[t.weekday()]} {_hm_zone(t)}"


@_remembered
def when(value, tz: str) -> str:
    """``Mon 6 Apr 14:05 PDT``."""
    t = local(value, tz)
    return "n/a" if t is None else f"{_DAYS[t.weekday()]} {t.day} {_MONTHS[t.month - 1]} {_hm_zone(t)}"


@lru_cache(maxsize=1024)  # a run names the same few nights thousands of times
def day(d) -> str:
    """``Mon 6 Apr 2026`` for a date or ISO date text."""
    if isinstance(d, str):
        try:
            d = dt.date.fromisoformat(d)
        except ValueError:
            return d
    return f"{d:%a} {d.day} {d:%b %Y}"


@lru_cache(maxsize=1024)
def short_day(d) -> str:
    """``6 Apr``."""
    if isinstance(d, str):
        try:
            d = dt.date.fromisoformat(d)
        except ValueError:
            return d
    return f"{d.day} {d:%b}"


def age(minutes: float | None) -> str:
    if minutes is None or not math.isfinite(minutes):
        return "unknown"
    if minutes < 90:
        return f"{minutes:.0f} min"
    if minutes < 48 * 60:
        return f"{minutes / 60:.1f} h"
    return f"{minutes / 1440:.1f} days"


# --------------------------------------------------------------------------------------------------
# Safe text
# --------------------------------------------------------------------------------------------------

_GSM7_BASIC = set(
    "@£$¥èéùìòÇ\nØø\rÅåΔ_ΦΓΛΩΠΨΣΘΞÆæßÉ !\"#¤%&'()*+,-./0123456789:;<=>?¡ABCDEFGHIJKLMNOPQRSTUVWXYZ"
    "ÄÖÑÜ§¿abcdefghijklmnopqrstuvwxyzäöñüà")


_SPACES = re.compile(r" {2,}")


@lru_cache(maxsize=16384)
def gsm_safe(text: str) -> str:
    """Text reduced to the GSM 03.38 basic character set, so 160 characters fit one text message.

    Accents are dropped where the plain letter exists (``é`` stays: it is in the
    set), other characters become ``?``; line breaks become spaces.
    """
    text = text.replace("°", "").replace("−", "-").replace("–", "-").replace("—", "-").replace("…", "...")
    text = text.replace("\r", " ").replace("\n", " ").replace("\t", " ")
    if _GSM7_BASIC.issuperset(text):
        return _SPACES.sub(" ", text).strip()
    out = []
    for ch in text:
        if ch in _GSM7_BASIC:
            out.append(ch)
            continue
        base = unicodedata.normalize("NFKD", ch).encode("ascii", "ignore").decode()
        out.append(base if base and all(c in _GSM7_BASIC for c in base) else "?")
    return _SPACES.sub(" ", "".join(out)).strip()


@lru_cache(maxsize=1 << 16)  # more than a large run's block names: each is asked for more than once
def slug(text: str, max_len: int = 40, fallback: str = "x") -> str:
    """An ASCII file-name piece: letters, digits and single hyphens."""
    s = unicodedata.normalize("NFKD", text).encode("ascii", "ignore").decode()
    s = re.sub(r"[^A-Za-z0-9]+", "-", s).strip("-").lower()[:max_len].strip("-")
    return s or fallback
