"""Validation of the console's forms by the farm file's own rules.

The stage goes through :func:`advisory.crops.thresholds.normalise_stage` and
:func:`~advisory.crops.thresholds.critical_temps`, as a block of the farm file does, and is recorded by
:func:`advisory.ingest.farm_file.record_stage`.  A recipient's channels are checked inside the farm
file's parser (its rules are written inline there, not as a function of their own): the adapter
:func:`check_channels` hands it a one-recipient farm file and reports its error on the field.
"""

from __future__ import annotations

import datetime as dt
import json

from advisory.crops import thresholds
from advisory.errors import InputError
from advisory.ingest.farm_file import parse_farm_text

CHANNELS = ("email", "sms", "webhook")
#: How far ahead of the block's today a stage date may be (a typing slip, not an observation).
MAX_DAYS_AHEAD = 1


class FormError(Exception):
    """A form value that does not pass: the message goes next to the field."""

    def __init__(self, field: str, message: str):
        super().__init__(message)
        self.field = field
        self.message = message


def check_stage(crop: str, stage: str, date_text: str, t10_override_c: float | None,
                t90_override_c: float | None, today: dt.date) -> tuple[str, dt.date]:
    """The table's stage name and the observation date, or FormError naming the field."""
    try:
        name = thresholds.normalise_stage(crop, (stage or "").strip())
        thresholds.critical_temps(crop, name, t10_override_c, t90_override_c)
    except InputError as exc:
        raise FormError("stage", exc.message) from None
    text = (date_text or "").strip()
    try:
        day = dt.date.fromisoformat(text)
    except ValueError:
        raise FormError("stage_date", f"'{text}' is not a date like 2026-04-02") from None
    if day > today + dt.timedelta(days=MAX_DAYS_AHEAD):
        raise FormError("stage_date", f"{day.isoformat()} is in the future: give the day the stage was seen")
    return name, day


def check_channels(values: dict[str, str]) -> dict[str, str]:
    """A recipient's channels as the farm file would store them (empty values dropped)."""
    lines = ['[farm]', 'name = "check"', 'timezone = "UTC"', '', '[[recipients]]', 'name = "check"']
    for ch in CHANNELS:
        v = (values.get(ch) or "").strip()
        if v:
            lines.append(f"{ch} = {json.dumps(v)}")
    try:
        spec = parse_farm_text("\n".join(lines) + "\n", path="<console form>")
    except InputError as exc:
        key = (exc.field or "").rsplit(".", 1)[-1]  # "recipients[0].email"
        raise FormError(key if key in CHANNELS else "email", exc.message) from None
    return dict(spec.recipients[0].channels)
