"""The service end to end: upload → background fit → draft → issue → renderings → verify →
reproduce, through the Flask test client and against a live server on 127.0.0.1; refused uploads;
job failures, crashes and restarts; amendments; search; and the OpenAPI document."""

from __future__ import annotations

import hashlib
import io
import json
import re
import tarfile
import time
import zipfile

import pytest
from lxml import etree
from sqlalchemy import func, select

from service import storage as st
from service.archive import canonical_json, verify_signed_document
from service.storage import sha256_hex, utc_now
from service.web.openapi import openapi_document
from tests.service_support import (
    EXAMPLE,
    LiveServer,
    running_lab,
    small_run_files,
    zip_of,
)


@pytest.fixture(scope="module")
def lab(tmp_path_factory):
    yield from running_lab(tmp_path_factory.mktemp("service"))


@pytest.fixture(scope="module")
def issued(lab):
    """One run taken all the way to an issued certificate (shared by several tests)."""
    client = lab.client()
    reply = lab.upload(client)
    assert reply.status_code == 202, reply.get_json()
    job = lab.wait(client, reply.get_json()["job_id"])
    assert job["status"] == "done", job["error"]
    cert = job["certificate_id"]
    issued = client.post(f"/api/certificates/{cert}/issue", headers=lab.headers("arno"))
    assert issued.status_code == 200, issued.get_json()
    return {"certificate_id": cert, "upload": reply.get_json(), "job": job}


def _stored_counts(lab) -> tuple[int, int, int]:
    with lab.services.storage.read() as conn:
        runs = conn.execute(select(func.count()).select_from(st.runs)).scalar()
        jobs = conn.execute(select(func.count()).select_from(st.jobs)).scalar()
    blob_files = sum(
        1
        for p in (lab.services.storage.blobs.root).rglob("*")
        if p.is_file() and p.parent.name != "tmp"
    )
    return runs, jobs, blob_files


def test_upload_to_issued_through_the_test_client(lab, issued):
    client = lab.client()
    upload = issued["upload"]
    assert upload["kind"] == "cbt_thermometry"
    assert upload["seed"] == 424242  # from run.toml
    assert [f["name"] for f in upload["files"]] == ["run.toml", "sweep_03_60mK.csv"]
    # Raw bytes stored unchanged under their SHA-256.
    for name, data in small_run_files():
        entry = next(f for f in upload["files"] if f["name"] == name)
        assert entry["sha256"] == sha256_hex(data)
        assert lab.services.storage.blobs.get(entry["sha256"]) == data
    job = issued["job"]
    assert job["fraction"] == 1.0 and job["attempts"] == 1
    assert all(0.0 <= fraction <= 1.0 for _status, fraction in job["seen"])
    cert = issued["certificate_id"]
    info = client.get(f"/api/certificates/{cert}", headers=lab.headers("aude")).get_json()
    assert info["state"] == "issued" and info["sequence"] >= 1
    assert info["submitted_by"] == "olga" and info["issued_by"] == "arno"
    record = info["record"]
    assert record["certificate_id"] == cert
    assert record["dates"]["issued"] == info["issued_at"][:10]
    assert record["people"]["approver"] == "Arno"
    assert record["results"][0]["unit"] == "K"
    # Renderings.
    as_json = client.get(f"/api/certificates/{cert}/json", headers=lab.headers("olga"))
    assert as_json.status_code == 200 and json.loads(as_json.data)["certificate_id"] == cert
    html = client.get(f"/api/certificates/{cert}/html", headers=lab.headers("olga"))
    assert html.status_code == 200 and cert.encode() in html.data and b"<svg" in html.data
    pdf = client.get(f"/api/certificates/{cert}/pdf", headers=lab.headers("olga"))
    assert pdf.status_code == 200 and pdf.data.startswith(b"%PDF")
    assert pdf.headers["Content-Disposition"] == f'attachment; filename="{cert}.pdf"'
    xml = client.get(f"/api/certificates/{cert}/xml", headers=lab.headers("olga"))
    assert xml.status_code == 200
    assert etree.fromstring(xml.data).findtext(".//{https://ptb.de/dcc}uniqueIdentifier") == cert
    signed = client.get(f"/api/certificates/{cert}/signed", headers=lab.headers("aude"))
    document = json.loads(signed.data)
    public = bytes.fromhex(client.get("/api/public-key").get_json()["public_key_hex"])
    assert all(c.ok for c in verify_signed_document(document, public))
    # Verify and reproduce.
    report = client.get(f"/api/certificates/{cert}/verify", headers=lab.headers("aude"))
    assert report.get_json()["valid"], report.get_json()["problems"]
    again = client.post(f"/api/certificates/{cert}/reproduce", headers=lab.headers("aude"))
    assert again.status_code == 202
    job = lab.wait(client, again.get_json()["job_id"], who="aude")
    assert job["status"] == "done", job["error"]
    assert job["result"]["identical"], job["result"]["mismatches"][:5]
    assert job["result"]["numbers_compared"] > 50
    actions = [
        e["action"]
        for e in client.get(f"/api/events?subject={cert}", headers=lab.headers("aude")).get_json()[
            "events"
        ]
    ]
    assert {
        "certificate.drafted",
        "certificate.issued",
        "certificate.verified",
        "certificate.reproduced",
    } <= set(actions)


