"""The continuous ranked probability score against a reference implementation.

Source: the ``properscoring`` package from the registry (``crps_gaussian``, the
closed form of Gneiting et al. 2005, and ``crps_ensemble``, the sample form of
Gneiting & Raftery 2007), not written here.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.special import ndtri

from advisory.forecast.hindcast import crps_gaussian
from advisory.forecast.result import LEVELS, table_crps

ps = pytest.importorskip("properscoring")


def test_gaussian_closed_form_matches_properscoring():
    rng = np.random.default_rng(11)
    mu, sd, y = rng.normal(0, 3, 200), rng.uniform(0.5, 4.0, 200), rng.normal(0, 4, 200)
    np.testing.assert_allclose(crps_gaussian(mu, sd, y), ps.crps_gaussian(y, mu, sd), rtol=1e-9)


def test_quantile_table_crps_matches_properscoring_for_a_normal():
    # a normal distribution written as the tool's quantile table scores as the closed form does
    rng = np.random.default_rng(12)
    mu, sd, y = rng.normal(0, 3, 100), rng.uniform(0.8, 3.0, 100), rng.normal(0, 4, 100)
    table = mu[:, None] + sd[:, None] * ndtri(LEVELS)[None, :]
    ref = ps.crps_gaussian(y, mu, sd)
    # the table stops at the 0.1 % and 99.9 % quantiles: within 1 % of the exact score
    np.testing.assert_allclose(table_crps(table, y), ref, rtol=0.01, atol=0.003)


def test_quantile_table_crps_matches_the_sample_form_for_a_skewed_sample():
    rng = np.random.default_rng(13)
    sample = np.sort(rng.gamma(2.0, 1.5, 4000) - 3.0)
    table = np.quantile(sample, LEVELS)[None, :]
    for y in (-4.0, -1.0, 0.5, 3.0, 9.0):
        assert table_crps(table, np.array([y]))[0] == pytest.approx(ps.crps_ensemble(y, sample), rel=0.02,
                                                                     abs=0.005)


def test_a_sure_forecast_scores_its_absolute_error():
    table = np.full((1, len(LEVELS)), 2.0)
    assert table_crps(table, np.array([-1.5]))[0] == pytest.approx(3.5)
