"""The browser view in a real headless Chromium (Debian's chromium and chromium-driver, driven by
selenium through the Debian chromedriver; nothing is downloaded), against a running service with a
simulated scene: the page draws, points the listening beam where it is clicked, and warns when the
service goes quiet.

A screenshot of each run is kept in ``build/test-artifacts/`` (or ``$BEAMTAP_ARTIFACTS``).
"""

from __future__ import annotations

import os
import shutil
import time
from pathlib import Path

import pytest

from beamtap.client import Subscriber
from beamtap.processes import stop

from conftest import line_config, running_service, running_web

pytest.importorskip("aiohttp")
webdriver = pytest.importorskip("selenium.webdriver")
from selenium.webdriver.chrome.service import Service as DriverService  # noqa: E402
from selenium.webdriver.common.action_chains import ActionChains  # noqa: E402
from selenium.webdriver.common.by import By  # noqa: E402
from selenium.webdriver.support.ui import WebDriverWait  # noqa: E402

CHROMIUM, CHROMEDRIVER = "/usr/bin/chromium", "/usr/bin/chromedriver"
SOURCE_DEG = 60.0
FAN = (0.0, 180.0, 4.0)
SCENE = line_config(scene=[{"azimuth_deg": SOURCE_DEG, "signal": "noise", "band_hz": [300.0, 1400.0],
                            "level_db": -20.0}], fan=FAN, audio_deg=[(90.0, 0.0)])
ARTIFACTS = Path(os.environ.get("BEAMTAP_ARTIFACTS", Path(__file__).resolve().parent.parent / "build" / "test-artifacts"))


@pytest.fixture
def browser(tmp_path):
    for path in (CHROMIUM, CHROMEDRIVER):
        assert os.path.exists(path), (f"{path} is missing: install Debian's chromium and chromium-driver "
                                      "(sh deploy/quickstart.sh test does)")
    opts = webdriver.ChromeOptions()
    opts.binary_location = CHROMIUM
    # As root in CI Chromium needs --no-sandbox; the rest keep it off the (closed) network.
    for a in ("--headless=new", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
              "--disable-background-networking", "--disable-component-update", "--disable-sync",
              "--disable-dev-shm-usage", "--window-size=1280,1000", "--autoplay-policy=no-user-gesture-required",
              f"--user-data-dir={tmp_path / 'chromium-profile'}"):
        opts.add_argument(a)
    opts.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    driver = webdriver.Chrome(service=DriverService(CHROMEDRIVER), options=opts)
    try:
        yield driver
    finally:
        driver.quit()


def _view(driver, expr):
    return driver.execute_script(f"return window.beamtapView && {expr};")


def _brightest_beam(driver, rows=4):
    """The beam under the lightest column of the waterfall's newest ``rows`` pixel rows (the palette's
    lightness rises with level, so the lightest column is the loudest bearing)."""
    return driver.execute_script("""
        const c = document.getElementById('waterfall');
        const d = c.getContext('2d').getImageData(0, 0, c.width, arguments[0]).data;
        let best = -1, bestX = 0;
        for (let x = 0; x < c.width; x++) {
          let s = 0;
          for (let y = 0; y < arguments[0]; y++) {
            const k = 4 * (y * c.width + x);
            s += 0.2126 * d[k] + 0.7152 * d[k + 1] + 0.0722 * d[k + 2];
          }
          if (s > best) { best = s; bestX = x; }
        }
        return Math.floor(bestX * window.beamtapView.nBeams / c.width);
    """, rows)


def _screenshot(driver, tmp_path, name):
    path = tmp_path / name
    driver.save_screenshot(str(path))
    ARTIFACTS.mkdir(parents=True, exist_ok=True)
    shutil.copy(path, ARTIFACTS / name)
    return path