def test_a_configured_dcc_schema_checks_every_xml_rendering(lab, issued, tmp_path):
    # A lab's own schema copy (DCC_SCHEMA / COLDCERT_DCC_SCHEMA) is applied before the XML is
    # served: a schema our rendering cannot satisfy makes the request fail with a named reason.
    strict = tmp_path / "other.xsd"
    strict.write_text(
        '<xs:schema xmlns:xs="http://www.w3.org/2001/XMLSchema">'
        '<xs:element name="somethingElse" type="xs:string"/></xs:schema>'
    )
    client, cert = lab.client(), issued["certificate_id"]
    lab.app.config["DCC_SCHEMA"] = str(strict)
    try:
        refused = client.get(f"/api/certificates/{cert}/xml", headers=lab.headers("olga"))
    finally:
        lab.app.config["DCC_SCHEMA"] = None
    assert refused.status_code == 409
    assert "does not validate against" in refused.get_json()["error"]
    assert client.get(f"/api/certificates/{cert}/xml", headers=lab.headers("olga")).status_code == 200


def test_four_eyes_through_the_api(lab):
    client = lab.client()
    reply = lab.upload(client, who="pat")  # pat is operator and approver
    job = lab.wait(client, reply.get_json()["job_id"], who="pat")
    cert = job["certificate_id"]
    refused = client.post(f"/api/certificates/{cert}/issue", headers=lab.headers("pat"))
    assert refused.status_code == 403
    assert "four-eyes" in refused.get_json()["error"]
    # A draft has no issue date, so it has no DCC XML and no signature yet.
    xml = client.get(f"/api/certificates/{cert}/xml", headers=lab.headers("pat"))
    assert xml.status_code == 409 and "issue date" in xml.get_json()["error"]
    pdf = client.get(f"/api/certificates/{cert}/pdf", headers=lab.headers("pat"))
    assert pdf.status_code == 200
    assert (
        client.post(f"/api/certificates/{cert}/issue", headers=lab.headers("bea")).status_code
        == 200
    )
    again = client.post(f"/api/certificates/{cert}/issue", headers=lab.headers("arno"))
    assert again.status_code == 409 and "only a draft" in again.get_json()["error"]


