"""The web pages in a real browser: Debian's headless chromium, driven through chromedriver.

One journey from upload to issued certificate, as two people would do it: an operator signs in,
uploads a run and watches the analysis progress live; an approver signs in, opens the draft,
issues it, downloads its renderings and verifies it. Skipped only on a developer machine without
chromium; in CI (CI=true) a missing browser is a failure.
"""

from __future__ import annotations

import os
import shutil
import time
import urllib.request
from pathlib import Path

import pytest

from tests.service_support import EXAMPLE, PASSWORD, LiveServer, make_lab

CHROMIUM = shutil.which("chromium") or "/usr/bin/chromium"
CHROMEDRIVER = shutil.which("chromedriver") or "/usr/bin/chromedriver"
FLAGS = (
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--window-size=1280,1600",
)


def _browser_or_skip():
    missing = [p for p in (CHROMIUM, CHROMEDRIVER) if not os.path.exists(p)]
    if missing:
        message = f"headless browser not installed ({', '.join(missing)} missing)"
        if os.environ.get("CI") == "true":
            pytest.fail(message + "; .ci/run must install chromium and chromium-driver")
        pytest.skip(message)
    webdriver = pytest.importorskip("selenium.webdriver")
    return webdriver


@pytest.fixture()
def browser(tmp_path):
    webdriver = _browser_or_skip()
    from selenium.webdriver.chrome.service import Service

    # Never let selenium look for a driver or browser online.
    os.environ.setdefault("SE_OFFLINE", "true")
    options = webdriver.ChromeOptions()
    options.binary_location = CHROMIUM
    for flag in FLAGS:
        options.add_argument(flag)
    options.add_argument(f"--user-data-dir={tmp_path / 'profile'}")
    downloads = tmp_path / "downloads"
    downloads.mkdir()
    options.add_experimental_option(
        "prefs",
        {"download.default_directory": str(downloads), "download.prompt_for_download": False},
    )
    driver = webdriver.Chrome(service=Service(CHROMEDRIVER), options=options)
    driver.set_page_load_timeout(60)
    driver.downloads = downloads
    yield driver
    driver.quit()


@pytest.fixture()
def served(tmp_path):
    # No analysis worker yet: the journey starts it once the run page shows the job queued, so
    # the live update is seen however fast the fit is.
    lab = make_lab(tmp_path)
    with LiveServer(lab.app) as server:
        yield lab, server
    lab.services.stop_workers()
    lab.services.storage.dispose()


def _wait_for(predicate, timeout: float = 120.0, what: str = "condition"):
    """Poll ``predicate`` until it is truthy.

    A click that submits a form replaces the page under the predicate: an element found on the old
    page goes stale, or is not on the new one yet. Both mean "not yet", never a failure.
    """
    from selenium.common.exceptions import NoSuchElementException, StaleElementReferenceException

    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        try:
            value = predicate()
        except (StaleElementReferenceException, NoSuchElementException):
            value = None
        if value:
            return value
        time.sleep(0.2)
    raise AssertionError(f"timed out waiting for {what}")


def _flash_text(driver) -> str:
    from selenium.webdriver.common.by import By

    return " ".join(e.text for e in driver.find_elements(By.CSS_SELECTOR, ".flash"))


def _sign_in(driver, url: str, username: str) -> None:
    from selenium.webdriver.common.by import By

    driver.get(url + "/login")
    driver.find_element(By.ID, "username").send_keys(username)
    driver.find_element(By.ID, "password").send_keys(PASSWORD)
    driver.find_element(By.ID, "sign-in").click()
    _wait_for(lambda: driver.find_elements(By.ID, "sign-out"), 30, "the signed-in page")


