"""Safety cautions that travel with a frost protection plan.

Each caution has a short key, a one-line title (for a phone screen) and a
fuller text.  Plans carry keys; run sheets and notices look up the words here
so every output says the same thing.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass


@dataclass(frozen=True)
class Caution:
    """One safety caution.

    Attributes
    ----------
    key : str
        Stable identifier (used in plans, CSV output and tests).
    title : str
        A few words for a narrow screen.
    text : str
        The caution in full.
    """

    key: str
    title: str
    text: str


_ALL = (
    Caution(
        "decision_support",
        "This sheet supports your judgement",
        "This plan is decision support built from a forecast, not an instruction. Check real "
        "thermometers in the block through the night. Local codes, workplace-safety rules, your "
        "equipment maker's instructions and advice from your extension service or a licensed "
        "adviser take precedence over anything here.",
    ),
    Caution(
        "crew_cold_dark",
        "Crews: cold, dark, tired",
        "Work is at night, near or below freezing, often on wet or icy ground. Send nobody out "
        "alone; carry lights and a charged phone, agree check-in times, and dress for hours of "
        "cold. Watch for slips, for hypothermia and for drowsy drivers on farm roads at dawn.",
    ),
    Caution(
        "ice_load",
        "Ice load can break limbs",
        "Over-tree sprinkling builds ice on buds, shoots and wires. A long or windy night can "
        "load limbs and trellis until they break, and young or weak trees suffer most. Keep "
        "clear of loaded canopies and trellis under strain; do not shake ice off.",
    ),
    Caution(
        "sprinkler_no_stop",
        "Never stop sprinklers early",
        "Once sprinklers are running they must keep running until after sunrise, when the "
        "wet-bulb temperature is back above the critical temperature and the ice is melting "
        "(water running between ice and twig). Stopping sooner, or a line freezing, lets "
        "evaporation chill the wet buds below the air temperature and can do more harm than "
        "not sprinkling at all.",
    ),
    Caution(
        "water_supply",
        "Water must last the whole night",
        "Check that the well, pond or allocation can deliver the full rate for the full run "
        "before starting. A supply that runs out mid-night stops the sprinklers at the worst "
        "time. Watch pump pressure and line freezing through the night.",
    ),
    Caution(
        "sprinkler_rate_short",
        "Sprinkler rate below the need",
        "The block's application rate is below the published guidance for tonight's forecast "
        "wind and minimum. Too little water freezes without keeping buds at 0 °C and the "
        "evaporating film can leave them colder than unsprinkled buds. Consider not sprinkling "
        "and using another method.",
    ),
    Caution(
        "heater_fire_co",
        "Heaters: fire and fumes",
        "Heaters and fuel are a fire hazard: keep them clear of dry grass, prunings, bins and "
        "fuel stores, refuel only cold heaters, and keep extinguishers at hand. Burning fuel "
        "makes carbon monoxide: never run a heater in a shed, cab or other enclosed space, and "
        "treat headache, dizziness or nausea in the crew as an emergency.",
    ),
    Caution(
        "wind_machine_noise",
        "Wind machines: noise and blades",
        "Wind machines are loud and neighbours may be close. Check local noise ordinances and "
        "any hours or notice they require. Keep people clear of turning blades and of the "
        "tower when the machine starts automatically.",
    ),
    Caution(
        "inversion_estimated",
        "Inversion is an estimate",
        "No upper thermometer: the inversion strength was estimated from sky and wind. Check a "
        "thermometer on a tower or pole (about 10 m) before relying on wind machines.",
    ),
    Caution(
        "no_protection",
        "No protection available",
        "The block has no usable frost protection for tonight. Record the stage, check buds "
        "after the night, and discuss options with your adviser before the next cold night.",
    ),
)

CAUTIONS: dict[str, Caution] = {c.key: c for c in _ALL}

#: Cautions that apply to each protection method (in addition to those every plan carries).
METHOD_CAUTIONS: dict[str, tuple[str, ...]] = {
    "overtree_sprinkler": ("sprinkler_no_stop", "ice_load", "water_supply"),
    "undertree_sprinkler": ("water_supply",),
    "heater": ("heater_fire_co",),
    "wind_machine": ("wind_machine_noise",),
    "none": ("no_protection",),
}

#: Cautions every plan carries.
ALWAYS: tuple[str, ...] = ("crew_cold_dark", "decision_support")


def cautions_for_method(method: str) -> tuple[str, ...]:
    """Caution keys for one protection method (method-specific first, then the general ones)."""
    return METHOD_CAUTIONS.get(method, ()) + ALWAYS


def get(key: str) -> Caution:
    """The caution with this key (KeyError for an unknown key)."""
    return CAUTIONS[key]


def ordered(keys: Iterable[str]) -> list[Caution]:
    """Distinct cautions for the given keys, in this module's fixed order."""
    wanted = set(keys)
    return [c for c in _ALL if c.key in wanted]
