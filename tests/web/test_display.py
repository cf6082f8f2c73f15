"""How the console words a plan's figures: the notices' labels and units, never the stored keys."""

from advisory.web import display


def test_plan_figures_use_the_notices_labels_and_units():
    q = {"rate_available_mm_h": 3.8, "rate_needed_mm_h": 4.1, "water_m3": 1520.0, "fuel_l": 1200.0,
         "ready_by_unix_s": 1775600000.0, "stop_open_flag": 1.0}
    metric = display.figures(q)
    assert metric[0] == "system rate 3.8 mm/h"
    assert "water 1,520 m³" in metric and "fuel 1,200 L" in metric
    assert not any("_" in f for f in metric)  # no stored key reaches a reader
    assert not any("unix" in f or "flag" in f for f in metric)
    imperial = display.figures(q, "imperial")
    assert imperial[0] == "system rate 3.8 mm/h (0.15 in/h)"