def test_live_server_journey(lab):
    with LiveServer(lab.app) as server:
        status, _h, body = server.request("GET", "/api/health")
        assert status == 200
        status, _h, body = server.request(
            "POST", "/api/runs", lab.tokens["olga"], files=small_run_files(), fields={"seed": "7"}
        )
        assert status == 202, body
        upload = json.loads(body)
        assert upload["seed"] == 7
        deadline = time.monotonic() + 180
        while True:
            status, _h, body = server.request(
                "GET", f"/api/jobs/{upload['job_id']}", lab.tokens["olga"]
            )
            job = json.loads(body)
            if job["status"] in ("done", "failed") or time.monotonic() > deadline:
                break
            time.sleep(0.3)
        assert job["status"] == "done", job
        cert = job["certificate_id"]
        status, _h, body = server.request(
            "POST", f"/api/certificates/{cert}/issue", lab.tokens["bea"]
        )
        assert status == 200, body
        for fmt, magic in (("pdf", b"%PDF"), ("xml", b"<?xml"), ("json", b"{"), ("html", b"<")):
            status, headers, body = server.request(
                "GET", f"/api/certificates/{cert}/{fmt}", lab.tokens["olga"]
            )
            assert status == 200 and body.startswith(magic), (fmt, status)
        status, _h, body = server.request(
            "GET", f"/api/certificates/{cert}/verify", lab.tokens["aude"]
        )
        assert json.loads(body)["valid"]
        status, _h, body = server.request(
            "POST", f"/api/certificates/{cert}/reproduce", lab.tokens["aude"]
        )
        assert status == 202
        job_id = json.loads(body)["job_id"]
        while True:
            status, _h, body = server.request("GET", f"/api/jobs/{job_id}", lab.tokens["aude"])
            job = json.loads(body)
            if job["status"] in ("done", "failed") or time.monotonic() > deadline:
                break
            time.sleep(0.3)
        assert job["status"] == "done" and job["result"]["identical"], job


def _tar_with_link() -> bytes:
    buffer = io.BytesIO()
    with tarfile.open(fileobj=buffer, mode="w") as archive:
        link = tarfile.TarInfo("run/sweep.csv")
        link.type = tarfile.SYMTYPE
        link.linkname = "/etc/passwd"
        archive.addfile(link)
    return buffer.getvalue()


def _zip_with_symlink() -> bytes:
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w") as archive:
        info = zipfile.ZipInfo("sweep.csv")
        info.external_attr = 0o120777 << 16
        archive.writestr(info, "/etc/passwd")
    return buffer.getvalue()


RUN_TOML = (EXAMPLE / "run.toml").read_bytes()
SWEEP = (EXAMPLE / "sweep_03_60mK.csv").read_bytes()


def _header_line(data: bytes) -> int:
    lines = data.split(b"\n")
    return next(i for i, line in enumerate(lines, start=1) if line.startswith(b"bias_V"))


def _spoil_first_value(data: bytes) -> bytes:
    """The first data row's bias with a letter O typed for a zero."""
    lines = data.split(b"\n")
    row = _header_line(data)  # 1-based header line = 0-based index of the first data row
    lines[row] = b"1.2e-O3" + lines[row][lines[row].index(b",") :]
    return b"\n".join(lines)


@pytest.mark.parametrize(
    ("files", "form", "status", "expect"),
    [
        ([], {}, 400, {"error": "no files"}),
        (
            [("run.toml", RUN_TOML), ("sweep.csv", b"")],
            {},
            400,
            {"file": "sweep.csv", "error": "empty"},
        ),
        (
            [("sweep.csv", b"\x00\x01\x02binary\xff" * 20)],
            {},
            400,
            {"file": "sweep.csv", "error": "binary"},
        ),
        (
            [("sweep.csv", SWEEP.replace(b"bias_V,conductance_S", b"bias_mV,conductance"))],
            {},
            400,
            {"file": "sweep.csv", "line": _header_line(SWEEP), "field": "bias_mV"},
        ),
        (
            [("sweep.csv", _spoil_first_value(SWEEP))],
            {},
            400,
            {
                "file": "sweep.csv",
                "line": _header_line(SWEEP) + 1,
                "field": "bias_V",
                "error": "not a number",
            },
        ),
        (
            [("run.toml", b"[run]\nkind = 'thermometry'\n"), ("sweep.csv", SWEEP)],
            {},
            400,
            {"file": "run.toml", "field": "run.kind"},
        ),
        (
            [("run.zip", zip_of([("../evil.csv", SWEEP)], folder=""))],
            {},
            400,
            {"file": "run.zip", "error": "outside the run folder"},
        ),
        (
            [("run.zip", zip_of([("/etc/evil.csv", SWEEP)], folder=""))],
            {},
            400,
            {"error": "outside the run folder"},
        ),
        ([("run.zip", _zip_with_symlink())], {}, 400, {"error": "link"}),
        ([("run.tar", _tar_with_link())], {}, 400, {"error": "link or device"}),
        ([("run.zip", b"PK\x03\x04 not really a zip")], {}, 400, {"error": "not a readable zip"}),
        ([("run.toml", RUN_TOML), ("sweep.csv", SWEEP)], {"seed": "-4"}, 400, {"field": "seed"}),
        (
            [("run.toml", RUN_TOML), ("sweep.csv", SWEEP)],
            {"replaces": "CC-1999-00001", "reason": "typo"},
            404,
            {"field": "replaces"},
        ),
    ],
    ids=[
        "nothing",
        "empty",
        "binary",
        "wrong-columns",
        "bad-number",
        "bad-manifest",
        "zip-traversal",
        "zip-absolute",
        "zip-symlink",
        "tar-symlink",
        "not-zip",
        "bad-seed",
        "amends-unknown",
    ],
)
def test_bad_uploads_are_refused_and_nothing_is_stored(lab, files, form, status, expect):
    before = _stored_counts(lab)
    reply = lab.upload(lab.client(), files=files, **form)
    body = reply.get_json()
    assert reply.status_code == status, body
    for key, value in expect.items():
        if key == "error":
            assert value in body["error"], body
        else:
            assert body[key] == value, body
    assert _stored_counts(lab) == before


