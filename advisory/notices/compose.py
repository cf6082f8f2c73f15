"""Compose notices: turn an :class:`advisory.assessment.Assessment` into the words a grower reads.

A :class:`BlockNotice` is a plain, JSON-able data object (every field is a
string, number, list or dict; times are ISO 8601 UTC text) holding the words
already written in the farm's units and local time, plus the numbers behind
them (``data``: the assessment itself, °C and UTC) and what the chart should
draw (``chart``).  :mod:`advisory.notices.render` lays it out as a text
message, plain text, Markdown, HTML or JSON; :mod:`advisory.notices.charts`
draws its curve.

Shape of every notice, top to bottom:

1. ``subject`` / ``headline``: the level name, the block and the one number.
2. ``lead``: two to four short lines a grower can read on a phone at night:
   the forecast low and its range, when it gets critical, what to do and when,
   the expected damage.
3. ``sections``: what it means for the buds (T10/T90, damage), the protection
   plan with local start and stop times and quantities, the data behind the
   forecast (age of the latest observation, quality flags), how recent nights
   verified.  Heat notes carry fruit, crew and hour-by-hour sections instead.
4. ``cautions`` and the ``footer`` that defers to local codes, workplace-safety
   rules and extension or licensed advice.

Updates (``Assessment.is_update``) are marked as updates to the evening notice
and list what changed against the previous assessment.

Heat details
------------
A heat assessment's ``details`` may hold any of the following (all optional;
times as datetimes or ISO text, temperatures °C); what is missing is derived
from the hourly ``curve`` where possible, or left out:

``max_time_utc``
    Time of the day's maximum.
``max_estimated`` (bool), ``max_source`` (text)
    The maximum was estimated from the morning's readings (no outlook).
``hottest_hours``
    ``{"start_utc", "stop_utc"}``.
``sunburn``
    ``{"threshold_c", "hours", "start_utc", "stop_utc", "note"}``: air
    temperature at which fruit sunburn becomes likely in full sun and the hours
    at or above it.  Flat keys ``sunburn_threshold_c`` and ``sunburn_hours``
    are read too.
``crew_windows``
    List of ``{"start_utc", "stop_utc", "label", "heat_index_max_c",
    "wbgt_max_c", "advice"}``: periods with their crew heat stress.
``safer_hours``
    List of ``{"start_utc", "stop_utc"}`` (or pairs): hours better suited to
    heavy work.
``guidance``
    List of text: rest, water and shade guidance.
``thresholds``
    ``{label: value_c}`` or a list of ``{"label", "value_c"}`` to draw on the chart.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import hashlib
import logging
import math
import re
from collections.abc import Collection
from dataclasses import dataclass, field
from functools import lru_cache
from typing import Any

from advisory import assessment as asm
from advisory.assessment import Assessment, pickle_by_fields
from advisory.crops import thresholds
from advisory.notices import words as w
from advisory.risk import cautions as caution_texts
from advisory.store import jsoncodec

log = logging.getLogger(__name__)

#: Version of the notice content layout (stored in ``Notice.content``).
SCHEMA = 1
_KEY_LIKE = re.compile(r"^[a-z0-9_]+$")

#: Cautions for heat notes (frost cautions live in :mod:`advisory.risk.cautions`).
HEAT_CAUTIONS: dict[str, tuple[str, str]] = {
    "heat_illness": (
        "Know the signs of heat illness",
        "Heavy sweating, cramps, headache, dizziness, nausea or unusual tiredness mean: stop, move "
        "to shade, drink water and cool down. Confusion, fainting, hot dry skin or a collapse is an "
        "emergency: call for help at once and cool the person while you wait.",
    ),
    "never_alone": (
        "Never work alone in the heat",
        "Work in pairs or within sight of others, agree check-ins, and give new or returning "
        "workers lighter loads for the first days while they get used to the heat.",
    ),
    "heat_plan": (
        "This note is not a heat plan",
        "It helps plan the day; it does not replace your workplace heat-illness plan, the water, "
        "shade and rest rules where you work, or the judgement of the people in the field.",
    ),
}
HEAT_ALWAYS = ("heat_illness", "never_alone", "heat_plan")

FOOTER_FROST = (
    "Decision support only. This notice is built from a forecast and can be wrong: check "
    "thermometers in the block through the night. Local codes, workplace-safety rules, equipment "
    "makers' instructions and advice from your extension service or a licensed adviser come first.")
FOOTER_HEAT = (
    "Decision support only. This note is built from a forecast and can be wrong. Local codes, "
    "workplace-safety and heat-illness rules, your workplace heat plan and advice from your "
    "extension service or a licensed adviser come first.")

#: A text message is one GSM 03.38 message: at most 160 characters of the basic set (``words.gsm_safe``).
#: Every message ends with its caution (below) and stays within this length, caution included.
SMS_MAX = 160
#: The caution that ends every frost or heat text message (block notices and farm summaries).
SMS_CAUTION_FROST = "Decision support only; block thermometers first."
SMS_CAUTION_HEAT = "Decision support only; local heat rules first."
#: Longest block name in a text message (longer names are shortened with "~").
SMS_NAME_MAX = 18


def sms_caution(kind: str) -> str:
    return SMS_CAUTION_HEAT if kind == "heat" else SMS_CAUTION_FROST


def bud_temperature_line(units: str) -> str:
    """The one line every frost notice carries: T10/T90 are bud temperatures, and where to read them.

    Under clear skies buds lose heat by radiation and run colder than the
    screen air, about 0.5-2 °C (common practice, from memory).
    """
    lo, hi = w.temp_delta(0.5, units).split(" ")[0], w.temp_delta(2.0, units)
    return (f"T10 and T90 are bud temperatures: under clear skies buds run {lo}-{hi} colder than the "
            "screen air, so read thermometers at bud height in the coldest part of the block.")


# --------------------------------------------------------------------------------------------------
# Data objects
# --------------------------------------------------------------------------------------------------

@dataclass
class Group:
    """A titled group of lines inside a section (e.g. one protection method)."""

    title: str
    tag: str = ""
    lines: list[str] = field(default_factory=list)


@dataclass
class Section:
    """One part of the notice body.

    ``key`` names the part (``changes``, ``buds``, ``plan``, ``data``,
    ``verification``, ``fruit``, ``crew``, ``hours``, ``status``); renderers
    show paragraphs, then bullet ``items``, then ``groups``, then ``table``
    (``{"header": [...], "rows": [[...], ...]}``).
    """

    key: str
    title: str
    paragraphs: list[str] = field(default_factory=list)
    items: list[str] = field(default_factory=list)
    groups: list[Group] = field(default_factory=list)
    table: dict[str, list] | None = None


@dataclass
class CautionText:
    key: str
    title: str
    text: str


@dataclass
class ChartSpec:
    """What to draw over the curve (the curve itself is ``BlockNotice.data["curve"]``).

    ``lines``: ``{"label", "value_c", "role"}`` (role ``t10``, ``t90`` or ``threshold``);
    ``windows``: ``{"label", "start_utc", "stop_utc", "role"}`` (``protect``, ``sunburn``, ``work``);
    ``marks``: ``{"label", "time_utc", "role"}`` (``sunset``, ``sunrise``, ``critical``, ``ready``, ``peak``);
    ``curves``: the extra curves of the data to draw (``wet_bulb`` when a plan starts on the wet bulb).
    Line roles also include ``start`` (the air or wet-bulb temperature at which a plan starts).
    """

    kind: str
    title: str = ""
    lines: list[dict[str, Any]] = field(default_factory=list)
    windows: list[dict[str, Any]] = field(default_factory=list)
    marks: list[dict[str, Any]] = field(default_factory=list)
    curves: list[str] = field(default_factory=list)


@dataclass
class BlockNotice:
    """One block's notice for one night (frost) or day (heat); see the module docstring."""

    key: str
    kind: str
    status: str
    farm: str
    farm_tz: str
    units: str
    block_id: int | None
    block: str
    station: str
    crop: str
    variety: str | None
    stage: str
    night: str
    revision: int
    is_update: bool
    level: str
    level_rank: int
    level_name: str
    level_meaning: str
    colour: str
    subject: str
    headline: str
    lead: list[str]
    sms: str
    sections: list[Section] = field(default_factory=list)
    cautions: list[CautionText] = field(default_factory=list)
    footer: str = ""
    changes: list[str] = field(default_factory=list)
    chart: ChartSpec | None = None
    issued_utc: str | None = None
    #: The assessment as plain data (°C, ISO 8601 UTC): the numbers for other systems and the chart.
    data: dict[str, Any] = field(default_factory=dict)
    type: str = "block"
    schema: int = SCHEMA

    def to_dict(self) -> dict[str, Any]:
        return _to_plain_dict(self)

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> BlockNotice:
        d = dict(d)
        d["sections"] = [_section_from(s) for s in d.get("sections", [])]
        d["cautions"] = [CautionText(**c) for c in d.get("cautions", [])]
        d["chart"] = ChartSpec(**d["chart"]) if d.get("chart") else None
        known = {f.name for f in dataclasses.fields(cls)}
        return cls(**{k: v for k, v in d.items() if k in known})


def _section_from(s: dict) -> Section:
    s = dict(s)
    s["groups"] = [Group(**g) for g in s.get("groups", [])]
    return Section(**s)


