"""Accounts, sessions, headers and operations under stress: token revocation, sessions ended by a
password change, login throttling, Secure cookies over TLS, private database file, security
headers, ``--workers 0``, a full disk and a read-only instance."""

from __future__ import annotations

import errno
import os
import re
import stat
import subprocess
import sys
from pathlib import Path

import pytest

from tests.hostile_support import database_file, draft, user
from tests.service_support import PASSWORD, make_lab, small_run_files


@pytest.fixture(scope="module")
def lab(tmp_path_factory):
    lab = make_lab(tmp_path_factory.mktemp("hardening"))
    yield lab
    lab.services.storage.dispose()


def _browser_login(lab, username: str, password: str = PASSWORD, **kwargs):
    client = lab.client()
    page = client.get("/login", **kwargs).get_data(as_text=True)
    token = re.search(r'name="csrf_token" value="([^"]+)"', page).group(1)
    reply = client.post(
        "/login", data={"username": username, "password": password, "csrf_token": token}, **kwargs
    )
    return client, reply


# ---- accounts and sessions --------------------------------------------------------------------


def test_one_token_can_be_revoked(lab):
    client = lab.client()
    made = client.post("/api/users/olga/tokens", json={"label": "laptop"},
                       headers=lab.headers("adam"))
    assert made.status_code == 201, made.get_json()
    token, token_id = made.get_json()["token"], made.get_json()["token_id"]
    mine = {"Authorization": f"Bearer {token}"}
    assert client.get("/api/certificates", headers=mine).status_code == 200
    listed = client.get("/api/users/olga/tokens", headers=lab.headers("adam")).get_json()
    assert any(t["id"] == token_id and t["label"] == "laptop" for t in listed["tokens"])
    assert all("sha256" not in key for t in listed["tokens"] for key in t)
    revoked = client.post(f"/api/users/olga/tokens/{token_id}/revoke",
                          headers=lab.headers("adam"))
    assert revoked.status_code == 200, revoked.get_json()
    assert revoked.get_json()["revoked_at"]
    assert client.get("/api/certificates", headers=mine).status_code == 401
    # Her other token still works; revoking twice says so.
    assert client.get("/api/certificates", headers=lab.headers("olga")).status_code == 200
    again = client.post(f"/api/users/olga/tokens/{token_id}/revoke", headers=lab.headers("adam"))
    assert again.status_code == 409
    assert client.post("/api/users/olga/tokens/999999/revoke",
                       headers=lab.headers("adam")).status_code == 404


def test_a_password_change_ends_existing_sessions(lab):
    from service.web.auth import create_user

    create_user(lab.services.storage, "sam", "operator", password=PASSWORD)
    browser, reply = _browser_login(lab, "sam")
    assert reply.status_code == 302
    assert browser.get("/certificates").status_code == 200
    changed = lab.client().patch("/api/users/sam", json={"password": "another long secret"},
                                 headers=lab.headers("adam"))
    assert changed.status_code == 200
    after = browser.get("/certificates")
    assert after.status_code == 302 and "/login" in after.headers["Location"]


def test_failed_logins_are_throttled(lab):
    from service.web.auth import create_user

    create_user(lab.services.storage, "tess", "operator", password=PASSWORD)
    statuses = [_browser_login(lab, "tess", "wrong password!")[1].status_code for _ in range(6)]
    assert statuses[:5] == [401] * 5
    assert statuses[5] == 429
    # Even the right password waits until the window has passed.
    _, reply = _browser_login(lab, "tess")
    assert reply.status_code == 429
    assert "Retry-After" in reply.headers


def test_session_cookie_is_secure_over_tls(lab):
    _, reply = _browser_login(lab, "olga", base_url="https://localhost")
    cookies = reply.headers.getlist("Set-Cookie")
    assert cookies and all("Secure" in c for c in cookies), cookies
    _, plain = _browser_login(lab, "olga")
    assert all("Secure" not in c for c in plain.headers.getlist("Set-Cookie"))


def test_database_file_is_private_to_the_service(lab):
    mode = stat.S_IMODE(database_file(lab.services).stat().st_mode)
    assert mode & 0o077 == 0, oct(mode)


def test_html_answers_carry_security_headers(lab):
    for path in ("/login", "/api/health"):
        reply = lab.client().get(path)
        assert reply.headers.get("X-Content-Type-Options") == "nosniff", path
    page = lab.client().get("/login")
    policy = page.headers.get("Content-Security-Policy", "")
    # Only our own pages may frame ours (the certificate page shows its document in a frame).
    assert "default-src 'self'" in policy and "frame-ancestors 'self'" in policy
    assert "'unsafe-inline'" not in policy.split("script-src", 1)[-1].split(";")[0]


# ---- operations -------------------------------------------------------------------------------


def test_zero_workers_means_none(tmp_path):
    lab = make_lab(tmp_path)
    try:
        pool = lab.services.start_workers(0)
        assert pool is None or pool.pids == []
    finally:
        lab.services.stop_workers()
        lab.services.storage.dispose()


def test_a_full_disk_answers_507_naming_what_is_full(lab, monkeypatch):
    from service.storage import BlobStore

    def full(self, data):
        raise OSError(errno.ENOSPC, "No space left on device", str(self.root / "tmp" / "x.part"))

    monkeypatch.setattr(BlobStore, "put", full)
    reply = lab.upload(lab.client(), files=small_run_files())
    body = reply.get_json()
    assert reply.status_code == 507, body
    assert "space" in body["error"] and str(lab.services.storage.blobs.root) in body["error"]


# ---- a read-only instance ---------------------------------------------------------------------


