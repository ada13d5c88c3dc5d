"""The pages in a real browser: headless Chromium (Debian's ``chromium`` and
``chromium-driver``) driven by Selenium through ``/usr/bin/chromedriver`` (nothing is
downloaded), against the app served by werkzeug's threaded server on a loopback port.

Signs in as an owner and as a submitter through the form, opens every page, checks what is
and is not shown (the same rules as the API's JSON), that the browser logged no error (CSP
violations and failed loads show there), that every chart image loaded, that a model name
with markup is text, and that a phone-width viewport has no horizontal overflow.
Screenshots go to ``$HELDOUT_SCREENSHOTS`` (default: the test's temporary directory).

References: the API's JSON for the same token (what a page may show); the W3C WebDriver
protocol and Chrome's DevTools protocol (``Emulation.setDeviceMetricsOverride``) for driving
the browser.
"""

from __future__ import annotations

import os
import threading
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from webdata import MARKUP_MODEL

CHROMIUM = Path("/usr/bin/chromium")
CHROMEDRIVER = Path("/usr/bin/chromedriver")

webdriver = pytest.importorskip("selenium.webdriver", reason="tests/run installs selenium")
if not (CHROMIUM.exists() and CHROMEDRIVER.exists()):
    pytest.skip(
        "Debian's chromium and chromium-driver are not installed (tests/run installs them)",
        allow_module_level=True,
    )

from selenium.webdriver.chrome.service import Service  # noqa: E402
from selenium.webdriver.common.by import By  # noqa: E402
from selenium.webdriver.support import expected_conditions  # noqa: E402
from selenium.webdriver.support.ui import WebDriverWait  # noqa: E402

PHONE = {"width": 390, "height": 844, "deviceScaleFactor": 2, "mobile": True}


@pytest.fixture(scope="module")
def base_url(site: Any) -> Iterator[str]:
    from werkzeug.serving import make_server

    server = make_server("127.0.0.1", 0, site.app, threaded=True)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    try:
        yield f"http://127.0.0.1:{server.server_port}"
    finally:
        server.shutdown()
        thread.join(timeout=10)


@pytest.fixture(scope="module")
def shots(tmp_path_factory: pytest.TempPathFactory) -> Path:
    target = os.environ.get("HELDOUT_SCREENSHOTS")
    path = Path(target) if target else tmp_path_factory.mktemp("screenshots")
    path.mkdir(parents=True, exist_ok=True)
    return path


@pytest.fixture(scope="module")
def browser() -> Iterator[Any]:
    options = webdriver.ChromeOptions()
    options.binary_location = str(CHROMIUM)
    for arg in (
        "--headless=new",
        "--no-sandbox",  # the suite runs as root
        "--disable-dev-shm-usage",
        "--disable-gpu",
        "--window-size=1366,900",
        "--no-first-run",
        "--disable-extensions",
    ):
        options.add_argument(arg)
    options.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    driver = webdriver.Chrome(service=Service(executable_path=str(CHROMEDRIVER)), options=options)
    driver.set_page_load_timeout(30)
    try:
        yield driver
    finally:
        driver.quit()


def _errors(driver: Any) -> list[dict[str, Any]]:
    """Console entries at level SEVERE since the last call (CSP violations, failed loads)."""
    return [e for e in driver.get_log("browser") if e["level"] == "SEVERE"]


def _open(driver: Any, url: str, shots: Path, name: str) -> None:
    driver.get(url)
    loaded = driver.execute_script(
        "return Array.from(document.images)"
        ".map(i => [i.currentSrc, i.complete && i.naturalWidth > 0])"
    )
    assert all(ok for _, ok in loaded), loaded
    driver.save_screenshot(str(shots / f"{name}.png"))
    assert _errors(driver) == []


def _arrive(driver: Any, url: str) -> None:
    """Wait (at most 15 s) until a form's redirect has landed on ``url``."""
    WebDriverWait(driver, 15).until(expected_conditions.url_to_be(url))


def _sign_in(driver: Any, base: str, token: str) -> None:
    driver.delete_all_cookies()
    driver.get(f"{base}/sign-in")
    driver.find_element(By.ID, "token").send_keys(token)
    driver.find_element(By.ID, "sign-in-button").click()
    _arrive(driver, f"{base}/holdouts")
    assert _errors(driver) == []