@dataclass
class FarmRow:
    """One block in the farm summary."""

    block: str
    block_id: int | None
    status: str
    level: str
    level_rank: int
    level_name: str
    colour: str
    low: str
    critical: str
    action: str
    kind: str = "frost"


pickle_by_fields(FarmRow)  # a large run's worker processes hand back thousands of rows


@dataclass
class FarmSummary:
    """All of a farm's blocks for one night or day, worst first, with the crew run sheet.

    ``runsheet`` holds ``rows`` (list of dicts: order, block, method, ready_by,
    start, stop, run, amounts, low) and the run sheet's own renderings
    ``text`` and ``csv`` (from :mod:`advisory.risk.runsheet`), or is empty when
    nothing needs a crew.  (The Markdown summary draws its table from ``rows``;
    ``advisory night sheet --format markdown`` renders the sheet as Markdown.)
    """

    key: str
    kind: str
    farm: str
    farm_tz: str
    units: str
    night: str
    level: str
    level_rank: int
    level_name: str
    colour: str
    subject: str
    headline: str
    lead: list[str]
    sms: str
    rows: list[FarmRow] = field(default_factory=list)
    runsheet: dict[str, Any] = field(default_factory=dict)
    cautions: list[CautionText] = field(default_factory=list)
    footer: str = ""
    data: dict[str, Any] = field(default_factory=dict)
    is_update: bool = False
    revision: int = 0
    type: str = "farm"
    schema: int = SCHEMA

    def to_dict(self) -> dict[str, Any]:
        return _to_plain_dict(self)

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> FarmSummary:
        d = dict(d)
        d["rows"] = [FarmRow(**r) for r in d.get("rows", [])]
        d["cautions"] = [CautionText(**c) for c in d.get("cautions", [])]
        known = {f.name for f in dataclasses.fields(cls)}
        return cls(**{k: v for k, v in d.items() if k in known})


def notice_from_dict(d: dict[str, Any]) -> BlockNotice | FarmSummary:
    """Rebuild a notice from ``Notice.content`` (either kind)."""
    return FarmSummary.from_dict(d) if d.get("type") == "farm" else BlockNotice.from_dict(d)


class EncodedBlockNotice(BlockNotice):
    """A block notice carried as its JSON as stored and its data's (:func:`stored_json`), with the
    few fields a run reads of every notice at hand; any other field is read from the JSON on
    first use, and is then the one the composed notice had.

    What a run's worker processes hand back: it pickles as two byte strings and a few names,
    several times faster than the notice's sections, items and chart.
    """

    #: The fields at hand without reading the JSON.
    HEAD = ("key", "kind", "status", "farm", "block_id", "block", "night", "revision", "is_update", "level",
            "level_rank", "subject", "sms")

    def __init__(self, head: tuple, stored: bytes, data: bytes):
        d = self.__dict__
        d.update(zip(self.HEAD, head, strict=True))
        d["_encoded"] = (stored, data)

    @classmethod
    def of(cls, n: BlockNotice, stored: bytes, data: bytes) -> EncodedBlockNotice:
        """``n`` carried as ``stored`` (:func:`stored_json` of it) and ``data`` (its data, encoded)."""
        return cls(tuple(getattr(n, k) for k in cls.HEAD), stored, data)

    def __getattr__(self, name: str):  # only for fields not read yet
        if name.startswith("_") or not self._read():
            raise AttributeError(name)
        return getattr(self, name)

    def _read(self) -> bool:
        """Read every field from the JSON (once); whether it was read now."""
        d = self.__dict__
        if "_encoded" not in d:
            return False
        stored, data = d.pop("_encoded")
        full = BlockNotice.from_dict({**jsoncodec.loads(stored), "data": jsoncodec.Encoded(data)})
        for f in _BLOCK_FIELDS:
            d.setdefault(f, getattr(full, f))
        d["_read"] = (stored, data)
        return True

    def __reduce__(self):
        d = self.__dict__
        return (EncodedBlockNotice, (tuple(d[k] for k in self.HEAD), *d.get("_encoded", d.get("_read"))))


class _ReadOnUse:
    """A field of :class:`EncodedBlockNotice` that has a class-level default in :class:`BlockNotice`
    (which would otherwise be found before the JSON is read)."""

    def __set_name__(self, owner, name: str):
        self.name = name

    def __get__(self, obj, owner=None):
        if obj is None:
            return getattr(BlockNotice, self.name)
        d = obj.__dict__
        if self.name not in d:
            obj._read()
        return d[self.name]


for _name in (f.name for f in dataclasses.fields(BlockNotice)):
    if _name in BlockNotice.__dict__ and _name not in EncodedBlockNotice.HEAD:
        _lazy = _ReadOnUse()
        setattr(EncodedBlockNotice, _name, _lazy)
        _lazy.__set_name__(EncodedBlockNotice, _name)


_NAMES: dict[type, tuple[str, ...]] = {}


def _plain(v):
    """JSON-able form of assessment values; same result as :func:`advisory.assessment.to_dict`, faster."""
    t = type(v)
    if t is float:
        return None if v != v else v
    if v is None or t is int or t is str or t is bool:
        return v
    if t is dt.datetime:
        return v.astimezone(dt.UTC).isoformat()
    if t is list or t is tuple:
        return [_plain(x) for x in v]
    if t is dict:
        return {k: _plain(x) for k, x in v.items()}
    if dataclasses.is_dataclass(v) and not isinstance(v, type):
        names = _NAMES.get(t)
        if names is None:
            names = _NAMES[t] = tuple(f.name for f in dataclasses.fields(v))
        return {n: _plain(getattr(v, n)) for n in names}
    return asm._encode(v)


def stored_json(n: BlockNotice | FarmSummary) -> bytes:
    """The notice as stored in ``Notice.content`` (JSON bytes); a block notice without ``data``.

    The nightly run stores a block notice's data once, as its forecast's payload
    (``Forecast.payload``), and the notice without it; ``Notice.full_content``
    joins them again.  See :func:`whole_json` for the notice whole.
    """
    if not isinstance(n, BlockNotice):
        return jsoncodec.encode(n)
    return jsoncodec.encode({f: getattr(n, f) for f in _BLOCK_FIELDS if f != "data"})


def whole_json(stored: bytes, data: bytes) -> bytes:
    """A block notice whole as JSON: :func:`stored_json` with the encoded ``data`` joined in (as its last
    field), so that a payload encoded once serves the database and the outbox."""
    return stored[:-1] + b',"data":' + data + b"}"


def json_file(stored: bytes, data: bytes) -> bytes:
    """A block notice's outbox JSON file: :func:`whole_json` and a line end (the same bytes
    whether written ahead by a large run or rendered at delivery)."""
    return whole_json(stored, data) + b"\n"


_BLOCK_FIELDS = tuple(f.name for f in dataclasses.fields(BlockNotice))


def _to_plain_dict(obj) -> dict[str, Any]:
    """A notice dataclass as a dict; ``data`` (already plain) is shared, not copied."""
    out = {}
    for f in dataclasses.fields(obj):
        v = getattr(obj, f.name)
        out[f.name] = v if f.name == "data" else _plain(v)
    return out


# --------------------------------------------------------------------------------------------------
# Keys
# --------------------------------------------------------------------------------------------------

def notice_key(kind: str, farm: str, block_id: int | None, night, revision: int) -> str:
    """The idempotency key of a notice: the same inputs always give the same key.

    Parameters
    ----------
    kind : str
        "frost" or "heat" (a farm summary: the same kind, or e.g. "frost-summary", with ``block_id`` None).
    farm : str
        Farm name (any text; a short hash keeps similar names apart).
    block_id : int or None
        Block id; None for the farm summary.
    night : datetime.date or str
        Local date of the evening (frost) or of the day (heat).
    revision : int
        0 for the evening (morning) notice, then 1, 2 ... for updates.

    Returns
    -------
    str
        e.g. ``frost:quillback-ridge-orchards-3f2a9c1d:b12:2026-04-06:r0`` (at most 110 characters).
    """
    night_s = night.isoformat() if isinstance(night, dt.date) else str(night)
    who = "farm" if block_id is None else f"b{int(block_id)}"
    return f"{w.slug(kind, 20)}:{_farm_key(farm)}:{who}:{night_s}:r{int(revision)}"


@lru_cache(maxsize=4096)
def _farm_key(farm: str) -> str:
    """The farm's part of a notice key: its name as a slug and a short hash of the name."""
    return f"{w.slug(farm, 40, 'farm')}-{hashlib.sha256(farm.encode('utf-8')).hexdigest()[:8]}"


# --------------------------------------------------------------------------------------------------
# Helpers
# --------------------------------------------------------------------------------------------------

