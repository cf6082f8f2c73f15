"""Winter chill from hourly temperatures: Utah model and Dynamic model.

Pure and vectorised over blocks: ``n`` blocks share one hourly grid of ``m``
hours; NaN marks a missing hour (it adds no chill and, in the Dynamic model,
leaves the intermediate product as it was).

Utah model (Richardson, Seeley & Walker 1974 [1]_): each hour adds chill units
by its temperature: up to 1.4 °C: 0; 1.5-2.4 °C: 0.5; 2.5-9.1 °C: 1; 9.2-12.4
°C: 0.5; 12.5-15.9 °C: 0; 16.0-18.0 °C: -0.5; above 18 °C: -1.  Warm hours
undo chill.  The sum here starts at the chill start date (no reset at the
season's lowest running total; the running minimum is returned too).

Dynamic model (Fishman, Erez & Couvillon 1987 [2]_ [3]_): chill builds up as a
thermally labile intermediate that warm hours can destroy; once the
intermediate reaches 1, a share of it is fixed as a *chill portion* that warm
hours no longer undo.  Parameters as in Erez & Fishman's spreadsheet, with the
formulas as extracted by Luedeling et al. (2009) [4]_: ``e0 = 4153.5 K``,
``e1 = 12888.8 K``, ``a0 = 1.395e5``, ``a1 = 2.567e18``, ``slp = 1.6``,
``tetmlt = 277 K``.

``data/chill_requirements.csv`` gives each crop's typical requirement in both
units, each row with its source.

References
----------
.. [1] Richardson, E. A., Seeley, S. D. & Walker, D. R. (1974) A model for
   estimating the completion of rest for 'Redhaven' and 'Elberta' peach
   trees. HortScience 9, 331-332.
.. [2] Fishman, S., Erez, A. & Couvillon, G. A. (1987) The temperature
   dependence of dormancy breaking in plants: mathematical analysis of a
   two-step model involving a cooperative transition. J. Theor. Biol. 124,
   473-483.
.. [3] Fishman, S., Erez, A. & Couvillon, G. A. (1987) The temperature
   dependence of dormancy breaking in plants: computer simulation of
   processes studied under controlled temperatures. J. Theor. Biol. 126,
   309-321.
.. [4] Luedeling, E., Zhang, M. & Girvetz, E. H. (2009) Climatic changes lead
   to declining winter chill for fruit and nut trees in California during
   1950-2099. PLoS ONE 4, e6166 (the spreadsheet's formulas; citation
   details from memory).
"""

from __future__ import annotations

import functools
from dataclasses import dataclass
from importlib import resources

import numpy as np
import pandas as pd

#: Utah model: (upper bound of the band [°C], chill units per hour); above the last bound: -1.
UTAH_BANDS: tuple[tuple[float, float], ...] = (
    (1.4, 0.0), (2.4, 0.5), (9.1, 1.0), (12.4, 0.5), (15.9, 0.0), (18.0, -0.5),
)
UTAH_ABOVE = -1.0

#: Dynamic model parameters (Erez & Fishman spreadsheet, as in Luedeling et al. 2009).
DYNAMIC_PARAMS = {"e0": 4153.5, "e1": 12888.8, "a0": 1.395e5, "a1": 2.567e18, "slp": 1.6, "tetmlt": 277.0}


def utah_units_per_hour(air_temp_c):
    """Utah chill units of each hour (Richardson et al. 1974).

    Band edges are the published tenths of a degree: a temperature belongs to
    the first band whose upper bound it does not exceed, after rounding to
    0.1 °C (so 1.45 °C is read as 1.5 °C, in the 0.5 band).

    Parameters
    ----------
    air_temp_c : array_like
        Hourly air temperature [°C]; NaN where missing.

    Returns
    -------
    ndarray
        Chill units [CU per hour]; 0 where missing.
    """
    t = np.round(np.asarray(air_temp_c, float), 1)
    out = np.full(t.shape, UTAH_ABOVE)
    for upper, units in reversed(UTAH_BANDS):
        out = np.where(t <= upper + 1e-9, units, out)
    return np.where(np.isfinite(t), out, 0.0)


def utah_chill_units(air_temp_c):
    """Accumulated Utah chill units over the hours given, per block.

    Parameters
    ----------
    air_temp_c : array_like, shape (n, m) or (m,)
        Hourly air temperature [°C].

    Returns
    -------
    total_cu : ndarray, shape (n,)
        Sum over the hours [CU].
    lowest_cu : ndarray, shape (n,)
        Lowest running total reached (<= 0), the point from which the
        original model starts counting when warm autumn hours come first.
    """
    u = utah_units_per_hour(np.atleast_2d(np.asarray(air_temp_c, float)))
    run = np.cumsum(u, axis=1)
    if run.shape[1] == 0:
        z = np.zeros(run.shape[0])
        return z, z
    return run[:, -1], np.minimum(run.min(axis=1), 0.0)


