"""report.html in a real browser: headless Chromium (the distribution's package) driven by Selenium.

The page must render (title, headline), every image must load, and the browser must log no error.
A full-page screenshot is kept as a test artefact: in the pytest tmp folder and, when the
environment variable PAIRVEL_TEST_ARTEFACTS names a folder, copied there.  Skipped only when no
Chromium is installed (`.ci/run` installs it).
"""

import os
import shutil
from pathlib import Path

import pytest

CHROMIUM = next((p for p in map(shutil.which, ("chromium", "chromium-browser", "google-chrome")) if p), None)
DRIVER = shutil.which("chromedriver")
ARGUMENTS = ("--headless=new", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
             "--disable-component-update", "--disable-sync", "--no-first-run", "--window-size=1280,900")


@pytest.fixture
def browser(tmp_path):
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    assert DRIVER, "Chromium is installed but chromedriver is not (Debian: apt-get install chromium-driver)"
    options = webdriver.ChromeOptions()
    options.binary_location = CHROMIUM
    for arg in ARGUMENTS:
        options.add_argument(arg)
    options.add_argument(f"--user-data-dir={tmp_path / 'chromium-profile'}")   # a fresh profile
    options.set_capability("goog:loggingOptions", {"browser": "ALL"})
    driver = webdriver.Chrome(options=options, service=Service(executable_path=DRIVER))
    try:
        yield driver
    finally:
        driver.quit()


@pytest.mark.skipif(CHROMIUM is None, reason="no Chromium installed")
def test_report_html_renders_in_headless_chromium(tiny_run, browser, tmp_path):
    browser.get((tiny_run / "report.html").resolve().as_uri())
    assert browser.title == "pairvel report: tiny"
    headline = browser.find_element("id", "headline").text
    assert "mean optical depth" in headline and "tau_mean = " in headline and "bias b" in headline
    images = browser.execute_script(
        "return Array.from(document.images).map(i => [i.complete, i.naturalWidth, i.alt]);")
    assert len(images) >= 3
    assert all(complete and width > 0 for complete, width, _ in images), images
    severe = [entry for entry in browser.get_log("browser") if entry["level"] == "SEVERE"]
    assert not severe, severe

    height = browser.execute_script("return document.documentElement.scrollHeight;")
    browser.set_window_size(1280, min(int(height), 16000))
    shot = tmp_path / "report-screenshot.png"
    assert browser.save_screenshot(str(shot)) and shot.stat().st_size > 10_000
    if os.environ.get("PAIRVEL_TEST_ARTEFACTS"):
        keep = Path(os.environ["PAIRVEL_TEST_ARTEFACTS"])
        keep.mkdir(parents=True, exist_ok=True)
        shutil.copyfile(shot, keep / shot.name)
