"""An item's history and the customer's check in a real browser (headless chromium, as in
tests/test_browser.py): an auditor opens an item and sees its drift plot and due date; a
customer, not signed in, checks the PDF they hold on the public page; a withdrawn certificate
shows as withdrawn."""

from __future__ import annotations

import hashlib
import urllib.request
from datetime import date, timedelta

import pytest

from tests import history_records as hr
from tests.service_support import LiveServer, make_lab
from tests.test_browser import _sign_in, _wait_for, browser  # noqa: F401 - the fixture

POLICY = {"max_permissible_change": {"deviation": {"max_change": 1.0}}}


@pytest.fixture()
def lab_server(tmp_path):
    lab = make_lab(tmp_path, RECALL_POLICY=POLICY)
    with LiveServer(lab.app) as server:
        yield lab, server
    lab.services.storage.dispose()


def _ago(days: int) -> str:
    return (date.today() - timedelta(days=days)).isoformat()


def _download_pdf(lab, server, cid, folder):
    request = urllib.request.Request(
        f"{server.url}/api/certificates/{cid}/pdf", headers=lab.headers("olga")
    )
    with urllib.request.urlopen(request, timeout=60) as reply:
        data = reply.read()
    path = folder / f"{cid}.pdf"
    path.write_bytes(data)
    return path


def test_auditor_sees_drift_and_due_date_customer_checks_a_pdf(browser, lab_server, tmp_path):  # noqa: F811
    from selenium.webdriver.common.by import By

    lab, server = lab_server
    driver = browser
    ids = [
        hr.archive_certificate(
            lab, hr.pump_record("HX-P3", _ago(d), deviation_ppm=-1.0 + 0.1 * i, gate_V=-0.3874)
        )
        for i, d in enumerate((600, 420, 250, 60))
    ]
    expected_due = (
        lab.client()
        .get("/api/items/HX-P3/history", headers=lab.headers("aude"))
        .get_json()["recall"]["due_date"]
    )

    # The auditor opens the item from the list of items due.
    _sign_in(driver, server.url, "aude")
    driver.get(server.url + "/due")
    driver.find_element(By.LINK_TEXT, "HX-P3").click()
    _wait_for(lambda: driver.find_elements(By.ID, "due-date"), 30, "the item page")
    assert driver.find_element(By.ID, "due-date").text == expected_due
    plot = driver.find_element(By.CSS_SELECTOR, "#drift-plot-0 svg")
    assert plot.size["width"] > 200 and plot.size["height"] > 100
    rows = driver.find_elements(By.CSS_SELECTOR, "#timeline .timeline-row")
    assert [r.get_attribute("data-state") for r in rows] == ["issued"] * 4
    driver.find_element(By.ID, "sign-out").click()

    # A customer with the PDF, not signed in, checks it on the public page.
    pdf = _download_pdf(lab, server, ids[-1], tmp_path)
    driver.get(f"{server.url}/check?id={ids[-1]}")
    assert not driver.find_elements(By.ID, "sign-out")
    assert driver.find_element(By.ID, "check-id").get_attribute("value") == ids[-1]
    driver.find_element(By.ID, "check-file").send_keys(str(pdf))
    driver.find_element(By.ID, "check-submit").click()
    verdict = _wait_for(lambda: driver.find_elements(By.ID, "check-verdict"), 30, "the answer")
    assert verdict[0].text == "Authentic, and in force."
    assert driver.find_element(By.ID, "check-state").text == "issued"
    # The browser sent the fingerprint, not the file.
    digest = hashlib.sha256(pdf.read_bytes()).hexdigest()
    assert driver.find_element(By.ID, "check-sha256").get_attribute("value") == digest
    assert driver.find_element(By.ID, "fingerprint-by").text == "computed by you or your browser"

    # The laboratory withdraws it; the same file now shows as withdrawn, with the reason.
    lab.services.archive.withdraw(
        ids[-1], {"id": 2, "username": "arno"}, "bridge out of calibration"
    )
    driver.get(f"{server.url}/check?id={ids[-1]}")
    driver.find_element(By.ID, "check-file").send_keys(str(pdf))
    driver.find_element(By.ID, "check-submit").click()
    _wait_for(lambda: driver.find_elements(By.ID, "check-state"), 30, "the answer")
    assert driver.find_element(By.ID, "check-state").text == "withdrawn"
    assert driver.find_element(By.ID, "check-withdrawn-reason").text == "bridge out of calibration"

    # A file that is not the issued one is not recognised.
    forged = tmp_path / "forged.pdf"
    forged.write_bytes(pdf.read_bytes().replace(b"%%EOF", b"%%EOF\n% edited"))
    driver.get(f"{server.url}/check?id={ids[0]}")
    driver.find_element(By.ID, "check-file").send_keys(str(forged))
    driver.find_element(By.ID, "check-submit").click()
    verdict = _wait_for(lambda: driver.find_elements(By.ID, "check-verdict"), 30, "the answer")
    assert verdict[0].text.startswith("No issued certificate with this number matches this file")