def test_page_draws_the_scene_points_the_beam_and_warns_when_the_service_stops(tmp_path, browser):
    with running_service(tmp_path, SCENE, expect_rc=None) as svc, \
            running_web(tmp_path, svc.publish, svc.control) as (url, _):
        browser.get(url)
        WebDriverWait(browser, 20).until(lambda d: (_view(d, "window.beamtapView.total") or 0) >= 20)

        # The waterfall moves: its pixels after 3 s of new rows differ from before.
        before = browser.execute_script("return document.getElementById('waterfall').toDataURL();")
        rows0 = _view(browser, "window.beamtapView.total")
        rate = 48000 / 1024  # power rows per second: one per block of this config
        WebDriverWait(browser, 15).until(lambda d: _view(d, "window.beamtapView.total") >= rows0 + 3 * rate)
        after = browser.execute_script("return document.getElementById('waterfall').toDataURL();")
        assert after != before

        # The loudest bearing in the newest rows is the source's (±2 beams).
        beam = _brightest_beam(browser)
        bearings = [az for az, _ in _view(browser, "window.beamtapView.beams.power_deg")]
        assert abs(beam - bearings.index(SOURCE_DEG)) <= 2, (beam, bearings[beam])

        # The status strip names the stream.
        strip = browser.find_element(By.ID, "status").text
        assert f"stream {svc.endpoints['stream']}" in strip and "48000 Hz" in strip

        # A click on the waterfall at 120° points the listening beam there: the service's beams say so.
        target = bearings.index(120.0)
        canvas = browser.find_element(By.ID, "waterfall")
        width = canvas.size["width"]
        with Subscriber(svc.publish, topics=["beams"], timeout_s=10) as sub:
            x = (target + 0.5) / len(bearings) * width - width / 2
            ActionChains(browser).move_to_element_with_offset(canvas, int(round(x)), 0).click().perform()
            deadline = time.monotonic() + 15
            while True:
                assert time.monotonic() < deadline, "no beams message with the clicked bearing"
                f = sub.recv()
                if f.header["audio_deg"][0] == [120.0, 0.0]:
                    break
        WebDriverWait(browser, 10).until(lambda d: "listening at 120.0°" in d.find_element(By.ID, "listen-state").text)
        _screenshot(browser, tmp_path, "web-view.png")

        # The service stops: the page says so within 5 s.
        stop(svc.proc)
        WebDriverWait(browser, 5, poll_frequency=0.2).until(
            lambda d: d.find_element(By.ID, "nodata").is_displayed()
            and "No data for" in d.find_element(By.ID, "nodata").text)
        _screenshot(browser, tmp_path, "web-view-no-data.png")
    problems = [e["message"] for e in browser.get_log("browser")
                if e["level"] == "SEVERE" or "Content Security Policy" in e["message"]]
    assert not problems, problems


def test_token_prompt_and_a_view_only_page(tmp_path, browser):
    """A reader token: asked for on first load, wrong one refused, right one views but cannot steer."""
    reader, operator = "r" * 40, "o" * 40
    (tmp_path / "rd").write_text(reader)
    (tmp_path / "op").write_text(operator)
    with running_service(tmp_path, SCENE) as svc, \
            running_web(tmp_path, svc.publish, svc.control, ["--reader-token-file", str(tmp_path / "rd"),
                                                             "--operator-token-file", str(tmp_path / "op")]) as (url, _):
        browser.get(url)
        login = WebDriverWait(browser, 10).until(lambda d: d.find_element(By.ID, "login"))
        WebDriverWait(browser, 10).until(lambda d: login.is_displayed())
        assert _view(browser, "window.beamtapView.total") == 0  # no data before a token
        browser.find_element(By.ID, "token").send_keys("x" * 40)
        browser.find_element(By.CSS_SELECTOR, "#login button").click()
        WebDriverWait(browser, 10).until(lambda d: "refused" in d.find_element(By.ID, "login-error").text)
        browser.refresh()  # the server closed the refused connection; a fresh page asks again
        WebDriverWait(browser, 10).until(lambda d: d.find_element(By.ID, "login").is_displayed())
        browser.find_element(By.ID, "token").send_keys(reader)
        browser.find_element(By.CSS_SELECTOR, "#login button").click()
        WebDriverWait(browser, 20).until(lambda d: (_view(d, "window.beamtapView.total") or 0) >= 5)
        assert _view(browser, "window.beamtapView.role") == "reader"
        browser.find_element(By.ID, "waterfall").click()
        WebDriverWait(browser, 5).until(lambda d: "operator token" in d.find_element(By.ID, "message").text)
