"""The rest of the day's temperature curve, drawn in the morning through the morning's own reading.

:func:`advisory.forecast.daytime.diurnal_temperature_c` draws a whole day
from its minimum and maximum.  When the heat note is made (a little after
sunrise + 2 h) the station has already measured the first hours of the day,
so the curve here:

* **passes through the morning reading** (the anchor: the first reading at or
  after sunrise + 2 h, :func:`morning_anchor`) and rises from it to the day's
  maximum ``Tx`` at ``tx = solar noon + lag``:
  ``Ta + (Tx - Ta) (1 - (1 - u)^q)``, ``u = (t - ta) / (tx - ta)``.  ``q = 1``
  is a straight rise, ``q`` near 1.6 resembles the quarter sine of Parton &
  Logan (1981) [2]_ and Cesaraccio et al. (2001) [1]_;
* **falls after the maximum toward the sunset temperature** of Cesaraccio et
  al. (2001) [1]_, ``To = Tx - k (Tx - Tp)`` with ``Tp`` the next morning's
  minimum: ``Tx - (Tx - To) v^r``, ``v = (t - tx) / (ss - tx)`` (``r = 2`` is
  close to their quarter cosine, ``r = 1`` a straight fall);
* **through the night** follows Cesaraccio et al.'s square-root fall from
  ``To`` to ``Tp``; **before the anchor** it joins the minimum at sunrise to
  the anchor with a quarter sine (those hours are observed: pass
  ``observed_c`` to show the readings instead);
* **when the day's maximum has already been read** before the anchor (a warm
  night ahead of a cold front: ``max_so_far_c >= Tx``), the afternoon does not
  climb back to it: it peaks at ``min(Tx, Ta + spent_rise_c)``.  The stated
  maximum still stands, in the morning's readings.

What is fitted locally (:func:`calibrate_day_shapes`).  The four shape
numbers (lag, ``q``, ``k``, ``r``) are fitted per station by least squares
over a grid, on the hours after the anchor between sunrise and sunset, given
each day's observed maximum and next minimum, separately for three classes of
cloud cover at the anchor (clear below 30 %, broken, overcast from 70 %):
clear days peak later and sharper, overcast days earlier and flatter.  A class
with too few days, or a day without a cloud reading, uses the shape fitted on
all days.  ``spent_rise_c`` is fitted on the days whose maximum came before
the anchor (1 °C, this tool's choice, when there are fewer than five).
The grid search is separable: for a given lag, the rise depends only on ``q``
and the fall only on ``k`` and ``r``.

Measured on pvlib's ``723170TYA.CSV`` (see
``tests/reference/test_daytime_tmy3.py``; shapes fitted on the odd months,
scored on the even months; given each day's observed maximum and next
minimum): every hour from sunrise to sunset, with the hours up to the reading
shown as read, RMSE 1.18 °C (Cesaraccio et al. with calibrated coefficients
and no reading: 1.69); the hours after the reading alone 1.37 (that curve:
1.72).  Rolling origin over the months: 1.25 and 1.44.

Where the sun does not rise or set the curve is
:func:`~advisory.forecast.daytime.diurnal_temperature_c`'s polar fallback.

References
----------
.. [1] Cesaraccio, C., Spano, D., Duce, P. & Snyder, R. L. (2001) An improved
   model for determining degree-day values from daily temperature data.
   Int. J. Biometeorol. 45, 161-169.
.. [2] Parton, W. J. & Logan, J. A. (1981) A model for diurnal variation in soil
   and air temperature. Agricultural Meteorology 23, 205-216.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field

import numpy as np

from advisory.forecast.daytime import _day_inputs, diurnal_temperature_c, to_hours

__all__ = [
    "CLEAR_BELOW_PCT",
    "DEFAULT_SHAPES",
    "DayShape",
    "DayShapes",
    "OVERCAST_FROM_PCT",
    "anchored_temperature_c",
    "calibrate_day_shapes",
    "morning_anchor",
]

#: Cloud cover at the anchor below which a day counts as clear [%] (this tool's choice).
CLEAR_BELOW_PCT = 30.0
#: Cloud cover at the anchor from which a day counts as overcast [%] (this tool's choice).
OVERCAST_FROM_PCT = 70.0
#: Rise after the anchor when the maximum was already read, when too few such days to fit it [°C]
#: (this tool's choice).
_SPENT_RISE_C = 1.0
#: A maximum within this of the highest morning reading counts as already read [°C].
_SPENT_TOL_C = 0.05
#: The peak is kept at least this long after the anchor [h], and before sunset by this share of the day.
_MIN_RISE_H = 0.5
_PEAK_BEFORE_SUNSET_FRAC = 0.05


@dataclass(frozen=True)
class DayShape:
    """One set of shape numbers of the anchored curve (module docstring).

    Attributes
    ----------
    max_lag_h : float
        Hours from solar noon to the maximum.
    rise_exponent : float
        ``q`` of the rise from the anchor (1 straight, larger: steeper first).
    sunset_fall_fraction : float
        ``k`` in ``To = Tx - k (Tx - Tp)`` (Cesaraccio et al. 2001 publish 0.39).
    fall_exponent : float
        ``r`` of the fall to sunset (1 straight, larger: slower first).
    """

    max_lag_h: float = 3.25
    rise_exponent: float = 1.75
    sunset_fall_fraction: float = 0.25
    fall_exponent: float = 0.875

    def to_dict(self) -> dict:
        return {k: float(v) for k, v in asdict(self).items()}

    @classmethod
    def from_dict(cls, d: dict) -> DayShape:
        return cls(**{k: float(d[k]) for k in cls.__dataclass_fields__ if k in d})


@dataclass(frozen=True)
class DayShapes:
    """A station's shapes by cloud class at the anchor, and its rise after an already-read maximum.

    Attributes
    ----------
    any_sky, clear, broken, overcast : DayShape
        Shape for all days (used without a cloud reading), and per class.
    spent_rise_c : float
        Rise after the anchor when the day's maximum was read before it [°C].
    """

    any_sky: DayShape = field(default_factory=DayShape)
    clear: DayShape = field(default_factory=DayShape)
    broken: DayShape = field(default_factory=DayShape)
    overcast: DayShape = field(default_factory=DayShape)
    spent_rise_c: float = _SPENT_RISE_C

    def to_dict(self) -> dict:
        return {"any_sky": self.any_sky.to_dict(), "clear": self.clear.to_dict(),
                "broken": self.broken.to_dict(), "overcast": self.overcast.to_dict(),
                "spent_rise_c": float(self.spent_rise_c)}

    @classmethod
    def from_dict(cls, d: dict) -> DayShapes:
        kw = {k: DayShape.from_dict(d[k]) for k in ("any_sky", "clear", "broken", "overcast") if k in d}
        if "spent_rise_c" in d:
            kw["spent_rise_c"] = float(d["spent_rise_c"])
        return cls(**kw)


#: Shapes before a station has its own: :func:`calibrate_day_shapes` on the odd months of pvlib's
#: ``723170TYA.CSV`` (a humid piedmont airport, 36.1° N), hour-ending stamps taken as is.
DEFAULT_SHAPES = DayShapes(any_sky=DayShape(3.25, 1.75, 0.25, 0.875), clear=DayShape(4.25, 2.5, 0.3, 0.875),
                           broken=DayShape(3.25, 2.0, 0.25, 0.625), overcast=DayShape(3.25, 1.5, 0.25, 0.625),
                           spent_rise_c=0.5)


def _shape_arrays(shapes, cloud_cover_pct, shape):
    """Per-day (lag, q, k, r) arrays of ``shape`` chosen by the cloud class at the anchor."""
    if isinstance(shapes, DayShape):
        shapes = DayShapes(shapes, shapes, shapes, shapes)
    cols = ("max_lag_h", "rise_exponent", "sunset_fall_fraction", "fall_exponent")
    out = [np.full(shape, getattr(shapes.any_sky, c), dtype=float) for c in cols]
    if cloud_cover_pct is not None:
        cloud = np.broadcast_to(np.asarray(cloud_cover_pct, dtype=float), shape)
        with np.errstate(invalid="ignore"):
            masks = ((cloud < CLEAR_BELOW_PCT, shapes.clear),
                     ((cloud >= CLEAR_BELOW_PCT) & (cloud < OVERCAST_FROM_PCT), shapes.broken),
                     (cloud >= OVERCAST_FROM_PCT, shapes.overcast))
        for m, s in masks:
            for a, c in zip(out, cols, strict=True):
                a[m] = getattr(s, c)
    return out


def _anchored_core(t, tn, tx, sr, ss, noon, ta, temp_a, tp, srn, top, ssp, lag, q, k, r, max_so_far, spent):
    """The anchored curve on broadcast arrays (all per-day inputs with a trailing axis of 1)."""
    tx = np.maximum(tx, tn)
    no_anchor = ~(np.isfinite(ta) & np.isfinite(temp_a))
    ta = np.where(no_anchor, sr, ta)
    temp_a = np.where(no_anchor, tn, temp_a)
    if max_so_far is not None:
        read = np.isfinite(max_so_far) & (max_so_far >= tx - _SPENT_TOL_C) & ~no_anchor
        tx = np.where(read, np.minimum(tx, temp_a + spent), tx)
    tx = np.maximum(tx, temp_a)
    day_len = ss - sr
    late = ss - _PEAK_BEFORE_SUNSET_FRAC * day_len
    t_max = np.minimum(np.maximum(noon + lag, np.maximum(noon, ta + _MIN_RISE_H)), late)
    t_max = np.maximum(t_max, ta)
    to = tx - k * (tx - tp)
    with np.errstate(invalid="ignore", divide="ignore"):
        s = np.clip(np.where(ta > sr, (t - sr) / (ta - sr), 1.0), 0.0, 1.0)
        morning = tn + (temp_a - tn) * np.sin(0.5 * np.pi * s)
        u = np.clip(np.where(t_max > ta, (t - ta) / (t_max - ta), 1.0), 0.0, 1.0)
        rise = temp_a + (tx - temp_a) * (1.0 - (1.0 - u) ** q)
        v = np.clip(np.where(ss > t_max, (t - t_max) / (ss - t_max), 1.0), 0.0, 1.0)
        fall = tx - (tx - to) * v ** r
        w = np.clip((t - ss) / (srn - ss), 0.0, 1.0)
        night = to + (tp - to) * np.sqrt(w)
        z = np.clip((t - ssp) / (sr - ssp), 0.0, 1.0)
        dawn = top + (tn - top) * np.sqrt(z)
    return np.where(t < sr, dawn, np.where(t <= ta, morning, np.where(
        t <= t_max, rise, np.where(t <= ss, fall, night))))


def anchored_temperature_c(times, min_temp_c, max_temp_c, sunrise, sunset, solar_noon, anchor_time,
                           anchor_temp_c, *, next_min_temp_c=None, next_sunrise=None, prev_sunset_temp_c=None,
                           prev_sunset=None, max_so_far_c=None, cloud_cover_pct=None,
                           shapes: DayShapes | DayShape = DEFAULT_SHAPES, observed_c=None):
    """Hourly air temperature of a day drawn through its morning reading.

    See the module docstring for the pieces.  Vectorised like
    :func:`~advisory.forecast.daytime.diurnal_temperature_c`: per-day inputs
    of shape ``S``, ``times`` of shape ``(H,)`` or ``S + (H,)``.

    Parameters
    ----------
    times : array_like
        Instants to evaluate.
    min_temp_c, max_temp_c : array_like
        The day's minimum (placed at sunrise) and maximum [°C].
    sunrise, sunset, solar_noon : array_like
        Sun times of the day (NaN/NaT sunrise or sunset: polar fallback).
    anchor_time : array_like
        Time of the morning reading (NaN/NaT: no reading; the curve then
        rises from the minimum at sunrise with the same shape).
    anchor_temp_c : array_like
        The morning reading [°C].
    next_min_temp_c, next_sunrise, prev_sunset_temp_c, prev_sunset : array_like, optional
        As for :func:`~advisory.forecast.daytime.diurnal_temperature_c`.
    max_so_far_c : array_like, optional
        Highest reading of the day up to the anchor [°C]; when it is at the
        maximum, the afternoon rises only ``shapes.spent_rise_c``.
    cloud_cover_pct : array_like, optional
        Cloud cover at the anchor [%], choosing the shape's class.
    shapes : DayShapes or DayShape
        From :func:`calibrate_day_shapes` (or one shape for every sky).
    observed_c : array_like, optional
        Readings on the ``times`` grid [°C] (NaN where none).  Where finite
        and not after the anchor, they replace the curve.

    Returns
    -------
    air_temp_c : ndarray
        Shape ``S + (H,)``.

    References
    ----------
    .. [1] Cesaraccio et al. (2001).
    .. [2] Parton & Logan (1981).
    """
    t, (tn, tx, sr, ss, noon, ta, temp_a, tp, srn, top, ssp, msf, cloud) = _day_inputs(
        times, min_temp_c, max_temp_c, sunrise, sunset, solar_noon, anchor_time, anchor_temp_c,
        next_min_temp_c, next_sunrise, prev_sunset_temp_c, prev_sunset, max_so_far_c, cloud_cover_pct)
    per_day = np.broadcast_shapes(*(a.shape for a in (tn, tx, sr, ss, noon, ta, temp_a, msf, cloud) if a is not None))
    if isinstance(shapes, DayShape):
        shapes = DayShapes(shapes, shapes, shapes, shapes)
    lag, q, k, r = _shape_arrays(shapes, None if cloud is None else cloud[..., 0],
                                 per_day[:-1] if per_day else ())
    lag, q, k, r = (a[..., None] for a in (lag, q, k, r))
    tp = tn if tp is None else np.where(np.isfinite(tp), tp, tn)
    srn = sr + 24.0 if srn is None else np.where(np.isfinite(srn), srn, sr + 24.0)
    ssp = ss - 24.0 if ssp is None else np.where(np.isfinite(ssp), ssp, ss - 24.0)
    txc = np.maximum(tx, tn)
    top_default = txc - k * (txc - tn)
    top = top_default if top is None else np.where(np.isfinite(top), top, top_default)
    out = _anchored_core(t, tn, tx, sr, ss, noon, ta, temp_a, tp, srn, top, ssp, lag, q, k, r, msf,
                         shapes.spent_rise_c)
    polar = ~(np.isfinite(sr) & np.isfinite(ss) & (ss > sr))
    if np.any(polar):
        fallback = diurnal_temperature_c(times, min_temp_c, max_temp_c, sunrise, sunset, solar_noon)
        out = np.where(polar, fallback, out)
    if observed_c is not None:
        obs = np.asarray(observed_c, dtype=float)
        show = np.isfinite(obs) & np.isfinite(ta) & (t <= ta)
        out = np.where(show, obs, out)
    return out


def morning_anchor(times, observed_c, sunrise, *, lead_h: float = 2.0, tolerance_h: float = 1.5,
                   cloud_cover_pct=None) -> dict:
    """The morning reading of each day: the first at or after sunrise + ``lead_h``.

    The same rule as :func:`advisory.forecast.daytime.morning_features`.

    Parameters
    ----------
    times : array_like
        Shape ``(D, H)``: the instants of the readings, in order (e.g. from
        local midnight).
    observed_c : array_like
        Shape ``(D, H)``: air temperature [°C], NaN where missing.
    sunrise : array_like
        Shape ``(D,)``.
    lead_h, tolerance_h : float
        The reading must be in ``[sunrise + lead_h, sunrise + lead_h + tolerance_h]``.
    cloud_cover_pct : array_like, optional
        Shape ``(D, H)``: cloud cover [%] on the same grid.

    Returns
    -------
    dict of ndarray, each shape ``(D,)``
        ``anchor_time`` (hours, NaN when none), ``anchor_temp_c``,
        ``max_so_far_c`` (highest reading of the row up to the anchor),
        ``cloud_cover_pct`` (at the anchor) and ``index`` (column, -1 when none).
    """
    t = np.asarray(to_hours(times), dtype=float)
    obs = np.asarray(observed_c, dtype=float)
    sr = np.asarray(to_hours(sunrise), dtype=float)[:, None]
    start = sr + lead_h
    ok = np.isfinite(obs) & (t >= start) & (t <= start + tolerance_h)
    found = ok.any(axis=1)
    j = np.where(found, np.argmax(ok, axis=1), -1)
    rows = np.arange(len(t))
    jj = np.maximum(j, 0)
    at = np.where(found, t[rows, jj], np.nan)
    temp = np.where(found, obs[rows, jj], np.nan)
    upto = np.where(np.isfinite(obs) & (t <= at[:, None]), obs, -np.inf)
    so_far = upto.max(axis=1)
    so_far = np.where(found & np.isfinite(so_far), so_far, np.nan)
    cloud = np.full(len(t), np.nan)
    if cloud_cover_pct is not None:
        c = np.asarray(cloud_cover_pct, dtype=float)
        cloud = np.where(found, c[rows, jj], np.nan)
    return {"anchor_time": at, "anchor_temp_c": temp, "max_so_far_c": so_far, "cloud_cover_pct": cloud,
            "index": j}


# --------------------------------------------------------------------------- calibration
_LAGS_H = np.arange(0.5, 4.501, 0.25)
_RISE_Q = np.array([1.0, 1.25, 1.5, 1.75, 2.0, 2.5, 3.0, 3.5])
_FALL_K = np.arange(0.05, 0.801, 0.05)
_FALL_R = np.array([0.5, 0.625, 0.75, 0.875, 1.0, 1.25, 1.5, 2.0, 2.5, 3.0])
_SPENT_GRID_C = np.array([0.0, 0.5, 1.0, 1.5, 2.0, 3.0])


def _fit_shape(t, obs, mask, tx, sr, ss, noon, ta, temp_a, tp):
    """Least-squares (lag, q, k, r) on the masked hours; returns (DayShape, sse, n)."""
    n = int(mask.sum())
    if n == 0:
        return None, np.inf, 0
    t, obs = t[mask], obs[mask]          # only the scored hours, flattened
    tx, sr, ss, noon, ta, temp_a, tp = (np.broadcast_to(a, mask.shape)[mask]
                                        for a in (tx, sr, ss, noon, ta, temp_a, tp))
    late = ss - _PEAK_BEFORE_SUNSET_FRAC * (ss - sr)
    q = _RISE_Q[:, None]
    kk, rr = (a.ravel()[:, None] for a in np.meshgrid(_FALL_K, _FALL_R, indexing="ij"))
    best = (np.inf, None)
    with np.errstate(invalid="ignore", divide="ignore"):
        for lag in _LAGS_H:           # 17 lags; each one vectorised over the shape grid and the hours
            t_max = np.maximum(np.minimum(np.maximum(noon + lag, np.maximum(noon, ta + _MIN_RISE_H)), late), ta)
            in_rise = t <= t_max
            u = np.clip(np.where(t_max > ta, (t - ta) / (t_max - ta), 1.0), 0.0, 1.0)[in_rise]
            rise = temp_a[in_rise] + (tx - temp_a)[in_rise] * (1.0 - (1.0 - u) ** q)
            sse_rise = ((rise - obs[in_rise]) ** 2).sum(axis=1)
            f = ~in_rise
            v = np.clip(np.where(ss > t_max, (t - t_max) / (ss - t_max), 1.0), 0.0, 1.0)[f]
            fall = tx[f] - kk * (tx - tp)[f] * v ** rr
            sse_fall = ((fall - obs[f]) ** 2).sum(axis=1)
            iq, ikr = int(np.argmin(sse_rise)), int(np.argmin(sse_fall))
            sse = sse_rise[iq] + sse_fall[ikr]
            if sse < best[0]:
                best = (sse, DayShape(float(round(lag, 4)), float(_RISE_Q[iq]),
                                      float(round(kk.ravel()[ikr], 4)), float(rr.ravel()[ikr])))
    return best[1], best[0], n


def calibrate_day_shapes(times, observed_c, max_temp_c, sunrise, sunset, solar_noon, anchor_time, anchor_temp_c,
                         *, next_min_temp_c=None, min_temp_c=None, max_so_far_c=None, cloud_cover_pct=None,
                         min_days: int = 20, min_class_days: int = 20):
    """Fit a station's anchored-curve shapes to its own days.

    Least squares over a grid (lag 0.5-4.5 h by 0.25, ``q`` 1-2.5, ``k``
    0.05-0.8 by 0.05, ``r`` 0.75-3) of the error of
    :func:`anchored_temperature_c` on the hours after the anchor from sunrise
    to sunset, given each day's observed maximum and next minimum.

    Parameters
    ----------
    times, observed_c : array_like
        Shape ``(D, H)``: instants and readings [°C] (NaN where missing).
    max_temp_c, sunrise, sunset, solar_noon : array_like
        Shape ``(D,)``.
    anchor_time, anchor_temp_c : array_like
        Shape ``(D,)``: the morning readings (:func:`morning_anchor`).
    next_min_temp_c : array_like, optional
        Shape ``(D,)``: each next morning's minimum (default: ``min_temp_c``).
    min_temp_c : array_like, optional
        Shape ``(D,)``: the day's minimum, only the default of the above.
    max_so_far_c : array_like, optional
        Shape ``(D,)``: highest reading up to the anchor; days with the
        maximum already read fit ``spent_rise_c`` only.
    cloud_cover_pct : array_like, optional
        Shape ``(D,)``: cloud at the anchor [%].
    min_days : int, default 20
        With fewer usable days, :data:`DEFAULT_SHAPES` is returned.
    min_class_days : int, default 20
        A cloud class with fewer days takes the all-days shape.

    Returns
    -------
    shapes : DayShapes
    rmse_c : float
        Root-mean-square error after the anchor on these days (NaN when the
        defaults are returned).
    """
    t, (tx, sr, ss, noon, ta, temp_a, tn, tp, msf, cloud) = _day_inputs(
        times, max_temp_c, sunrise, sunset, solar_noon, anchor_time, anchor_temp_c, min_temp_c,
        next_min_temp_c, max_so_far_c, cloud_cover_pct)
    obs = np.asarray(observed_c, dtype=float)
    if tp is None:
        tp = tn if tn is not None else np.full_like(tx, np.nan)
    elif tn is not None:
        tp = np.where(np.isfinite(tp), tp, tn)
    usable = (np.isfinite(tx) & np.isfinite(sr) & np.isfinite(ss) & np.isfinite(noon) & np.isfinite(ta)
              & np.isfinite(temp_a) & np.isfinite(tp))
    mask = usable & np.isfinite(obs) & (t > ta) & (t >= sr) & (t <= ss)
    spent = np.zeros_like(tx, dtype=bool) if msf is None else (np.isfinite(msf) & (msf >= tx - _SPENT_TOL_C))
    shape_mask = mask & ~spent
    if shape_mask.any(axis=1).sum() < min_days:
        return DEFAULT_SHAPES, float("nan")
    args = (t, obs, None, tx, sr, ss, noon, ta, temp_a, tp)

    def fit(rows):
        a = list(args)
        a[2] = shape_mask & rows
        return _fit_shape(*a)

    all_rows = np.ones_like(tx, dtype=bool)
    any_sky, _, _ = fit(all_rows)
    classes = {}
    if cloud is not None:
        with np.errstate(invalid="ignore"):
            rows = {"clear": cloud < CLEAR_BELOW_PCT,
                    "broken": (cloud >= CLEAR_BELOW_PCT) & (cloud < OVERCAST_FROM_PCT),
                    "overcast": cloud >= OVERCAST_FROM_PCT}
        for name, m in rows.items():
            if (shape_mask & m).any(axis=1).sum() >= min_class_days:
                classes[name] = fit(m)[0]
    shapes = DayShapes(any_sky, classes.get("clear", any_sky), classes.get("broken", any_sky),
                       classes.get("overcast", any_sky))
    cloud1 = None if cloud is None else cloud[:, 0]
    lag, q, k, r = (a[:, None] for a in _shape_arrays(shapes, cloud1, (len(t),)))
    tn_ = tp if tn is None else tn

    def curve(spent_c):
        return _anchored_core(t, tn_, tx, sr, ss, noon, ta, temp_a, tp, sr + 24.0, tx, ss - 24.0,
                              lag, q, k, r, msf, spent_c)

    spent_days = (mask & spent).any(axis=1)
    spent_c = _SPENT_RISE_C
    if spent_days.sum() >= 5:
        m = mask & spent
        sse = [np.sum((curve(c) - obs)[m] ** 2) for c in _SPENT_GRID_C]
        spent_c = float(_SPENT_GRID_C[int(np.argmin(sse))])
    shapes = DayShapes(shapes.any_sky, shapes.clear, shapes.broken, shapes.overcast, spent_c)
    err = (curve(spent_c) - obs)[mask]
    return shapes, float(np.sqrt(np.mean(err ** 2)))
