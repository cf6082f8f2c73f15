"""Protection already under way carries into the night's updates.

An update re-plans the night from the latest readings.  Taken alone, the new
plan can drop a method the crew was told to start an hour ago: the measured
wind rose a little, so the sprinkler rate needed is now just above the
system's.  Over-tree sprinklers must not be stopped on such a change: once
the buds are iced, stopping before the ice melts after sunrise lets the water
evaporate from them and cools them below the air temperature, which kills
more buds than no sprinkling at all ("once started, keep running until the
ice melts": common practice, as extension guides on sprinkling for frost
protection put it; quoted from memory).  So:

* a method the last notice of the night advised with a start time that has
  passed at the update's clock (or that an earlier update already carried
  over) is *started*: the crew should have it running;
* a started over-tree sprinkler run stays advised in the update whatever the
  new plan says, with its original start time and the new plan's stop; when
  the new plan finds the rate short, the update says so and says to keep
  running, watch the ice and add other protection if there is any;
* any other started method that the new plan still advises keeps its
  original start time, so that a run the crew began is not "moved";
* a started wind machine or heater run that the new plan no longer advises
  is dropped: that is news for the grower, and the update says why;
* a started run of any method stays on as noticed when the update has no
  plan for it at all (no forecast: the station fell silent): the silence
  notice then says to keep it running and stop by its stop rule.

Pure functions on :class:`advisory.assessment.ProtectionStep` lists.
"""

from __future__ import annotations

import dataclasses
import datetime as dt

from advisory.assessment import ProtectionStep

__all__ = ["KEEP_RUNNING", "carry_started", "started_at"]

#: Methods that must keep running once started, whatever a later plan says (see the module docstring).
KEEP_RUNNING = frozenset({"overtree_sprinkler"})

#: Notes of a fresh plan that make no sense for a run already under way.
_FRESH_ONLY = ("Already at the start temperature", "too little water can freeze buds harder than none")


def started_at(step: ProtectionStep, now_utc: dt.datetime) -> dt.datetime | None:
    """When the crew should have started ``step`` (a step of an earlier notice), or None if not yet.

    A step started on a still earlier notice keeps that time; otherwise its
    start time once it has passed at ``now_utc``.  A step not advised, or
    advised only as "have it ready by" (start if it runs colder), has not
    started.
    """
    if not step.advised or step.method == "none":
        return None
    if step.started_utc is not None:
        return step.started_utc
    t = step.start_utc
    return t if t is not None and t <= now_utc else None


def carry_started(plan: list[ProtectionStep], noticed: list[ProtectionStep], now_utc: dt.datetime
                  ) -> list[ProtectionStep]:
    """The update's ``plan`` with the runs the last notice (``noticed``) had started carried over.

    Parameters
    ----------
    plan : list of ProtectionStep
        The update's own plan (not modified).
    noticed : list of ProtectionStep
        The plan of the last notice sent for this block and night.
    now_utc : datetime
        The update's clock (aware).

    Returns
    -------
    list of ProtectionStep
        New step objects where something changed; the others as given.  When
        a kept run makes a method advised again, the "no usable protection"
        step is left out.
    """
    started = {}
    was = {}
    for s in noticed:
        t = started_at(s, now_utc)
        if t is not None:
            started[s.method] = t
            was[s.method] = s
    if not started:
        return plan
    out: list[ProtectionStep] = []
    kept = False
    # a started run the update has no plan for at all (no forecast: station silent): it stays on as noticed
    here = {s.method for s in plan}
    for method, t in started.items():
        if method not in here:
            old = was[method]  # its run time and amounts were counted from its start: not repeated
            q = {k: v for k, v in (old.quantities or {}).items() if k not in _RUN_AMOUNTS}
            out.append(_under_way(dataclasses.replace(old, quantities=q), t, (_NO_NEW_PLAN,)))
            kept = True
    for s in plan:
        t = started.get(s.method)
        if t is None:
            out.append(s)
        elif s.advised:
            out.append(_under_way(s, t))
        elif s.method in KEEP_RUNNING:
            out.append(_keep_running(s, t))
            kept = True
        else:
            out.append(s)
    if kept:
        out = [s for s in out if s.method != "none"]
    return out


_NO_NEW_PLAN = ("No new forecast at this update: keep it running, and stop by its stop rule and the block "
                "thermometers.")

#: Quantities of a plan that count from the plan's own start: for a run under way, the rest of the run.
_RUN_AMOUNTS = ("hours", "hours_cold", "water_m3", "water_m3_cold", "water_l_per_ha", "fuel_l", "fuel_l_cold")


def _under_way(s: ProtectionStep, t: dt.datetime, first: tuple[str, ...] = ()) -> ProtectionStep:
    """``s`` as a run started at ``t``: its first start kept, notes meant for a fresh start left out."""
    notes = [*first, *(n for n in s.notes if not any(f in n for f in _FRESH_ONLY))]
    if any(k in (s.quantities or {}) for k in _RUN_AMOUNTS):
        notes.append("Run time, water and fuel are counted from this update to the stop: what the rest of "
                     "the run needs.")
    return dataclasses.replace(s, advised=True, start_utc=t, started_utc=t, ready_by_utc=None, notes=notes)


def _keep_running(s: ProtectionStep, t: dt.datetime) -> ProtectionStep:
    """A started run the new plan would not advise, kept running with the reason said plainly."""
    q = s.quantities or {}
    have, need = q.get("rate_available_mm_h"), q.get("rate_needed_mm_h")
    if have is not None and need is not None and have < need:
        why = (f"The system rate ({have:.1f} mm/h) is now below the {need:.1f} mm/h the latest readings call "
               "for. Do not stop: stopping before the ice melts does more harm than a short rate. Watch the "
               "ice (clear and dripping is working; milky and dry is not) and add any other protection you "
               "have.")
    else:
        why = ("Do not stop before the stop condition: stopping before the ice melts does more harm than "
               "sprinkling on.")
    return _under_way(s, t, (why,))
