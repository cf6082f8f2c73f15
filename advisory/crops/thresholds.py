"""Critical temperatures of blossom buds by crop and phenological stage.

The table ``data/critical_temperatures.csv`` holds, for each crop and stage,
the temperatures at which about 10 % (T10) and 90 % (T90) of buds are killed by
a 30-minute exposure, as published by the extension services.  Every row names
its source; ``verified`` is ``True`` only where the value was checked against a
copy of the published table (the column ``checked_against`` says which), and
``False`` for values written from memory.

Table columns
-------------
crop, stage, stage_order
    Canonical crop key, the trade's stage name (lower case), and the stage's
    1-based position in the season.
t10_published, t90_published, published_unit
    The values as the source prints them (°F for the extension bulletins, °C
    for the grape values tabulated by Snyder & de Melo-Abreu).
t10_c, t90_c
    The same in °C (rounded to 0.1 °C); these are the values used.
source, verified, checked_against, note
    Provenance.

References
----------
.. [1] Ballard, J. K., Proebsting, E. L. & Tukey, R. B. Critical temperatures for
   blossom buds: apple (EB0913), pear (EB0978), sweet cherry (EB1128), peach
   (EB0914), apricot (EB1240). Washington State University Extension.
.. [2] Michigan State University Extension. Critical spring temperatures for tree
   fruit bud development stages (tart cherry from MSU Research Report 220).
.. [3] Proebsting, E. L., Brummund, V. P. & Clore, W. J. (1988) Critical
   temperatures for Concord grapes. Washington State University; as tabulated
   in Snyder, R. L. & de Melo-Abreu, J. P. (2005) Frost Protection:
   fundamentals, practice and economics, vol. 1, FAO, Table 4.8.
"""

from __future__ import annotations

import functools
import re
from dataclasses import dataclass
from importlib import resources

import numpy as np
import pandas as pd

from advisory.errors import InputError

#: Canonical crop keys, in table order.
CROPS: tuple[str, ...] = (
    "apple", "pear", "sweet_cherry", "tart_cherry", "peach", "apricot", "plum", "wine_grape",
)

# Other names growers use for the same crops (keys are normalised spellings).
_CROP_ALIASES = {
    "apples": "apple",
    "pears": "pear",
    "sweet_cherries": "sweet_cherry",
    "tart_cherries": "tart_cherry",
    "sour_cherry": "tart_cherry",
    "sour_cherries": "tart_cherry",
    "pie_cherry": "tart_cherry",
    "peaches": "peach",
    "apricots": "apricot",
    "plums": "plum",
    "prune": "plum",
    "prunes": "plum",
    "european_plum": "plum",
    "italian_prune": "plum",
    "grape": "wine_grape",
    "grapes": "wine_grape",
    "grapevine": "wine_grape",
    "wine_grapes": "wine_grape",
    "vine": "wine_grape",
}

