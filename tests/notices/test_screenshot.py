"""Render a frost notice to HTML and photograph it with headless Chromium (skipped without Chromium)."""

from __future__ import annotations

import shutil
import subprocess

import pytest

from advisory.notices.charts import chart_png
from advisory.notices.compose import compose_block
from advisory.notices.render import render
from tests.notices import samples

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")


@pytest.mark.skipif(CHROMIUM is None, reason="chromium is not on PATH (Debian: apt-get install -y chromium)")
def test_html_notice_screenshot(tmp_path):
    n = compose_block(samples.frost_assessment())
    (tmp_path / "chart.png").write_bytes(chart_png(n))
    page = tmp_path / "notice.html"
    page.write_text(render(n, "html", chart_src="chart.png"), encoding="utf-8")
    shot = tmp_path / "notice.png"
    cmd = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
           "--disable-component-update", "--disable-sync", "--no-first-run", f"--user-data-dir={tmp_path / 'profile'}",
           "--hide-scrollbars", "--window-size=412,1400", f"--screenshot={shot}", page.as_uri()]
    subprocess.run(cmd, capture_output=True, timeout=120, check=False)
    assert shot.exists(), "chromium wrote no screenshot"
    from matplotlib.image import imread

    img = imread(str(shot))
    assert img.shape[:2] == (1400, 412)
    # The level band at the top has the level's colour, so the page was laid out.
    want = int(n.colour[1:3], 16), int(n.colour[3:5], 16), int(n.colour[5:7], 16)
    r, g, b = (img[40, 200, :3] * 255).round()
    assert abs(r - want[0]) <= 3 and abs(g - want[1]) <= 3 and abs(b - want[2]) <= 3
    # The chart image loaded: its middle-forecast line (#16365c) and its range band (#a9cbe8 at 55 % over
    # white = (207, 226, 242)) are on the page.
    px = img[:, :, :3] * 255
    line = (abs(px - (0x16, 0x36, 0x5C)) < 12).all(axis=2)
    band = (abs(px - (207, 226, 242)) < 6).all(axis=2)
    assert line.sum() > 100 and band.sum() > 1000
