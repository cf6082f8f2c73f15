"""Times on a night's curves, vectorised over blocks: sustained minimum, hours at or below a
threshold, first crossing down, the stop after sunrise, rounding, nanosecond instants.
"""

from __future__ import annotations

import math
from datetime import UTC, datetime

import numpy as np
import pandas as pd

_FINE_STEP_NS = 5 * 60 * 10**9  # sub-step for the sustained minimum and durations: about 5 minutes


def _fine(times_ns: np.ndarray, values: np.ndarray):
    """Linear interpolation of (n, m) values to about 5-minute sub-steps (NaN propagates)."""
    n, m = values.shape
    steps = max(1, int(round(float(np.median(np.diff(times_ns))) / _FINE_STEP_NS)))
    frac = np.arange(steps) / steps
    v0, v1 = values[:, :-1], values[:, 1:]
    fine = (v0[:, :, None] + (v1 - v0)[:, :, None] * frac).reshape(n, -1)
    fine = np.concatenate([fine, values[:, -1:]], axis=1)
    dt = np.diff(times_ns).astype(float)
    tf = (times_ns[:-1, None].astype(float) + dt[:, None] * frac).reshape(-1)
    tf = np.concatenate([tf, times_ns[-1:].astype(float)])
    return tf, fine


def sustained_minimum_c(times_utc, air_temp_c, window_min: float = 30.0):
    """Lowest temperature sustained for ``window_min`` minutes on each curve.

    The curve is interpolated linearly to sub-steps; the running maximum over
    a window of ``window_min`` is taken and its minimum returned.

    Parameters
    ----------
    times_utc : DatetimeIndex, shape (m,)
    air_temp_c : ndarray, shape (n, m)
        NaN outside the block's night.
    window_min : float
        Exposure window [min] (30 for the published tables).

    Returns
    -------
    sustained_c : ndarray, shape (n,)
    """
    t = _ns(times_utc)
    tf, fine = _fine(t, np.atleast_2d(np.asarray(air_temp_c, float)))
    step = np.median(np.diff(tf))
    w = max(int(round(window_min * 60e9 / step)), 0) + 1
    filled = np.where(np.isfinite(fine), fine, -np.inf)
    if w > 1 and fine.shape[1] >= w:
        win = np.lib.stride_tricks.sliding_window_view(filled, w, axis=1).max(axis=2)
        win = np.where(np.isfinite(win), win, np.inf)  # windows touching NaN are ignored
        out = win.min(axis=1)
        # Too short a valid stretch: fall back to the plain minimum.
        return np.where(np.isfinite(out), out, np.nanmin(fine, axis=1))
    return np.nanmin(fine, axis=1)


def _hours_at_or_below(times_ns, values, thr):
    """Hours each row spends at or below thr (n,) (fine-step count)."""
    tf, fine = _fine(times_ns, values)
    dt_h = np.median(np.diff(tf)) / 3.6e12
    return (fine <= thr[:, None]).sum(axis=1) * dt_h


def _crossing_down(times_ns, series, thr, valid):
    """First time each row's series falls to thr or below (linear interpolation).

    Returns (time_ns float (n,), found (n,), index (n,)).
    """
    n, m = series.shape
    mask = valid & (series <= thr[:, None])
    found = mask.any(axis=1)
    i = np.argmax(mask, axis=1)
    rows = np.arange(n)
    ip = np.maximum(i - 1, 0)
    prev_ok = (i > 0) & valid[rows, ip]
    s0, s1 = series[rows, ip], series[rows, i]
    with np.errstate(divide="ignore", invalid="ignore"):
        frac = np.where(prev_ok & (s0 > s1), (s0 - thr) / (s0 - s1), 1.0)
    frac = np.clip(np.nan_to_num(frac, nan=1.0), 0.0, 1.0)
    t0, t1 = times_ns[ip].astype(float), times_ns[i].astype(float)
    t = np.where(prev_ok, t0 + frac * (t1 - t0), t1)
    return np.where(found, t, np.nan), found, i


def _stop_time(times_ns, margin_ok, g, valid, after_idx, sunrise_ns):
    """First time after ``after_idx`` and sunrise at which the stop condition holds.

    ``g`` (n, m) is positive when the condition holds (used to interpolate the
    crossing); ``margin_ok`` = valid & (g > 0).  Returns (time_ns, found).
    """
    n, m = g.shape
    idx = np.arange(m)[None, :]
    after_sun = times_ns[None, :].astype(float) >= sunrise_ns[:, None]
    cand = margin_ok & after_sun & (idx > after_idx[:, None])
    found = cand.any(axis=1)
    j = np.argmax(cand, axis=1)
    rows = np.arange(n)
    jp = np.maximum(j - 1, 0)
    prev_in = (j - 1 > after_idx) & valid[rows, jp]
    prev_ok = prev_in & margin_ok[rows, jp]
    g0, g1 = g[rows, jp], g[rows, j]
    with np.errstate(divide="ignore", invalid="ignore"):
        frac = np.where(prev_in & ~prev_ok & (g1 > g0), (0.0 - g0) / (g1 - g0), 1.0)
    frac = np.clip(np.nan_to_num(frac, nan=1.0), 0.0, 1.0)
    t0, t1 = times_ns[jp].astype(float), times_ns[j].astype(float)
    t_cross = np.where(prev_in & ~prev_ok, t0 + frac * (t1 - t0), np.where(prev_ok, t0, t1))
    t = np.maximum(t_cross, np.where(np.isfinite(sunrise_ns), sunrise_ns, -np.inf))
    return np.where(found, t, np.nan), found


def _ns(times) -> np.ndarray:
    """Nanoseconds since the epoch (int64) of a tz-aware DatetimeIndex, whatever its unit."""
    return pd.DatetimeIndex(times).tz_convert("UTC").tz_localize(None).to_numpy().astype(
        "datetime64[ns]").astype(np.int64)


def _round_ns(t_ns, minutes, up):
    q = minutes * 60e9
    if isinstance(t_ns, float):  # one instant (per block in a plan): plain Python is much faster
        if not math.isfinite(t_ns):
            return math.nan
        return (math.ceil(t_ns / q) if up else math.floor(t_ns / q)) * q
    f = np.ceil if up else np.floor
    return np.where(np.isfinite(t_ns), f(t_ns / q) * q, np.nan)


def _to_dt(t_ns) -> datetime | None:
    if t_ns is None or not np.isfinite(t_ns):
        return None
    return datetime.fromtimestamp(float(t_ns) / 1e9, tz=UTC)
