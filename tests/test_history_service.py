"""Items in the service: history (API, PDF, page), items due, impact of a change, bulk
reproduction, and the customer's public check (what it reveals, and that it is throttled)."""

from __future__ import annotations

import hashlib
import io
import json
from datetime import date, timedelta

import pypdf
import pytest
from sqlalchemy import func, select

from service import storage as st
from service.archive.items import result_movements
from tests import history_records as hr
from tests.service_support import make_lab

POLICY = {
    "max_permissible_change": {"deviation": {"max_change": 1.0}},
    "maximum_interval_days": 730,
    "minimum_interval_days": 30,
}


def _ago(days: int) -> str:
    return (date.today() - timedelta(days=days)).isoformat()


@pytest.fixture()
def lab(tmp_path):
    lab = make_lab(tmp_path, RECALL_POLICY=POLICY, PUBLIC_CHECK_LIMIT="6 per minute")
    yield lab
    lab.services.storage.dispose()


def _pump_history(lab, item="HX-P3", days=(700, 500, 300, 100), software="0.1.0"):
    ids = []
    for i, d in enumerate(days):
        record = hr.pump_record(item, _ago(d), deviation_ppm=-1.0 + 0.05 * i, gate_V=-0.3874)
        record["reproducibility"]["software"]["coldcert"] = software
        ids.append(hr.archive_certificate(lab, record))
    return ids


# ---- history ---------------------------------------------------------------------------------


def test_history_api_lists_every_revision_and_state_in_time_order(lab):
    ids = _pump_history(lab)
    c = lab.client()
    lab.services.archive.withdraw(ids[1], {"id": 2, "username": "arno"}, "wrong frequency")
    reply = c.get("/api/items/HX-P3/history", headers=lab.headers("olga"))
    assert reply.status_code == 200
    h = reply.get_json()
    assert [x["certificate_id"] for x in h["certificates"]] == ids
    assert [x["state"] for x in h["certificates"]] == ["issued", "withdrawn", "issued", "issued"]
    assert h["certificates"][1]["withdrawn_reason"] == "wrong frequency"
    assert h["in_force"] == [ids[0], ids[2], ids[3]]
    deviation = h["quantities"][0]
    assert [p["certificate_id"] for p in deviation["points"]] == h["in_force"]
    assert h["recall"]["last_calibration"] == _ago(100)
    assert h["recall"]["method"].startswith("ILAC-G24")
    assert c.get("/api/items/NOPE/history", headers=lab.headers("olga")).status_code == 404
    assert c.get("/api/items/HX-P3/history").status_code == 401


def test_history_pdf_and_page(lab):
    _pump_history(lab)
    c = lab.client()
    reply = c.get("/api/items/HX-P3/history.pdf", headers=lab.headers("aude"))
    assert reply.status_code == 200 and reply.data.startswith(b"%PDF")
    text = "".join(p.extract_text() for p in pypdf.PdfReader(io.BytesIO(reply.data)).pages)
    assert "Calibration history of HX-P3" in text and "not an accreditation" in text
    page = c.get("/items/HX-P3", headers=lab.headers("aude"))
    assert page.status_code == 200
    html = page.get_data(as_text=True)
    assert 'id="due-date"' in html and "<svg" in html


def test_items_due_and_overdue(lab):
    _pump_history(lab, "HX-P3")
    _pump_history(lab, "OLD-P1", days=(2000, 1800))
    c = lab.client()
    rows = c.get("/api/items/due", headers=lab.headers("olga")).get_json()["items"]
    by_item = {r["item"]: r for r in rows}
    assert by_item["OLD-P1"]["status"] == "overdue" and by_item["OLD-P1"]["days_remaining"] < 0
    assert by_item["HX-P3"]["status"] in ("in date", "due")
    overdue = c.get("/api/items/due?status=overdue", headers=lab.headers("olga")).get_json()
    assert [r["item"] for r in overdue["items"]] == ["OLD-P1"]
    assert c.get("/api/items/due?status=late", headers=lab.headers("olga")).status_code == 400
    assert "OLD-P1" in c.get("/due", headers=lab.headers("olga")).get_data(as_text=True)


