"""The console in a real browser: headless Chromium (the system's package) driven by Selenium through
the system's chromedriver, against `advisory web` serving a copy of the demo database.

Screenshots go to ``test-artifacts/web/`` at the repository root (their paths are printed).
"""

from __future__ import annotations

import os
import shutil
import socket
import sqlite3
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

import pytest

from tests.web.conftest import HERE

ROOT = Path(__file__).resolve().parents[2]
ARTIFACTS = ROOT / "test-artifacts" / "web"
CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
CHROMEDRIVER = shutil.which("chromedriver")
PASSWORD = "browser-test-password"

pytestmark = [
    pytest.mark.skipif(CHROMIUM is None, reason="no Chromium on this machine (apt-get install chromium)"),
    pytest.mark.skipif(CHROMEDRIVER is None,
                       reason="no chromedriver on this machine (apt-get install chromium-driver)"),
    pytest.mark.sqlite_only("serves a copy of the demo's SQLite database"),
]


def _advisory(db_url, *args, env, stdin=None, timeout=900):
    return subprocess.run([sys.executable, "-m", "advisory.cli", "--db", db_url, *args], input=stdin, env=env,
                          capture_output=True, text=True, timeout=timeout, check=True)


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.fixture(scope="module")
def served(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("webdemo")
    env = {k: v for k, v in os.environ.items() if not k.startswith("ADVISORY_")}
    env.update(ADVISORY_HOME=str(tmp / "home"), ADVISORY_OUTBOX=str(tmp / "outbox"),
               ADVISORY_WEB_SECRET="browser-test-secret-" + "z" * 24, ADVISORY_WORKERS="1")
    demo = ROOT / "demo-output" / "demo.sqlite"
    if not demo.exists():  # a fresh clone: run the demo into the test's folder
        _advisory(f"sqlite:///{tmp / 'made' / 'demo.sqlite'}", "demo", "--out", str(tmp / "made"), env=env)
        demo = tmp / "made" / "demo.sqlite"
    path = tmp / "demo.sqlite"
    src, dst = sqlite3.connect(demo), sqlite3.connect(path)
    src.backup(dst)
    src.close()
    dst.close()
    url = f"sqlite:///{path}"
    _advisory(url, "db", "upgrade", env=env)
    _advisory(url, "farm", "import", str(HERE / "other_farm.toml"), env=env)
    _advisory(url, "users", "add", "wren-agent", "--role", "agent", "--all-farms", "--password-stdin",
              env=env, stdin=PASSWORD + "\n")
    _advisory(url, "users", "add", "ines-grower", "--role", "grower", "--farm", "Larkspur Flat Vineyard",
              "--password-stdin", env=env, stdin=PASSWORD + "\n")
    con = sqlite3.connect(path)
    ids = dict(con.execute("select name, id from blocks").fetchall())
    con.close()
    port = _free_port()
    proc = subprocess.Popen([sys.executable, "-m", "advisory.cli", "--db", url, "web", "--port", str(port)],
                            env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
    base = f"http://127.0.0.1:{port}"
    for _ in range(100):
        try:
            urllib.request.urlopen(base + "/login", timeout=1)
            break
        except OSError:
            time.sleep(0.2)
    else:
        proc.kill()
        pytest.fail("advisory web did not start: " + (proc.stdout.read() if proc.stdout else ""))
    yield base, ids
    proc.terminate()
    proc.wait(timeout=10)


@pytest.fixture
def browser(tmp_path):
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    opts = webdriver.ChromeOptions()
    opts.binary_location = CHROMIUM
    for flag in ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                 "--disable-background-networking", "--disable-component-update", "--disable-sync",
                 "--disable-dev-shm-usage", "--window-size=1400,1000", f"--user-data-dir={tmp_path / 'profile'}"):
        opts.add_argument(flag)
    driver = webdriver.Chrome(service=Service(CHROMEDRIVER), options=opts)
    driver.set_page_load_timeout(30)
    yield driver
    driver.quit()


def _shot(driver, name: str) -> Path:
    ARTIFACTS.mkdir(parents=True, exist_ok=True)
    path = ARTIFACTS / f"{name}.png"
    height = driver.execute_script("return document.documentElement.scrollHeight")
    driver.set_window_size(1400, min(max(1000, height + 40), 4000))
    driver.save_screenshot(str(path))
    print(f"screenshot: {path}")
    return path


def _sign_in(driver, base, user):
    from selenium.webdriver.common.by import By

    driver.get(base + "/login")
    driver.find_element(By.NAME, "username").send_keys(user)
    driver.find_element(By.NAME, "password").send_keys(PASSWORD)
    _follow(driver, driver.find_element(By.CSS_SELECTOR, "form button[type=submit]"))
    _wait_for(driver, "#overview")


def _follow(driver, element) -> None:
    """Click a link or a submit button and wait until the next page has replaced this one.

    A click returns as soon as the browser has the event; reading the page at once can read the old
    page (seen on a loaded CI machine), so wait for the old document to go stale and the new to load.
    """
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support import expected_conditions as ec
    from selenium.webdriver.support.ui import WebDriverWait

    old = driver.find_element(By.TAG_NAME, "html")
    element.click()
    WebDriverWait(driver, 30).until(ec.staleness_of(old))
    WebDriverWait(driver, 30).until(lambda d: d.execute_script("return document.readyState") == "complete")


def _wait_for(driver, css: str) -> None:
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support import expected_conditions as ec
    from selenium.webdriver.support.ui import WebDriverWait

    WebDriverWait(driver, 30).until(ec.presence_of_element_located((By.CSS_SELECTOR, css)))


def test_agent_changes_a_stage_and_a_grower_cannot_open_another_farm(served, browser):
    from selenium.webdriver.common.by import By

    base, ids = served
    _sign_in(browser, base, "wren-agent")
    assert "Frost night" in browser.find_element(By.TAG_NAME, "h1").text
    table = browser.find_element(By.ID, "overview").text
    assert "Bench Gala" in table and "Flat Riesling" in table
    assert "Decision support only" in browser.page_source
    _shot(browser, "1-tonight-agent")

    _follow(browser, browser.find_element(By.LINK_TEXT, "Bench Gala"))
    assert "Bench Gala" in browser.find_element(By.TAG_NAME, "h1").text
    assert browser.find_elements(By.CSS_SELECTOR, "svg.chart")
    assert "T10 -2.2 °C, T90 -3.9 °C" in browser.find_element(By.ID, "critical").text
    _shot(browser, "2-block-before")

    stage = browser.find_element(By.NAME, "stage")
    stage.clear()
    stage.send_keys("tight cluster")
    day = browser.find_element(By.NAME, "stage_date")
    browser.execute_script("arguments[0].value = '2026-04-09'", day)
    _follow(browser, browser.find_element(By.CSS_SELECTOR, "#stage-form button[type=submit]"))
    assert "Stage saved." in browser.page_source
    assert browser.find_element(By.ID, "current-stage").text == "tight cluster"
    assert "T10 -2.8 °C, T90 -6.1 °C" in browser.find_element(By.ID, "critical").text
    assert "wren-agent" in browser.find_element(By.ID, "audit").text
    _shot(browser, "3-block-after-stage-change")

    stage = browser.find_element(By.NAME, "stage")
    stage.clear()
    stage.send_keys("purple haze")
    _follow(browser, browser.find_element(By.CSS_SELECTOR, "#stage-form button[type=submit]"))
    assert "stages in order" in browser.find_element(By.ID, "stage-error").text
    _shot(browser, "4-block-bad-stage")

    _follow(browser, browser.find_element(By.LINK_TEXT, "QR-BENCH"))
    assert "Station QR-BENCH" in browser.find_element(By.TAG_NAME, "h1").text
    assert browser.find_elements(By.CSS_SELECTOR, "svg.chart") and "Quality flags" in browser.page_source
    _shot(browser, "7-station")
    _follow(browser, browser.find_element(By.LINK_TEXT, "Skill"))
    assert "By station" in browser.page_source and browser.find_elements(By.CSS_SELECTOR, "svg.chart")
    _shot(browser, "8-skill")
    _follow(browser, browser.find_element(By.LINK_TEXT, "Heat day"))
    assert "Heat day" in browser.find_element(By.TAG_NAME, "h1").text
    assert "Bench Gala" in browser.find_element(By.ID, "overview").text
    _shot(browser, "9-heat-day")

    _follow(browser, browser.find_element(By.CSS_SELECTOR, "form.who button"))
    _wait_for(browser, "input[name=password]")  # signed out: the sign-in page
    _sign_in(browser, base, "ines-grower")
    table = browser.find_element(By.ID, "overview").text
    assert "Flat Riesling" in table and "Bench Gala" not in table
    _shot(browser, "5-tonight-grower")
    browser.get(f"{base}/blocks/{ids['Bench Gala']}")
    assert "Not found" in browser.find_element(By.TAG_NAME, "h1").text
    assert "Bench Gala" not in browser.page_source
    _shot(browser, "6-grower-other-farm-block")
