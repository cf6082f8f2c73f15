"""What makes an update of a frost night worth a new notice (:func:`material_change`).

An update (``run_night(update=True)``) re-forecasts from the latest observations; a new notice
goes out only when the change is material; a protection run already under way is carried into
the update (:mod:`advisory.risk.continuity`).
"""

from __future__ import annotations

import datetime as dt
import math

from advisory import assessment as asm

#: An update notice goes out when the advised start time comes at least this much earlier [min] ...
MATERIAL_START_SHIFT_MIN = 30
#: ... or at least this much later [min] ...
MATERIAL_LATER_SHIFT_MIN = 60
#: ... or the median minimum moves by at least this much [°C] while protection is advised.
MATERIAL_MIN_SHIFT_C = 1.5
#: A change towards less to do (a lower action band, a method or a start time dropped) goes out only when
#: the median minimum is at least this much warmer than in the last notice [°C] (see :func:`material_change`).
MATERIAL_STAND_DOWN_C = 0.5


def _first_advised(a: asm.Assessment, attr: str) -> dt.datetime | None:
    times = [getattr(s, attr) for s in a.plan if s.advised and getattr(s, attr) is not None]
    return min(times) if times else None


def action_band(a: asm.Assessment) -> int:
    """What the grower has to do, in three steps: 0 nothing (the two lowest levels), 1 have protection
    ready, 2 protect (the block's own protect level, ``details["needs_protection"]``, or above);
    -1 for a night without a forecast."""
    if a.status != asm.STATUS_OK:
        return -1
    if (a.details or {}).get("needs_protection"):
        return 2
    return 1 if (a.level_rank or 0) >= 2 else 0


def material_change(new: asm.Assessment, old: asm.Assessment | None) -> list[str]:
    """Why an update deserves a new notice (empty: it does not).

    ``old`` is the assessment behind the last notice sent for the block that
    night; the update's clock is ``new.reference_time_utc``.  A notice at
    night wakes someone, so a change is material when it changes what the
    crew does, and a change towards doing less must hold by a margin: near a
    level's edge the forecast would otherwise flip it back and forth every
    hour, and crews would stop and start on the flips.  Material:

    * a different status (a forecast, or none);
    * a higher :func:`action_band` (nothing to do, have protection ready,
      protect); a lower one only when the forecast minimum is at least
      :data:`MATERIAL_STAND_DOWN_C` warmer than in the last notice.  A level
      change within a band is not material;
    * a method (or "no usable protection") newly advised; a method no longer
      advised, with the same margin as above (a run already under way is
      kept by :func:`advisory.risk.continuity.carry_started` before this
      check);
    * while the last notice's first firm start is still ahead: a start
      :data:`MATERIAL_START_SHIFT_MIN` or more earlier, or
      :data:`MATERIAL_LATER_SHIFT_MIN` or more later; a firm start where
      there was only "be ready"; no firm start any more, with the margin.
      Once the noticed start has passed the crew is running, and the new
      plan's later "start" is not news.  Without firm starts, a "ready by"
      time :data:`MATERIAL_START_SHIFT_MIN` or more earlier;
    * while protection is advised, the forecast minimum moves by
      :data:`MATERIAL_MIN_SHIFT_C` or more.
    """
    if old is None:
        return ["first notice of the night"]
    why = []
    warmer = (new.p50_c - old.p50_c) if new.p50_c is not None and old.p50_c is not None else math.inf
    stand_down = warmer >= MATERIAL_STAND_DOWN_C
    band_new, band_old = action_band(new), action_band(old)
    if new.status != old.status:
        why.append(f"status {old.status} -> {new.status}")
    elif band_new > band_old or (band_new < band_old and stand_down):
        why.append(f"level {old.level or '-'} -> {new.level or '-'}")
    adv_new = {s.method for s in new.plan if s.advised}
    adv_old = {s.method for s in old.plan if s.advised}
    if adv_new - adv_old or (adv_old - adv_new and stand_down):
        why.append("advised protection changed")
    now = new.reference_time_utc
    earlier = dt.timedelta(minutes=MATERIAL_START_SHIFT_MIN)
    later = dt.timedelta(minutes=MATERIAL_LATER_SHIFT_MIN)
    s_new, s_old = _first_advised(new, "start_utc"), _first_advised(old, "start_utc")
    if s_old is not None and now is not None and s_old <= now:
        pass  # under way: the crew started at the noticed time
    elif s_new is not None and s_old is None:
        why.append("start time set")
    elif s_new is None and s_old is not None:
        if stand_down:
            why.append("no start time on the middle forecast")
    elif s_new is not None:
        if s_old - s_new >= earlier:
            why.append(f"start time {(s_old - s_new).total_seconds() / 60:.0f} min earlier")
        elif s_new - s_old >= later:
            why.append(f"start time {(s_new - s_old).total_seconds() / 60:.0f} min later")
    else:
        r_new, r_old = _first_advised(new, "ready_by_utc"), _first_advised(old, "ready_by_utc")
        if r_new is not None and r_old is not None and (now is None or r_old > now) and r_old - r_new >= earlier:
            why.append(f"ready-by time {(r_old - r_new).total_seconds() / 60:.0f} min earlier")
    if adv_new and new.p50_c is not None and old.p50_c is not None \
            and abs(new.p50_c - old.p50_c) >= MATERIAL_MIN_SHIFT_C:
        why.append(f"forecast minimum moved by {abs(new.p50_c - old.p50_c):.1f} °C")
    return why