def _no_horizontal_overflow(driver: Any) -> None:
    width = driver.execute_script(
        "return [document.documentElement.scrollWidth, window.innerWidth]"
    )
    assert width[0] <= width[1], width


def test_owner_in_the_browser(browser: Any, base_url: str, site: Any, shots: Path) -> None:
    sc = site.scenario
    _sign_in(browser, base_url, site.tokens["owner"])
    _open(browser, f"{base_url}/holdouts", shots, "owner-holdouts")
    assert "diabetes-half" in browser.find_element(By.ID, "holdouts").text
    _open(browser, f"{base_url}/holdouts/{sc.holdout_id}", shots, "owner-holdout")
    standings = browser.find_element(By.ID, "standings").text
    assert "RESERVE" in standings.upper() and sc.other_model in standings
    assert browser.find_element(By.CSS_SELECTOR, "#slices img").get_attribute("alt")
    _open(browser, f"{base_url}/submissions/{sc.own[0]}", shots, "owner-submission")
    views = browser.find_element(By.ID, "views").text
    assert "reserve" in views and "feedback" in views
    _open(
        browser,
        f"{base_url}/holdouts/{sc.holdout_id}/sweeps/inverse-alpha?group=g1",
        shots,
        "owner-sweep",
    )
    assert browser.find_element(By.ID, "sweep-points").text


def test_submitter_in_the_browser(browser: Any, base_url: str, site: Any, shots: Path) -> None:
    sc = site.scenario
    _sign_in(browser, base_url, site.tokens["g1"])
    _open(browser, f"{base_url}/holdouts/{sc.holdout_id}", shots, "submitter-holdout")
    body = browser.find_element(By.TAG_NAME, "body").text
    assert "Reserve" not in body and "reserve" not in body.split("Rows")[0]
    assert sc.other_model not in body
    assert browser.find_elements(By.ID, "slices") == []
    _open(browser, f"{base_url}/submissions/{sc.own[2]}", shots, "submitter-submission")
    # the markup in the model name is shown as text: no element was made from it
    assert browser.find_element(By.ID, "model-name").text == MARKUP_MODEL
    assert browser.find_elements(By.CSS_SELECTOR, "#model-name b, #model-name img") == []
    assert browser.find_element(By.ID, "submission-slice").text.startswith("feedback")
    # another group's submission: the page answers 404 like the API
    browser.get(f"{base_url}/submissions/{sc.other[0]}")
    assert "Not found" in browser.find_element(By.TAG_NAME, "h1").text
    assert sc.other_model not in browser.page_source
    browser.get_log("browser")  # the 404 itself is logged as a failed load; nothing else
    _open(
        browser,
        f"{base_url}/holdouts/{sc.holdout_id}/sweeps/inverse-alpha",
        shots,
        "submitter-sweep",
    )
    # sign out through the form: the session ends
    browser.find_element(By.CSS_SELECTOR, "form[action='/sign-out'] button").click()
    _arrive(browser, f"{base_url}/sign-in")
    browser.get(f"{base_url}/holdouts")
    assert browser.current_url.startswith(f"{base_url}/sign-in")
    assert _errors(browser) == []


def test_phone_width(browser: Any, base_url: str, site: Any, shots: Path) -> None:
    sc = site.scenario
    _sign_in(browser, base_url, site.tokens["owner"])
    browser.execute_cdp_cmd("Emulation.setDeviceMetricsOverride", PHONE)
    try:
        for name, path in (
            ("phone-holdouts", "/holdouts"),
            ("phone-holdout", f"/holdouts/{sc.holdout_id}"),
            ("phone-submission", f"/submissions/{sc.own[0]}"),
            ("phone-sweep", f"/holdouts/{sc.holdout_id}/sweeps/inverse-alpha?group=g1"),
        ):
            _open(browser, base_url + path, shots, name)
            _no_horizontal_overflow(browser)
        # the narrow charts were chosen by the picture's media query
        sources = browser.execute_script(
            "return Array.from(document.images).map(i => i.currentSrc)"
        )
        assert sources and all("size=narrow" in s for s in sources), sources
    finally:
        browser.execute_cdp_cmd("Emulation.clearDeviceMetricsOverride", {})