def dynamic_chill_portions(air_temp_c, *, params: dict | None = None, cumulative: bool = False):
    """Chill portions of the Dynamic model (Fishman et al. 1987), per block.

    One step per hour.  With ``TK`` the temperature in kelvin:
    ``ftmprt = slp tetmlt (TK - tetmlt) / TK``, ``sr = exp(ftmprt)``,
    ``xi = sr / (1 + sr)``, ``xs = (a0/a1) exp((e1 - e0) / TK)``,
    ``ak1 = a1 exp(-e1 / TK)``; the intermediate after an hour is
    ``x = xs - (xs - S) exp(-ak1)``, where ``S`` is the last hour's
    intermediate, less the share fixed as a portion if it had reached 1; an
    hour whose intermediate reaches 1 fixes ``xi x`` as portions.

    Parameters
    ----------
    air_temp_c : array_like, shape (n, m) or (m,)
        Hourly air temperature [°C]; NaN hours keep the intermediate as it was.
    params : dict, optional
        Overrides of :data:`DYNAMIC_PARAMS`.
    cumulative : bool, default False
        Return the running total per hour, shape (n, m), instead of the total.

    Returns
    -------
    ndarray
        Chill portions, shape (n,) (or (n, m) with ``cumulative``).

    References
    ----------
    .. [2] Fishman, Erez & Couvillon (1987a); [3] (1987b); [4] Luedeling et al. (2009).
    """
    p = {**DYNAMIC_PARAMS, **(params or {})}
    temp = np.atleast_2d(np.asarray(air_temp_c, float))
    n, m = temp.shape
    tk = temp + 273.0
    with np.errstate(over="ignore", invalid="ignore"):
        ftmprt = p["slp"] * p["tetmlt"] * (tk - p["tetmlt"]) / tk
        sr = np.exp(np.clip(ftmprt, -700, 700))
        xi = sr / (1.0 + sr)
        xs = (p["a0"] / p["a1"]) * np.exp((p["e1"] - p["e0"]) / tk)
        decay = np.exp(-p["a1"] * np.exp(-p["e1"] / tk))
    valid = np.isfinite(temp)
    x_prev = np.zeros(n)
    fix_prev = np.zeros(n)  # share of the last hour's intermediate fixed as portions
    total = np.zeros(n)
    run = np.zeros((n, m)) if cumulative else None
    for j in range(m):
        ok = valid[:, j]
        s = x_prev - fix_prev
        x = np.where(ok, xs[:, j] - (xs[:, j] - s) * np.where(ok, decay[:, j], 1.0), s)
        gained = np.where(ok & (x >= 1.0), x * np.where(ok, xi[:, j], 0.0), 0.0)
        total += gained
        x_prev, fix_prev = x, gained
        if run is not None:
            run[:, j] = total
    return run if cumulative else total


def hourly_grid(times_utc, air_temp_c, start_utc, end_utc) -> tuple[pd.DatetimeIndex, np.ndarray]:
    """Hourly means of readings on a shared UTC grid [start, end), NaN for hours without readings.

    Parameters
    ----------
    times_utc : DatetimeIndex or array of datetime, shape (m,)
        Reading times (tz-aware).
    air_temp_c : array_like, shape (n, m) or (m,)
        Readings [°C].
    start_utc, end_utc : datetime
        Grid bounds (tz-aware).

    Returns
    -------
    hours : DatetimeIndex (UTC), shape (h,)
        Start of each hour.
    temp_c : ndarray, shape (n, h)
        Mean of the readings in each hour [°C].
    """
    temp = np.atleast_2d(np.asarray(air_temp_c, float))
    idx = pd.DatetimeIndex(pd.to_datetime(times_utc, utc=True))
    hours = pd.date_range(pd.Timestamp(start_utc).tz_convert("UTC").floor("h"),
                          pd.Timestamp(end_utc).tz_convert("UTC"), freq="h", inclusive="left")
    if len(idx) == 0 or len(hours) == 0:
        return hours, np.full((temp.shape[0], len(hours)), np.nan)
    frame = pd.DataFrame(temp.T, index=idx.floor("h"))
    means = frame.groupby(level=0).mean().reindex(hours)
    return hours, means.to_numpy(float).T


@dataclass(frozen=True)
class ChillRequirement:
    """Typical chill requirement of a crop (range across common cultivars)."""

    crop: str
    utah_cu_low: float
    utah_cu_high: float
    portions_low: float
    portions_high: float
    source: str
    verified: bool


@functools.lru_cache(maxsize=1)
def requirements() -> dict[str, ChillRequirement]:
    """Chill requirements by crop, from ``data/chill_requirements.csv``."""
    path = resources.files("advisory.crops").joinpath("data/chill_requirements.csv")
    with path.open("r", encoding="utf-8") as fh:
        df = pd.read_csv(fh, keep_default_na=False)
    return {r.crop: ChillRequirement(r.crop, float(r.utah_cu_low), float(r.utah_cu_high),
                                     float(r.portions_low), float(r.portions_high), str(r.source),
                                     str(r.verified).lower() == "true")
            for r in df.itertuples()}


def chill_start_date(day, latitude: float, override_mmdd: str | None = None):
    """Start of chill accumulation: 1 October in the north, 1 April in the south (common practice)."""
    from advisory.crops.phenology import season_start

    return season_start(day, latitude, "10-01", "04-01", override_mmdd)


def dormancy_share(portions, crops) -> np.ndarray:
    """Chill portions as a share of the low end of each crop's requirement (NaN where unknown)."""
    req = requirements()
    low = np.array([req[c].portions_low if c in req else np.nan for c in crops])
    return np.asarray(portions, float) / low
