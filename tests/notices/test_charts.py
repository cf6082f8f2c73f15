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