class _Fmt:
    """Formatting bound to one farm's zone and units (one per zone and units: see :func:`_fmt`)."""

    def __init__(self, tz: str, units: str):
        self.tz, self.units = tz, units
        self.imp = w.imperial(units)
        self.unit = w.temp_unit(units)
        self._clocks: dict = {}  # instant -> clock text, in this zone

    def t(self, c):
        """Same as :func:`words.temp` (kept in step by the tests), without re-reading the units each time."""
        if not _finite(c):
            return "n/a"
        s = f"{c * 1.8 + 32.0 if self.imp else c:.1f}"
        return f"{'0.0' if s == '-0.0' else s} {self.unit}"

    def rng(self, lo, hi):
        return w.temp_range(lo, hi, self.units)

    def d(self, c, signed=False):
        return w.temp_delta(c, self.units, signed=signed)

    def clock(self, t):
        """Same as :func:`words.clock` in this zone (a night's notices repeat the same instants)."""
        try:
            return self._clocks[t]
        except KeyError:
            if len(self._clocks) > 20_000:
                self._clocks.clear()
            s = self._clocks[t] = w.clock(t, self.tz)
            return s
        except TypeError:  # unhashable
            return w.clock(t, self.tz)

    def when(self, t):
        return w.when(t, self.tz)


@lru_cache(maxsize=64)
def _fmt(tz: str, units: str) -> _Fmt:
    return _Fmt(tz, units)


def _finite(x) -> bool:
    if type(x) is float:
        return x - x == 0.0          # False for NaN and ±inf
    return isinstance(x, int | float) and not isinstance(x, bool) and math.isfinite(x)


def _curve_extreme(a: Assessment, lowest: bool):
    pts = [p for p in a.curve if _finite(p.p50_c)]
    if not pts:
        return None, None
    p = min(pts, key=lambda q: q.p50_c) if lowest else max(pts, key=lambda q: q.p50_c)
    return p.time_utc, p.p50_c


def _steps(a: Assessment):
    advised = [s for s in a.plan if s.advised and s.method != "none"]
    none_advised = any(s.advised and s.method == "none" for s in a.plan)
    return advised, none_advised


def _sms(parts: list[tuple], caution: str = SMS_CAUTION_FROST) -> str:
    """Join parts (text, keep) into one text message of at most :data:`SMS_MAX` GSM characters,
    ending with ``caution``.

    ``keep`` is True for a part that must stay; otherwise False or a number:
    optional parts are dropped, lowest ``keep`` first (the later one of equal
    ones), until the message fits; then the text before the caution is cut.
    A part given as (text, keep, short) is shortened to ``short`` (which then
    stays) instead of dropped.  The caution is never cut.
    """
    shorts = {i: w.gsm_safe(p[2]) for i, p in enumerate(parts) if len(p) > 2 and p[0]}
    parts = [(w.gsm_safe(p[0]), p[1], i) for i, p in enumerate(parts) if p[0]]
    tail = w.gsm_safe(caution)
    room = SMS_MAX - len(tail) - 1
    while True:
        text = " ".join(t for t, _, _ in parts)
        if len(text) <= room:
            return f"{text} {tail}"
        opt = [(int(keep), -i) for i, (_, keep, _) in enumerate(parts) if keep is not True]
        if not opt:
            return text[: room - 3].rstrip() + "... " + tail
        i = -min(opt)[1]
        orig = parts[i][2]
        if orig in shorts:
            parts[i] = (shorts[orig], True, orig)
        else:
            parts.pop(i)


def _short_name(name: str, n: int = 28, mark: str = "~") -> str:
    return name if len(name) <= n else name[: n - 1].rstrip() + mark


def _caution_list(keys: list[str]) -> list[CautionText]:
    """Caution keys (or literal texts) to caution texts, known keys first in their fixed order.

    Keys come from :mod:`advisory.risk.cautions` or :data:`HEAT_CAUTIONS`; an
    unknown key is logged and left out; any other text is shown as written.
    """
    out: list[CautionText] = []
    seen = set()
    known = [c for c in caution_texts.ordered(keys)]
    for c in known:
        out.append(CautionText(c.key, c.title, c.text))
        seen.add(c.key)
    for k in keys:
        if k in seen:
            continue
        seen.add(k)
        if k in HEAT_CAUTIONS:
            title, text = HEAT_CAUTIONS[k]
            out.append(CautionText(k, title, text))
        elif k not in caution_texts.CAUTIONS:
            if _KEY_LIKE.match(str(k)):
                log.warning("unknown caution key %r left out of the notice", k)
            else:
                out.append(CautionText("note", "", str(k)))
    return out


def _time_pair(x):
    """(start, stop) from a dict with start_utc/stop_utc or a 2-sequence."""
    if isinstance(x, dict):
        return w.parse_time(x.get("start_utc") or x.get("start")), w.parse_time(x.get("stop_utc") or x.get("stop")
                                                                                or x.get("end_utc"))
    if isinstance(x, list | tuple) and len(x) == 2:
        return w.parse_time(x[0]), w.parse_time(x[1])
    return None, None


def _hours_window(points, cond):
    """First..last time (UTC) of the hours where ``cond(point)`` holds, and how many hours."""
    hit = [p for p in points if cond(p)]
    if not hit:
        return None, None, 0.0
    step_h = 1.0
    if len(points) > 1:
        step_h = max((points[1].time_utc - points[0].time_utc).total_seconds() / 3600.0, 1e-6)
    return hit[0].time_utc, hit[-1].time_utc, len(hit) * step_h


# --------------------------------------------------------------------------------------------------
# Sections shared by frost and heat
# --------------------------------------------------------------------------------------------------

def _rules(a: Assessment, s, f: _Fmt) -> tuple[str, str]:
    """Start and stop rules; rewritten from the numbers for a farm in °F (the plan's texts are in °C)."""
    start, stop = s.start_rule, s.stop_rule
    if not w.imperial(f.units) or a.kind == "heat":
        return start, stop
    q = s.quantities or {}
    wb, air = q.get("start_wet_bulb_c"), q.get("start_air_temp_c")
    crit = (a.details or {}).get("critical_c", a.t10_c)
    if _finite(wb):
        start = f"when the wet bulb falls to {f.t(wb)}" + (
            f" (air about {f.t(air)} at the forecast dew point)" if _finite(air) else "")
    elif _finite(air):
        start = f"when the air falls to {f.t(air)}"
    if s.method == "overtree_sprinkler" and _finite(crit):
        stop = f"after sunrise, once the wet bulb is above {f.t(crit)} and the ice is melting; never earlier"
    elif _finite(air):
        stop = f"after sunrise, once the air is back above {f.t(air)}"
    return start, stop


#: Quantities shown for a method that is not advised (they explain why).
_ADEQUACY_KEYS = ("rate_needed_mm_h", "required_rate_mm_h", "rate_available_mm_h", "rate_mm_h", "inversion_c")
#: How the plan's note on a wind machine's inversion begins (``risk.frost``).
_INVERSION_NOTE = "Inversion "


def _plan_section(a: Assessment, f: _Fmt) -> Section:
    sec = Section("plan", "Protection plan" if a.kind != "heat" else "Cooling plan")
    if not a.plan:
        sec.paragraphs.append("No protection equipment is recorded for this block.")
        return sec
    order = sorted(a.plan, key=lambda s: (not s.advised, s.method == "none"))
    has_equipment = any(s.method != "none" for s in a.plan)
    for s in order:
        if s.method == "none":
            title = "No usable protection" if has_equipment else w.method_name("none").capitalize()
            g = Group(title, "AT RISK" if s.advised else "")
            if has_equipment:  # each method's own group says why (its note would say it twice)
                g.lines.append("None of the equipment recorded for this block can be used tonight; "
                               "why, method by method, below.")
            else:
                g.lines.extend(s.notes)
            sec.groups.append(g)
            continue
        ready = w.parse_time(getattr(s, "ready_by_utc", None))
        started = getattr(s, "started_utc", None)
        if s.advised and started is not None:
            tag = "KEEP RUNNING"
        elif s.advised and s.start_utc is not None:
            tag = "RUN"
        elif s.advised:
            tag = "BE READY"
        else:
            tag = "not advised"
        g = Group(w.method_name(s.method).capitalize(), tag)
        start_rule, stop_rule = _rules(a, s, f)
        q = {k: v for k, v in (s.quantities or {}).items()
             if k not in ("start_air_temp_c", "start_wet_bulb_c") and v is not None}
        if any(n.startswith(_INVERSION_NOTE) for n in s.notes):
            q.pop("inversion_c", None)  # the note gives it, and says whether it was measured or estimated
        if not s.advised:
            # Why not, and the figures that say so; no times, amounts or run instructions ("keep running
            # until ...") that could read as an order for a method the plan does not advise.
            g.lines.extend(n for n in s.notes if "keep running" not in n.lower())
            q = {k: v for k, v in q.items() if k in _ADEQUACY_KEYS}
            if q:
                g.lines.append("; ".join(f"{w.quantity_label(k)} {w.quantity(k, v, f.units)}" for k, v in q.items()))
            # No start rule either: for a method ruled out tonight it would read as an instruction.
            sec.groups.append(g)
            continue
        if started is not None:
            g.lines.append(f"Running since {f.clock(started)} (started on an earlier notice of the night)")
        elif s.start_utc is not None:
            g.lines.append(f"Start {f.clock(s.start_utc)}" + (f", {start_rule}" if start_rule else ""))
            if ready is not None and ready < s.start_utc:
                g.lines.append(f"Be ready by {f.clock(ready)}: that is when it starts if the night runs colder")
        elif ready is not None:
            g.lines.append(f"Only if colder than forecast: start about {f.clock(ready)}"
                           + (f", {start_rule}" if start_rule else ""))
        elif start_rule:
            g.lines.append(f"Start {start_rule}")
        if s.stop_utc is not None:
            open_ = bool(getattr(s, "stop_open", False))
            g.lines.append(f"Stop {'not before' if open_ else 'about'} {f.clock(s.stop_utc)}"
                           + (f", {stop_rule}" if stop_rule else ""))
        elif stop_rule:
            g.lines.append(f"Stop {stop_rule}")
        if q:
            g.lines.append("; ".join(f"{w.quantity_label(k)} {w.quantity(k, v, f.units)}" for k, v in q.items()))
        if s.estimated:
            g.lines.append("Some inputs are estimates (no direct measurement); check in the block.")
        g.lines.extend(s.notes)
        sec.groups.append(g)
    return sec


