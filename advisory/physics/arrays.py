"""Two small helpers shared by the vectorised physics functions."""

from __future__ import annotations

import numpy as np


def asfloat(x) -> np.ndarray:
    """Any scalar, sequence or array as a float ndarray."""
    return np.asarray(x, dtype=float)


def out(x):
    """A Python float for 0-d results, else the array (so scalars in give scalars out)."""
    x = np.asarray(x)
    return float(x) if x.ndim == 0 else x