# Stage names growers also use, per crop (normalised spellings -> table stage).
_STAGE_ALIASES = {
    "apple": {
        "1/2_inch_green": "half-inch green", "½_inch_green": "half-inch green",
        "half_green": "half-inch green", "pink": "first pink", "king_bloom": "first bloom",
        "petal_fall": "post bloom",
    },
    "pear": {
        "swollen_bud": "scales separating", "scale_separation": "scales separating",
        "bud_scales_separating": "scales separating", "bud_burst": "blossom buds exposed",
        "green_cluster": "tight cluster", "white_bud": "first white", "king_bloom": "first bloom",
        "petal_fall": "post bloom",
    },
    "sweet_cherry": {
        "swollen_bud": "first swelling", "first_swell": "first swelling", "bud_swell": "first swelling",
        "bud_burst": "green tip", "white_bud": "first white", "popcorn": "first white",
        "petal_fall": "post bloom",
    },
    "tart_cherry": {
        "swollen_bud": "first swelling", "first_swell": "first swelling", "bud_swell": "first swelling",
        "bud_burst": "green tip", "white_bud": "first white", "popcorn": "first white",
        "petal_fall": "post bloom",
    },
    "peach": {
        "swollen_bud": "first swelling", "first_swell": "first swelling", "bud_swell": "first swelling",
        "pink": "first pink", "petal_fall": "post bloom",
    },
    "apricot": {
        "tip_separates": "tips separate", "shuck": "in the shuck", "shuck_split": "in the shuck",
    },
    "plum": {
        "swollen_bud": "first swelling", "first_swell": "first swelling", "bud_swell": "first swelling",
        "green_tip": "tip green", "white_bud": "first white", "petal_fall": "post bloom",
    },
    "wine_grape": {
        "first_swelling": "first swell", "early_swell": "first swell", "full_swell": "late swell",
        "budburst": "bud burst", "bud_break": "bud burst", "budbreak": "bud burst",
        "1_leaf": "first leaf", "2_leaves": "second leaf", "3_leaves": "third leaf",
        "4_leaves": "fourth leaf",
    },
}


@dataclass(frozen=True)
class CriticalTemps:
    """Critical temperatures of one crop at one stage.

    Attributes
    ----------
    crop : str
        Canonical crop key (one of :data:`CROPS`).
    stage : str
        Stage name as in the table.
    t10_c : float
        Temperature killing about 10 % of buds in 30 minutes [°C].
    t90_c : float
        Temperature killing about 90 % of buds in 30 minutes [°C].
    source : str
        Where the values come from ("block override" where a block set them).
    verified : bool
        True when every value used was checked against the published table
        (a block override counts as the user's own, verified value).
    """

    crop: str
    stage: str
    t10_c: float
    t90_c: float
    source: str
    verified: bool


def _key(text: str) -> str:
    """Normalise a name: lower case, runs of spaces/hyphens/underscores -> '_'."""
    return re.sub(r"[\s\-_]+", "_", str(text).strip().lower()).strip("_")


@functools.lru_cache(maxsize=1)
def _load() -> pd.DataFrame:
    path = resources.files("advisory.crops").joinpath("data/critical_temperatures.csv")
    with path.open("r", encoding="utf-8") as fh:
        df = pd.read_csv(fh, dtype={"note": str, "checked_against": str}, keep_default_na=False)
    df["verified"] = df["verified"].astype(str).str.lower().eq("true")
    df["t10_c"] = df["t10_c"].astype(float)
    df["t90_c"] = df["t90_c"].astype(float)
    df["stage_order"] = df["stage_order"].astype(int)
    df = df.sort_values(["crop", "stage_order"], kind="stable").reset_index(drop=True)
    return df


@functools.lru_cache(maxsize=1)
def _index() -> tuple[dict[str, tuple[str, ...]], dict[tuple[str, str], tuple[float, float, str, bool]]]:
    """The table by crop (its stages in order) and by (crop, stage): (T10, T90, source, verified)."""
    df = _load()
    stages: dict[str, list[str]] = {}
    rows: dict[tuple[str, str], tuple[float, float, str, bool]] = {}
    for crop, stage, t10, t90, source, verified in zip(
            df["crop"], df["stage"], df["t10_c"], df["t90_c"], df["source"], df["verified"], strict=True):
        stages.setdefault(crop, []).append(stage)
        rows.setdefault((crop, stage), (float(t10), float(t90), str(source), bool(verified)))
    return {c: tuple(v) for c, v in stages.items()}, rows


def table() -> pd.DataFrame:
    """The whole critical-temperature table (a copy), sorted by crop and stage order."""
    return _load().copy()