def _data_section(a: Assessment, f: _Fmt) -> Section:
    sec = Section("data", "Data behind this notice")
    dq = a.data_quality or {}
    run = "evening run" if a.kind != "heat" else "morning run"
    if a.reference_time_utc:
        sec.items.append(f"Issued {f.when(a.reference_time_utc)} ({'update ' + str(a.revision) if a.is_update else run})")
    latest = dq.get("latest_obs_utc")
    age_min = dq.get("obs_age_min")
    if latest or _finite(age_min):
        s = "Latest observation: " + (f.when(latest) if latest else "time unknown")
        if _finite(age_min):
            s += f", {w.age(age_min)} old at the run"
        sec.items.append(s)
    sec.items.append(f"Station: {a.station}")
    flags = dq.get("flags")
    if isinstance(flags, dict):
        flags = [f"{k}: {v}" for k, v in flags.items()]
    if flags:
        sec.items.append("Quality flags: " + "; ".join(str(x) for x in flags))
    elif dq:
        sec.items.append("Quality flags: none")
    state = {k: v for k, v in dq.items()
             if k not in ("latest_obs_utc", "obs_age_min", "flags") and _finite(v)}
    if state:
        sec.items.append(("Evening readings: " if a.kind != "heat" else "Morning readings: ")
                         + ", ".join(f"{w.quantity_label(k)} {w.quantity(k, v, f.units)}" for k, v in state.items()))
    if a.model:
        sec.items.append(_model_line(a))
    outlook = (a.details or {}).get("night_outlook") if a.kind != "heat" else None
    if isinstance(outlook, str) and outlook.strip():
        sec.items.append(_one_line(outlook))
    curve_model = (a.details or {}).get("curve_model") if a.kind == "heat" else None
    if isinstance(curve_model, str) and curve_model.strip():
        sec.items.append("Hourly curve: " + _one_line(curve_model))
    if a.sunset_utc or a.sunrise_utc:
        parts = []
        if a.sunset_utc:
            parts.append(f"sunset {f.clock(a.sunset_utc)}")
        if a.sunrise_utc:
            parts.append(f"sunrise {f.clock(a.sunrise_utc)}")
        sec.items.append("Sun: " + ", ".join(parts))
    return sec


def _model_line(a: Assessment) -> str:
    """What the forecast rests on, in words (a physical model is not "fitted")."""
    n = int(a.training_nights or 0)
    unit = "days" if a.kind == "heat" else "nights"
    if a.kind != "heat" and a.model == "physical":
        if n:
            return (f"Model: physical cooling model, its spread learned from {n} {unit} at this station "
                    "(too few yet for a calibration of its own)")
        return "Model: physical cooling model (no checked nights at this station yet)"
    if a.kind != "heat" and a.model == "calibrated":
        return f"Model: calibrated on {n} {unit} at this station"
    return f"Model: {a.model}" + (f", fitted on {n} {unit} at this station" if n else "")


def _verification_section(a: Assessment, f: _Fmt) -> Section | None:
    rows = [r for r in (a.verification or []) if isinstance(r, dict)]
    if not rows:
        return None
    rows = sorted(rows, key=lambda r: str(r.get("night", "")))[-5:]
    what = "low" if a.kind != "heat" else "high"
    sec = Section("verification", "How recent forecasts verified here")
    errs = []
    table_rows = []
    for r in rows:
        fc, ob, er = r.get("forecast_c"), r.get("observed_c"), r.get("error_c")
        if not _finite(er) and _finite(fc) and _finite(ob):
            er = fc - ob
        if _finite(er):
            errs.append(er)
        table_rows.append([w.short_day(str(r.get("night", ""))), f.t(fc) if _finite(fc) else "n/a",
                           f.t(ob) if _finite(ob) else "n/a", f.d(er, signed=True) if _finite(er) else "n/a"])
    sec.table = {"header": ["Night" if a.kind != "heat" else "Day", f"Forecast {what}", "Observed",
                            "Forecast minus observed"], "rows": table_rows}
    if errs:
        mae = sum(abs(e) for e in errs) / len(errs)
        bias = sum(errs) / len(errs)
        lean = "about right on average"
        if bias >= 0.3:
            lean = f"too warm by {f.d(bias)} on average"
        elif bias <= -0.3:
            lean = f"too cold by {f.d(-bias)} on average"
        sec.paragraphs.append(f"Last {len(errs)} {'nights' if a.kind != 'heat' else 'days'}: typical miss "
                              f"{f.d(mae)}; forecasts ran {lean}.")
    return sec


# --------------------------------------------------------------------------------------------------
# Frost
# --------------------------------------------------------------------------------------------------

