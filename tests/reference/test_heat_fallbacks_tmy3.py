"""The heat note's fallback ranges, checked on real hourly weather.

Data: pvlib's ``723170TYA.CSV`` (real hourly observations at a piedmont airport,
36.1° N), read and relabelled to one year as in ``test_daytime_tmy3.py``.
"""

from __future__ import annotations

import numpy as np
import pytest

from advisory.forecast import daytime as dt
from advisory.runs import heat_refit
from tests.reference.test_daytime_tmy3 import _features


def test_persistence_range_is_the_one_measured_on_real_days():
    # pvlib 723170TYA.CSV: yesterday's maximum as today's, 364 days
    f = _features()
    miss = (f["prev_max_temp_c"] - f["max_temp_c"]).dropna()
    assert len(miss) >= 360
    q10, q90 = heat_refit.PERSISTENCE_RESIDUAL_Q_C
    assert q10 == pytest.approx(miss.quantile(0.1), abs=0.05)
    assert q90 == pytest.approx(miss.quantile(0.9), abs=0.05)
    mae = heat_refit.PERSISTENCE_MAE_C
    assert mae == pytest.approx(miss.abs().mean(), abs=0.05)
    # about 80 % of real days fall inside the stated range
    lo, hi = heat_refit.PERSISTENCE_RESIDUAL_Q_C
    inside = np.mean((miss >= lo) & (miss <= hi))
    assert 0.78 <= inside <= 0.86


def test_regression_range_before_its_own_record_is_wider_than_its_typical_miss():
    # pvlib 723170TYA.CSV: the regression's rolling-origin miss (MAE about 1.6 °C)
    ro = dt.rolling_origin_max_temp(_features(), min_train_days=30)
    mae = float(ro["residual_c"].dropna().abs().mean())
    assert mae < heat_refit.REGRESSION_HALF_RANGE_C < 2 * mae
