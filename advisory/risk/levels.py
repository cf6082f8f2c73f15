"""Frost risk levels (names of our own): ``nil``, ``slight``, ``marked``, ``serious``, ``grave``,
from P(kill >= 10 %), P(kill >= 90 %) and the expected kill, with thresholds settable per farm or
block (:class:`advisory.risk.frost_data.FrostSettings`).
"""

from __future__ import annotations

import numpy as np

#: Risk level names, lowest first.
LEVELS: tuple[str, ...] = ("nil", "slight", "marked", "serious", "grave")


def level_index(p_kill_10: np.ndarray, p_kill_90: np.ndarray, expected_kill: np.ndarray,
                th: dict[str, np.ndarray]) -> np.ndarray:
    """The index in :data:`LEVELS` of every block's level.

    Parameters
    ----------
    p_kill_10, p_kill_90, expected_kill : ndarray, shape (n,)
        P(kill >= 10 %), P(kill >= 90 %) and the expected kill [fraction].
    th : dict of ndarray, shape (n,)
        The ``level_*`` thresholds of :class:`advisory.risk.frost_data.FrostSettings`.

    Returns
    -------
    ndarray of int, shape (n,)
    """
    p10k, p90k, ek = p_kill_10, p_kill_90, expected_kill
    lvl = np.zeros(p10k.shape[0], dtype=int)
    lvl = np.where(p10k >= th["level_slight_p"], 1, lvl)
    lvl = np.where(p10k >= th["level_marked_p"], 2, lvl)
    lvl = np.where((p10k >= th["level_serious_p"]) | (ek >= th["level_serious_kill"]), 3, lvl)
    lvl = np.where((ek >= th["level_grave_kill"]) | (p90k >= th["level_grave_p90"]), 4, lvl)
    return lvl