def test_oversized_uploads_are_refused(lab):
    before = _stored_counts(lab)
    lab.app.config["MAX_CONTENT_LENGTH"] = 20_000
    try:
        reply = lab.upload(lab.client(), files=[("run.toml", RUN_TOML), ("s.csv", SWEEP * 3)])
    finally:
        lab.app.config["MAX_CONTENT_LENGTH"] = 64 * 1024 * 1024
    assert reply.status_code == 413 and "larger than the limit" in reply.get_json()["error"]
    # A small zip that would unpack to a huge run (a "zip bomb") is refused before unpacking.
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", compression=zipfile.ZIP_DEFLATED) as archive:
        archive.writestr("huge.csv", b"0" * (5 * 1024 * 1024))
    lab.app.config["MAX_RUN_BYTES"] = 1024 * 1024
    try:
        reply = lab.upload(lab.client(), files=[("run.zip", buffer.getvalue())])
    finally:
        lab.app.config["MAX_RUN_BYTES"] = 256 * 1024 * 1024
    assert reply.status_code == 413 and "limit" in reply.get_json()["error"]
    assert _stored_counts(lab) == before


def test_zip_of_a_run_folder_is_accepted(lab):
    files = small_run_files() + [("notes.txt", b"bench notes, not part of the run")]
    reply = lab.upload(lab.client(), files=[("hollowmere.zip", zip_of(files))])
    body = reply.get_json()
    assert reply.status_code == 202, body
    assert [f["name"] for f in body["files"]] == ["run.toml", "sweep_03_60mK.csv"]
    assert body["ignored"] == ["notes.txt"]
    # Same bytes as the plain upload: content addressing stores them once.
    assert body["files"][1]["sha256"] == sha256_hex(SWEEP)


