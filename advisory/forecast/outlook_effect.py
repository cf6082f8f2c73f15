"""What a night outlook (the forecaster's hourly sky cover and wind) changes in the night-minimum forecast.

The evening observations cannot see a sky that clears after midnight or a wind
that drops: those nights are the large warm misses of any evening-only
forecast.  A night outlook (:mod:`advisory.ingest.night_outlook`) gives the
forecaster's sky cover and wind for each hour of the night.  Its effect is
taken through the physical cooling model (:mod:`advisory.forecast.cooling`):

``delta = weight x (physical minimum with the outlook's night-mean sky and wind
- physical minimum with the evening's sky and wind)``

so a clearing sky or a dropping wind lowers the forecast by what the cooling
physics says it should, scaled by how far this station's record shows the
outlook can be trusted.

* **Until the station has** :data:`MIN_NIGHTS` **verified nights that carried an
  outlook**, the weight is :data:`DEFAULT_WEIGHT` and the change is bounded to
  :data:`DEFAULT_COLDER_MAX_C` colder and :data:`DEFAULT_WARMER_MAX_C` warmer
  (a judgement of this tool, not a published value: an unproven outlook may
  shift the forecast, a little, and more readily toward the cold side, because
  a missed frost costs a grower far more than a night of needless readiness --
  the cost-loss asymmetry of Snyder & de Melo-Abreu [1]_).
* **After that** the weight is a predictor's coefficient fitted on those nights
  (:func:`fit_outlook_weight`: the regression of the calibrated forecast's
  residual on the outlook's physical change, shrunk toward the default with
  the weight of :data:`PRIOR_NIGHTS` nights), and the bound widens to
  :data:`FITTED_MAX_C` either way.
* **Without an outlook nothing changes.**

The whole quantile table moves by ``delta``: the outlook informs the level of
the night, not how sure the evening is.

References
----------
.. [1] Snyder, R. L. & de Melo-Abreu, J. P. (2005) Frost Protection:
   fundamentals, practice and economics, vol. 1. FAO Environment and Natural
   Resources Series 10 (ch. 4 on forecasts; the economics of protection).
.. [2] Brunt, D. (1941) Physical and Dynamical Meteorology, Cambridge Univ.
   Press (the square-root-of-time cooling behind the physical model).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from advisory.forecast.cooling import MINIMUM_LAG_H, PhysicalNight

__all__ = ["DEFAULT_WEIGHT", "DEFAULT_COLDER_MAX_C", "DEFAULT_WARMER_MAX_C", "FITTED_MAX_C", "MIN_NIGHTS",
           "PRIOR_NIGHTS", "NightOutlookMeans", "outlook_means", "physical_change_c", "outlook_delta_c",
           "fit_outlook_weight", "outlook_reason", "outlook_shifts"]

#: Share of the physical change used before the station has proved the outlook.
DEFAULT_WEIGHT = 0.5
#: Largest colder shift before the weight is fitted [°C].
DEFAULT_COLDER_MAX_C = 2.0
#: Largest warmer shift before the weight is fitted [°C].
DEFAULT_WARMER_MAX_C = 1.0
#: Largest shift either way once the weight is fitted [°C].
FITTED_MAX_C = 3.0
#: Verified nights with an outlook needed to fit the weight.
MIN_NIGHTS = 30
#: Weight of the default in the fitted weight, in nights.
PRIOR_NIGHTS = 10.0
#: A sky change of this much [%] between the evening and the hours after midnight is named in the notice.
SKY_CHANGE_PCT = 30.0
#: A wind change of this much [m s-1] is named in the notice.
WIND_CHANGE_MS = 1.5


@dataclass(frozen=True)
class NightOutlookMeans:
    """One block's outlook over its night (reference time to sunrise); NaN where the outlook is silent.

    Attributes
    ----------
    sky_cover_pct, wind_speed_ms : float
        Means over the outlook hours of the window.
    late_sky_cover_pct : float
        Mean sky cover over the window's hours after local midnight.
    low_c : float
        Lowest forecast temperature of the window's hours.
    hours : int
        Outlook hours in the window.
    """

    sky_cover_pct: float = np.nan
    wind_speed_ms: float = np.nan
    late_sky_cover_pct: float = np.nan
    low_c: float = np.nan
    hours: int = 0


def outlook_means(hours: pd.DataFrame | None, reference_utc, sunrise_utc, tz: str) -> NightOutlookMeans:
    """Means of an outlook's hours inside one night's window.

    Parameters
    ----------
    hours : DataFrame or None
        Indexed by aware UTC time, columns ``sky_cover_pct``, ``wind_speed_ms``,
        ``air_temp_c`` (NaN where missing).
    reference_utc, sunrise_utc : datetime-like
        The window (the forecast's reference time to sunrise).
    tz : str
        The block's zone (for "after midnight").
    """
    if hours is None or len(hours) == 0 or pd.isna(reference_utc) or pd.isna(sunrise_utc):
        return NightOutlookMeans()
    t0, t1 = pd.Timestamp(reference_utc), pd.Timestamp(sunrise_utc)
    win = hours[(hours.index >= t0) & (hours.index <= t1)]
    if win.empty:
        return NightOutlookMeans()
    local = win.index.tz_convert(tz)
    late = win[(local.hour < 12)]
    return NightOutlookMeans(
        sky_cover_pct=float(win["sky_cover_pct"].mean()) if win["sky_cover_pct"].notna().any() else np.nan,
        wind_speed_ms=float(win["wind_speed_ms"].mean()) if win["wind_speed_ms"].notna().any() else np.nan,
        late_sky_cover_pct=float(late["sky_cover_pct"].mean()) if late["sky_cover_pct"].notna().any() else np.nan,
        low_c=float(win["air_temp_c"].min()) if win["air_temp_c"].notna().any() else np.nan,
        hours=int(len(win)))


def physical_change_c(night: PhysicalNight, sky_cover_pct, wind_speed_ms) -> np.ndarray:
    """Physical-model minimum with the outlook's sky and wind minus that with the evening's [°C].

    Parameters
    ----------
    night : PhysicalNight
        The evening's physical night for N blocks.
    sky_cover_pct, wind_speed_ms : array_like (N,)
        The outlook's night means; NaN keeps the evening's value.

    Returns
    -------
    ndarray (N,)
        0 where the outlook gives neither.
    """
    sky = np.asarray(sky_cover_pct, dtype=float)
    wind = np.asarray(wind_speed_ms, dtype=float)
    cloud_e = np.asarray(night.cloud_cover_pct, dtype=float)
    wind_e = np.asarray(night.wind_speed_ms, dtype=float)
    changed = PhysicalNight(night.air_temp_c, night.dew_point_c, np.where(np.isfinite(wind), wind, wind_e),
                            np.where(np.isfinite(sky), sky, cloud_e), night.hours_since_sunset,
                            night.hours_to_minimum - MINIMUM_LAG_H, pressure_kpa=night.pressure_kpa)
    delta = changed.minimum_c - night.minimum_c
    return np.where(np.isfinite(delta), delta, 0.0)


def outlook_delta_c(change_c, weight=None) -> np.ndarray:
    """The shift of the forecast [°C] from the physical change and the station's fitted weight (None: default)."""
    change = np.asarray(change_c, dtype=float)
    w = np.array([np.nan if v is None else float(v) for v in np.broadcast_to(
        np.asarray(weight, dtype=object), change.shape)], dtype=float)
    fitted = np.isfinite(w)
    shift = np.where(fitted, w, DEFAULT_WEIGHT) * change
    lo = np.where(fitted, -FITTED_MAX_C, -DEFAULT_COLDER_MAX_C)
    hi = np.where(fitted, FITTED_MAX_C, DEFAULT_WARMER_MAX_C)
    return np.clip(shift, lo, hi)


def fit_outlook_weight(change_c, residual_c, weights=None) -> tuple[float | None, int]:
    """Fit the outlook's weight on a station's verified nights that carried an outlook.

    Weighted least squares of ``residual = observed - forecast without the
    outlook`` on ``change`` (no intercept), shrunk toward
    :data:`DEFAULT_WEIGHT` with the weight of :data:`PRIOR_NIGHTS` typical
    nights, and kept within 0-1.5.

    Parameters
    ----------
    change_c : array_like (M,)
        :func:`physical_change_c` of each night.
    residual_c : array_like (M,)
        Observed minimum minus the calibrated forecast's median [°C].
    weights : array_like (M,), optional
        Recency weights.

    Returns
    -------
    weight : float or None
        None with fewer than :data:`MIN_NIGHTS` usable nights.
    nights : int
    """
    d = np.asarray(change_c, dtype=float)
    r = np.asarray(residual_c, dtype=float)
    w = np.ones(len(d)) if weights is None else np.asarray(weights, dtype=float)
    ok = np.isfinite(d) & np.isfinite(r) & np.isfinite(w)
    n = int(ok.sum())
    if n < MIN_NIGHTS:
        return None, n
    d, r, w = d[ok], r[ok], w[ok]
    typical = max(float(np.sum(w * d * d) / np.sum(w)), 0.25)
    lam = PRIOR_NIGHTS * typical
    beta = (float(np.sum(w * d * r)) + lam * DEFAULT_WEIGHT) / (float(np.sum(w * d * d)) + lam)
    return float(np.clip(beta, 0.0, 1.5)), n


def _pct(v: float) -> str:
    return f"{v:.0f} %"


def outlook_reason(means: NightOutlookMeans, evening_cloud_pct: float | None, evening_wind_ms: float | None,
                   delta_c: float, fitted: bool) -> str | None:
    """One plain sentence on what the outlook says and what it changed; None without an outlook."""
    if means.hours == 0:
        return None
    parts = []
    late = means.late_sky_cover_pct if np.isfinite(means.late_sky_cover_pct) else means.sky_cover_pct
    if np.isfinite(late):
        if evening_cloud_pct is None or not np.isfinite(evening_cloud_pct):
            parts.append(f"expects a sky {_pct(means.sky_cover_pct)} covered through the night (the station "
                         "measures no cloud)")
        elif evening_cloud_pct - late >= SKY_CHANGE_PCT:
            parts.append(f"expects clearing after midnight (sky cover {_pct(evening_cloud_pct)} this evening, "
                         f"{_pct(late)} later)")
        elif late - evening_cloud_pct >= SKY_CHANGE_PCT:
            parts.append(f"expects cloud to come in after midnight (sky cover {_pct(evening_cloud_pct)} this "
                         f"evening, {_pct(late)} later)")
        elif np.isfinite(means.sky_cover_pct) and abs(means.sky_cover_pct - evening_cloud_pct) >= 10.0:
            more = "more" if means.sky_cover_pct > evening_cloud_pct else "less"
            parts.append(f"expects {more} cloud overnight than this evening (sky cover "
                         f"{_pct(means.sky_cover_pct)} on average, {_pct(evening_cloud_pct)} now)")
    if np.isfinite(means.wind_speed_ms) and evening_wind_ms is not None and np.isfinite(evening_wind_ms):
        if evening_wind_ms - means.wind_speed_ms >= WIND_CHANGE_MS:
            parts.append(f"expects the wind to drop ({evening_wind_ms:.1f} m/s now, {means.wind_speed_ms:.1f} "
                         "m/s overnight)")
        elif means.wind_speed_ms - evening_wind_ms >= WIND_CHANGE_MS:
            parts.append(f"expects more wind ({evening_wind_ms:.1f} m/s now, {means.wind_speed_ms:.1f} m/s "
                         "overnight)")
        elif abs(means.wind_speed_ms - evening_wind_ms) >= 0.5:
            parts.append(f"expects {means.wind_speed_ms:.1f} m/s of wind overnight ({evening_wind_ms:.1f} m/s now)")
    said = "The night outlook " + (" and ".join(parts) if parts else "agrees with this evening's sky and wind")
    if abs(delta_c) >= 0.05:
        way = "lowered" if delta_c < 0 else "raised"
        how = ("by the weight this station's nights have earned it" if fitted
               else "by half what the cooling physics gives, within set bounds, until this station has "
                    f"{MIN_NIGHTS} checked nights with an outlook")
        said += f"; the forecast low is {way} {abs(delta_c):.1f} °C for it ({how})"
    if np.isfinite(means.low_c):
        said += f". The outlook's own low is {means.low_c:.0f} °C"
    return said + "."


def outlook_shifts(states: pd.DataFrame, means: list[NightOutlookMeans], weights) -> tuple[np.ndarray, list]:
    """Shift [°C] and notice sentence for each row of the evening states (0 and None without an outlook).

    Parameters
    ----------
    states : pandas.DataFrame
        Evening states (:func:`advisory.forecast.evening.evening_states`), N rows.
    means : list of NightOutlookMeans (N,)
    weights : sequence (N,) of float or None
        Each row's station's fitted weight (None: the default).
    """
    from advisory.forecast.cooling import physical_night

    n = len(states)
    has = np.array([m.hours > 0 for m in means], dtype=bool)
    delta = np.zeros(n)
    notes: list = [None] * n
    if not has.any():
        return delta, notes
    rows = np.flatnonzero(has)
    night = physical_night(states.iloc[rows])
    change = physical_change_c(night, [means[i].sky_cover_pct for i in rows],
                               [means[i].wind_speed_ms for i in rows])
    w = [weights[i] for i in rows]
    d = outlook_delta_c(change, np.array(w, dtype=object))
    d = np.where(np.isfinite(night.minimum_c), d, 0.0)
    cloud = states["cloud_cover_pct"].to_numpy(float)
    wind = states["wind_speed_ms"].to_numpy(float)
    for k, i in enumerate(rows):
        delta[i] = float(d[k])
        notes[i] = outlook_reason(means[i], float(cloud[i]), float(wind[i]), float(d[k]), w[k] is not None)
    return delta, notes
