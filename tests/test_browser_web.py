"""The web app in a real browser: Debian's Chromium driven by Selenium through Debian's chromedriver.

A draft typed into the Drafts page gets its score without a click (htmx, debounced); a result
recorded on an experiment's page changes its status in place; the weekly report at 390 px wide
(a phone) has nothing wider than the screen and chart text of at least 11 px.

Needs the ``chromium`` and ``chromium-driver`` Debian packages (``.ci/run`` installs them) and the
``selenium`` package of the test extra; skipped with the reason where one is missing. Selenium is
given the driver's path, so it never downloads a browser or a driver.
"""

from __future__ import annotations

import shutil
import socket
import threading
import time
from pathlib import Path

import pytest

CHROMIUM = shutil.which("chromium") or ("/usr/bin/chromium" if Path("/usr/bin/chromium").exists() else None)
DRIVER = shutil.which("chromedriver") or ("/usr/bin/chromedriver" if Path("/usr/bin/chromedriver").exists() else None)
selenium = pytest.importorskip("selenium", reason="selenium is not installed (pip install -e '.[test]')")
pytestmark = pytest.mark.skipif(
    CHROMIUM is None or DRIVER is None,
    reason="Debian's chromium and chromium-driver are not installed (apt-get install chromium chromium-driver; "
           ".ci/run does this on CI)",
)

from test_web import template_ws  # noqa: E402,F401  (the same demo workspace as the test-client tests)

PHONE_WIDTH = 390
MIN_CHART_TEXT_PX = 11  # the floor for chart text on a phone


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.fixture(scope="module")
def server(template_ws, tmp_path_factory):
    """uvicorn serving a copy of the test workspace on a free loopback port, in a thread."""
    import uvicorn

    from contentlab.web import create_app

    ws = tmp_path_factory.mktemp("browser-web") / "ws"
    shutil.copytree(template_ws, ws)
    port = _free_port()
    app = create_app(ws)
    app.state.workspace.warm()
    config = uvicorn.Config(app, host="127.0.0.1", port=port, log_level="warning", access_log=False)
    srv = uvicorn.Server(config)
    thread = threading.Thread(target=srv.run, daemon=True)
    thread.start()
    deadline = time.monotonic() + 30
    while not srv.started and time.monotonic() < deadline:
        time.sleep(0.05)
    assert srv.started, "uvicorn did not start"
    yield {"url": f"http://127.0.0.1:{port}", "workspace": ws}
    srv.should_exit = True
    thread.join(timeout=10)


@pytest.fixture(scope="module")
def browser(tmp_path_factory):
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    options = webdriver.ChromeOptions()
    options.binary_location = CHROMIUM
    for flag in ("--headless=new", "--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage", "--no-first-run",
                 "--disable-background-networking", "--disable-component-update", "--disable-sync",
                 "--disable-extensions", f"--user-data-dir={tmp_path_factory.mktemp('chromium-profile')}",
                 "--window-size=1200,900"):
        options.add_argument(flag)
    driver = webdriver.Chrome(service=Service(executable_path=DRIVER), options=options)
    driver.set_page_load_timeout(120)
    yield driver
    driver.quit()


def _wait(driver, condition, timeout=60):
    from selenium.webdriver.support.ui import WebDriverWait

    return WebDriverWait(driver, timeout, poll_frequency=0.1).until(condition)


def test_type_a_draft_and_see_its_score(server, browser):
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import Select

    browser.get(server["url"] + "/drafts")
    Select(browser.find_element(By.ID, "channel")).select_by_value("newsletter")
    box = browser.find_element(By.ID, "headlines")
    box.send_keys("5 things to know about the makerspace laser cutter")  # no click on Score
    rate = _wait(browser, lambda d: d.find_elements(By.CSS_SELECTOR, "#scores .rate"))[0]
    assert rate.text.endswith("%") and 0 < float(rate.text.rstrip("%")) < 100
    assert "90% range" in browser.find_element(By.ID, "scores").text
    logs = [e for e in browser.get_log("browser") if e.get("level") == "SEVERE"]
    assert not logs, logs  # no CSP violation or script error


