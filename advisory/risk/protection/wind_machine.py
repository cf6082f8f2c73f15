"""Wind machines: the inversion they need (measured, else estimated from the evening sky and
wind), the wind above which they do not help.
"""

from __future__ import annotations

import numpy as np

from advisory.risk.protection.equipment import _c


def estimate_inversion_c(cloud_cover_pct, wind_speed_ms):
    """Rough inversion strength (about 10 m minus screen height) from sky and wind [°C].

    An estimate only, used when a block's station has no upper thermometer:
    clear, calm radiation nights typically build inversions of a few degrees
    (common practice); clouds and wind destroy them.  Here ``3.0 * (1 -
    (N/100)**2) * clip((4 - u) / 3, 0, 1)`` with cloud cover N [%] and wind
    speed u [m/s]; the 3.0 °C clear-calm value is from memory, unverified.

    Parameters
    ----------
    cloud_cover_pct : array_like
        Evening cloud cover [%]; NaN gives NaN.
    wind_speed_ms : array_like
        Wind speed [m/s].

    Returns
    -------
    inversion_c : float or ndarray
    """
    n = np.clip(np.asarray(cloud_cover_pct, float), 0.0, 100.0) / 100.0
    u = np.asarray(wind_speed_ms, float)
    out = 3.0 * (1.0 - n ** 2) * np.clip((4.0 - u) / 3.0, 0.0, 1.0)
    return float(out) if out.ndim == 0 else out


def wind_machine_plan(b, st, evening_wind: float, wind_mean: float, kw: dict, notes: list[str],
                      keys: list[str]) -> bool:
    """A wind machine's part of a plan (:func:`advisory.risk.frost._method_plan`): the inversion
    (measured, else estimated) and the wind into ``kw``, ``notes`` and ``keys``; whether it is usable."""
    usable = True
    measured = b.upper_inversion_c is not None and np.isfinite(b.upper_inversion_c)
    if measured:
        inv, est = float(b.upper_inversion_c), False
    else:
        cloud = np.nan if b.cloud_cover_pct is None else b.cloud_cover_pct
        inv = float(estimate_inversion_c(cloud, evening_wind if np.isfinite(evening_wind) else np.nan))
        est = True
        keys.insert(0, "inversion_estimated")
    kw.update(inversion_c=None if not np.isfinite(inv) else inv, inversion_estimated=est)
    label = "estimated" if est else "measured"
    if not np.isfinite(inv):
        usable = False
        notes.append("Inversion unknown (no upper sensor, no cloud report): measure it before relying "
                     "on wind machines.")
    elif inv < st.wind_machine_min_inversion_c:
        usable = False
        notes.append(f"Inversion {_c(inv)} °C ({label}) is weaker than the "
                     f"{st.wind_machine_min_inversion_c:g} °C a wind machine needs.")
    else:
        notes.append(f"Inversion {_c(inv)} °C ({label}).")
    if np.isfinite(wind_mean) and wind_mean > st.wind_machine_max_wind_ms:
        usable = False
        notes.append(f"Wind {wind_mean:.1f} m/s is above the {st.wind_machine_max_wind_ms:g} m/s "
                     "at which wind machines help.")
    return usable
