"""Forecast of tonight's minimum for N blocks, as plain numpy arrays.

:class:`NightForecast` is what the risk and notice code consumes.  Every block's
forecast distribution of the night minimum is stored as a table of quantiles at
fixed probability levels (:data:`LEVELS`, 0.1 % to 99.9 %), so that any quantile
and the probability of any threshold are one vectorised interpolation away:

>>> fc.p50                    # forecast minimum (median) per block [°C]
>>> fc.quantile(0.1)          # p10 per block
>>> fc.prob_below(-2.2)       # P(min <= -2.2 °C) per block
>>> fc.prob_below(crit_c)     # or one threshold per block (array of N)
>>> times, temps = fc.curve() # hourly curve, arrays of shape (H, N)
>>> fc.crossing_time(0.0)     # when the median curve reaches 0 °C (NaT: never)

Blocks without a forecast (stale data, polar day...) have ``status ==
"no_forecast"``, a ``reason`` and NaN everywhere.  All times are UTC
(``datetime64[ns, UTC]``).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from advisory.forecast.cooling import (
    CURVE_END_AFTER_SUNRISE_H,
    PhysicalNight,
    curve_fraction,
    hours_to_fraction,
)

__all__ = ["LEVELS", "PHYSICAL", "CALIBRATED", "NightForecast", "table_quantile", "table_prob_below", "table_crps",
           "two_piece_table"]

#: Probability levels of the stored quantile table.
LEVELS = np.concatenate([[0.001, 0.0025, 0.005], np.round(np.arange(0.01, 0.995, 0.01), 2),
                         [0.995, 0.9975, 0.999]])
#: Model name: the physical cooling model (no or too little site history).
PHYSICAL = "physical"
#: Model name: the site-calibrated regression.
CALIBRATED = "calibrated"

_NS_PER_H = 3600 * 10**9


def table_quantile(quantiles_c, q) -> np.ndarray:
    """Quantile ``q`` of each row of a quantile table (N, K) at :data:`LEVELS`."""
    q = float(q)
    if not LEVELS[0] <= q <= LEVELS[-1]:
        raise ValueError(f"quantile must be within [{LEVELS[0]}, {LEVELS[-1]}]")
    j = int(np.clip(np.searchsorted(LEVELS, q, side="right") - 1, 0, len(LEVELS) - 2))
    f = (q - LEVELS[j]) / (LEVELS[j + 1] - LEVELS[j])
    return quantiles_c[:, j] * (1 - f) + quantiles_c[:, j + 1] * f


def table_prob_below(quantiles_c, threshold_c) -> np.ndarray:
    """P(value <= threshold) for each row of a quantile table (N, K) at :data:`LEVELS`.

    Below the 0.1 % quantile the probability is 0, above the 99.9 % quantile 1;
    NaN rows give NaN.
    """
    q = np.asarray(quantiles_c, dtype=float)
    n, k = q.shape
    x = np.broadcast_to(np.asarray(threshold_c, dtype=float), (n,))
    below = (q <= x[:, None]).sum(axis=1)
    j = np.clip(below, 1, k - 1)
    rows = np.arange(n)
    lo, hi = q[rows, j - 1], q[rows, j]
    with np.errstate(invalid="ignore", divide="ignore"):
        f = np.where(hi > lo, (x - lo) / (hi - lo), 1.0)
    p = LEVELS[j - 1] + np.clip(f, 0.0, 1.0) * (LEVELS[j] - LEVELS[j - 1])
    p = np.where(below == 0, 0.0, np.where(below >= k, 1.0, p))
    return np.where(np.isfinite(q[:, 0]) & np.isfinite(x), p, np.nan)


def _crps_weights() -> np.ndarray:
    """Trapezoid weights over the levels, the flat tails beyond the first and last level included."""
    t = LEVELS
    w = np.empty(len(t))
    w[1:-1] = (t[2:] - t[:-2]) / 2.0
    w[0] = t[0] + (t[1] - t[0]) / 2.0
    w[-1] = (1.0 - t[-1]) + (t[-1] - t[-2]) / 2.0
    return w


_CRPS_W = _crps_weights()


def table_crps(quantiles_c, observed_c) -> np.ndarray:
    """Continuous ranked probability score of each row of a quantile table (N, K) at :data:`LEVELS`.

    CRPS is twice the integral over probability levels of the quantile (pinball)
    score, ``CRPS(F, y) = 2 \\int_0^1 (1{y < Q(tau)} - tau) (Q(tau) - y) dtau``
    (Gneiting & Raftery 2007 [1]_, eq. 21; Laio & Tamea 2007 [2]_), evaluated
    by the trapezoid rule on the table's levels (the quantile below the first
    and above the last level taken as flat).  Same unit as the values [°C];
    lower is better; for a point forecast it is the absolute error.

    Returns
    -------
    ndarray (N,)
        NaN where the row or the observation is missing.

    References
    ----------
    .. [1] Gneiting, T. & Raftery, A. E. (2007) Strictly proper scoring rules,
       prediction, and estimation. J. Amer. Statist. Assoc. 102, 359-378.
    .. [2] Laio, F. & Tamea, S. (2007) Verification tools for probabilistic
       forecasts of continuous hydrological variables. Hydrol. Earth Syst. Sci.
       11, 1267-1277 (citation details from memory).
    """
    q = np.asarray(quantiles_c, dtype=float)
    y = np.asarray(observed_c, dtype=float)[:, None]
    score = ((y < q).astype(float) - LEVELS[None, :]) * (q - y)
    return 2.0 * (score @ _CRPS_W)


def two_piece_table(p10_c, p50_c, p90_c) -> np.ndarray:
    """Quantile table (N, K) of the two-piece normal through a forecast's 10th, 50th and 90th percentiles.

    The same reading of three stored quantiles as
    :class:`advisory.risk.damage.MinTempForecast` uses without a full table: a
    normal of spread ``(p50 - p10) / z90`` below the median and
    ``(p90 - p50) / z90`` above it, ``z90 = 1.2816``.
    """
    from scipy.special import ndtri

    p10, p50, p90 = (np.atleast_1d(np.asarray(v, dtype=float)) for v in (p10_c, p50_c, p90_c))
    z = ndtri(LEVELS)[None, :]
    z90 = ndtri(0.9)
    lo = np.maximum(p50 - p10, 0.0)[:, None] / z90
    hi = np.maximum(p90 - p50, 0.0)[:, None] / z90
    return p50[:, None] + np.where(z < 0, lo, hi) * z


@dataclass
class NightForecast:
    """Night-minimum forecast of N blocks.

    Attributes
    ----------
    status : ndarray of str, (N,)
        ``"ok"`` or ``"no_forecast"``.
    reason : ndarray of object, (N,)
        Why there is no forecast (None when ok).
    model : ndarray of str, (N,)
        ``"physical"``, ``"calibrated"`` or ``""`` (no forecast).
    training_nights : ndarray of int, (N,)
        Verified nights behind the calibration (0 for the physical model).
    reference_time, sunrise, minimum_time : pandas.DatetimeIndex, (N,)
        UTC; the minimum is expected at ``minimum_time`` (just after sunrise).
    reference_temp_c : ndarray, (N,)
        Air temperature at the reference time [°C].
    quantiles_c : ndarray, (N, K)
        Minimum temperature at the probability levels :data:`LEVELS` [°C].
    physical : PhysicalNight
        Physical-model quantities; they give the curve its shape.
    assumed : ndarray of object, (N,)
        Tuples of plain sentences on assumptions (e.g. unknown cloud).
    block, station, night : ndarray of object, (N,)
        Identifiers carried through from the caller (may be None).
    """

    status: np.ndarray
    reason: np.ndarray
    model: np.ndarray
    training_nights: np.ndarray
    reference_time: pd.DatetimeIndex
    sunrise: pd.DatetimeIndex
    minimum_time: pd.DatetimeIndex
    reference_temp_c: np.ndarray
    quantiles_c: np.ndarray
    physical: PhysicalNight
    assumed: np.ndarray
    block: np.ndarray = field(default=None)
    station: np.ndarray = field(default=None)
    night: np.ndarray = field(default=None)

    def __post_init__(self):
        n = len(self.status)
        for name in ("reference_time", "sunrise", "minimum_time"):
            idx = pd.DatetimeIndex(getattr(self, name))
            idx = idx.tz_localize("UTC") if idx.tz is None else idx.tz_convert("UTC")
            setattr(self, name, idx.as_unit("ns"))
        for name in ("block", "station", "night"):
            if getattr(self, name) is None:
                setattr(self, name, np.full(n, None, dtype=object))

    def __len__(self) -> int:
        return len(self.status)

    @property
    def ok(self) -> np.ndarray:
        """Boolean mask of blocks with a forecast."""
        return self.status == "ok"

    # ---------------------------------------------------------------- distribution
    def quantile(self, q) -> np.ndarray:
        """Quantile ``q`` (0.001 <= q <= 0.999) of each block's minimum [°C], shape (N,)."""
        return table_quantile(self.quantiles_c, q)

    @property
    def p10(self) -> np.ndarray:
        """10 % quantile of the minimum [°C] (a colder night is a 1-in-10 chance)."""
        return self.quantile(0.1)

    @property
    def p50(self) -> np.ndarray:
        """Median forecast minimum [°C]; this is *the* forecast minimum."""
        return self.quantile(0.5)

    @property
    def p90(self) -> np.ndarray:
        """90 % quantile of the minimum [°C]."""
        return self.quantile(0.9)

    def prob_below(self, threshold_c) -> np.ndarray:
        """P(minimum <= threshold) for each block, shape (N,).

        Parameters
        ----------
        threshold_c : float or array_like of shape (N,)
            Temperature [°C], one for all blocks or one per block.

        Returns
        -------
        ndarray
            Probabilities in [0, 1] (NaN where there is no forecast).  Below
            the 0.1 % quantile the probability is reported as 0, above the
            99.9 % quantile as 1.
        """
        return np.where(self.ok, table_prob_below(self.quantiles_c, threshold_c), np.nan)

    # ---------------------------------------------------------------- curve
    def _curve_values(self, hours, q):
        """Temperatures at ``hours`` after the reference time (shape (H, N)) for quantile q."""
        tmin = self.quantile(q)
        t_ref = self.reference_temp_c
        frac = curve_fraction(self.physical, hours)
        cooling = t_ref - (t_ref - tmin) * frac
        after = np.maximum(hours - self.physical.hours_to_minimum, 0.0)
        return np.where(after > 0, tmin + self.physical.warming_k_per_h * after, cooling)

    def curve(self, q: float = 0.5):
        """Hourly curve from the reference time to two hours after sunrise.

        Points: the reference time, every whole UTC hour after it, and the end
        (sunrise + 2 h).  Blocks with shorter nights are padded with NaT/NaN.

        Parameters
        ----------
        q : float, default 0.5
            Quantile of the minimum the curve runs to (0.5: the forecast; 0.1:
            the cold side).

        Returns
        -------
        times : ndarray of datetime64[ns], shape (H, N)
            UTC times (naive numpy values in UTC; NaT padding).
        temps_c : ndarray, shape (H, N)
            Air temperature [°C].
        """
        ref = self.reference_time.asi8
        end = (self.sunrise + pd.Timedelta(hours=CURVE_END_AFTER_SUNRISE_H)).asi8
        ok = self.ok
        first_hour = (ref // _NS_PER_H + 1) * _NS_PER_H
        n_hours = np.where(ok, np.maximum((end - first_hour) // _NS_PER_H + 1, 0), 0)
        h_max = int(n_hours.max()) + 2 if len(n_hours) else 2
        k = np.arange(h_max)[:, None]
        t = np.where(k == 0, ref[None, :], first_hour[None, :] + (k - 1) * _NS_PER_H)
        t = np.where(k == n_hours[None, :] + 1, end[None, :], t)
        valid = (k <= n_hours[None, :] + 1) & ok[None, :] & (t <= end[None, :])
        hours = (t - ref[None, :]) / _NS_PER_H
        temps = np.where(valid, self._curve_values(hours, q), np.nan)
        times = np.where(valid, t, np.iinfo(np.int64).min).astype("datetime64[ns]")
        return times, temps

    def crossing_time(self, threshold_c, q: float = 0.5) -> pd.DatetimeIndex:
        """When the curve first falls to a temperature, per block.

        Parameters
        ----------
        threshold_c : float or array_like of shape (N,)
            Temperature [°C].
        q : float, default 0.5
            Quantile curve to use (0.1 for an early, cautious start time).

        Returns
        -------
        pandas.DatetimeIndex, (N,)
            UTC time (exact inversion of the curve); the reference time itself
            if the air is already at or below the threshold; ``NaT`` if the
            curve never reaches it before the minimum (or no forecast).
        """
        n = len(self)
        x = np.broadcast_to(np.asarray(threshold_c, dtype=float), (n,))
        tmin = self.quantile(q)
        t_ref = self.reference_temp_c
        fall = t_ref - tmin
        with np.errstate(invalid="ignore", divide="ignore"):
            share = np.where(fall > 0, (t_ref - x) / np.where(fall > 0, fall, 1.0), np.inf)
        already = t_ref <= x
        reached = self.ok & np.isfinite(x) & (already | ((fall > 0) & (share <= 1.0)))
        hours = np.where(already, 0.0, hours_to_fraction(self.physical, np.where(np.isfinite(share), share, 0.0)))
        ns = self.reference_time.asi8 + np.round(np.nan_to_num(hours) * _NS_PER_H).astype(np.int64)
        out = pd.DatetimeIndex(ns.astype("datetime64[ns]")).tz_localize("UTC")
        return out.where(reached)

    # ---------------------------------------------------------------- tables
    def to_frame(self) -> pd.DataFrame:
        """One row per block: identifiers, status, model, p10/p50/p90, times."""
        return pd.DataFrame({
            "block": self.block, "station": self.station, "night": self.night,
            "status": self.status, "reason": self.reason, "model": self.model,
            "training_nights": self.training_nights, "reference_time": self.reference_time,
            "minimum_time": self.minimum_time, "reference_temp_c": self.reference_temp_c,
            "forecast_min_c": self.p50, "forecast_p10_c": self.p10, "forecast_p90_c": self.p90,
            "assumed": self.assumed,
        })

    def row(self, i: int) -> dict:
        """Block ``i`` as a JSON-friendly dict (ISO times, floats, None for missing)."""
        def num(v):
            return None if not np.isfinite(v) else round(float(v), 2)

        def iso(ts):
            return None if pd.isna(ts) else ts.isoformat()

        return {
            "block": self.block[i], "station": self.station[i],
            "night": None if self.night[i] is None else str(self.night[i]),
            "status": str(self.status[i]), "reason": self.reason[i], "model": str(self.model[i]),
            "training_nights": int(self.training_nights[i]),
            "reference_time": iso(self.reference_time[i]), "minimum_time": iso(self.minimum_time[i]),
            "reference_temp_c": num(self.reference_temp_c[i]),
            "forecast_min_c": num(self.p50[i]), "forecast_p10_c": num(self.p10[i]),
            "forecast_p90_c": num(self.p90[i]), "assumed": list(self.assumed[i] or ()),
        }
