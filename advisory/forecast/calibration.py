"""Per-station calibration of the night-minimum forecast, and the forecast itself.

Model
-----
In the spirit of Allen (1957) [1]_, tonight's minimum is a linear function of
the evening observations, extended with predictors that carry physics:

==========================  =====================================================
``air_temp_c``              Allen's evening temperature
``dew_point_c``             Allen's dew point: moist air radiates more and dew
                            releases latent heat
``wind_speed_ms``           mixing with warmer air aloft
``cloud_cover_pct``         the cloud's back-radiation
``cooling_since_sunset_c``  tonight's own cooling rate (Brunt's ``b`` as observed)
``brunt_time_factor``       ``sqrt(h_ss + h_min) - sqrt(h_ss)`` [h^1/2]: the
                            square-root-of-time still to run (night length and
                            season enter here)
``dew_point_change_3h_c``   a falling dew point in the evening marks drier air
                            arriving -- the usual prelude to a cold night
==========================  =====================================================

Fitting (:func:`fit_calibration`) is weighted ridge regression on standardised
predictors:

* **recent nights weigh more**: weights halve every 365 verified nights (by
  count, not by calendar, so gaps in a record do not erase it), keeping a whole
  seasonal cycle while letting the station's surroundings drift;
* **shrinkage toward the physical model**: the coefficients are pulled toward
  the least-squares linearisation of :mod:`advisory.forecast.cooling` over the
  same evenings, with the weight of 10 nights.  After 30 nights the data carry
  about 75 % of the weight, after a season (90 nights) about 90 %, after a
  year about 97 %;
* nights before the first 30 use the physical model alone (``model ==
  "physical"``).

Spread
------
The spread comes from **out-of-sample residuals**: the exact leave-one-out
residuals of the ridge fit (``r_i = e_i / (1 - h_ii)``), kept with the cloud and
wind of their evening.  For a new evening the residuals are weighted by how
alike the evenings are (Gaussian kernel, 30 % cloud and 2 m/s wind; a 5 % floor
keeps every night in play), and the forecast distribution is the weighted
empirical distribution of ``prediction + residual`` (Hazen plotting positions,
normal tails beyond the sample).  So the spread is narrow on clear calm
evenings and wide -- with a long cold tail -- on cloudy or windy evenings that
may clear overnight, as the station's own history shows; and it is honest for
cold nights because it is made of errors the model actually makes.

The physical model's spread is normal: 2.5 °C on radiative evenings (cloud <=
30 %, wind <= 3 m/s) and 3.5 °C otherwise -- wider than a calibrated model's
1.5-2.5 °C because it is unproven at the site (a judgement, common practice for
untuned minimum-temperature schemes) -- updated with the station's physical
residuals as they accrue (the prior weighs 10 nights).

Recalibration from the station's own forecasts
----------------------------------------------
Leave-one-out residuals are exchangeable with each other, but tomorrow is not
exchangeable with the past: seasons drift, a young station has few residuals
to draw tails from, and the analog weighting can be too sure or too timid at a
given site.  So each fit also replays the station's past nights with the
rolling origin -- night ``j`` forecast from a calibration fitted on the nights
before it only, exactly as it would have been issued -- and records the
probability integral transform ``u_j = F_j(y_j)`` of each observed minimum
(:func:`rolling_pit`).  A calibrated forecast has uniform ``u`` [5]_ [6]_.  The
recency-weighted empirical quantiles of the ``u`` (same half-life as the fit),
shrunk toward the identity with the weight of :data:`PIT_PRIOR_NIGHTS` nights,
map each probability level ``tau`` to the level of the raw distribution that
has held ``tau`` of the outcomes at this station (:func:`pit_levels`); the
forecast quantile at ``tau`` is the raw quantile at that level.

One safety rule: below the median the map may only move *outward*.  The
recalibration may widen a cold tail that has proved too narrow at the site, but
never narrows one -- on the rare cold nights that matter most the raw
distribution's cold tail is kept at least as wide as the site's own residuals
make it.  The warm tail and the centre follow the station's record freely.

All parameters of a calibration serialise to a plain JSON-able dict
(:meth:`Calibration.to_dict` / :meth:`Calibration.from_dict`).

References
----------
.. [1] Allen, C. C. (1957) A simplified equation for minimum temperature
   prediction. Monthly Weather Review 85, 119-120.
.. [2] Brunt, D. (1941) Physical and Dynamical Meteorology, Cambridge Univ. Press.
.. [3] Hoerl, A. E. & Kennard, R. W. (1970) Ridge regression: biased estimation
   for nonorthogonal problems. Technometrics 12, 55-67.
.. [4] Wilks, D. S. (2011) Statistical Methods in the Atmospheric Sciences, 3rd
   ed., Academic Press (cross-validation, empirical distributions).
.. [5] Dawid, A. P. (1984) Statistical theory: the prequential approach. J. R.
   Statist. Soc. A 147, 278-292 (the probability integral transform of
   sequential forecasts; citation details from memory).
.. [6] Gneiting, T., Balabdaoui, F. & Raftery, A. E. (2007) Probabilistic
   forecasts, calibration and sharpness. J. R. Statist. Soc. B 69, 243-268
   (PIT histograms; recalibration toward uniform PIT; citation details from
   memory).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy.special import ndtri

from advisory.forecast.cooling import MINIMUM_LAG_H, PhysicalNight, physical_night
from advisory.forecast.evening import MAX_AGE_MIN, OK, REFERENCE_OFFSET_H, evening_states
from advisory.forecast.result import CALIBRATED, LEVELS, PHYSICAL, NightForecast

__all__ = [
    "PREDICTORS", "MIN_NIGHTS", "HALF_LIFE_NIGHTS", "PRIOR_NIGHTS", "MAX_NIGHTS",
    "RADIATIVE_CLOUD_MAX_PCT", "RADIATIVE_WIND_MAX_MS", "PHYSICAL_SPREAD_C",
    "Calibration", "predictor_matrix", "is_radiative", "fit_calibration", "fit_arrays", "forecast_night",
    "forecast_quantiles", "forecast_blocks", "PIT_PRIOR_NIGHTS", "PIT_MAX_NIGHTS", "pit_of", "pit_levels",
    "rolling_pit", "recalibrate_table",
]

PREDICTORS = ("air_temp_c", "dew_point_c", "wind_speed_ms", "cloud_cover_pct",
              "cooling_since_sunset_c", "brunt_time_factor", "dew_point_change_3h_c")
#: Verified nights needed before the calibrated model is used.
MIN_NIGHTS = 30
#: Night weights halve every this many verified nights.
HALF_LIFE_NIGHTS = 365.0
#: Weight of the physical prior, in nights.
PRIOR_NIGHTS = 10.0
#: Only the most recent nights are used (older ones weigh < 7 %).
MAX_NIGHTS = 1460
#: Radiative evening: cloud at most this [%] ...
RADIATIVE_CLOUD_MAX_PCT = 30.0
#: ... and wind at most this [m s-1].
RADIATIVE_WIND_MAX_MS = 3.0
#: Spread (standard deviation) of the physical model before any history [°C].
PHYSICAL_SPREAD_C = {"radiative": 2.5, "other": 3.5}
#: Weight of that prior spread, in nights.
PRIOR_SPREAD_NIGHTS = 10.0
#: Analog kernel widths for weighting residuals: cloud [%] and wind [m s-1].
ANALOG_CLOUD_PCT = 30.0
ANALOG_WIND_MS = 2.0
#: Every residual keeps at least this kernel weight.
ANALOG_FLOOR = 0.05

#: Weight of the identity (no recalibration) in the PIT map, in nights.
PIT_PRIOR_NIGHTS = 30.0
#: Past nights replayed for the PIT map (older ones weigh < 50 % of the newest).
PIT_MAX_NIGHTS = 365

_VERSION = 1
_Z_LEVELS = ndtri(LEVELS)


# --------------------------------------------------------------------------- predictors
def is_radiative(cloud_cover_pct, wind_speed_ms) -> np.ndarray:
    """Radiative evening: cloud <= 30 % and wind <= 3 m/s (missing taken as clear/calm)."""
    c = np.nan_to_num(np.asarray(cloud_cover_pct, dtype=float), nan=0.0)
    u = np.nan_to_num(np.asarray(wind_speed_ms, dtype=float), nan=0.0)
    return (c <= RADIATIVE_CLOUD_MAX_PCT) & (u <= RADIATIVE_WIND_MAX_MS)


def _col(states, name):
    if name not in states.columns:
        return np.full(len(states), np.nan)
    col = states[name]
    if pd.api.types.is_float_dtype(col.dtype) or pd.api.types.is_integer_dtype(col.dtype):
        return col.to_numpy(dtype=float, na_value=np.nan)
    return pd.to_numeric(col, errors="coerce").to_numpy(dtype=float)


def predictor_matrix(states: pd.DataFrame, fill: Mapping[str, float] | None = None) -> np.ndarray:
    """Predictor matrix (n, 7) in the order of :data:`PREDICTORS`.

    Missing wind and cloud are taken as calm and clear (the colder case, as
    the evening state says), a missing dew-point change as none, and a missing
    cooling since sunset as ``fill["cooling_since_sunset_c"]`` (the training
    mean) or 0.

    Parameters
    ----------
    states : pandas.DataFrame
        Evening states (:func:`advisory.forecast.evening.evening_states`) or
        verified nights with the same columns.
    fill : mapping, optional
        Replacement values for missing predictors.

    Returns
    -------
    ndarray
    """
    fill = dict(fill or {})
    h_ss = np.maximum(_col(states, "hours_since_sunset"), 1e-3)
    h_min = np.maximum(_col(states, "hours_to_sunrise") + MINIMUM_LAG_H, 0.0)
    cols = {
        "air_temp_c": _col(states, "air_temp_c"),
        "dew_point_c": _col(states, "dew_point_c"),
        "wind_speed_ms": np.nan_to_num(np.maximum(_col(states, "wind_speed_ms"), 0.0), nan=0.0),
        "cloud_cover_pct": np.nan_to_num(np.clip(_col(states, "cloud_cover_pct"), 0, 100), nan=0.0),
        "cooling_since_sunset_c": np.nan_to_num(_col(states, "cooling_since_sunset_c"),
                                                nan=fill.get("cooling_since_sunset_c", 0.0)),
        "brunt_time_factor": np.sqrt(h_ss + h_min) - np.sqrt(h_ss),
        "dew_point_change_3h_c": np.nan_to_num(_col(states, "dew_point_change_3h_c"), nan=0.0),
    }
    return np.column_stack([cols[p] for p in PREDICTORS])


# --------------------------------------------------------------------------- calibration
def _floats(a):
    return [float(x) for x in np.asarray(a, dtype=float).ravel()]


@dataclass
class Calibration:
    """Fitted calibration of one station.

    Attributes
    ----------
    model : str
        ``"calibrated"`` (regression) or ``"physical"`` (too little history:
        the physical model with a learned spread).
    training_nights : int
        Verified nights used.
    center, scale : ndarray (7,)
        Standardisation of the predictors.
    coef, prior_coef : ndarray (8,)
        Intercept and coefficients on standardised predictors; ``prior_coef``
        is the linearised physical model they were shrunk toward.
    residual_c, residual_cloud_pct, residual_wind_ms, residual_weight : ndarray (M,)
        Leave-one-out residuals (observed - forecast) [°C], sorted, with the
        cloud [%] and wind [m s-1] of their evening and their recency weight.
    physical_spread_c : dict
        Spread of the physical model on radiative and other evenings [°C].
    fill : dict
        Replacement values for missing predictors.
    last_night : str or None
        ISO date of the latest night used.
    settings : dict
        Fitting settings (half-life, prior weight, minimum nights).
    pit_levels : ndarray (K,) or empty
        Level of the raw distribution used for each of
        :data:`advisory.forecast.result.LEVELS` (see "Recalibration" above);
        empty: none (too few replayed nights, or the physical model).
    pit_nights : int
        Replayed nights behind ``pit_levels``.
    outlook_weight : float or None
        Fitted weight of a night outlook's physical change
        (:func:`advisory.forecast.outlook_effect.fit_outlook_weight`); None:
        too few verified nights carried one, the default applies.
    outlook_nights : int
        Verified nights with an outlook behind it.
    """

    model: str
    training_nights: int
    physical_spread_c: dict
    center: np.ndarray = field(default_factory=lambda: np.zeros(len(PREDICTORS)))
    scale: np.ndarray = field(default_factory=lambda: np.ones(len(PREDICTORS)))
    coef: np.ndarray = field(default_factory=lambda: np.zeros(len(PREDICTORS) + 1))
    prior_coef: np.ndarray = field(default_factory=lambda: np.zeros(len(PREDICTORS) + 1))
    residual_c: np.ndarray = field(default_factory=lambda: np.zeros(0))
    residual_cloud_pct: np.ndarray = field(default_factory=lambda: np.zeros(0))
    residual_wind_ms: np.ndarray = field(default_factory=lambda: np.zeros(0))
    residual_weight: np.ndarray = field(default_factory=lambda: np.zeros(0))
    fill: dict = field(default_factory=dict)
    last_night: str | None = None
    settings: dict = field(default_factory=dict)
    pit_levels: np.ndarray = field(default_factory=lambda: np.zeros(0))
    pit_nights: int = 0
    outlook_weight: float | None = None
    outlook_nights: int = 0

    @classmethod
    def physical_default(cls) -> Calibration:
        """The calibration of a station without history."""
        return cls(model=PHYSICAL, training_nights=0, physical_spread_c=dict(PHYSICAL_SPREAD_C))

    def to_dict(self) -> dict:
        """Plain JSON-able dict (lists of floats, strings, ints)."""
        return {
            "version": _VERSION,
            "model": self.model,
            "training_nights": int(self.training_nights),
            "predictors": list(PREDICTORS),
            "center": _floats(self.center),
            "scale": _floats(self.scale),
            "coef": _floats(self.coef),
            "prior_coef": _floats(self.prior_coef),
            "residuals": {
                "c": _floats(self.residual_c),
                "cloud_cover_pct": _floats(self.residual_cloud_pct),
                "wind_speed_ms": _floats(self.residual_wind_ms),
                "weight": _floats(self.residual_weight),
            },
            "physical_spread_c": {k: float(v) for k, v in self.physical_spread_c.items()},
            "fill": {k: float(v) for k, v in self.fill.items()},
            "last_night": self.last_night,
            "settings": dict(self.settings),
            "pit_levels": _floats(self.pit_levels),
            "pit_nights": int(self.pit_nights),
            "outlook_weight": None if self.outlook_weight is None else float(self.outlook_weight),
            "outlook_nights": int(self.outlook_nights),
        }

    @classmethod
    def from_dict(cls, data: Mapping) -> Calibration:
        """Inverse of :meth:`to_dict`; raises ValueError on a foreign or damaged dict."""
        if data.get("version") != _VERSION:
            raise ValueError(f"unsupported calibration version {data.get('version')!r}")
        if list(data.get("predictors", [])) != list(PREDICTORS):
            raise ValueError("calibration was fitted with other predictors; refit it")
        res = data.get("residuals", {})
        arrays = {k: np.asarray(res.get(k, []), dtype=float)
                  for k in ("c", "cloud_cover_pct", "wind_speed_ms", "weight")}
        if len({len(v) for v in arrays.values()}) != 1:
            raise ValueError("calibration residual arrays differ in length")
        p = len(PREDICTORS)
        cal = cls(
            model=str(data["model"]),
            training_nights=int(data["training_nights"]),
            physical_spread_c={k: float(v) for k, v in data["physical_spread_c"].items()},
            center=np.asarray(data["center"], dtype=float),
            scale=np.asarray(data["scale"], dtype=float),
            coef=np.asarray(data["coef"], dtype=float),
            prior_coef=np.asarray(data["prior_coef"], dtype=float),
            residual_c=arrays["c"], residual_cloud_pct=arrays["cloud_cover_pct"],
            residual_wind_ms=arrays["wind_speed_ms"], residual_weight=arrays["weight"],
            fill={k: float(v) for k, v in data.get("fill", {}).items()},
            last_night=data.get("last_night"),
            settings=dict(data.get("settings", {})),
            pit_levels=np.asarray(data.get("pit_levels", []), dtype=float),
            pit_nights=int(data.get("pit_nights", 0)),
            outlook_weight=None if data.get("outlook_weight") is None else float(data["outlook_weight"]),
            outlook_nights=int(data.get("outlook_nights", 0)),
        )
        if len(cal.pit_levels) not in (0, len(LEVELS)) or (
                len(cal.pit_levels) and not np.all(np.diff(cal.pit_levels) >= 0)):
            raise ValueError("calibration PIT map is damaged")
        if cal.model not in (PHYSICAL, CALIBRATED):
            raise ValueError(f"unknown calibration model {cal.model!r}")
        if len(cal.center) != p or len(cal.scale) != p or len(cal.coef) != p + 1:
            raise ValueError("calibration coefficient arrays have the wrong length")
        if cal.model == CALIBRATED and len(cal.residual_c) < 2:
            raise ValueError("a calibrated model needs its residuals")
        return cal


def fit_calibration(history: pd.DataFrame, *, min_nights: int = MIN_NIGHTS,
                    half_life_nights: float = HALF_LIFE_NIGHTS, prior_nights: float = PRIOR_NIGHTS,
                    max_nights: int = MAX_NIGHTS) -> Calibration:
    """Fit a station's calibration from its verified nights.

    Parameters
    ----------
    history : pandas.DataFrame
        One row per verified night: the evening-state columns
        (``air_temp_c``, ``dew_point_c``, ``wind_speed_ms``,
        ``cloud_cover_pct``, ``cooling_since_sunset_c``,
        ``dew_point_change_3h_c``, ``hours_since_sunset``,
        ``hours_to_sunrise``) and ``observed_min_c``; ordered by
        ``reference_time`` or ``night`` if present, else taken in the given
        order (oldest first).  Rows without an observed minimum, air
        temperature or dew point are ignored.
    min_nights : int, default 30
        Nights needed for the calibrated model.
    half_life_nights : float, default 365
        Recency half-life, in verified nights.
    prior_nights : float, default 10
        Weight of the physical prior, in nights.
    max_nights : int, default 1460
        Most recent nights used.

    Returns
    -------
    Calibration
    """
    h = history
    for name in ("reference_time", "night"):
        if name in h.columns:
            h = h.sort_values(name, kind="stable")
            break
    need = np.isfinite(_col(h, "observed_min_c")) & np.isfinite(_col(h, "air_temp_c")) \
        & np.isfinite(_col(h, "dew_point_c")) & np.isfinite(_col(h, "hours_since_sunset")) \
        & np.isfinite(_col(h, "hours_to_sunrise"))
    h = h[need].tail(max_nights)
    n = len(h)
    last = str(h["night"].iloc[-1]) if n and "night" in h.columns else None
    x_raw = predictor_matrix(h, {"cooling_since_sunset_c": np.nan})
    y = _col(h, "observed_min_c")
    phys_min = physical_night(h).minimum_c
    cal = fit_arrays(x_raw, y, phys_min, min_nights=min_nights, half_life_nights=half_life_nights,
                     prior_nights=prior_nights, last_night=last)
    if cal.model == CALIBRATED:
        u = rolling_pit(h.reset_index(drop=True), x_raw, y, phys_min, min_nights=min_nights,
                        half_life_nights=half_life_nights, prior_nights=prior_nights)
        cal.pit_levels = pit_levels(u, half_life_nights=half_life_nights)
        cal.pit_nights = int(np.isfinite(u).sum()) if len(cal.pit_levels) else 0
    return cal


def fit_arrays(x_raw, y, physical_min_c, *, min_nights: int = MIN_NIGHTS,
               half_life_nights: float = HALF_LIFE_NIGHTS, prior_nights: float = PRIOR_NIGHTS,
               last_night: str | None = None) -> Calibration:
    """:func:`fit_calibration` on arrays (oldest night first); used by the hindcast.

    Parameters
    ----------
    x_raw : ndarray (n, 7)
        :func:`predictor_matrix` with missing ``cooling_since_sunset_c`` left NaN.
    y : ndarray (n,)
        Observed minima [°C].
    physical_min_c : ndarray (n,)
        Physical-model minima of the same nights [°C].

    Returns
    -------
    Calibration
    """
    n = len(y)
    min_nights = max(int(min_nights), 2)  # the spread needs at least two residuals
    settings = {"half_life_nights": float(half_life_nights), "prior_nights": float(prior_nights),
                "min_nights": min_nights}
    if n == 0:
        cal = Calibration.physical_default()
        cal.settings = settings
        return cal
    phys = np.asarray(physical_min_c, dtype=float)
    w = 0.5 ** ((n - 1 - np.arange(n)) / half_life_nights)
    cloud = x_raw[:, PREDICTORS.index("cloud_cover_pct")]
    wind = x_raw[:, PREDICTORS.index("wind_speed_ms")]
    rad = is_radiative(cloud, wind)

    spread = {}
    err = y - phys
    for name, mask in (("radiative", rad), ("other", ~rad)):
        s0 = PHYSICAL_SPREAD_C[name]
        spread[name] = float(np.sqrt((PRIOR_SPREAD_NIGHTS * s0**2 + np.sum(w[mask] * err[mask] ** 2))
                                     / (PRIOR_SPREAD_NIGHTS + np.sum(w[mask]))))
    if n < min_nights:
        return Calibration(model=PHYSICAL, training_nights=n, physical_spread_c=spread, last_night=last_night,
                           settings=settings)

    j_cs = PREDICTORS.index("cooling_since_sunset_c")
    cs = x_raw[:, j_cs]
    ok_cs = np.isfinite(cs)
    fill = {"cooling_since_sunset_c": float(w[ok_cs] @ cs[ok_cs] / w[ok_cs].sum()) if ok_cs.any() else 0.0}
    x = x_raw.copy()
    x[~ok_cs, j_cs] = fill["cooling_since_sunset_c"]
    wn = w / w.mean()
    center = (wn @ x) / n
    scale = np.sqrt((wn @ (x - center) ** 2) / n)
    scale = np.where(scale > 1e-6, scale, 1.0)
    z = np.empty((n, x.shape[1] + 1))
    z[:, 0] = 1.0
    z[:, 1:] = (x - center) / scale
    zw = z * wn[:, None]
    gram = z.T @ zw
    p1 = z.shape[1]
    prior = np.linalg.solve(gram + 1e-6 * np.eye(p1), zw.T @ phys)
    penalty = prior_nights * np.eye(p1)
    g_inv = np.linalg.inv(gram + penalty)
    coef = g_inv @ (zw.T @ y + penalty @ prior)
    leverage = ((zw @ g_inv) * z).sum(axis=1)
    loo = (y - z @ coef) / np.maximum(1.0 - leverage, 1e-3)

    order = np.argsort(loo, kind="stable")
    return Calibration(
        model=CALIBRATED, training_nights=n, physical_spread_c=spread, center=center, scale=scale,
        coef=coef, prior_coef=prior, residual_c=loo[order], residual_cloud_pct=cloud[order],
        residual_wind_ms=wind[order], residual_weight=w[order], fill=fill, last_night=last_night,
        settings=settings)


# --------------------------------------------------------------------------- recalibration
def pit_of(quantiles_c, observed_c) -> np.ndarray:
    """Probability integral transform of each observation under its forecast's quantile table.

    Parameters
    ----------
    quantiles_c : ndarray (N, K)
        Quantiles at :data:`advisory.forecast.result.LEVELS` [°C].
    observed_c : array_like (N,)
        Observed minima [°C].

    Returns
    -------
    ndarray (N,)
        ``F(y)`` in (0, 1), linear between the tabulated levels; NaN where the
        table or the observation is missing.
    """
    from advisory.forecast.result import table_prob_below

    q = np.asarray(quantiles_c, dtype=float)
    y = np.asarray(observed_c, dtype=float)
    out = np.full(len(y), np.nan)
    ok = np.isfinite(y) & np.isfinite(q).all(axis=1) if q.size else np.zeros(len(y), bool)
    if ok.any():
        out[ok] = np.clip(table_prob_below(q[ok], y[ok]), LEVELS[0] / 2, 1 - (1 - LEVELS[-1]) / 2)
    return out


def pit_levels(pit, *, half_life_nights: float = HALF_LIFE_NIGHTS,
               prior_nights: float = PIT_PRIOR_NIGHTS, min_nights: int = 10) -> np.ndarray:
    """The recalibration map from a station's past PIT values (oldest first).

    Parameters
    ----------
    pit : array_like (M,)
        PIT values of the station's replayed forecasts, oldest first (NaN
        skipped).
    half_life_nights : float
        Recency half-life of their weights, in nights.
    prior_nights : float
        Weight of the identity map, in nights.
    min_nights : int
        Fewer PIT values than this give no map.

    Returns
    -------
    ndarray (K,) or empty
        For each level ``tau`` of :data:`LEVELS`, the raw-distribution level to
        read; non-decreasing; below the median never above ``tau`` itself (a
        cold tail is only widened).
    """
    u = np.asarray(pit, dtype=float)
    u = u[np.isfinite(u)]
    m = len(u)
    if m < min_nights:
        return np.zeros(0)
    w = 0.5 ** ((m - 1 - np.arange(m)) / half_life_nights)
    order = np.argsort(u, kind="stable")
    us, ws = u[order], w[order]
    pos = (np.cumsum(ws) - 0.5 * ws) / ws.sum()
    g_inv = np.interp(LEVELS, pos, us)
    share = ws.sum() / (ws.sum() + prior_nights)
    taus = share * g_inv + (1.0 - share) * LEVELS
    lower = LEVELS < 0.5
    taus[lower] = np.minimum(taus[lower], LEVELS[lower])
    return np.clip(np.maximum.accumulate(taus), LEVELS[0], LEVELS[-1])


def recalibrate_table(quantiles_c, levels) -> np.ndarray:
    """Read each row of a raw quantile table (N, K) at the levels of a PIT map (K,)."""
    q = np.asarray(quantiles_c, dtype=float)
    levels = np.asarray(levels, dtype=float)
    if len(levels) == 0 or len(q) == 0:
        return q
    j = np.clip(np.searchsorted(LEVELS, levels, side="right") - 1, 0, len(LEVELS) - 2)
    f = np.clip((levels - LEVELS[j]) / (LEVELS[j + 1] - LEVELS[j]), 0.0, 1.0)
    return q[:, j] * (1.0 - f) + q[:, j + 1] * f


def rolling_pit(states: pd.DataFrame, x_raw, y, physical_min_c, *, min_nights: int = MIN_NIGHTS,
                half_life_nights: float = HALF_LIFE_NIGHTS, prior_nights: float = PRIOR_NIGHTS,
                max_nights: int = PIT_MAX_NIGHTS, chunk: int = 256) -> np.ndarray:
    """PIT of each of the last ``max_nights`` nights under the raw forecast it would have had.

    Night ``j`` is forecast from a calibration fitted on nights ``0 .. j-1``
    (consecutive verified nights: each window closes at sunrise + 1 h, before
    the next evening), without any PIT map -- the rolling origin of
    :mod:`advisory.forecast.hindcast`.

    Parameters
    ----------
    states : pandas.DataFrame
        The verified nights' evening states, oldest first, index 0..n-1.
    x_raw, y, physical_min_c
        As for :func:`fit_arrays`.

    Returns
    -------
    ndarray (n,)
        PIT values, NaN for nights not replayed or forecast by the physical
        model.
    """
    n = len(y)
    out = np.full(n, np.nan)
    first = max(int(min_nights), 2, n - int(max_nights))
    for a in range(first, n, chunk):
        b = min(a + chunk, n)
        cals = [fit_arrays(x_raw[max(0, j - MAX_NIGHTS):j], y[max(0, j - MAX_NIGHTS):j],
                           physical_min_c[max(0, j - MAX_NIGHTS):j], min_nights=min_nights,
                           half_life_nights=half_life_nights, prior_nights=prior_nights)
                for j in range(a, b)]
        q, model, _, _ = forecast_quantiles(states.iloc[a:b], cals)
        u = pit_of(q, y[a:b])
        out[a:b] = np.where(model == CALIBRATED, u, np.nan)
    return out


# --------------------------------------------------------------------------- forecasting
def _weighted_quantiles(res, wts, levels_z):
    """Quantiles at LEVELS of weighted samples, row by row.

    ``res`` (n, M) ascending per row, ``wts`` (n, M) >= 0 with zero-weight
    padding only at the end of a row.  Hazen plotting positions, linear
    interpolation, normal tails (weighted standard deviation) beyond the first
    and last position.
    """
    n, m = res.shape
    k = len(LEVELS)
    tot = wts.sum(axis=1, keepdims=True)
    pos = (np.cumsum(wts, axis=1) - 0.5 * wts) / tot
    real = wts > 0
    m_real = real.sum(axis=1)
    pos = np.where(real, pos, 2.0)
    rows = np.arange(n)
    offset = 3.0 * rows[:, None]
    count = np.searchsorted((pos + offset).ravel(), (LEVELS[None, :] + offset).ravel(),
                            side="right").reshape(n, k) - rows[:, None] * m
    j = np.clip(count, 1, np.maximum(m_real - 1, 1)[:, None])
    r_lo = np.take_along_axis(res, j - 1, axis=1)
    r_hi = np.take_along_axis(res, j, axis=1)
    p_lo = np.take_along_axis(pos, j - 1, axis=1)
    p_hi = np.take_along_axis(pos, j, axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        f = np.clip(np.where(p_hi > p_lo, (LEVELS[None, :] - p_lo) / (p_hi - p_lo), 0.0), 0.0, 1.0)
    q = r_lo + f * (r_hi - r_lo)
    mean = (wts * res).sum(axis=1) / tot[:, 0]
    sd = np.sqrt((wts * (res - mean[:, None]) ** 2).sum(axis=1) / tot[:, 0])
    first_p, first_r = pos[:, 0], res[:, 0]
    last_i = np.maximum(m_real - 1, 0)
    last_p, last_r = pos[rows, last_i], res[rows, last_i]
    low = first_r[:, None] + sd[:, None] * (levels_z[None, :] - ndtri(first_p)[:, None])
    high = last_r[:, None] + sd[:, None] * (levels_z[None, :] - ndtri(last_p)[:, None])
    q = np.where(LEVELS[None, :] < first_p[:, None], np.minimum(low, q), q)
    return np.where(LEVELS[None, :] > last_p[:, None], np.maximum(high, q), q)


def _calibrated_quantiles(cals, which, x, cloud, wind, chunk_elems=2_000_000):
    """Quantile table (len(which), K) for rows using calibrated models ``cals[which]``."""
    s = len(cals)
    m = max(len(c.residual_c) for c in cals)
    p = len(PREDICTORS)
    coef = np.array([c.coef for c in cals])
    center = np.array([c.center for c in cals])
    scale = np.array([c.scale for c in cals])
    res = np.zeros((s, m))
    rcl = np.zeros((s, m))
    rwd = np.zeros((s, m))
    rwt = np.zeros((s, m))
    for i, c in enumerate(cals):
        k = len(c.residual_c)
        res[i, :k], rcl[i, :k], rwd[i, :k], rwt[i, :k] = (c.residual_c, c.residual_cloud_pct,
                                                          c.residual_wind_ms, c.residual_weight)
        res[i, k:] = c.residual_c[-1]
    zx = (x - center[which]) / scale[which]
    mean = coef[which, 0] + np.einsum("ij,ij->i", zx, coef[which, 1:p + 1])
    # blocks sharing a station share its evening: weight the residuals once per distinct evening
    keys = np.column_stack([which.astype(float), cloud, wind])
    uniq, inverse = np.unique(keys, axis=0, return_inverse=True)
    inverse = inverse.ravel()
    u_which = uniq[:, 0].astype(np.int64)
    u_cloud, u_wind = uniq[:, 1], uniq[:, 2]
    spread = np.empty((len(uniq), len(LEVELS)))
    step = max(1, chunk_elems // max(m, 1))
    for a in range(0, len(uniq), step):
        b = min(a + step, len(uniq))
        wi = u_which[a:b]
        d2 = ((u_cloud[a:b, None] - rcl[wi]) / ANALOG_CLOUD_PCT) ** 2 \
            + ((u_wind[a:b, None] - rwd[wi]) / ANALOG_WIND_MS) ** 2
        wts = rwt[wi] * (np.exp(-0.5 * d2) + ANALOG_FLOOR)
        spread[a:b] = _weighted_quantiles(res[wi], wts, _Z_LEVELS)
    q = mean[:, None] + spread[inverse]
    for slot, c in enumerate(cals):
        if len(c.pit_levels):
            rows = which == slot
            q[rows] = recalibrate_table(q[rows], c.pit_levels)
    return q


def _resolve(calibrations, states, n):
    if calibrations is None:
        return [None] * n
    if isinstance(calibrations, Calibration):
        return [calibrations] * n
    if isinstance(calibrations, Mapping):
        keys = states["station"].to_numpy(dtype=object) if "station" in states.columns else [None] * n
        return [calibrations.get(k) for k in keys]
    if isinstance(calibrations, Sequence) and not isinstance(calibrations, str):
        if len(calibrations) != n:
            raise ValueError("one calibration (or None) per row of states is needed")
        return list(calibrations)
    raise TypeError("calibrations must be None, a Calibration, a sequence or a mapping by station")


def forecast_quantiles(states: pd.DataFrame, calibrations=None, physical: PhysicalNight | None = None):
    """Quantile table of the minimum for each row of ``states`` (the core of :func:`forecast_night`).

    Returns
    -------
    quantiles_c : ndarray (N, K)
        Minimum at :data:`advisory.forecast.result.LEVELS` [°C]; NaN rows
        where the status is not ok.
    model : ndarray of str (N,)
    training_nights : ndarray of int (N,)
    physical : PhysicalNight
    """
    n = len(states)
    phys = physical if physical is not None else physical_night(states)
    cals = _resolve(calibrations, states, n)
    status_ok = (states["status"].to_numpy(dtype=object) == OK) if "status" in states.columns \
        else np.ones(n, bool)
    ok = status_ok & np.isfinite(phys.minimum_c)
    q = np.full((n, len(LEVELS)), np.nan)
    model = np.where(ok, PHYSICAL, "").astype(object)
    nights = np.array([0 if c is None else int(c.training_nights) for c in cals], dtype=np.int64)

    calibrated = np.array([ok[i] and cals[i] is not None and cals[i].model == CALIBRATED for i in range(n)],
                          dtype=bool)
    phys_rows = ok & ~calibrated
    if phys_rows.any():
        rad = is_radiative(phys.cloud_cover_pct, phys.wind_speed_ms)
        spread_rad = np.array([(c or _DEFAULT).physical_spread_c["radiative"] for c in cals])
        spread_oth = np.array([(c or _DEFAULT).physical_spread_c["other"] for c in cals])
        sd = np.where(rad, spread_rad, spread_oth)
        q[phys_rows] = phys.minimum_c[phys_rows, None] + sd[phys_rows, None] * _Z_LEVELS[None, :]
    if calibrated.any():
        rows = np.flatnonzero(calibrated)
        uniq: dict[int, int] = {}
        cal_list: list[Calibration] = []
        which = np.empty(len(rows), dtype=np.int64)
        for k, i in enumerate(rows):
            slot = uniq.get(id(cals[i]))
            if slot is None:
                slot = uniq[id(cals[i])] = len(cal_list)
                cal_list.append(cals[i])
            which[k] = slot
        sub = states.iloc[rows]
        fills = [cal_list[w].fill for w in which]
        x = predictor_matrix(sub)
        cs_missing = ~np.isfinite(_col(sub, "cooling_since_sunset_c"))
        if cs_missing.any():
            j = PREDICTORS.index("cooling_since_sunset_c")
            x[cs_missing, j] = [fills[i].get("cooling_since_sunset_c", 0.0) for i in np.flatnonzero(cs_missing)]
        q[rows] = _calibrated_quantiles(cal_list, which, x, phys.cloud_cover_pct[rows], phys.wind_speed_ms[rows])
        model[rows] = CALIBRATED
    nights = np.where(model == CALIBRATED, nights, np.where(ok, nights, 0))
    return q, model, nights, phys


_DEFAULT = Calibration.physical_default()


def _assumed(states, n):
    out = np.empty(n, dtype=object)
    src = states["assumed"].to_numpy(dtype=object) if "assumed" in states.columns else [()] * n
    for i, a in enumerate(src):
        out[i] = tuple(a) if isinstance(a, tuple | list) else ()
    return out


def forecast_night(states: pd.DataFrame, calibrations=None, *, block=None) -> NightForecast:
    """Forecast tonight's minimum for N blocks.

    Parameters
    ----------
    states : pandas.DataFrame
        Evening states, one row per block
        (:func:`advisory.forecast.evening.evening_states`).
    calibrations : None, Calibration, sequence or mapping
        ``None`` (physical model everywhere), one :class:`Calibration` for all
        rows, one per row (``None`` allowed), or a mapping ``station ->
        Calibration`` looked up with ``states["station"]``.
    block : array_like, optional
        Block identifiers carried into the result.

    Returns
    -------
    NightForecast
    """
    q, model, nights, phys = forecast_quantiles(states, calibrations)
    n = len(states)
    status = np.where(np.isfinite(q[:, 0]), OK, "no_forecast").astype(object)
    reason = states["reason"].to_numpy(dtype=object) if "reason" in states.columns \
        else np.full(n, None, dtype=object)
    reason = np.array([None if s == OK else (r if isinstance(r, str) else "No usable evening observations.")
                       for s, r in zip(status, reason, strict=True)], dtype=object)
    ref = pd.DatetimeIndex(states["reference_time"])
    sunrise = pd.DatetimeIndex(states["sunrise"])
    return NightForecast(
        status=status, reason=reason, model=model.astype(str), training_nights=nights,
        reference_time=ref, sunrise=sunrise,
        minimum_time=sunrise + pd.Timedelta(hours=MINIMUM_LAG_H),
        reference_temp_c=phys.air_temp_c, quantiles_c=q, physical=phys,
        assumed=_assumed(states, n),
        block=None if block is None else np.asarray(block, dtype=object),
        station=states["station"].to_numpy(dtype=object) if "station" in states.columns else None,
        night=states["night"].to_numpy(dtype=object) if "night" in states.columns else None,
    )


def forecast_blocks(observations, latitude, longitude, night, tz, *, station=None, calibrations=None,
                    reference_offset_h=REFERENCE_OFFSET_H, max_age_min=MAX_AGE_MIN, block=None):
    """Sun times, evening states and forecast for N blocks in one call.

    Parameters
    ----------
    observations : DataFrame or mapping
        As for :func:`advisory.forecast.evening.evening_states`.
    latitude, longitude : array_like (N,) or float
        Block positions [degrees].
    night : date or array_like of dates
        Local date of the evening.
    tz : str or array_like of str
        IANA zone of each block.
    station : array_like (N,), optional
        Station key of each block.
    calibrations : see :func:`forecast_night`
    reference_offset_h : float or array_like (N,), default 2
        Reference time after sunset [h], per block.
    max_age_min : float, default 90
        Oldest acceptable observation [min].
    block : array_like (N,), optional
        Block identifiers.

    Returns
    -------
    forecast : NightForecast
    states : pandas.DataFrame
        The evening states behind it (one row per block).
    """
    from advisory.physics.sun import sun_times_batch

    sun = sun_times_batch(latitude, longitude, night, tz)
    states = evening_states(observations, sun, station=station, reference_offset_h=reference_offset_h,
                            max_age_min=max_age_min)
    return forecast_night(states, calibrations, block=block), states