def _frost(a: Assessment, f: _Fmt, name: str):
    d = a.details or {}
    t_min = w.parse_time(d.get("time_of_min_utc")) or _curve_extreme(a, lowest=True)[0]
    advised, none_advised = _steps(a)
    lead: list[str] = []
    if _finite(a.p50_c):
        s = f"Low {f.t(a.p50_c)}" + (f" around {f.clock(t_min)}" if t_min else "")
        if _finite(a.p10_c) and _finite(a.p90_c):
            s += f" (8 in 10 chance: {f.rng(a.p10_c, a.p90_c)})"
        lead.append(s + ".")
    stage = a.stage
    if _finite(a.t10_c):
        # The critical time is when the middle forecast reaches T10 itself (protection starts earlier).
        if a.critical_time_utc:
            s = f"Critical for {stage} buds ({f.t(a.t10_c)}) reached at {f.clock(a.critical_time_utc)}"
            if _finite(a.hours_below_t10) and a.hours_below_t10 > 0:
                s += f", about {w.hours(a.hours_below_t10)} at or below it"
            lead.append(s + ".")
        elif _finite(a.p10_c) and a.p10_c <= a.t10_c:
            lead.append(f"Critical for {stage} buds ({f.t(a.t10_c)}) not reached on the middle forecast; "
                        "the cold end of the range goes below it.")
        else:
            lead.append(f"Critical for {stage} buds ({f.t(a.t10_c)}) not reached.")
    actions = []
    for s in advised:
        m = w.method_name(s.method)
        ready = w.parse_time(getattr(s, "ready_by_utc", None))
        started = getattr(s, "started_utc", None)
        if started is not None:  # under way since an earlier notice
            txt = f"Keep {m} running (started {f.clock(started)})"
            if s.stop_utc is not None:
                txt += f", stop {'not before' if s.stop_open else 'about'} {f.clock(s.stop_utc)}"
            actions.append(txt)
        elif s.start_utc is not None:
            txt = f"Start {m} at {f.clock(s.start_utc)}"
            if ready is not None and ready < s.start_utc:
                txt += f" (ready by {f.clock(ready)} in case it runs colder)"
            if s.stop_utc is not None:
                open_ = bool(getattr(s, "stop_open", False))
                txt += f", stop {'not before' if open_ else 'about'} {f.clock(s.stop_utc)}"
            actions.append(txt)
        elif ready is not None:
            actions.append(f"Have {m} ready by {f.clock(ready)}; start only if it gets colder than forecast")
        else:
            actions.append(f"Have {m} ready" + (f"; start {s.start_rule}" if s.start_rule else ""))
    if actions:
        lead.append(". ".join(actions) + ".")
    elif none_advised:
        lead.append("No usable protection on this block tonight: check the buds, call your adviser tonight "
                    "and record the stage.")
    elif a.level_rank >= 2:
        lead.append("No protection run advised on the middle forecast; have it ready and check thermometers.")
    elif a.level_rank == 1:
        lead.append("No protection needed on this forecast; check a thermometer late in the night.")
    else:
        lead.append("No protection needed tonight.")
    if _finite(a.expected_kill_pct) and (a.level_rank >= 1 or a.expected_kill_pct >= 0.5):
        s = f"Expected bud loss {w.pct(a.expected_kill_pct / 100.0)}"
        if _finite(a.p_kill_ge_10pct):
            s += f"; chance of losing 10 % or more: {w.pct(a.p_kill_ge_10pct)}"
        lead.append(s + ".")

    # headline, subject, text message
    core = f"{a.block}: low {f.t(a.p50_c)}" if _finite(a.p50_c) else a.block
    if a.critical_time_utc:
        core += f", critical at {f.clock(a.critical_time_utc)}"
    elif _finite(a.p50_c) and _finite(a.t10_c):
        core += ", critical not reached"
    sms_parts: list[tuple] = [
        (f"{name} - {_short_name(a.block, SMS_NAME_MAX, '.')} {w.short_day(a.night)}:", True)]
    if _finite(a.p50_c):
        low = f"low {w.temp(a.p50_c, f.units, ascii_only=True)}"
        if _finite(a.p10_c) and _finite(a.p90_c):  # shortened to the low alone first when space is short
            sms_parts.append((f"{low} ({w.temp_range(a.p10_c, a.p90_c, f.units, ascii_only=True)}).", 1,
                              f"{low}."))
        else:
            sms_parts.append((f"{low}.", True))
    for s in advised:  # what to do must stay
        if s.start_utc is not None:
            stop = f"-{f.clock(s.stop_utc)}" if s.stop_utc else f" {f.clock(s.start_utc)[6:]}"
            on = " on since " if getattr(s, "started_utc", None) is not None else " "
            sms_parts.append((f"{w.method_name(s.method).capitalize()}{on}{f.clock(s.start_utc)[:5]}{stop}.", True))
    if none_advised:
        sms_parts.append(("Check buds; call adviser tonight.", True))
    if a.critical_time_utc:  # when the air reaches T10, kept before the range when space is short
        sms_parts.append((f"Critical at {f.clock(a.critical_time_utc)[:5]}.", 2))

    # body
    sections = []
    buds = Section("buds", "What it means for the buds")
    if _finite(a.t10_c) and _finite(a.t90_c):
        crop = w.crop_name(a.crop) + (f" ({a.variety})" if a.variety else "")
        buds.paragraphs.append(
            f"{crop[:1].upper() + crop[1:]} at {stage}: about 10 % of buds die after half an hour at {f.t(a.t10_c)} "
            f"(T10) and 90 % at {f.t(a.t90_c)} (T90).")
    if _finite(a.expected_kill_pct):
        buds.items.append(f"Expected bud loss: {w.pct(a.expected_kill_pct / 100.0)}")
    if _finite(a.p_kill_ge_10pct):
        buds.items.append(f"Chance of losing 10 % of buds or more: {w.pct(a.p_kill_ge_10pct)}")
    if _finite(d.get("p_kill_ge_90pct")):
        buds.items.append(f"Chance of losing 90 % or more: {w.pct(d['p_kill_ge_90pct'])}")
    if _finite(a.p_below_t10):
        s = f"Chance the low reaches T10: {w.pct(a.p_below_t10)}"
        if _finite(a.p_below_t90):
            s += f"; reaches T90: {w.pct(a.p_below_t90)}"
        buds.items.append(s)
    if _finite(a.hours_below_t10):
        s = f"Time at or below T10: {w.hours(a.hours_below_t10)} on the middle forecast"
        if _finite(d.get("hours_below_t10_cold")):
            s += f", {w.hours(d['hours_below_t10_cold'])} if colder"
        buds.items.append(s)
    buds.paragraphs.append(bud_temperature_line(f.units))
    if a.critical_source:
        buds.items.append(f"Critical temperatures: {a.critical_source}")
    other_family = thresholds.cultivar_note(a.crop, a.variety, a.critical_source)
    if other_family:
        buds.paragraphs.append(other_family)
    sections.append(buds)
    sections.append(_plan_section(a, f))
    sections.append(_data_section(a, f))
    ver = _verification_section(a, f)
    if ver:
        sections.append(ver)

    chart = ChartSpec("frost", f"{a.block}: night of {w.day(a.night)}")
    if _finite(a.t10_c):
        chart.lines.append({"label": f"T10 {f.t(a.t10_c)}", "value_c": a.t10_c, "role": "t10"})
    if _finite(a.t90_c):
        chart.lines.append({"label": f"T90 {f.t(a.t90_c)}", "value_c": a.t90_c, "role": "t90"})
    for s in advised:
        q = s.quantities or {}
        wb_start = q.get("start_wet_bulb_c")
        if _finite(wb_start):
            chart.curves.append("wet_bulb")  # the wet bulb is drawn only where a plan starts on it
            chart.lines.append({"label": f"start: wet bulb {f.t(wb_start)}",
                                "value_c": wb_start, "role": "start"})
        elif _finite(q.get("start_air_temp_c")):
            chart.lines.append({"label": f"start: air {f.t(q['start_air_temp_c'])}",
                                "value_c": q["start_air_temp_c"], "role": "start"})
        if s.start_utc is not None:
            chart.windows.append({"label": w.method_name(s.method), "start_utc": w.iso(s.start_utc),
                                  "stop_utc": w.iso(s.stop_utc or a.sunrise_utc or s.start_utc), "role": "protect"})
        ready = w.parse_time(getattr(s, "ready_by_utc", None))
        if ready is not None and (s.start_utc is None or ready < s.start_utc):
            chart.marks.append({"label": f"ready by {f.clock(ready)[:5]}", "time_utc": w.iso(ready), "role": "ready"})
    chart.curves = list(dict.fromkeys(chart.curves))
    if a.critical_time_utc:
        chart.marks.append({"label": f"air at T10 {f.clock(a.critical_time_utc)[:5]}",
                            "time_utc": w.iso(a.critical_time_utc), "role": "critical"})
    if a.sunset_utc:
        chart.marks.append({"label": f"sunset {f.clock(a.sunset_utc)}", "time_utc": w.iso(a.sunset_utc),
                            "role": "sunset"})
    if a.sunrise_utc:
        chart.marks.append({"label": f"sunrise {f.clock(a.sunrise_utc)}", "time_utc": w.iso(a.sunrise_utc),
                            "role": "sunrise"})

    keys = list(a.cautions or [])
    if not keys and (advised or none_advised):
        for s in a.plan:
            if s.advised:
                keys.extend(caution_texts.cautions_for_method(s.method))
    if keys and (advised or none_advised or a.level_rank >= 2):
        keys.extend(caution_texts.ALWAYS)
    return core, lead, sms_parts, sections, chart, keys


# --------------------------------------------------------------------------------------------------
# Heat
# --------------------------------------------------------------------------------------------------