def test_upload_to_issued_journey(browser, served, tmp_path):
    from selenium.webdriver.common.by import By

    lab, server = served
    driver = browser

    # The operator uploads a run without its manifest and watches it being analysed.
    _sign_in(driver, server.url, "olga")
    paths = [str(EXAMPLE / "sweep_03_60mK.csv")]
    driver.find_element(By.ID, "files").send_keys("\n".join(paths))
    driver.find_element(By.ID, "submit-run").click()
    _wait_for(lambda: "/runs/" in driver.current_url, 30, "the run page")
    # The page opens with the job queued (no worker has been started yet); then a worker starts
    # and what follows is the live update.
    assert driver.find_element(By.CSS_SELECTOR, ".job-status").text == "queued"
    lab.services.start_workers(1)
    widths = set()

    def finished():
        bar = driver.find_element(By.CSS_SELECTOR, ".job-bar")
        widths.add(bar.get_attribute("style"))
        return driver.find_elements(By.CSS_SELECTOR, "a.job-certificate")

    link = _wait_for(finished, 180, "the analysis to finish")[0]
    assert driver.find_element(By.CSS_SELECTOR, ".job-status").text == "done"
    assert "width: 100%" in " ".join(widths)  # the bar was driven by the live status
    certificate_id = link.text.removeprefix("Open certificate ").strip()
    link.click()
    _wait_for(lambda: driver.find_elements(By.ID, "certificate-state"), 30, "the certificate")
    assert driver.find_element(By.ID, "certificate-state").text == "draft"
    # An operator has no issue button.
    assert not driver.find_elements(By.ID, "issue")
    # Without a manifest the draft lacks what ISO/IEC 17025 7.8.2.1 asks for: the page says what
    # and takes it (the date of measurement came from the sweep's sweep_started line).
    missing = driver.find_element(By.ID, "missing").text
    assert "customer's name" in missing and "date of the measurement" not in missing
    fill = {
        "laboratory-name": "Browser Test Laboratory", "laboratory-address": "3 Test Lane",
        "customer-name": "A Customer", "customer-address": "4 Client Street",
        "item-description": "CBT chip", "item-identifier": "CBT-B1",
    }
    for field, value in fill.items():
        driver.find_element(By.ID, f"fill-{field}").send_keys(value)
    driver.find_element(By.ID, "correct").click()
    _wait_for(lambda: "can be issued" in _flash_text(driver), 30, "the corrected draft")
    assert not driver.find_elements(By.ID, "missing")
    driver.find_element(By.ID, "sign-out").click()

    # The approver reviews the draft (its document with plots) and issues it.
    _sign_in(driver, server.url, "arno")
    driver.get(f"{server.url}/certificates/{certificate_id}")
    frame = driver.find_element(By.ID, "document")
    driver.switch_to.frame(frame)
    _wait_for(lambda: driver.find_elements(By.TAG_NAME, "svg"), 30, "the plots")
    assert certificate_id in driver.page_source
    driver.switch_to.default_content()
    # Signing cannot be undone: the button does nothing until the approver confirms.
    driver.find_element(By.ID, "issue").click()
    time.sleep(1.0)
    assert driver.find_element(By.ID, "certificate-state").text == "draft"
    driver.find_element(By.ID, "issue-confirm").click()
    driver.find_element(By.ID, "issue").click()
    _wait_for(lambda: driver.find_element(By.ID, "certificate-state").text == "issued", 30, "issue")
    assert "issued and signed" in driver.find_element(By.CSS_SELECTOR, ".flash").text
    driver.save_screenshot(str(tmp_path / "issued.png"))

    # Renderings offered on the page are real documents.
    cookie = "; ".join(f"{c['name']}={c['value']}" for c in driver.get_cookies())
    for element_id, magic in (
        ("download-pdf", b"%PDF"),
        ("download-xml", b"<?xml"),
        ("download-json", b"{"),
        ("download-signed", b"{"),
    ):
        href = driver.find_element(By.ID, element_id).get_attribute("href")
        request = urllib.request.Request(href, headers={"Cookie": cookie})
        with urllib.request.urlopen(request, timeout=60) as reply:
            assert reply.read().startswith(magic), element_id

    # The archive lists it; verification passes.
    driver.get(f"{server.url}/certificates?state=issued")
    rows = driver.find_element(By.ID, "results").text
    assert certificate_id in rows
    driver.get(f"{server.url}/certificates/{certificate_id}")
    driver.find_element(By.ID, "verify").click()
    verdict = _wait_for(lambda: driver.find_elements(By.ID, "verdict"), 30, "the verdict")[0]
    assert verdict.text.startswith("Valid")
    Path(tmp_path / "verify.png").write_bytes(driver.get_screenshot_as_png())
    driver.find_element(By.ID, "sign-out").click()

    # The administrator gives themself the operator role and disables an account on People.
    _sign_in(driver, server.url, "adam")
    driver.get(f"{server.url}/users")
    row = driver.find_element(By.ID, "update-adam")
    row.find_element(By.CSS_SELECTOR, 'input[value="operator"]').click()
    driver.find_element(By.ID, "save-adam").click()
    _wait_for(lambda: "adam updated" in _flash_text(driver), 30, "the saved roles")
    row = driver.find_element(By.ID, "update-aude")
    row.find_element(By.CSS_SELECTOR, 'input[name="active"]').click()
    driver.find_element(By.ID, "save-aude").click()
    _wait_for(lambda: "aude updated" in _flash_text(driver), 30, "the disabled account")
    from service.web.auth import get_user

    assert "operator" in get_user(lab.services.storage, "adam")["roles"]
    assert not get_user(lab.services.storage, "aude")["active"]
