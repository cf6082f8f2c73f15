"""JSON for stored payloads and notices: one fast encoder used by the database and the outbox.

The stored forms are those of :func:`advisory.assessment.to_dict`: dataclasses
as objects (fields in declaration order), instants as ISO 8601 in UTC, dates as
``YYYY-MM-DD``, NaN as ``null``.  The run's instants are UTC already (``datetime``
with ``tzinfo=UTC``, written ``+00:00`` by orjson itself, as ``isoformat`` would;
a test holds the pipeline to it); an instant with another offset keeps its offset
(the same instant), a naive one is taken as UTC (as the database hands them back),
and a ``pandas.Timestamp`` goes through :func:`_fallback`.  :mod:`orjson` writes them directly from the
objects (dataclasses, ``datetime``, numpy scalars), so a run for thousands of
blocks does not first copy every assessment and notice into plain dicts and
then walk the copies again in the standard library's encoder.

Infinities are written as ``null`` (JSON has no infinity).  Anything orjson does not know (``pandas.Timestamp``, numpy types it does not
cover, sets) goes through :func:`_fallback`, which gives the same form as
:func:`advisory.assessment.to_dict`.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
from collections.abc import Mapping
from typing import Any

import orjson

#: Plain ``datetime`` objects are written by orjson (see the module's note); the rest by :func:`_fallback`.
_OPTIONS = orjson.OPT_NON_STR_KEYS | orjson.OPT_SERIALIZE_NUMPY | orjson.OPT_NAIVE_UTC


class Encoded(Mapping):
    """A JSON object kept encoded (bytes), read as a mapping: parsed on first use.

    A large run's notices carry their assessment's data this way: it is stored and
    written to the outbox as the bytes it already is (encoded as a :class:`Fragment`),
    and parsed only where a notice is drawn or rendered from it.  Copies and pickles
    keep only the bytes.
    """

    __slots__ = ("raw", "_parsed")

    def __init__(self, raw: bytes):
        self.raw = raw
        self._parsed: dict | None = None

    def _value(self) -> dict:
        if self._parsed is None:
            self._parsed = orjson.loads(self.raw)
        return self._parsed

    def __getitem__(self, key):
        return self._value()[key]

    def __iter__(self):
        return iter(self._value())

    def __len__(self) -> int:
        return len(self._value())

    def __eq__(self, other) -> bool:
        return self._value() == (other._value() if isinstance(other, Encoded) else other)

    __hash__ = None

    def __reduce__(self):
        return (Encoded, (self.raw,))

    def __repr__(self) -> str:
        return f"Encoded({len(self.raw)} bytes)"


def _fallback(value: Any):
    if isinstance(value, Encoded):
        return orjson.Fragment(value.raw)
    if isinstance(value, dt.datetime):  # pandas.Timestamp (orjson writes plain datetimes itself)
        return value.astimezone(dt.UTC).isoformat()
    if isinstance(value, dt.date):
        return value.isoformat()
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        return {f.name: getattr(value, f.name) for f in dataclasses.fields(value)}
    if hasattr(value, "item"):  # numpy scalar
        return value.item()
    if isinstance(value, set | frozenset):
        return sorted(value)
    raise TypeError(f"cannot store a value of type {type(value).__name__} as JSON")


def dumps(value: Any) -> str:
    """``value`` as compact JSON text (the database's JSON serializer).

    A :class:`Fragment` (JSON encoded before) is written as it is, also inside other values.
    """
    return orjson.dumps(value, default=_fallback, option=_OPTIONS).decode("utf-8")


def encode(value: Any) -> bytes:
    """``value`` as compact JSON, UTF-8 bytes (what :func:`dumps` writes)."""
    return orjson.dumps(value, default=_fallback, option=_OPTIONS)


#: JSON encoded before (bytes), written as it is: ``dumps({"data": Fragment(b"[1]")})`` is ``{"data":[1]}``.
Fragment = orjson.Fragment


def loads(text: str | bytes) -> Any:
    """Parse JSON text (the database's JSON deserializer)."""
    return orjson.loads(text)