def _heat(a: Assessment, f: _Fmt, name: str):
    d = a.details or {}
    pts = [p for p in a.curve if _finite(p.p50_c)]
    t_max, v_max = _curve_extreme(a, lowest=False)
    t_max = w.parse_time(d.get("max_time_utc")) or t_max
    lead: list[str] = []
    if _finite(a.p50_c):
        s = f"High {f.t(a.p50_c)}" + (f" around {f.clock(t_max)}" if t_max else "")
        if _finite(a.p10_c) and _finite(a.p90_c):
            s += f" (8 in 10 chance: {f.rng(a.p10_c, a.p90_c)})"
        s += "."
        if d.get("max_estimated"):
            s += " Estimated from this morning's readings (no outlook entered)."
        lead.append(s)

    # fruit
    fruit = Section("fruit", "Fruit")
    sb = d.get("sunburn") if isinstance(d.get("sunburn"), dict) else {}
    thr = sb.get("threshold_c", d.get("sunburn_threshold_c"))
    sb_hours = sb.get("hours", d.get("sunburn_hours"))
    sb_start, sb_stop = _time_pair(sb)
    if _finite(thr) and pts and (sb_start is None or not _finite(sb_hours)):
        s0, s1, h = _hours_window(pts, lambda p: p.p50_c >= thr)
        sb_start, sb_stop = sb_start or s0, sb_stop or s1
        sb_hours = sb_hours if _finite(sb_hours) else h
    hot_start, hot_stop = _time_pair(d.get("hottest_hours") or {})
    if hot_start is None and pts and _finite(v_max):
        hot_start, hot_stop, _ = _hours_window(pts, lambda p: p.p50_c >= v_max - 1.0)
    if _finite(sb_hours) and sb_hours > 0:
        s = f"Fruit sunburn risk for about {w.hours(sb_hours)}"
        if sb_start and sb_stop:
            s += f" ({f.clock(sb_start)} to {f.clock(sb_stop)})"
        if _finite(thr):
            s += f", air at or above {f.t(thr)}"
        lead.append(s + ".")
        fruit.paragraphs.append(s + " in full sun on exposed fruit.")
    elif _finite(thr):
        lead.append(f"Air stays below the fruit sunburn threshold of {f.t(thr)}.")
        fruit.paragraphs.append(f"The air is not forecast to reach {f.t(thr)}, where sunburn on exposed fruit "
                                "becomes likely in full sun.")
    if hot_start and hot_stop:
        fruit.items.append(f"Hottest hours: {f.clock(hot_start)} to {f.clock(hot_stop)}")
    if sb.get("note"):
        fruit.items.append(str(sb["note"]))

    # crew
    crew = Section("crew", "Crews")
    safer = [_time_pair(x) for x in (d.get("safer_hours") or [])]
    safer = [(s0, s1) for s0, s1 in safer if s0 and s1]
    windows = [x for x in (d.get("crew_windows") or []) if isinstance(x, dict)]
    if safer:
        spans = ", ".join(f"{f.clock(s0)} to {f.clock(s1)}" for s0, s1 in safer)
        lead.append(f"Heavy work: best {spans}, still with rest in shade each hour.")
        crew.paragraphs.append(f"Hours better suited to heavy work: {spans}.")
    rows = []
    for x in windows:
        s0, s1 = _time_pair(x)
        rows.append([f"{f.clock(s0)} to {f.clock(s1)}" if s0 and s1 else "n/a",
                     str(x.get("label", "")),
                     f.t(x["heat_index_max_c"]) if _finite(x.get("heat_index_max_c")) else "n/a",
                     f.t(x["wbgt_max_c"]) if _finite(x.get("wbgt_max_c")) else "n/a",
                     str(x.get("advice", ""))])
    if rows:
        crew.table = {"header": ["Hours", "Heat stress", "Heat index up to", "WBGT up to", "What to do"],
                      "rows": rows}
    hi_pts = [p for p in pts if _finite(p.heat_index_c)]
    wb_pts = [p for p in pts if _finite(p.wbgt_c)]
    if hi_pts:
        p = max(hi_pts, key=lambda q: q.heat_index_c)
        crew.items.append(f"Heat index peaks at {f.t(p.heat_index_c)} around {f.clock(p.time_utc)}")
        if not safer and not windows:
            lead.append(f"Crew heat index peaks at {f.t(p.heat_index_c)} around {f.clock(p.time_utc)}.")
    if wb_pts:
        p = max(wb_pts, key=lambda q: q.wbgt_c)
        crew.items.append(f"Wet-bulb globe temperature (estimate) peaks at {f.t(p.wbgt_c)} around "
                          f"{f.clock(p.time_utc)}")
    for g in d.get("guidance") or []:
        crew.items.append(str(g))

    advised, _ = _steps(a)
    for s in advised:
        if s.start_utc is not None:
            stop = f", stop about {f.clock(s.stop_utc)}" if s.stop_utc else ""
            lead.append(f"Start {w.method_name(s.method)} at {f.clock(s.start_utc)}{stop}.")

    # hour by hour
    hours_sec = None
    if pts:
        day_pts = [p for p in pts if (not a.sunrise_utc or p.time_utc >= a.sunrise_utc)
                   and (not a.sunset_utc or p.time_utc <= a.sunset_utc)] or pts
        header = ["Time", "Air"]
        has_hi, has_wb = any(_finite(p.heat_index_c) for p in day_pts), any(_finite(p.wbgt_c) for p in day_pts)
        if has_hi:
            header.append("Heat index")
        if has_wb:
            header.append("WBGT")
        trows = []
        for p in day_pts[:24]:
            r = [f.clock(p.time_utc), f.t(p.p50_c)]
            if has_hi:
                r.append(f.t(p.heat_index_c) if _finite(p.heat_index_c) else "n/a")
            if has_wb:
                r.append(f.t(p.wbgt_c) if _finite(p.wbgt_c) else "n/a")
            trows.append(r)
        hours_sec = Section("hours", "Hour by hour", table={"header": header, "rows": trows})

    core = f"{a.block}: high {f.t(a.p50_c)}" if _finite(a.p50_c) else a.block
    if hot_start and hot_stop:
        core += f", hottest {f.clock(hot_start)[:5]}-{f.clock(hot_stop)}"
    sms_parts: list[tuple] = [
        (f"{name} - {_short_name(a.block, SMS_NAME_MAX, '.')} {w.short_day(a.night)}:", True)]
    if _finite(a.p50_c):
        sms_parts.append((f"high {w.temp(a.p50_c, f.units, ascii_only=True)}"
                          + (f" at {f.clock(t_max)}" if t_max else "") + ".", True))
    if _finite(sb_hours) and sb_hours > 0:
        sms_parts.append((f"Sunburn risk {sb_hours:.0f} h.", 2))
    if safer:
        sms_parts.append((f"Heavy work best {f.clock(safer[0][0])[:5]}-{f.clock(safer[0][1])}.", 3))
    sms_parts.append(("Water, shade, rest; never alone.", 1))

    sections = []
    if fruit.paragraphs or fruit.items:
        sections.append(fruit)
    if crew.paragraphs or crew.items or crew.table:
        sections.append(crew)
    if hours_sec:
        sections.append(hours_sec)
    if a.plan:
        sections.append(_plan_section(a, f))
    sections.append(_data_section(a, f))
    ver = _verification_section(a, f)
    if ver:
        sections.append(ver)

    chart = ChartSpec("heat", f"{a.block}: {w.day(a.night)}")
    if _finite(thr):
        chart.lines.append({"label": f"sunburn {f.t(thr)}", "value_c": thr, "role": "threshold"})
    th = d.get("thresholds")
    if isinstance(th, dict):
        th = [{"label": k, "value_c": v} for k, v in th.items()]
    for x in th or []:
        if isinstance(x, dict) and _finite(x.get("value_c")):
            chart.lines.append({"label": f"{x.get('label', '')} {f.t(x['value_c'])}".strip(),
                                "value_c": x["value_c"], "role": "threshold"})
    if sb_start and sb_stop and _finite(sb_hours) and sb_hours > 0:
        chart.windows.append({"label": "sunburn risk", "start_utc": w.iso(sb_start), "stop_utc": w.iso(sb_stop),
                              "role": "sunburn"})
    for s0, s1 in safer:
        chart.windows.append({"label": "heavy work", "start_utc": w.iso(s0), "stop_utc": w.iso(s1), "role": "work"})
    if a.sunrise_utc:
        chart.marks.append({"label": f"sunrise {f.clock(a.sunrise_utc)}", "time_utc": w.iso(a.sunrise_utc),
                            "role": "sunrise"})
    if a.sunset_utc:
        chart.marks.append({"label": f"sunset {f.clock(a.sunset_utc)}", "time_utc": w.iso(a.sunset_utc),
                            "role": "sunset"})

    # The heat model's own caution texts when it gives them (they cover illness signs, working in pairs
    # and the workplace heat plan); otherwise ours.
    keys = list(a.cautions) if a.cautions else list(HEAT_ALWAYS)
    for s in advised:
        keys.extend(caution_texts.METHOD_CAUTIONS.get(s.method, ()))
    return core, lead, sms_parts, sections, chart, keys


# --------------------------------------------------------------------------------------------------
# No result: station silent, no night, missed run
# --------------------------------------------------------------------------------------------------

def _status(a: Assessment, f: _Fmt, name: str):
    dq = a.data_quality or {}
    heat = a.kind == "heat"
    when_txt = "today" if heat else "tonight"
    lead: list[str] = []
    if a.status == asm.STATUS_NO_FORECAST:
        latest = dq.get("latest_obs_utc")
        if latest:
            first = f"No forecast {when_txt}: station {a.station} silent since {f.when(latest)}."
        else:  # the reason may begin with the same words (advisory.runs.frost_assess._silence_reason)
            why = re.sub(r"(?i)^no forecast (tonight|today):\s*", "", a.reason or "").rstrip(".")
            first = f"No forecast {when_txt}: " + (why + "." if why else f"no usable data from station {a.station}.")
        core = f"{a.block}: no forecast {when_txt}"
        lead.append(first)
        if latest and a.reason:
            why = re.sub(r"(?i)^no forecast (tonight|today):\s*", "", a.reason).rstrip(".")
            lead.append(f"Reason: {why}.")
        next_step = ("Check the station, its power and its data feed; the next run uses new readings "
                     "as soon as they arrive.")
    elif a.status == asm.STATUS_MISSED:
        what = "morning heat run" if heat else "evening run"
        first = f"The {what} for {'' if heat else 'the night of '}{w.day(a.night)} was missed"
        first += f": {a.reason.rstrip('.')}." if a.reason else "."
        core = f"{a.block}: {what} missed"
        lead.append(first)
        next_step = "No forecast went out in time. The next scheduled run will try again."
    elif a.status == asm.STATUS_NO_NIGHT:
        if heat:
            first = f"No heat note for {w.day(a.night)}: the sun does not rise here."
        else:
            first = f"No frost forecast for the night of {w.day(a.night)}: the sun does not set here."
        core = f"{a.block}: no {'day' if heat else 'night'} to forecast"
        lead.append(first)
        if a.reason:
            lead.append(a.reason.rstrip(".") + ".")
        next_step = ""
    else:
        first = f"No forecast: {a.reason or a.status}."
        core = f"{a.block}: no forecast"
        lead.append(first)
        next_step = ""
    running = [s for s in a.plan if s.advised and getattr(s, "started_utc", None) is not None]
    for s in running:  # protection under way since an earlier notice (advisory.risk.continuity)
        lead.append(f"Keep {w.method_name(s.method)} running (started {f.clock(s.started_utc)})"
                    + (f"; stop {s.stop_rule}" if s.stop_rule else "") + ".")
    if not heat and a.status != asm.STATUS_NO_NIGHT and _finite(a.t10_c):
        lead.append(f"{a.stage.capitalize()} buds are damaged from about {f.t(a.t10_c)} (T10): check "
                    "thermometers in the block tonight.")
        lead.append(bud_temperature_line(f.units))
    if next_step:
        lead.append(next_step)
    sms_parts = [(f"{name} - {_short_name(a.block, SMS_NAME_MAX, '.')} {w.short_day(a.night)}:", True),
                 (first.split(": ", 1)[-1], True)]
    for k, s in enumerate(running):  # before the rest: a cut text must still say it
        sms_parts.insert(1 + k, (f"Keep {w.method_name(s.method)} on.", True))
    if not heat and a.status != asm.STATUS_NO_NIGHT and _finite(a.t10_c):
        sms_parts.append((f"Buds hurt from {w.temp(a.t10_c, f.units, ascii_only=True)}; check thermometers.",
                          False))
    sections = ([_plan_section(a, f)] if running else []) + [_data_section(a, f)]
    ver = _verification_section(a, f)
    if ver:
        sections.append(ver)
    keys = list(a.cautions or [])
    for s in running:
        keys += [k for k in s.caution_keys if k not in keys]
    return core, lead, sms_parts, sections, None, keys