def test_amendment_and_withdrawal_over_the_api(lab, issued):
    client = lab.client()
    cert = issued["certificate_id"]
    refused = client.post(
        f"/api/certificates/{cert}/amend",
        headers=lab.headers("olga"),
        json={"reason": "x", "corrections": {"results": []}},
    )
    assert refused.status_code == 400 and "new run" in refused.get_json()["error"]
    reply = client.post(
        f"/api/certificates/{cert}/amend",
        headers=lab.headers("olga"),
        json={
            "reason": "customer renamed their group",
            "corrections": {"customer": {"name": "Quantum Devices Section (fictional)"}},
        },
    )
    assert reply.status_code == 201, reply.get_json()
    amended = reply.get_json()["certificate_id"]
    assert amended == f"{cert}-R2"
    assert (
        client.post(f"/api/certificates/{amended}/issue", headers=lab.headers("bea")).status_code
        == 200
    )
    old = client.get(f"/api/certificates/{cert}", headers=lab.headers("aude")).get_json()
    new = client.get(f"/api/certificates/{amended}", headers=lab.headers("aude")).get_json()
    assert old["state"] == "superseded" and old["superseded_by"] == amended
    assert new["record"]["replaces"] == cert
    xml = client.get(f"/api/certificates/{amended}/xml", headers=lab.headers("aude")).data
    assert b"<dcc:replacedUniqueIdentifier>" + cert.encode() in xml
    html = client.get(f"/api/certificates/{amended}/html", headers=lab.headers("aude")).data
    assert f"replaces certificate {cert}".encode() in html
    assert b"customer renamed their group" in html
    old_html = client.get(f"/api/certificates/{cert}/html", headers=lab.headers("aude")).data
    assert f"Superseded by certificate {amended}".encode() in old_html
    old_xml = client.get(f"/api/certificates/{cert}/xml", headers=lab.headers("aude")).data
    assert f"Superseded by certificate {amended}".encode() in old_xml
    for c in (cert, amended):
        assert client.get(f"/api/certificates/{c}/verify", headers=lab.headers("aude")).get_json()[
            "valid"
        ]
    # Withdrawal needs a reason and is final.
    bad = client.post(f"/api/certificates/{amended}/withdraw", headers=lab.headers("arno"), json={})
    assert bad.status_code == 400
    done = client.post(
        f"/api/certificates/{amended}/withdraw",
        headers=lab.headers("arno"),
        json={"reason": "device found cracked after shipping"},
    )
    assert done.status_code == 200 and done.get_json()["sequence"]
    assert client.get(
        f"/api/certificates/{amended}/verify", headers=lab.headers("aude")
    ).get_json()["valid"]
    whole = client.get("/api/archive/verify", headers=lab.headers("aude")).get_json()
    assert whole["valid"] and whole["entries"] >= 3


def test_archive_search(lab, issued):
    client = lab.client()
    headers = lab.headers("aude")
    cert = issued["certificate_id"]
    today = utc_now()[:10]
    found = client.get(f"/api/certificates?q={cert}", headers=headers).get_json()
    assert cert in [c["id"] for c in found["certificates"]]
    by_item = client.get(
        "/api/certificates?item=HLT-CBT-07&kind=cbt_thermometry", headers=headers
    ).get_json()
    assert by_item["count"] >= 1
    assert all(c["kind"] == "cbt_thermometry" for c in by_item["certificates"])
    dated = client.get(f"/api/certificates?from={today}&to={today}", headers=headers).get_json()
    assert dated["count"] >= 1
    assert (
        client.get("/api/certificates?from=1990-01-01&to=1990-12-31", headers=headers).get_json()[
            "count"
        ]
        == 0
    )
    states = {
        c["state"]
        for c in client.get("/api/certificates?state=draft", headers=headers).get_json()[
            "certificates"
        ]
    }
    assert states <= {"draft"}
    assert client.get("/api/certificates?state=lost", headers=headers).status_code == 400


def test_openapi_document_matches_the_routes(lab, issued):
    document = openapi_document()
    documented = {
        (method.upper(), path) for path, ops in document["paths"].items() for method in ops
    }
    routed = set()
    for rule in lab.app.url_map.iter_rules():
        if not rule.rule.startswith("/api/"):
            continue
        path = re.sub(r"<(?:[a-z]+:)?([a-z_]+)>", r"{\1}", rule.rule)
        for method in rule.methods - {"HEAD", "OPTIONS"}:
            routed.add((method, path))
    assert documented == routed