# ---- impact of a change ----------------------------------------------------------------------


def test_impact_lists_certificates_by_software_with_item_and_customer(lab):
    old = _pump_history(lab, "HX-P3", days=(300, 200), software="0.1.0")
    new = _pump_history(lab, "HX-P4", days=(150,), software="0.2.0")
    c = lab.client()
    found = c.get("/api/impact?software=0.1.0", headers=lab.headers("aude")).get_json()
    assert [x["certificate_id"] for x in found["certificates"]] == old
    assert {x["item"] for x in found["certificates"]} == {"HX-P3"}
    assert found["certificates"][0]["customer"] == hr.CUSTOMER["name"]
    other = c.get("/api/impact?software=coldcert=0.2.0", headers=lab.headers("aude")).get_json()
    assert [x["certificate_id"] for x in other["certificates"]] == new
    by_model = c.get("/api/impact?model=n·e·f", headers=lab.headers("aude")).get_json()
    assert by_model["count"] == 0  # the invented pump records name no model
    everything = c.get("/api/impact", headers=lab.headers("aude")).get_json()
    assert everything["count"] == len(old) + len(new)
    assert c.get("/api/impact?software=0.1.0", headers=lab.headers("olga")).status_code == 403


def test_bulk_reproduce_queues_one_job_per_certificate(lab):
    ids = _pump_history(lab, days=(300, 200))
    c = lab.client()
    reply = c.post(
        "/api/impact/reproduce",
        json={"certificate_ids": ids, "fraction": 0.2},
        headers=lab.headers("aude"),
    )
    assert reply.status_code == 202
    jobs = reply.get_json()["jobs"]
    assert [j["certificate_id"] for j in jobs] == ids
    report = c.get(reply.get_json()["report_url"], headers=lab.headers("aude")).get_json()
    assert not report["finished"]
    assert [j["status"] for j in report["jobs"]] == ["queued", "queued"]
    bad = c.post(
        "/api/impact/reproduce", json={"certificate_ids": "all"}, headers=lab.headers("aude")
    )
    assert bad.status_code == 400 and bad.get_json()["field"] == "certificate_ids"


def test_result_movements_compare_with_a_fraction_of_U():
    record = {
        "results": [
            {"name": "a", "expanded_uncertainty": 0.5},
            {"name": "b", "expanded_uncertainty": 2.0},
        ]
    }
    report = {
        "mismatches": [
            {"path": "results[0].value", "archived": 1.0, "reproduced": 1.2},  # 0.4 U
            {"path": "results[1].value", "archived": 3.0, "reproduced": 3.1},  # 0.05 U
            {"path": "results[1].budget.rows[0].estimate", "archived": 1, "reproduced": 2},
        ]
    }
    moved = result_movements(record, report, 0.1)
    assert [(m["name"], round(m["moved_by_U"], 6), m["exceeds"]) for m in moved] == [
        ("a", 0.4, True),
        ("b", 0.05, False),
    ]


# ---- the customer's check --------------------------------------------------------------------


def _pdf(lab, client, cid):
    reply = client.get(f"/api/certificates/{cid}/pdf", headers=lab.headers("olga"))
    assert reply.status_code == 200
    return reply.data


def test_pdf_carries_number_signed_hash_and_where_to_check(lab):
    (cid,) = _pump_history(lab, days=(100,))
    c = lab.client()
    text = pypdf.PdfReader(io.BytesIO(_pdf(lab, c, cid))).pages[0].extract_text()
    signed = lab.services.archive.get(cid)["sha256"]
    assert "Check this certificate" in text
    assert signed in text.replace("\n", "")
    assert f"/check?id={cid}" in text.replace("\n", "")


def _check(client, cid, data):
    return client.get(f"/api/public/check?id={cid}&sha256={hashlib.sha256(data).hexdigest()}")