# --------------------------------------------------------------------------------------------------
# Updates
# --------------------------------------------------------------------------------------------------

def _style(a: Assessment) -> w.LevelStyle:
    """How a notice shows its level: a frost level that means "protect" on a block with no usable
    protection tonight is shown as what it is (at risk, unprotected), not as an order."""
    if a.kind != "heat" and a.status == asm.STATUS_OK and _steps(a)[1]:
        return w.unprotected_style(a.kind, a.level, a.level_rank, a.status)
    return w.level_style(a.kind, a.level, a.level_rank, a.status)


def _status_name(a: Assessment) -> str:
    return _style(a).name


def changes(a: Assessment, previous: Assessment | None) -> list[str]:
    """What changed between the previous notice's assessment and this one, in plain words."""
    if previous is None:
        return []
    f = _fmt(a.farm_tz, a.units)
    out = []
    if previous.status != a.status or previous.level != a.level:
        out.append(f"level {_status_name(previous)} → {_status_name(a)}")
    if _finite(a.p50_c) and _finite(previous.p50_c) and abs(a.p50_c - previous.p50_c) >= 0.3:
        out.append(f"{'low' if a.kind != 'heat' else 'high'} {f.t(previous.p50_c)} → {f.t(a.p50_c)}")
    pc, ac = previous.critical_time_utc, a.critical_time_utc
    if (pc is None) != (ac is None):
        out.append(f"critical temperature now reached at {f.clock(ac)}" if ac
                   else "no longer reaches the critical temperature")
    elif pc and ac and abs((ac - pc).total_seconds()) >= 600:
        out.append(f"critical temperature reached at {f.clock(pc)} → {f.clock(ac)}")
    before = {s.method: s for s in previous.plan}
    for s in a.plan:
        m = w.method_name(s.method)
        p = before.get(s.method)
        if p is None or p.advised != s.advised:
            if s.method == "none":
                continue
            out.append(f"{m} now advised" if s.advised else f"{m} no longer advised")
            continue
        if not s.advised:
            continue
        if (p.start_utc is None) != (s.start_utc is None) or (
                p.start_utc and s.start_utc and abs((s.start_utc - p.start_utc).total_seconds()) >= 600):
            out.append(f"{m} start {f.clock(p.start_utc) if p.start_utc else 'not set'} → "
                       f"{f.clock(s.start_utc) if s.start_utc else 'not set'}")
        if p.stop_utc and s.stop_utc and abs((s.stop_utc - p.stop_utc).total_seconds()) >= 1800:
            out.append(f"{m} stop {f.clock(p.stop_utc)} → {f.clock(s.stop_utc)}")
    return out


# --------------------------------------------------------------------------------------------------
# Public
# --------------------------------------------------------------------------------------------------

#: A stage seen this long before the night is from an earlier season: a spring frost season, bud break
#: to fruit set, lasts about two to three months (common practice) [days].
STAGE_SEASON_DAYS = 120


def stage_warning(a: Assessment) -> str | None:
    """A warning when the block's recorded stage is from an earlier season (or after the night)."""
    seen = (a.details or {}).get("stage_date")
    night = a.night if isinstance(a.night, dt.date) else dt.date.fromisoformat(str(a.night))
    if not seen:
        return None
    seen = dt.date.fromisoformat(str(seen))
    if (night - seen).days > STAGE_SEASON_DAYS or seen > night:
        return (f"Check the stage: '{a.stage}' was recorded on {seen.isoformat()}, "
                f"{'after this night' if seen > night else 'in an earlier season'}; the critical temperatures "
                "here are for that stage. Record the stage seen now (advisory blocks set-stage).")
    return None


def compose_block(a: Assessment | dict, previous: Assessment | dict | None = None, *,
                  data: dict[str, Any] | None = None) -> BlockNotice:
    """Compose one block's notice.

    Parameters
    ----------
    a : Assessment or dict
        The block's assessment (a dict from :func:`advisory.assessment.to_dict` is accepted).
    previous : Assessment or dict, optional
        For an update: the assessment of the last notice sent for this block
        and night, to say what changed.
    data : dict, optional
        ``advisory.assessment.to_dict(a)`` when the caller already has it (the
        forecast payload): saves encoding the assessment a second time.

    Returns
    -------
    BlockNotice
    """
    if isinstance(a, dict):
        data = a if data is None else data
        a = asm.from_dict(a)
    if isinstance(previous, dict):
        previous = asm.from_dict(previous)
    key = notice_key(a.kind, a.farm, a.block_id, a.night, a.revision)
    if data is None:
        data = _plain(a)
    a = _clean_names(a)
    f = _fmt(a.farm_tz, a.units)
    style = _style(a)
    name = style.name
    if a.status != asm.STATUS_OK:
        core, lead, sms_parts, sections, chart, keys = _status(a, f, name)
    elif a.kind == "heat":
        core, lead, sms_parts, sections, chart, keys = _heat(a, f, name)
    else:
        core, lead, sms_parts, sections, chart, keys = _frost(a, f, name)

    changed = changes(a, previous) if a.is_update else []
    if a.kind != "heat" and (warn := stage_warning(a)):
        lead.insert(0, warn)
    outlook = (a.details or {}).get("night_outlook") if a.kind != "heat" and a.status == asm.STATUS_OK else None
    if isinstance(outlook, str) and " the forecast low is " in outlook:
        lead.append(_one_line(outlook))
    when_txt = f"night of {w.short_day(a.night)}" if a.kind != "heat" else w.short_day(a.night)
    first = "morning note" if a.kind == "heat" else "evening notice"
    prefix = f"[{name}] "
    if a.is_update:
        prefix += f"Update {a.revision} to the {first}: "
        upd = f"Update {a.revision} to the {first}"
        upd += (": " + "; ".join(changed) + ".") if changed else (
            "." if previous is None else ": small changes only; the plan stands.")
        lead = [upd] + lead
        sms_parts.insert(0, (f"Update {a.revision}:", True))
        sections.insert(0, Section("changes", "What changed", items=changed or ["Small changes only."]))
    subject = (prefix + core + f" ({when_txt})")[:250]
    headline = f"{name}: {core}"
    notice = BlockNotice(
        key=key, kind=a.kind, status=a.status,
        farm=a.farm, farm_tz=a.farm_tz, units=a.units, block_id=a.block_id, block=a.block, station=a.station,
        crop=a.crop, variety=a.variety, stage=a.stage, night=a.night.isoformat(), revision=a.revision,
        is_update=a.is_update, level=a.level, level_rank=int(a.level_rank or 0), level_name=name,
        level_meaning=style.meaning, colour=style.colour, subject=subject, headline=headline, lead=lead,
        sms=_sms(sms_parts, sms_caution(a.kind)), sections=sections, cautions=_caution_list(keys),
        footer=FOOTER_HEAT if a.kind == "heat" else FOOTER_FROST, changes=changed, chart=chart,
        issued_utc=w.iso(a.reference_time_utc), data=data)
    return notice


def _one_line(text):
    """Names on one line: control characters and runs of white space become one space."""
    if text is None:
        return None
    return " ".join("".join(ch if ch.isprintable() else " " for ch in str(text)).split())


_NAME_FIELDS = ("farm", "block", "station", "variety", "stage", "crop")


def _clean_names(a: Assessment) -> Assessment:
    """``a`` with its names on one line (a copy only when a name needs it)."""
    if all((v := getattr(a, k)) is None or (v.isprintable() and "  " not in v and v == v.strip())
           for k in _NAME_FIELDS):
        return a
    return dataclasses.replace(a, farm=_one_line(a.farm), block=_one_line(a.block), station=_one_line(a.station),
                               variety=_one_line(a.variety), stage=_one_line(a.stage), crop=_one_line(a.crop))


def _severity(a: Assessment) -> float:
    """Sort weight: ok blocks by level rank; a block without a forecast ranks just below "protect"."""
    if a.status == asm.STATUS_OK:
        return float(a.level_rank or 0)
    if a.status in (asm.STATUS_NO_FORECAST, asm.STATUS_MISSED):
        return 2.5
    return -1.0


def _first_start(a: Assessment):
    starts = [s.start_utc for s in a.plan if s.advised and s.start_utc is not None]
    return min(starts) if starts else None