def normalise_crop(name: str) -> str:
    """Canonical crop key for a crop name.

    Accepts case, space, hyphen and underscore variants and a few common
    synonyms ("prune" -> "plum", "sour cherry" -> "tart_cherry", "grape" ->
    "wine_grape").

    Parameters
    ----------
    name : str
        Crop name as a user wrote it.

    Returns
    -------
    crop : str
        One of :data:`CROPS`.

    Raises
    ------
    InputError
        Unknown crop; the message lists the valid choices.
    """
    k = _key(name)
    k = _CROP_ALIASES.get(k, k)
    if k in CROPS:
        return k
    raise InputError(f"unknown crop {name!r}; choose one of: {', '.join(CROPS)}", field="crop")


def stages_for(crop: str) -> list[str]:
    """Stage names of a crop in phenological order.

    Parameters
    ----------
    crop : str
        Crop name (normalised with :func:`normalise_crop`).

    Returns
    -------
    stages : list of str
    """
    return list(_index()[0][normalise_crop(crop)])


def normalise_stage(crop: str, stage: str) -> str:
    """The table's stage name for a stage as a user wrote it.

    Parameters
    ----------
    crop : str
        Crop name.
    stage : str
        Stage name; case, spaces, hyphens and underscores are ignored, and a few
        synonyms used in the trade are accepted ("petal fall" -> "post bloom",
        "king bloom" -> "first bloom", "swollen bud" -> "first swelling", ...).

    Returns
    -------
    stage : str
        Stage name as in :func:`stages_for`.

    Raises
    ------
    InputError
        Unknown crop or stage; the message lists the crop's stages in order.
    """
    c = normalise_crop(crop)
    stages = stages_for(c)
    by_key = {_key(s): s for s in stages}
    k = _key(stage)
    if k in by_key:
        return by_key[k]
    alias = _STAGE_ALIASES.get(c, {}).get(k)
    if alias is not None:
        return alias
    raise InputError(
        f"unknown stage {stage!r} for {c}; stages in order: {', '.join(stages)}", field="stage")


def _check_pair(t10_c: float, t90_c: float, crop: str, stage: str) -> None:
    if not (np.isfinite(t10_c) and np.isfinite(t90_c)):
        raise InputError(f"critical temperatures for {crop} {stage} must be numbers", field="t10_c")
    if not t10_c > t90_c:
        raise InputError(
            f"T10 ({t10_c:g} °C) must be warmer than T90 ({t90_c:g} °C) for {crop} {stage}",
            field="t90_c")
    if not (t90_c >= -40.0 and t10_c <= 5.0):
        raise InputError(
            f"critical temperatures for {crop} {stage} out of range (-40..5 °C): "
            f"T10 {t10_c:g}, T90 {t90_c:g}", field="t10_c")


def critical_temps(crop: str, stage: str, t10_override_c: float | None = None,
                   t90_override_c: float | None = None) -> CriticalTemps:
    """Critical temperatures (T10, T90) of a crop at a stage.

    Parameters
    ----------
    crop : str
        Crop name.
    stage : str
        Stage name.
    t10_override_c, t90_override_c : float, optional
        A block's own values [°C], replacing the table's.  Either may be given
        alone; the pair must still have T10 warmer than T90.

    Returns
    -------
    CriticalTemps

    Raises
    ------
    InputError
        Unknown crop or stage, or overrides that are not a valid pair.
    """
    c = normalise_crop(crop)
    s = normalise_stage(c, stage)
    t10, t90, source, verified = _index()[1][(c, s)]
    over = [v is not None for v in (t10_override_c, t90_override_c)]
    if t10_override_c is not None:
        t10 = float(t10_override_c)
    if t90_override_c is not None:
        t90 = float(t90_override_c)
    if all(over):
        source, verified = "block override", True
    elif any(over):
        which = "T10" if over[0] else "T90"
        source = f"block override ({which}); other value: {source}"
    _check_pair(t10, t90, c, s)
    return CriticalTemps(crop=c, stage=s, t10_c=t10, t90_c=t90, source=source, verified=verified)