def test_every_documented_route_answers_as_documented(lab, issued):
    client = lab.client()
    cert = issued["certificate_id"]
    fill = {
        "name": "calibration_table.csv",
        "run_id": issued["upload"]["run_id"],
        "job_id": issued["upload"]["job_id"],
        "certificate_id": cert,
        "username": "olga",
    }
    bodies = {
        ("POST", "/api/runs"): None,
        ("POST", "/api/users"): {"username": "oa-check", "roles": "auditor"},
        ("PATCH", "/api/users/{username}"): {"roles": "operator"},
        ("POST", "/api/certificates/{certificate_id}/withdraw"): {"reason": "route check"},
        ("POST", "/api/certificates/{certificate_id}/amend"): {"reason": "route check"},
        ("POST", "/api/impact/reproduce"): {"certificate_ids": [cert]},
        ("POST", "/api/certificates/{certificate_id}/corrections"): {
            "corrections": {"customer": {"name": "Route Check"}}
        },
    }
    person = {"operator": "olga", "approver": "bea", "auditor": "aude", "admin": "adam"}
    # Issue and withdraw act on a fresh draft, the rest on a fresh issued certificate, so that
    # every call can succeed whatever other tests did to the shared one.
    first, second, third = (lab.upload(client).get_json()["job_id"] for _ in range(3))
    draft = lab.wait(client, first)["certificate_id"]
    cert = lab.wait(client, second)["certificate_id"]
    assert (
        client.post(f"/api/certificates/{cert}/issue", headers=lab.headers("bea")).status_code
        == 200
    )
    fill["certificate_id"] = cert
    fill["item"] = lab.services.archive.get(cert)["item"]
    pdf = client.get(f"/api/certificates/{cert}/pdf", headers=lab.headers("olga")).data
    # The public check answers a number and a file's SHA-256 (or the file), whatever the method.
    queries = {
        "/api/public/check": f"?id={cert}&sha256={hashlib.sha256(pdf).hexdigest()}",
    }
    # A token to revoke, and a failed job to retry (as if interrupted by restarts).
    fill["token_id"] = str(
        client.post("/api/users/olga/tokens", json={"label": "route check"},
                    headers=lab.headers("adam")).get_json()["token_id"]
    )
    failed_job = lab.upload(client).get_json()["job_id"]
    lab.wait(client, failed_job)
    with lab.services.storage.write() as conn:
        conn.execute(st.jobs.update().where(st.jobs.c.id == failed_job).values(
            status="failed", error="interrupted 3 times (route check)"))
    called = 0
    for path, operations in openapi_document()["paths"].items():
        for method, op in operations.items():
            key = (method.upper(), path)
            concrete = path
            for name, value in fill.items():
                concrete = concrete.replace("{" + name + "}", value)
            if path.endswith(("/issue", "/withdraw")):
                concrete = concrete.replace(cert, draft)
            if path.endswith("/retry"):
                concrete = concrete.replace(fill["job_id"], failed_job)
            if path.endswith("/corrections"):  # a draft of its own (the other is withdrawn)
                concrete = concrete.replace(cert, lab.wait(client, third)["certificate_id"])
            roles = op["x-roles"]
            headers = lab.headers(person[roles[0]]) if roles else {}
            kwargs = {"json": bodies.get(key, {})} if method != "get" else {}
            if key == ("POST", "/api/runs"):
                kwargs = {
                    "data": {"files": [(io.BytesIO(d), n) for n, d in small_run_files()]},
                    "content_type": "multipart/form-data",
                }
            if "{fmt}" in path:
                for fmt in op["parameters"][1]["schema"]["enum"]:
                    reply = client.open(
                        concrete.replace("{fmt}", fmt), method=method.upper(), headers=headers
                    )
                    assert str(reply.status_code) in op["responses"], (fmt, reply.status_code)
                    assert reply.status_code == 200, (fmt, reply.data[:200])
                    called += 1
                continue
            concrete += queries.get(path, "")
            reply = client.open(concrete, method=method.upper(), headers=headers, **kwargs)
            if "{name}" in path and "/files/" in path:
                # Thermometry keeps no output files; the 200 case is in tests/test_jobs.py.
                assert reply.status_code == 404 and "no output file" in reply.get_json()["error"]
                called += 1
                continue
            assert str(reply.status_code) in op["responses"], (
                key,
                reply.status_code,
                reply.data[:300],
            )
            assert reply.status_code < 400, (key, reply.status_code, reply.data[:300])
            called += 1
    assert called >= len(openapi_document()["paths"])