def compose_farm(assessments: list[Assessment], *, revision: int = 0,
                 changed: Collection[int] | None = None) -> FarmSummary:
    """Compose the farm summary: every block worst first, and the crew run sheet.

    Parameters
    ----------
    assessments : list of Assessment (or dicts)
        One per block, all of the same farm and night (or day).
    revision : int
        0 for the evening summary; higher when re-issued after updates.
    changed : collection of block ids, optional
        For an update (``revision`` > 0): the blocks with a new notice in
        this update; the summary says so first, and names them.  The other
        blocks stand as last sent.

    Returns
    -------
    FarmSummary

    Order: blocks by level rank (highest first), a block without a forecast
    (station silent, run missed) just below the blocks to protect, blocks with
    no night last; within a level by expected damage (highest first), then
    earliest protection start, then name.
    """
    items = [asm.from_dict(x) if isinstance(x, dict) else x for x in assessments]
    if not items:
        raise ValueError("compose_farm needs at least one assessment")
    summary_key = notice_key(items[0].kind, items[0].farm, None, items[0].night, revision)
    items = [_clean_names(x) for x in items]
    farms = {x.farm for x in items}
    if len(farms) > 1:
        raise ValueError(f"assessments of several farms: {sorted(farms)}")
    a0 = items[0]
    f = _fmt(a0.farm_tz, a0.units)
    kind = a0.kind
    far = dt.datetime.max.replace(tzinfo=dt.UTC)
    items.sort(key=lambda x: (-_severity(x), -(x.expected_kill_pct or 0.0) if x.status == asm.STATUS_OK else 0.0,
                              _first_start(x) or far, x.block))

    rows: list[FarmRow] = []
    for x in items:
        style = _style(x)
        if x.status != asm.STATUS_OK:
            low = ""
            action = {"no_forecast": "no forecast: check the station and thermometers",
                      "missed": "run missed: check thermometers",
                      "no_night": "no night to forecast" if x.kind != "heat" else "no day to forecast",
                      }.get(x.status, x.status)
        else:
            word = "high" if x.kind == "heat" else "low"
            low = (f"{word} {f.t(x.p50_c)} ({f.rng(x.p10_c, x.p90_c)})"
                   if _finite(x.p50_c) and _finite(x.p10_c) and _finite(x.p90_c) else
                   (f"{word} {f.t(x.p50_c)}" if _finite(x.p50_c) else "n/a"))
            advised, none_advised = _steps(x)
            acts = []
            for s in advised:
                if s.start_utc is not None:
                    acts.append(f"{w.method_name(s.method)} {f.clock(s.start_utc)}"
                                + (f" to {f.clock(s.stop_utc)}" if s.stop_utc else ""))
                else:
                    acts.append(f"{w.method_name(s.method)}: be ready")
            if none_advised:
                acts.append("no usable protection")
            action = "; ".join(acts) or "none needed"
        # when the middle forecast reaches T10 itself ("not reached" when it does not)
        crit = "-"
        if x.status == asm.STATUS_OK and x.kind != "heat":
            crit = f.clock(x.critical_time_utc) if x.critical_time_utc else "not reached"
        rows.append(FarmRow(x.block, x.block_id, x.status, x.level, int(x.level_rank or 0), style.name,
                            style.colour, low, crit, action, x.kind))

    worst = items[0]
    wstyle = _style(worst)
    # the summary shows the worst *level* among blocks with a forecast
    ok = [x for x in items if x.status == asm.STATUS_OK]
    top = max(ok, key=lambda x: x.level_rank or 0) if ok else worst
    tstyle = w.level_style(top.kind, top.level, top.level_rank, top.status)  # the farm's worst level, as such
    if not ok:
        tstyle = wstyle

    counts: dict[str, int] = {}
    for r in rows:
        counts[r.level_name] = counts.get(r.level_name, 0) + 1
    order_names = []
    for r in rows:
        if r.level_name not in order_names:
            order_names.append(r.level_name)
    count_txt = ", ".join(f"{counts[n]} {n}" for n in order_names)

    runsheet: dict[str, Any] = {}
    cautions_keys: list[str] = []
    starts = [(_first_start(x), x) for x in ok]
    starts = [(t, x) for t, x in starts if t is not None]
    first_start = min(starts, key=lambda p: p[0]) if starts else None
    if kind != "heat" and ok:
        runsheet, cautions_keys = _runsheet(a0, ok, f)
    elif kind == "heat":
        cautions_keys = list(HEAT_ALWAYS)

    when_txt = f"night of {w.short_day(a0.night)}" if kind != "heat" else w.short_day(a0.night)
    lead = [f"{len(rows)} block{'s' if len(rows) != 1 else ''}: {count_txt}."]
    is_update = revision > 0
    if is_update:
        names = [x.block for x in items if changed is None or x.block_id in changed]
        lead.insert(0, f"Update {revision}: new notice{'s' if len(names) != 1 else ''} for "
                       f"{', '.join(names)}; the other blocks stand as last sent." if len(names) < len(items)
                    else f"Update {revision}: new notices for every block.")
    if first_start:
        what = "First evaporative cooling start" if kind == "heat" else "First protection start"
        lead.append(f"{what} {f.clock(first_start[0])} ({first_start[1].block}).")
    bare = [x.block for x in ok if _steps(x)[1]]
    if bare:
        lead.append("At risk with no usable protection: " + ", ".join(bare) + ".")
    silent = [x.block for x in items if x.status in (asm.STATUS_NO_FORECAST, asm.STATUS_MISSED)]
    if silent:
        lead.append("No forecast for: " + ", ".join(silent) + ".")
    core = f"{a0.farm}, {when_txt}: {count_txt}"
    subject = f"[{tstyle.name}] " + (f"Update {revision}: " if is_update else "") + core
    subject = subject[:250]
    head = w.gsm_safe(f"{_short_name(a0.farm, 24, '.')} {w.short_day(a0.night)}"
                      + (f" update {revision}:" if is_update else ":"))
    tail = w.gsm_safe(sms_caution(kind))
    room = SMS_MAX - len(tail) - 1
    bits = []
    for x, r in zip(items, rows, strict=True):
        if r.status == asm.STATUS_OK and r.level_rank < 2:
            continue
        bit = f"{_short_name(r.block, SMS_NAME_MAX, '.')} ({r.level_name})"
        st = _first_start(x) if r.status == asm.STATUS_OK else None
        if st:
            bit += f" from {f.clock(st)[:5]}"
        bits.append(w.gsm_safe(bit))
    tz_note = f" (times {f.clock(first_start[0])[6:]})" if first_start else ""
    if not bits:
        who = f"all {len(rows)} blocks" if len(rows) > 1 else _short_name(rows[0].block, SMS_NAME_MAX, '.')
        sms = _sms([(head, True), (f"{who} {tstyle.name.lower()}.", True)], sms_caution(kind))
    else:
        sms = ""
        lower = len(rows) - len(bits)
        for k in range(len(bits), 0, -1):
            # the counts say plainly what is named and what is not: "5 at risk in all, 1 lower"
            more = [f"{len(bits)} at risk in all"] if k < len(bits) else []
            if lower:
                more.append(f"{lower} lower")
            more_txt = ("; " + ", ".join(more)) if more else ""
            for tz_txt in (tz_note, ""):
                cand = f"{head} {'; '.join(bits[:k])}{more_txt}.{tz_txt}"
                if len(cand) <= room:
                    sms = f"{cand} {tail}"
                    break
            if sms:
                break
        if not sms:
            sms = _sms([(head, True), (bits[0], True), (f"{len(bits)} at risk in all.", True)], sms_caution(kind))

    return FarmSummary(
        key=summary_key, kind=kind, farm=a0.farm, farm_tz=a0.farm_tz,
        units=a0.units, night=a0.night.isoformat(), level=top.level, level_rank=int(top.level_rank or 0),
        level_name=tstyle.name, colour=tstyle.colour, subject=subject, headline=f"{tstyle.name}: {core}",
        lead=lead, sms=sms, rows=rows, runsheet=runsheet, cautions=_caution_list(cautions_keys),
        footer=FOOTER_HEAT if kind == "heat" else FOOTER_FROST, is_update=is_update,
        data={"blocks": [{"block": x.block, "block_id": x.block_id, "status": x.status, "level": x.level,
                          "level_rank": x.level_rank, "p10_c": x.p10_c, "p50_c": x.p50_c, "p90_c": x.p90_c,
                          "critical_time_utc": w.iso(x.critical_time_utc),
                          "first_start_utc": w.iso(_first_start(x))} for x in items]},
        revision=revision)


def _runsheet(a0: Assessment, ok: list[Assessment], f: _Fmt) -> tuple[dict[str, Any], list[str]]:
    """The crew run sheet from :mod:`advisory.risk.runsheet` (its three renderings and our table rows)."""
    from advisory.risk import runsheet as rs

    made = [x.reference_time_utc for x in ok if x.reference_time_utc is not None]
    sheet = rs.build_run_sheet(a0.farm, a0.night, a0.farm_tz, ok,
                               generated_utc=max(made) if made else None,  # an update's: its own time
                               units="imperial" if w.imperial(a0.units) else "metric")
    rows = []
    for r in sheet.rows:
        p = r.plan
        amounts = []
        for attr, key in (("run_hours", "hours"), ("water_m3", "water_m3"), ("fuel_l", "fuel_l")):
            v = getattr(p, attr, None)
            if _finite(v):
                amounts.append(f"{w.quantity_label(key)} {w.quantity(key, v, f.units)}")
        rows.append({
            "order": r.order, "block": r.risk.block, "method": w.method_name(p.method),
            "ready_by": f.clock(r.ready_by) if r.ready_by else "",
            "start": f.clock(r.start) if r.start else "",
            "stop": (("not before " if p.stop_open else "") + f.clock(r.stop)) if r.stop else "",
            "amounts": "; ".join(amounts),
            "low": f"{f.t(r.risk.min_p50_c)} ({f.rng(r.risk.min_p10_c, r.risk.min_p90_c)})",
        })
    out = {"rows": rows, "unprotected": [r.block for r in sheet.unprotected],
           "text": rs.render_text(sheet), "csv": rs.render_csv(sheet)}
    return out, list(sheet.caution_keys)