@pytest.fixture()
def read_only_copy(tmp_path):
    """An instance with one issued certificate, then made read-only and stripped of the private
    key (an auditor's copy needs only the public key)."""
    lab = make_lab(tmp_path)
    services = lab.services
    cert = draft(services, user(services, "olga"), 21, [("r.csv", b"time_s,current_A\n0,1\n")])
    services.archive.issue(cert, user(services, "arno"))
    services.storage.dispose()
    instance = Path(lab.app.instance_path)
    (instance / "keys" / "lab_ed25519_private.pem").unlink()
    for path in [instance, *instance.rglob("*")]:
        os.chmod(path, 0o555 if path.is_dir() else 0o444)
    yield instance, cert, lab.tokens["aude"]
    for path in [instance, *instance.rglob("*")]:
        os.chmod(path, 0o755 if path.is_dir() else 0o644)


def _snapshot(folder: Path) -> dict[str, tuple]:
    return {
        str(p.relative_to(folder)): (p.stat().st_size, p.stat().st_mtime_ns, p.stat().st_mode)
        for p in [folder, *folder.rglob("*")]
    }


def _cli(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "service.cli.main", *args],
        capture_output=True, text=True, timeout=300,
    )


def test_a_read_only_copy_is_verified_without_writing_anything(read_only_copy):
    instance, cert, _ = read_only_copy
    before = _snapshot(instance)
    for args in (["verify", "--all"], ["verify", cert]):
        done = _cli(*args, "--instance", str(instance), "--read-only")
        assert "Traceback" not in done.stderr, done.stderr
        assert done.returncode == 0, (done.stdout, done.stderr)
        assert "valid" in done.stdout and "NOT" not in done.stdout
    assert _snapshot(instance) == before


def test_a_read_only_copy_serves_reading_and_refuses_changes(read_only_copy):
    from service.web.app import create_app

    instance, cert, token = read_only_copy
    before = _snapshot(instance)
    app = create_app({"INSTANCE_PATH": str(instance), "READ_ONLY": True, "TESTING": True})
    client = app.test_client()
    headers = {"Authorization": f"Bearer {token}"}
    reply = client.get(f"/api/certificates/{cert}/verify", headers=headers)
    assert reply.status_code == 200 and reply.get_json()["valid"] is True
    assert client.get(f"/api/certificates/{cert}/html", headers=headers).status_code == 200
    refused = client.post(f"/api/certificates/{cert}/withdraw", json={"reason": "x"},
                          headers=headers)
    assert refused.status_code == 503 and "read-only" in refused.get_json()["error"]
    app.extensions["coldcert"].storage.dispose()
    assert _snapshot(instance) == before


@pytest.mark.skipif(os.geteuid() == 0, reason="root may write any file, so an unwritable "
                    "instance cannot be made here; run the tests as an ordinary user")
def test_an_unwritable_instance_is_opened_read_only_by_itself(read_only_copy):
    instance, cert, _ = read_only_copy
    done = _cli("verify", "--all", "--instance", str(instance))
    assert "Traceback" not in done.stderr, done.stderr
    assert done.returncode == 0, (done.stdout, done.stderr)


# ---- after a crash ----------------------------------------------------------------------------


def _dead_pid() -> int:
    child = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"],
                           capture_output=True, text=True, check=True)
    return int(child.stdout)


def test_temporary_files_of_a_killed_process_are_removed_on_restart(tmp_path):
    import socket

    from service.web.app import create_app

    lab = make_lab(tmp_path)
    scratch = lab.services.storage.blobs.root / "tmp"
    lab.services.storage.dispose()
    host, dead, alive = socket.gethostname(), _dead_pid(), os.getpid()
    left = scratch / f"coldcert-upload-{dead}@{host}+k1"
    left.mkdir()
    (left / "sweep.csv").write_bytes(b"raw data of a killed upload")
    part = scratch / f"{dead}@{host}+0123456789abxyz.part"
    part.write_bytes(b"half a blob")
    live = scratch / f"coldcert-job-{alive}@{host}+k2"
    live.mkdir()
    app = create_app({"INSTANCE_PATH": str(Path(lab.app.instance_path)), "TESTING": True})
    try:
        assert not left.exists() and not part.exists()
        assert live.exists(), "a live process's folder was removed"
    finally:
        app.extensions["coldcert"].storage.dispose()


def test_a_failed_job_can_be_retried_a_bounded_number_of_times(lab):
    from sqlalchemy import update

    from service import storage as st

    client = lab.client()
    accepted = lab.upload(client)
    assert accepted.status_code == 202, accepted.get_json()
    job = accepted.get_json()["job_id"]

    def fail():
        with lab.services.storage.write() as conn:
            conn.execute(update(st.jobs).where(st.jobs.c.id == job).values(
                status="failed", error="interrupted 3 times (worker died each time)", attempts=3))

    assert client.post(f"/api/jobs/{job}/retry", headers=lab.headers("olga")).status_code == 409
    for retry in (1, 2):
        fail()
        reply = client.post(f"/api/jobs/{job}/retry", headers=lab.headers("olga"))
        assert reply.status_code == 202, reply.get_json()
        assert reply.get_json()["retry"] == retry
        status = client.get(f"/api/jobs/{job}", headers=lab.headers("olga")).get_json()
        assert status["status"] == "queued" and status["attempts"] == 0
    fail()
    refused = client.post(f"/api/jobs/{job}/retry", headers=lab.headers("olga"))
    assert refused.status_code == 409 and "limit" in refused.get_json()["error"]
    assert client.post("/api/jobs/job-nothing/retry", headers=lab.headers("olga")).status_code == 404
    assert client.post(f"/api/jobs/{job}/retry", headers=lab.headers("aude")).status_code == 403
