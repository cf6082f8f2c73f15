"""The cost-loss decision: expected losses, running cost, the sentence, the visit order."""

from __future__ import annotations

import numpy as np

from advisory.risk import economics
from advisory.risk.damage import MinTempForecast


def test_cost_loss_threshold_on_constructed_cases():
    # Thompson (1952); Murphy (1977): protect exactly when p > C/L.
    loss = 1000.0
    for cost in (50.0, 200.0, 700.0):
        ratio = cost / loss
        assert economics.cost_loss_protect(ratio + 0.01, cost, loss)
        assert not economics.cost_loss_protect(ratio - 0.01, cost, loss)
        assert not economics.cost_loss_protect(ratio, cost, loss)  # indifferent: do not protect
    assert not economics.cost_loss_protect(1.0, 10.0, 0.0)


def test_expected_value_rule_reduces_to_cost_loss_for_perfect_all_or_nothing_protection():
    # An all-or-nothing loss (T10 close to T90 -> kill is a step) and a method that always saves it:
    # the expected saving is p * L, so "protecting pays" exactly when p > C / L.
    k = 2000
    rng_p = np.linspace(0.05, 0.95, 19)
    value, area = 10000.0, 1.0
    for p in rng_p:
        n_cold = int(round(p * k))
        q = np.r_[np.full(n_cold, -5.0), np.full(k - n_cold, 5.0)][None, :]
        for cost in (1000.0, 4000.0, 8000.0):
            e = economics.night_economics(q, 0.0, -1.99, -2.01, 20.0, value, area, cost, 1.0, 0.0)
            assert bool(e.pays[0]) == bool(economics.cost_loss_protect(n_cold / k, cost, value * area))


def test_night_economics_from_the_frost_distribution_shifted_by_protection():
    fc = MinTempForecast(p10_c=[-4.0, -4.0], p50_c=[-2.0, -2.0], p90_c=[0.0, 0.0])
    q = fc.quantiles((np.arange(200) + 0.5) / 200)
    e = economics.night_economics(q, [0.0, 0.0], [-2.2, -2.2], [-3.9, -3.9], [2.0, np.nan],
                                  [20000.0, 20000.0], [2.0, 2.0], [100.0, 100.0], [6.0, 6.0], [150.0, 150.0])
    assert e.loss_without[0] > e.loss_with[0] > 0
    assert np.isclose(e.running_cost[0], 750.0)
    assert np.isnan(e.loss_with[1]) and not e.pays[1]  # no protection figure: no verdict
    assert e.pays[0] == (e.loss_without[0] - e.loss_with[0] > 750.0)


def test_missing_values_give_no_sentence():
    assert economics.economics_sentence(4100.0, 600.0, 900.0, "USD") == (
        "expected loss 4,100 without, 600 with, running cost 900 (USD): protecting pays")
    assert economics.economics_sentence(1000.0, 600.0, 900.0, "USD").endswith("protecting does not pay")
    assert economics.economics_sentence(float("nan"), 600.0, 900.0, "USD") is None
    assert economics.economics_sentence(4100.0, 600.0, 900.0, None) is None


def test_visit_order_by_saving_within_crew_reach():
    order, reached = economics.visit_order([100.0, np.nan, 900.0, -50.0, 400.0], crew_size=2)
    assert list(order) == [2, 4, 0, 3, 1]
    assert list(reached) == [False, False, True, False, True]
    _, all_reached = economics.visit_order([100.0, -1.0], None)
    assert list(all_reached) == [True, False]


def test_method_protection():
    assert economics.method_protection_c("heater", {"protection_c": 2.0}) == 2.0
    assert economics.method_protection_c("wind_machine", {}, inversion_c=3.0) == 1.5
    assert np.isnan(economics.method_protection_c("heater", {}))