def test_a_refused_request_says_so_in_place(server, browser):
    """An expired form (CSRF cookie gone) is refused, and the page shows why instead of staying silent."""
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import Select

    browser.get(server["url"] + "/drafts")
    browser.delete_cookie("contentlab_csrf")
    Select(browser.find_element(By.ID, "channel")).select_by_value("newsletter")
    browser.find_element(By.ID, "headlines").send_keys("Opening hours this week")
    error = _wait(browser, lambda d: d.find_elements(By.CSS_SELECTOR, "#scores .error"))[0]
    assert "CSRF" in error.text and "Reload the page" in error.text


def test_record_a_result_and_see_the_status_change(server, browser):
    from selenium.webdriver.common.by import By

    browser.get(server["url"] + "/experiments/winter-reading")
    before = browser.find_element(By.ID, "arms").text
    form = browser.find_element(By.CSS_SELECTOR, "form.record")
    form.find_element(By.NAME, "impressions").send_keys("777")
    form.find_element(By.NAME, "clicks").send_keys("31")
    form.find_element(By.CSS_SELECTOR, "button[type=submit]").click()
    done = _wait(browser, lambda d: d.find_elements(By.ID, "recorded"))[0]
    assert "1 recorded" in done.text and "+777 impressions" in done.text
    assert browser.find_element(By.ID, "arms").text != before
    assert "777" in browser.find_element(By.ID, "arms").text
    # A refused row shows its message beside the field and changes nothing.
    form = browser.find_element(By.CSS_SELECTOR, "form.record")
    form.find_element(By.NAME, "impressions").send_keys("5")
    form.find_element(By.NAME, "clicks").send_keys("9")
    form.find_element(By.CSS_SELECTOR, "button[type=submit]").click()
    error = _wait(browser, lambda d: d.find_elements(By.ID, "error-clicks"))[0]
    assert "more than its 5 impressions" in error.text


def _phone(browser):
    browser.execute_cdp_cmd("Emulation.setDeviceMetricsOverride",
                            {"width": PHONE_WIDTH, "height": 844, "deviceScaleFactor": 1, "mobile": True})


def _week(server, browser) -> str:
    from selenium.webdriver.common.by import By

    browser.get(server["url"] + "/report")
    return browser.find_element(By.ID, "week").get_attribute("value")


def test_report_page_fits_a_phone(server, browser):
    """The app's Report page (week picker and frame) is no wider than a phone."""
    week = _week(server, browser)
    _phone(browser)
    try:
        browser.get(server["url"] + f"/report?week={week}")
        assert browser.execute_script("return document.documentElement.scrollWidth") <= PHONE_WIDTH
        for path in ("/drafts", "/experiments/winter-reading", "/history"):
            browser.get(server["url"] + path)
            assert browser.execute_script("return document.documentElement.scrollWidth") <= PHONE_WIDTH, path
    finally:
        browser.execute_cdp_cmd("Emulation.clearDeviceMetricsOverride", {})


def test_report_content_readable_on_a_phone(server, browser):
    week = _week(server, browser)
    _phone(browser)
    try:
        browser.get(server["url"] + f"/report/view?week={week}")
        _wait(browser, lambda d: d.execute_script("return document.readyState") == "complete")
        width = browser.execute_script("return document.documentElement.scrollWidth")
        wide = browser.execute_script(
            "const w = document.documentElement.clientWidth; return Array.from(document.querySelectorAll("
            "'table, svg, img, pre')).filter(e => e.getBoundingClientRect().right > w + 1).length")
        sizes = browser.execute_script(
            "return Array.from(document.querySelectorAll('svg text')).filter(t => t.textContent.trim())"
            ".map(t => parseFloat(getComputedStyle(t).fontSize) * (t.getScreenCTM() ? t.getScreenCTM().a : 1))")
    finally:
        browser.execute_cdp_cmd("Emulation.clearDeviceMetricsOverride", {})
    assert width <= PHONE_WIDTH and wide == 0, f"{wide} tables or charts wider than {PHONE_WIDTH} px"
    assert sizes, "the report has charts with text"
    assert min(sizes) >= MIN_CHART_TEXT_PX, f"smallest chart text {min(sizes):.1f} px at {PHONE_WIDTH} px wide"
