"""The notice data objects: :class:`BlockNotice`, :class:`FarmSummary` and their parts, their
stored JSON, and the notices' idempotency keys (:func:`notice_key`).

A notice is a plain, JSON-able data object (every field is a string, number, list or dict; times
are ISO 8601 UTC text) holding the words already written in the farm's units and local time, plus
the numbers behind them (``data``: the assessment itself, °C and UTC) and what the chart should
draw (``chart``).
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import hashlib
from dataclasses import dataclass, field
from functools import lru_cache
from typing import Any

from advisory import assessment as asm
from advisory.assessment import pickle_by_fields
from advisory.notices import words as w
from advisory.store import jsoncodec

#: Version of the notice content layout (stored in ``Notice.content``).
SCHEMA = 1


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
