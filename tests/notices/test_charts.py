"""The PNG chart of the night or day curve."""

from __future__ import annotations

import struct

from matplotlib import _pylab_helpers

from advisory.notices.charts import chart_png, data_uri
from advisory.notices.compose import compose_block
from tests.notices import samples


def png_size(png: bytes) -> tuple[int, int]:
    assert png[:8] == b"\x89PNG\r\n\x1a\n"
    assert png[12:16] == b"IHDR"
    return struct.unpack(">II", png[16:24])


def test_frost_chart_is_a_png_of_the_requested_size():
    n = compose_block(samples.frost_assessment())
    png = chart_png(n)
    assert png_size(png) == (960, 680)            # 480 x 340 at scale 2
    assert png_size(chart_png(n, width_px=300, height_px=200, scale=1.0)) == (300, 200)


def test_chart_from_stored_content_matches():
    n = compose_block(samples.frost_assessment())
    assert chart_png(n.to_dict()) == chart_png(n)    # deterministic, no timestamps in the file


def test_heat_and_imperial_charts():
    assert png_size(chart_png(compose_block(samples.heat_assessment()))) == (960, 680)
    assert chart_png(compose_block(samples.frost_assessment(units="imperial")))


def test_no_curve_no_chart():
    n = compose_block(samples.frost_assessment(status="no_forecast", plan=[], curve=[], level=""))
    assert chart_png(n) is None
    n = compose_block(samples.frost_assessment(curve=samples.night_curve()[:1]))
    assert chart_png(n) is None


def test_curve_without_band_or_wet_bulb():
    a = samples.frost_assessment(curve=samples.night_curve(wet_bulb=False))
    for p in a.curve:
        p.p10_c = p.p90_c = None
    assert chart_png(compose_block(a))


def test_no_figures_left_behind():
    before = _pylab_helpers.Gcf.get_num_fig_managers()
    for _ in range(2):
        chart_png(compose_block(samples.frost_assessment()))
    assert _pylab_helpers.Gcf.get_num_fig_managers() == before == 0


def test_data_uri():
    assert data_uri(b"\x89PNG").startswith("data:image/png;base64,")


def test_frost_chart_draws_what_the_plan_uses_and_nothing_green_for_a_run():
    import colorsys
    import datetime as dt

    from advisory.assessment import ProtectionStep
    from advisory.notices import charts

    wind = samples.frost_assessment()
    wind.plan = [ProtectionStep(method="wind_machine", advised=True,
                                start_utc=dt.datetime(2026, 4, 7, 9, 0, tzinfo=dt.UTC),
                                stop_utc=dt.datetime(2026, 4, 7, 14, 0, tzinfo=dt.UTC),
                                ready_by_utc=dt.datetime(2026, 4, 7, 7, 0, tzinfo=dt.UTC),
                                quantities={"start_air_temp_c": -1.2, "inversion_c": 2.6})]
    n = compose_block(wind)
    assert "wet_bulb" not in n.chart.curves                  # a wind machine does not start on the wet bulb
    starts = [x for x in n.chart.lines if x["role"] == "start"]
    assert starts and starts[0]["value_c"] == -1.2 and "air -1.2 °C" in starts[0]["label"]
    roles = {m["role"] for m in n.chart.marks}
    assert {"ready", "critical"} <= roles
    assert chart_png(n)
    spr = compose_block(samples.frost_assessment())
    assert spr.chart.curves == ["wet_bulb"]
    assert any(x["role"] == "start" and "wet bulb -1.2 °C" in x["label"] for x in spr.chart.lines)
    for colour in (charts.PROTECT, charts.READY, charts.START, charts.WORK):
        h, s, _ = colorsys.rgb_to_hsv(*(int(colour[i:i + 2], 16) / 255 for i in (1, 3, 5)))
        assert not (0.2 < h < 0.45 and s > 0.15), colour     # no green for "act"
