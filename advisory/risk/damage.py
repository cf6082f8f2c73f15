"""Bud damage over a frost night: the kill curve, the distribution of the night minimum, and the
expected kill and its probabilities for every block (vectorised).

Damage model
------------
Bud kill after a 30-minute exposure at temperature ``T`` is a logistic curve
through the published points (10 % at T10, 90 % at T90)::

    kill(T) = 1 / (1 + exp((T - T50) / s)),  T50 = (T10 + T90) / 2,
    s = (T10 - T90) / (2 ln 9)

so that kill(T10) = 0.1 and kill(T90) = 0.9 exactly.  The logistic is the form
used for bud-kill curves in the frost literature (Snyder & de Melo-Abreu
2005, ch. 5, citing Katz, Murphy & Winkler 1982); the spread is fixed by the
two table values.

Duration.  The tables are for 30 minutes, so the temperature used is not the
curve's instantaneous minimum but its *30-minute sustained minimum*: the
hourly curve is interpolated to 5-minute steps and the lowest 30-minute
running maximum is taken (a short dip counts less than a long flat bottom).
Longer exposures do more harm than the 30-minute tables show; as a model
assumption (settable, not from the tables) the effective temperature is
lowered by ``duration_shift_c_per_doubling`` for each doubling of the time the
curve stays within ``near_min_band_c`` of its sustained minimum beyond 30
minutes, up to ``duration_max_doublings`` doublings.

Uncertainty.  The hourly curve is shifted so that its minimum equals each
possible night minimum m.  Since the sustained minimum and the duration both
move with the shift, the effective temperature is m + (sustained - minimum) -
shift, and:

* P(kill >= 10 %) = F(T10 - offset), P(kill >= 90 %) = F(T90 - offset), with F
  the forecast CDF of the minimum and offset = sustained - minimum - shift;
* expected kill = E[kill(m + offset)], by quantile quadrature (equal-probability
  midpoints of F).

References
----------
.. [1] Snyder, R. L. & de Melo-Abreu, J. P. (2005) Frost Protection: fundamentals, practice and
   economics, vol. 1. FAO Environment and Natural Resources Series 10, ch. 5 (damage functions).
.. [2] Ballard, J. K., Proebsting, E. L. & Tukey, R. B., WSU Extension bulletins (T10 and T90,
   30-minute exposure); see :mod:`advisory.crops.thresholds`.
.. [3] Katz, R. W., Murphy, A. H. & Winkler, R. L. (1982) Assessing the value of frost forecasts to
   orchardists. J. Appl. Meteor. 21, 518-531 (citation details from memory; cited by [1] ch. 5 for
   logistic damage functions).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, fields

import numpy as np
from scipy.special import ndtr, ndtri

from advisory.risk.frost_data import FrostSettings, NightCurves
from advisory.risk.levels import level_index
from advisory.risk.night_curve import _hours_at_or_below, _ns, sustained_minimum_c

LN9 = math.log(9.0)


def kill_fraction(temp_c, t10_c, t90_c):
    """Fraction of buds killed by a 30-minute exposure, logistic through T10 and T90.

    Parameters
    ----------
    temp_c : array_like
        Exposure (bud or air) temperature [°C].
    t10_c, t90_c : array_like
        Temperatures killing 10 % and 90 % of buds [°C]; T10 > T90.

    Returns
    -------
    kill : float or ndarray
        Killed fraction in [0, 1]; exactly 0.1 at T10 and 0.9 at T90.

    References
    ----------
    .. [1] Snyder & de Melo-Abreu (2005), ch. 5; [4] Katz et al. (1982).
    """
    t, t10, t90 = (np.asarray(a, dtype=float) for a in (temp_c, t10_c, t90_c))
    t50 = 0.5 * (t10 + t90)
    s = (t10 - t90) / (2.0 * LN9)
    z = np.clip((t - t50) / s, -700.0, 700.0)
    out = 1.0 / (1.0 + np.exp(z))
    return float(out) if out.ndim == 0 else out


def temp_for_kill_c(kill, t10_c, t90_c):
    """Inverse of :func:`kill_fraction`: the temperature giving a kill fraction [°C]."""
    k, t10, t90 = (np.asarray(a, dtype=float) for a in (kill, t10_c, t90_c))
    t50 = 0.5 * (t10 + t90)
    s = (t10 - t90) / (2.0 * LN9)
    out = t50 + s * np.log((1.0 - k) / k)
    return float(out) if out.ndim == 0 else out


# --------------------------------------------------------------------------------------------------
# Minimum-temperature distribution
# --------------------------------------------------------------------------------------------------

_Z90 = float(ndtri(0.9))  # 1.2816


@dataclass(frozen=True)
class MinTempForecast:
    """Forecast distribution of each block's night minimum.

    Attributes
    ----------
    p10_c, p50_c, p90_c : ndarray, shape (n,)
        10th, 50th, 90th percentiles [°C]; p10 <= p50 <= p90.
    cdf : callable, optional
        ``cdf(x) -> P(min <= x)`` for ``x`` of shape (n, k) [°C], returning the
        same shape, non-decreasing along the last axis.  When absent, a
        two-piece normal through the three quantiles is used.
    quantile : callable, optional
        ``quantile(q) -> (n, k)``: the inverse of ``cdf`` at probabilities ``q``
        (k,) [°C], when known exactly; otherwise ``cdf`` is inverted numerically.
    """

    p10_c: np.ndarray
    p50_c: np.ndarray
    p90_c: np.ndarray
    cdf: Callable[[np.ndarray], np.ndarray] | None = None
    quantile: Callable[[np.ndarray], np.ndarray] | None = None

    def __post_init__(self):
        for name in ("p10_c", "p50_c", "p90_c"):
            object.__setattr__(self, name, np.atleast_1d(np.asarray(getattr(self, name), dtype=float)))
        if not (self.p10_c.shape == self.p50_c.shape == self.p90_c.shape):
            raise ValueError("p10_c, p50_c and p90_c must have the same shape")
        if np.any(self.p10_c > self.p50_c + 1e-9) or np.any(self.p50_c > self.p90_c + 1e-9):
            raise ValueError("quantiles must satisfy p10 <= p50 <= p90")

    @property
    def _sigmas(self):
        lo = np.maximum(self.p50_c - self.p10_c, 0.0) / _Z90
        hi = np.maximum(self.p90_c - self.p50_c, 0.0) / _Z90
        return lo, hi

    def cdf_at(self, x) -> np.ndarray:
        """P(min <= x) for ``x`` of shape (n,) or (n, k)."""
        x = np.asarray(x, dtype=float)
        squeeze = x.ndim == 1
        x2 = x[:, None] if squeeze else x
        if self.cdf is not None:
            out = np.clip(np.asarray(self.cdf(x2), dtype=float), 0.0, 1.0)
        else:
            lo, hi = self._sigmas
            d = x2 - self.p50_c[:, None]
            sig = np.where(d < 0, lo[:, None], hi[:, None])
            with np.errstate(divide="ignore", invalid="ignore"):
                z = np.where(sig > 0, d / np.where(sig > 0, sig, 1.0), np.where(d < 0, -np.inf, np.inf))
            # A point mass at p50 (zero spread) counts as "<= x" when x >= p50.
            out = np.where((sig == 0) & (d == 0), 1.0, ndtr(z))
        return out[:, 0] if squeeze else out

    def quantiles(self, q) -> np.ndarray:
        """Quantiles of the minimum for probabilities ``q`` (k,), shape (n, k) [°C]."""
        q = np.asarray(q, dtype=float)
        if self.cdf is None:
            lo, hi = self._sigmas
            z = ndtri(q)[None, :]
            sig = np.where(z < 0, lo[:, None], hi[:, None])
            return self.p50_c[:, None] + sig * z
        if self.quantile is not None:
            return np.asarray(self.quantile(q), dtype=float)
        # Invert a user CDF on a grid spanning well beyond the quantiles.
        spread = np.maximum(self.p90_c - self.p10_c, 0.5)
        x = np.linspace(self.p10_c - 4 * spread, self.p90_c + 4 * spread, 401, axis=1)  # (n, g)
        f = np.maximum.accumulate(self.cdf_at(x), axis=1)
        return _interp_rows(q, f, x)


def _interp_rows(xq: np.ndarray, xp: np.ndarray, fp: np.ndarray) -> np.ndarray:
    """Row-wise linear interpolation: for each row i, interp(xq, xp[i], fp[i]).

    ``xp`` (n, g) non-decreasing per row; ``xq`` (k,) or (n, k).  Returns (n, k),
    clamped to the end values outside each row's range.  One ``searchsorted``
    over all rows at once (rows are separated by offsets), so memory stays
    O(n (g + k)).
    """
    xp = np.asarray(xp, float)
    fp = np.asarray(fp, float)
    n, g = xp.shape
    xq2 = np.broadcast_to(np.asarray(xq, float), (n, np.shape(xq)[-1])) if np.ndim(xq) == 1 else np.asarray(xq)
    lo = min(np.nanmin(xp), np.nanmin(xq2))
    span = max(np.nanmax(xp), np.nanmax(xq2)) - lo + 1.0
    off = (np.arange(n, dtype=float) * span)[:, None]
    flat = (xp - lo + off).ravel()
    pos = np.searchsorted(flat, (xq2 - lo + off).ravel(), side="right").reshape(xq2.shape)
    idx = pos - (np.arange(n) * g)[:, None]  # count of xp <= xq within the row
    i1 = np.clip(idx, 1, g - 1)
    i0 = i1 - 1
    rows = np.arange(n)[:, None]
    x0, x1 = xp[rows, i0], xp[rows, i1]
    y0, y1 = fp[rows, i0], fp[rows, i1]
    with np.errstate(divide="ignore", invalid="ignore"):
        w = np.where(x1 > x0, (xq2 - x0) / (x1 - x0), 0.0)
    out = y0 + np.clip(w, 0.0, 1.0) * (y1 - y0)
    out = np.where(idx <= 0, fp[:, :1], out)
    return np.where(idx >= g, fp[:, -1:], out)


@dataclass(frozen=True)
class DamageArrays:
    """Vectorised damage results, all shape (n,) (see :class:`BlockRisk` for meanings)."""

    curve_min_c: np.ndarray
    time_of_min_ns: np.ndarray
    sustained_offset_c: np.ndarray
    near_min_hours: np.ndarray
    duration_shift_c: np.ndarray
    expected_kill: np.ndarray
    p_kill_10: np.ndarray
    p_kill_90: np.ndarray
    level_index: np.ndarray


def damage(curves: NightCurves, forecast: MinTempForecast, t10_c, t90_c, *,
           duration_shift_c_per_doubling=0.15, duration_max_doublings=3.0, near_min_band_c=0.5,
           level_thresholds: Mapping[str, np.ndarray] | None = None, n_quad: int = 200) -> DamageArrays:
    """Expected bud kill, P(kill >= 10 %), P(kill >= 90 %) and risk level for every block.

    Parameters
    ----------
    curves : NightCurves
        Hourly curves (only ``air_temp_c`` and ``times_utc`` are used).
    forecast : MinTempForecast
        Distribution of the night minimum.
    t10_c, t90_c : array_like, shape (n,)
        Critical temperatures [°C].
    duration_shift_c_per_doubling, duration_max_doublings, near_min_band_c : array_like
        Duration adjustment (module docstring), scalars or (n,).
    level_thresholds : mapping, optional
        Arrays (n,) or scalars for the :class:`FrostSettings` ``level_*``
        fields; defaults from :class:`FrostSettings`.
    n_quad : int
        Quadrature points for the expected kill.

    Returns
    -------
    DamageArrays
    """
    air = curves.air_temp_c
    n = air.shape[0]
    t10 = np.broadcast_to(np.asarray(t10_c, float), (n,))
    t90 = np.broadcast_to(np.asarray(t90_c, float), (n,))
    times_ns = _ns(curves.times_utc)
    cmin = np.nanmin(air, axis=1)
    imin = np.nanargmin(np.where(np.isfinite(air), air, np.inf), axis=1)
    sus = sustained_minimum_c(curves.times_utc, air)
    offset = sus - cmin
    band = np.broadcast_to(np.asarray(near_min_band_c, float), (n,))
    near_h = _hours_at_or_below(times_ns, air, sus + band)
    rate = np.broadcast_to(np.asarray(duration_shift_c_per_doubling, float), (n,))
    cap = np.broadcast_to(np.asarray(duration_max_doublings, float), (n,))
    doublings = np.clip(np.log2(np.maximum(near_h, 0.5) / 0.5), 0.0, cap)
    shift = rate * doublings
    eff_offset = offset - shift  # effective exposure temperature = night minimum + eff_offset

    p10k = forecast.cdf_at(t10 - eff_offset)
    p90k = forecast.cdf_at(t90 - eff_offset)
    q = (np.arange(n_quad) + 0.5) / n_quad
    mins = forecast.quantiles(q)  # (n, K)
    ek = kill_fraction(mins + eff_offset[:, None], t10[:, None], t90[:, None]).mean(axis=1)

    d = {f.name: getattr(FrostSettings(), f.name) for f in fields(FrostSettings) if f.name.startswith("level_")}
    if level_thresholds:
        d.update(level_thresholds)
    th = {k: np.broadcast_to(np.asarray(v, float), (n,)) for k, v in d.items()}
    lvl = level_index(p10k, p90k, ek, th)
    return DamageArrays(cmin, times_ns[imin].astype(float), offset, near_h, shift, ek, p10k, p90k, lvl)