def test_public_check_answers_state_and_replacement_and_nothing_else(lab):
    ids = _pump_history(lab, days=(300, 100))
    c = lab.client()
    pdf = _pdf(lab, c, ids[0])
    answer = _check(c, ids[0], pdf).get_json()
    assert answer == {
        "certificate_id": ids[0],
        "authentic": True,
        "state": "issued",
        "message": "Authentic, and in force.",
    }

    # Amended: the old revision is superseded by the new one, and the answer says which.
    archive = lab.services.archive
    new = archive.amend(
        ids[0],
        {"id": 1, "username": "olga", "display_name": "Olga"},
        "customer address corrected",
        {"customer": {"name": "Heron", "address": "x"}},
    )
    archive.issue(new, {"id": 2, "username": "arno", "display_name": "Arno"})
    answer = _check(c, ids[0], pdf).get_json()
    assert set(answer) == {
        "certificate_id",
        "authentic",
        "state",
        "superseded_by",
        "current_revision",
        "message",
    }
    assert answer["state"] == "superseded" and answer["superseded_by"] == new
    assert answer["current_revision"] == {"certificate_id": new, "state": "issued"}

    # Withdrawn: the answer says so and why.
    pdf2 = _pdf(lab, c, ids[1])
    archive.withdraw(ids[1], {"id": 2, "username": "arno"}, "reference standard found faulty")
    answer = _check(c, ids[1], pdf2).get_json()
    assert set(answer) == {"certificate_id", "authentic", "state", "withdrawn_reason", "message"}
    assert answer["state"] == "withdrawn"
    assert answer["withdrawn_reason"] == "reference standard found faulty"

    # Nothing of the record leaks: not the customer, item, values or dates.
    body = json.dumps(answer) + json.dumps(_check(c, ids[0], pdf).get_json())
    for secret in (hr.CUSTOMER["name"], "HX-P3", "ppm", _ago(300), _ago(100)):
        assert secret not in body


def test_wrong_file_unknown_number_and_draft_get_one_and_the_same_answer(lab):
    (cid,) = _pump_history(lab, days=(100,))
    draft = hr.archive_certificate(
        lab, hr.pump_record("HX-P3", _ago(10), deviation_ppm=-1.0, gate_V=-0.3874), issue=False
    )
    c = lab.client()
    real = _pdf(lab, c, cid)
    draft_pdf = _pdf(lab, c, draft)
    answers = [
        _check(c, cid, real + b"tampered").get_json(),
        _check(c, "CC-1999-00001", real).get_json(),
        _check(c, draft, draft_pdf).get_json(),
    ]
    for a in answers:
        assert a["authentic"] is False and set(a) == {"certificate_id", "authentic", "message"}
    assert len({a["message"] for a in answers}) == 1
    bad = c.get(f"/api/public/check?id={cid}&sha256=xyz")
    assert bad.status_code == 400 and bad.get_json()["field"] == "sha256"


def test_a_file_checked_on_the_server_is_not_stored(lab):
    (cid,) = _pump_history(lab, days=(100,))
    c = lab.client()
    pdf = _pdf(lab, c, cid)
    blobs = lab.services.storage.blobs.root

    def stored():
        with lab.services.storage.read() as conn:
            rows = conn.execute(select(func.count()).select_from(st.blobs)).scalar_one()
            noted = conn.execute(select(func.count()).select_from(st.served_files)).scalar_one()
        return rows, noted, sorted(p.name for p in blobs.rglob("*") if p.is_file())

    before = stored()
    reply = c.post(
        "/api/public/check",
        data={"id": cid, "file": (io.BytesIO(pdf), "mine.pdf")},
        content_type="multipart/form-data",
    )
    assert reply.get_json()["authentic"] is True
    assert stored() == before
    page = c.post(
        "/check",
        data={"id": cid, "file": (io.BytesIO(pdf), "mine.pdf")},
        content_type="multipart/form-data",
    )
    assert 'id="check-state"' in page.get_data(as_text=True)
    assert "computed by the server (the file was not kept)" in page.get_data(as_text=True)
    assert stored() == before