def test_signed_record_is_canonical_json(lab, issued):
    entry = lab.services.archive.signed_entry(issued["certificate_id"])
    assert sha256_hex(canonical_json(entry["entry"])) == entry["sha256"]


def test_command_line_verify_and_reproduce(lab, issued, tmp_path, capsys):
    from service.cli.main import main as cli_main

    instance = lab.app.instance_path
    cert = issued["certificate_id"]
    assert cli_main(["verify", cert, "--instance", instance]) == 0
    assert "valid" in capsys.readouterr().out
    # An exported signed entry checks offline against the lab's published key.
    exported = tmp_path / f"{cert}-signed.json"
    exported.write_bytes(
        lab.client().get(f"/api/certificates/{cert}/signed", headers=lab.headers("aude")).data
    )
    key_file = tmp_path / "lab.pem"
    key_file.write_text(lab.client().get("/api/public-key").get_json()["public_key_pem"])
    assert cli_main(["verify", str(exported), "--public-key", str(key_file)]) == 0
    capsys.readouterr()
    tampered = exported.read_text().replace('"unit": "K"', '"unit": "mK"', 1)
    assert tampered != exported.read_text()
    exported.write_text(tampered)
    assert cli_main(["verify", str(exported), "--public-key", str(key_file)]) == 1
    out = capsys.readouterr().out
    assert "FAIL" in out and "does not match" in out
    assert cli_main(["verify", "--all", "--instance", instance]) == 0
    assert cli_main(["verify", "CC-1999-99999", "--instance", instance]) == 2
    assert cli_main(["reproduce", cert, "--instance", instance]) == 0
    assert "identical bit for bit" in capsys.readouterr().out


def _session(lab, username: str):
    from tests.service_support import PASSWORD

    client = lab.client()
    page = client.get("/login").data
    token = re.search(rb'name="csrf_token" value="([^"]+)"', page).group(1).decode()
    reply = client.post(
        "/login", data={"username": username, "password": PASSWORD, "csrf_token": token}
    )
    assert reply.status_code == 302
    home = client.get("/")
    csrf = re.search(rb'name="csrf_token" value="([^"]+)"', home.data).group(1).decode()
    return client, csrf


def test_pages_for_each_step(lab, issued):
    cert = issued["certificate_id"]
    client, csrf = _session(lab, "olga")
    # A refused upload comes back to the form with the reason, naming the file.
    reply = client.post(
        "/upload",
        data={"csrf_token": csrf, "files": [(io.BytesIO(b""), "sweep.csv")]},
        content_type="multipart/form-data",
        follow_redirects=True,
    )
    assert b"Upload refused" in reply.data and b"sweep.csv" in reply.data
    reply = client.post(
        "/upload",
        data={"csrf_token": csrf, "files": [(io.BytesIO(d), n) for n, d in small_run_files()]},
        content_type="multipart/form-data",
    )
    assert reply.status_code == 303 and "/runs/run-" in reply.headers["Location"]
    run_page = client.get(reply.headers["Location"])
    assert b"job-bar" in run_page.data and b"sweep_03_60mK.csv" in run_page.data
    listing = client.get(f"/certificates?q={cert}&state=&kind=cbt_thermometry")
    assert cert.encode() in listing.data
    page = client.get(f"/certificates/{cert}")
    assert page.status_code == 200 and b'id="download-pdf"' in page.data
    assert b'id="issue"' not in page.data  # operators cannot issue
    assert client.get("/certificates/CC-1999-00000").status_code == 404

    auditor, csrf = _session(lab, "aude")
    verify_page = auditor.get(f"/certificates/{cert}/verify")
    assert b'id="verdict" class="ok"' in verify_page.data
    reply = auditor.post(f"/certificates/{cert}/reproduce", data={"csrf_token": csrf})
    assert reply.status_code == 303 and "/jobs/job-" in reply.headers["Location"]
    assert b"job-status" in auditor.get(reply.headers["Location"]).data
    assert b"certificate.issued" in auditor.get("/audit").data
    whole = auditor.get("/audit?verify=all").data
    assert b'id="archive-verdict" class="ok"' in whole

    admin, csrf = _session(lab, "adam")
    reply = admin.post(
        "/users",
        data={
            "csrf_token": csrf,
            "username": "gus",
            "roles": ["auditor"],
            "password": "a long enough password",
        },
    )
    assert b"User added." in reply.data and b"gus" in reply.data
    reply = admin.post("/users", data={"csrf_token": csrf, "action": "token", "username": "gus"})
    assert re.search(rb'id="new-token">cct_', reply.data)


