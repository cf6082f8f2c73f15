"""How the console shows levels, methods, temperatures and times: the notices' own words and colours
(level names of :mod:`advisory.notices.words`, the one-hue steps), in the farm's units and zone."""

from __future__ import annotations

import datetime as dt
import math
from zoneinfo import ZoneInfo

from advisory.notices.words import METHOD_NAMES, level_style, quantity, quantity_label

NO_FORECAST = "No forecast"


def level(kind: str, key: str | None, status: str | None):
    """(name, colour, meaning) of a stored level; a block without a forecast gets a grey 'No forecast'."""
    if status is None:
        return NO_FORECAST, "#4b5563", "No forecast stored for this night."
    from advisory.web.queries import LEVEL_RANKS

    st = level_style(kind, key or "", LEVEL_RANKS.get(key or "", 0), status)
    return st.name, st.colour, st.meaning


def method(key: str) -> str:
    return METHOD_NAMES.get(key, key.replace("_", " "))


#: Plan quantities that carry a flag or a time for the program, not a figure for a reader.
_INTERNAL_QUANTITIES = frozenset({"ready_by_unix_s", "stop_open_flag"})


def figures(quantities: dict | None, units: str = "metric") -> list[str]:
    """A plan step's quantities as the notices word them ("system rate 3.8 mm/h", "fuel 1,200 L"),
    in the farm's units; internal flags are left out."""
    return [f"{quantity_label(k)} {quantity(k, v, units)}" for k, v in (quantities or {}).items()
            if k not in _INTERNAL_QUANTITIES]


def temp(value: float | None, units: str = "metric", digits: int = 1) -> str:
    if value is None or not math.isfinite(value):
        return "–"
    if units == "imperial":
        return f"{value * 9 / 5 + 32:.{digits}f} °F"
    return f"{value:.{digits}f} °C"


def temp_value(value: float, units: str) -> float:
    return value * 9 / 5 + 32 if units == "imperial" else value


def unit(units: str) -> str:
    return "°F" if units == "imperial" else "°C"


def local(t: dt.datetime | str | None, tz: str, fmt: str = "%H:%M %Z") -> str:
    if t is None:
        return "–"
    if isinstance(t, str):
        t = dt.datetime.fromisoformat(t)
    return t.astimezone(ZoneInfo(tz)).strftime(fmt)


def num(value, fmt: str = "{:.1f}") -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "–"
    return fmt.format(value)