def test_public_check_is_throttled_per_address(lab):
    (cid,) = _pump_history(lab, days=(100,))
    c = lab.client()
    pdf = _pdf(lab, c, cid)
    for _ in range(5):
        assert c.get("/check").status_code == 200  # loading the empty form is not counted
    codes = [_check(c, cid, pdf).status_code for _ in range(6)]
    assert codes == [200] * 6
    throttled = _check(c, cid, pdf)
    assert throttled.status_code == 429 and "too many checks" in throttled.get_json()["error"]
    # The page shares the budget with the API.
    page = c.get(f"/check?id={cid}&sha256={hashlib.sha256(pdf).hexdigest()}")
    assert page.status_code == 429
    # Another address still gets its answers.
    other = c.get(
        f"/api/public/check?id={cid}&sha256={hashlib.sha256(pdf).hexdigest()}",
        environ_base={"REMOTE_ADDR": "127.0.0.9"},
    )
    assert other.status_code == 200


def test_command_line_history_and_due(lab, tmp_path, capsys):
    from service.cli.main import main as cli_main

    ids = _pump_history(lab, days=(400, 200))
    instance = lab.app.instance_path
    report = tmp_path / "history.pdf"
    assert cli_main(["history", "HX-P3", "--instance", instance, "--pdf", str(report)]) == 0
    out = capsys.readouterr().out
    assert out.startswith("History of HX-P3 (pump_verification)")
    assert ids[0] in out and "recall: " in out
    assert report.read_bytes().startswith(b"%PDF")
    assert cli_main(["history", "HX-P3", "--instance", instance, "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["in_force"] == ids
    assert cli_main(["history", "NOPE", "--instance", instance]) == 2
    assert "no certificate of item 'NOPE'" in capsys.readouterr().err
    assert cli_main(["due", "--instance", instance]) == 0
    assert "HX-P3" in capsys.readouterr().out


@pytest.mark.slow
def test_bulk_reproduction_of_a_real_run_through_the_queue(tmp_path):
    import time

    lab = make_lab(tmp_path)
    lab.services.start_workers(1)
    try:
        c = lab.client()
        upload = lab.upload(c)
        job = lab.wait(c, upload.get_json()["job_id"])
        cert = job["certificate_id"]
        assert (
            c.post(f"/api/certificates/{cert}/issue", headers=lab.headers("arno")).status_code
            == 200
        )
        reply = c.post(
            "/api/impact/reproduce",
            json={"certificate_ids": [cert], "fraction": 0.05},
            headers=lab.headers("aude"),
        )
        assert reply.status_code == 202
        url = reply.get_json()["report_url"]
        deadline = time.monotonic() + 300
        while time.monotonic() < deadline:
            report = c.get(url, headers=lab.headers("aude")).get_json()
            if report["finished"]:
                break
            time.sleep(0.5)
        (row,) = report["jobs"]
        assert row["status"] == "done", row
        # Same seed, same options, same software: nothing moves, bit for bit.
        assert row["identical"] is True and row["moved"] == []
        assert report["certificates_with_moves"] == []
    finally:
        lab.services.stop_workers()
        lab.services.storage.dispose()


def test_impact_page_reproduces_the_selection_and_links_items(lab):
    ids = _pump_history(lab, days=(300, 200))
    c = lab.client()
    page = c.get("/impact?software=0.1.0", headers=lab.headers("aude")).get_data(as_text=True)
    assert all(cid in page for cid in ids) and "/items/HX-P3" in page
    reply = c.post(
        "/impact", data={"certificate_id": ids[:1], "fraction": "0.2"}, headers=lab.headers("aude")
    )
    assert reply.status_code == 303 and "/impact/reproduce?jobs=job-" in reply.headers["Location"]
    report = c.get(reply.headers["Location"], headers=lab.headers("aude"))
    assert ids[0] in report.get_data(as_text=True)
    certificate = c.get(f"/certificates/{ids[0]}", headers=lab.headers("olga"))
    assert 'id="item-history"' in certificate.get_data(as_text=True)


def test_a_wrong_recall_policy_gets_a_message_naming_the_setting(tmp_path):
    lab = make_lab(tmp_path, RECALL_POLICY={"max_permissible_change": {"temprature": 0.01}})
    try:
        _pump_history(lab, days=(100,))
        reply = lab.client().get("/api/items/due", headers=lab.headers("olga"))
        assert reply.status_code == 500
        assert "max_permissible_change names 'temprature'" in reply.get_json()["error"]
    finally:
        lab.services.storage.dispose()