def test_an_incomplete_draft_is_not_issued_until_corrected(lab):
    # ISO/IEC 17025:2017 7.8.2.1 lists what every report states (laboratory, customer, item,
    # dates, method, results with uncertainty, authorisation): a draft may lack some of it, an
    # issued certificate may not. Without a manifest, the date of measurement comes from the
    # sweep's '# sweep_started:' line.
    sweep = (EXAMPLE / "sweep_03_60mK.csv").read_bytes()
    assert b"# sweep_started: 2026-" in sweep
    client = lab.client()
    reply = lab.upload(client, files=[("sweep_03_60mK.csv", sweep)])
    assert reply.status_code == 202, reply.get_json()
    job = lab.wait(client, reply.get_json()["job_id"])
    assert job["status"] == "done", job["error"]
    cert = job["certificate_id"]
    info = client.get(f"/api/certificates/{cert}", headers=lab.headers("olga")).get_json()
    assert info["record"]["dates"]["measured"][:4] == "2026"
    missing = {m["field"] for m in info["missing"]}
    assert {"laboratory.name", "customer.name", "item.identifier"} <= missing
    assert "dates.measured" not in missing and "method.description" not in missing
    refused = client.post(f"/api/certificates/{cert}/issue", headers=lab.headers("arno"))
    assert refused.status_code == 409
    assert "customer's name" in refused.get_json()["error"]
    assert client.get(f"/api/certificates/{cert}", headers=lab.headers("olga")).get_json()[
        "state"] == "draft"
    # Results cannot be "corrected"; administrative fields can, on the draft itself.
    bad = client.post(
        f"/api/certificates/{cert}/corrections",
        json={"corrections": {"results": []}},
        headers=lab.headers("olga"),
    )
    assert bad.status_code == 400
    fill = {
        "laboratory": {"name": "Test Lab", "address": "1 Test Road"},
        "customer": {"name": "A Customer", "address": "2 Client Street"},
        "item": {"description": "CBT chip", "identifier": "CBT-1"},
    }
    done = client.post(
        f"/api/certificates/{cert}/corrections", json={"corrections": fill},
        headers=lab.headers("olga"),
    )
    assert done.status_code == 200 and done.get_json()["missing"] == []
    issued = client.post(f"/api/certificates/{cert}/issue", headers=lab.headers("arno"))
    assert issued.status_code == 200, issued.get_json()
    record = client.get(f"/api/certificates/{cert}/json", headers=lab.headers("olga")).get_json()
    assert record["customer"]["name"] == "A Customer" and "customer" in record["corrected_fields"]
    # The corrected item identifies the run and the certificate in the archive, and verifies.
    report = client.get(f"/api/certificates/{cert}/verify", headers=lab.headers("aude")).get_json()
    assert report["valid"], [c for c in report["checks"] if not c["ok"]]
    assert client.get(f"/api/certificates/{cert}", headers=lab.headers("olga")).get_json()[
        "item"] == "CBT-1"


def test_issued_renderings_carry_the_signature_details(lab, issued):
    # The auditor's check of authorisation: approver and role, key id, chain entry and its hash,
    # and where the public key is published, in the HTML the archive serves.
    client, cert = lab.client(), issued["certificate_id"]
    info = client.get(f"/api/certificates/{cert}", headers=lab.headers("olga")).get_json()
    html = client.get(f"/api/certificates/{cert}/html", headers=lab.headers("olga")).data.decode()
    assert "signed electronically" in html and "(approver" in html
    assert info["sha256"] in html and info["key_id"] in html
    assert f"entry {info['sequence']}" in html and "/api/public-key" in html