def critical_temps_frame(crops, stages, t10_override_c=None, t90_override_c=None) -> pd.DataFrame:
    """Critical temperatures for many blocks at once.

    Parameters
    ----------
    crops, stages : sequence of str, length n
        Crop and stage per block (any accepted spelling).
    t10_override_c, t90_override_c : array_like of float, length n, optional
        Per-block overrides [°C]; NaN or None where the table applies.

    Returns
    -------
    pandas.DataFrame
        n rows in input order, columns ``crop``, ``stage``, ``t10_c``, ``t90_c``,
        ``source``, ``verified``.

    Raises
    ------
    InputError
        As :func:`critical_temps`, for the first bad block.
    """
    crops = list(crops)
    stages = list(stages)
    if len(crops) != len(stages):
        raise InputError("crops and stages must have the same length", field="stage")
    n = len(crops)

    def _arr(x):
        if x is None:
            return np.full(n, np.nan)
        a = np.array([np.nan if v is None else v for v in np.atleast_1d(np.asarray(x, dtype=object))],
                     dtype=float)
        return np.broadcast_to(a, (n,)).copy()

    o10, o90 = _arr(t10_override_c), _arr(t90_override_c)
    c = [normalise_crop(x) for x in crops]
    s = [normalise_stage(ci, si) for ci, si in zip(c, stages, strict=True)]
    keys = pd.DataFrame({"crop": c, "stage": s})
    df = keys.merge(_load()[["crop", "stage", "t10_c", "t90_c", "source", "verified"]],
                    on=["crop", "stage"], how="left", validate="many_to_one")
    has10, has90 = np.isfinite(o10), np.isfinite(o90)
    df["t10_c"] = np.where(has10, o10, df["t10_c"].to_numpy())
    df["t90_c"] = np.where(has90, o90, df["t90_c"].to_numpy())
    both = has10 & has90
    one = has10 ^ has90
    df.loc[both, "source"] = "block override"
    df.loc[both, "verified"] = True
    df.loc[one, "source"] = "block override; other value: " + df.loc[one, "source"]
    bad = ~(df["t10_c"].to_numpy() > df["t90_c"].to_numpy())
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        _check_pair(float(df.at[i, "t10_c"]), float(df.at[i, "t90_c"]), c[i], s[i])
    for i in range(n):
        if has10[i] or has90[i]:
            _check_pair(float(df.at[i, "t10_c"]), float(df.at[i, "t90_c"]), c[i], s[i])
    df["verified"] = df["verified"].astype(bool)
    return df


#: Stage-table sources measured on another cultivar family than the crop's usual one: crop -> (what the
#: source's values were measured on, the family the crop's blocks usually are).
_OTHER_FAMILY = {"wine_grape": ("Concord", "Concord grapes (Vitis labruscana)",
                                "a wine grape of Vitis vinifera, another cultivar family")}


def cultivar_note(crop: str, variety: str | None, source: str | None) -> str | None:
    """A line for the notice when the critical temperatures were measured on another cultivar family.

    The wine-grape rows of the table are the Concord values of Proebsting,
    Brummund & Clore (1988) [3]_: Concord is *V. labruscana*; wine grapes are
    mostly *V. vinifera*, whose buds may differ.  A block with its own values
    (a block override) gets no note.

    Parameters
    ----------
    crop : str
        Crop name (any spelling :func:`normalise_crop` accepts).
    variety : str or None
        The block's variety, named in the note.
    source : str or None
        The source text of the critical temperatures used.

    Returns
    -------
    str or None
    """
    try:
        c = normalise_crop(crop)
    except InputError:
        return None
    other = _OTHER_FAMILY.get(c)
    if other is None or not source or other[0] not in source or source.startswith("block override"):
        return None
    who = f"{variety} is" if variety else "This block is"
    return (f"These critical temperatures were measured on {other[1]}. {who} {other[2]}: its buds may "
            "be hardier or tenderer. Use local values for the variety (a block override) where you have them.")
