"""Background jobs: a failing analysis records why, a worker killed mid-fit is replaced and its
job re-run, a restart re-queues jobs whose worker is gone, and a job interrupted too often is
failed with the reason. The analysis here misbehaves on purpose (tests/fake_analysis.py)."""

from __future__ import annotations

import socket

import pytest
from sqlalchemy import func, select

from service import storage as st
from service.queue.jobs import recover_interrupted
from service.storage import utc_now
from tests.service_support import EXAMPLE, make_lab

RUN_TOML = (EXAMPLE / "run.toml").read_bytes()
SWEEP = (EXAMPLE / "sweep_03_60mK.csv").read_bytes()


@pytest.fixture()
def troubled_lab(tmp_path, monkeypatch):
    monkeypatch.setenv("COLDCERT_TEST_CRASH_MARKER", str(tmp_path / "crashed"))
    lab = make_lab(tmp_path, CERTIFY="tests.fake_analysis:misbehaving_certify")
    yield lab
    lab.services.stop_workers()
    lab.services.storage.dispose()


def _with_behaviour(behaviour: str) -> list[tuple[str, bytes]]:
    manifest = RUN_TOML.replace(b"[run]\n", f'[run]\ntest_behaviour = "{behaviour}"\n'.encode())
    return [("run.toml", manifest), ("sweep_03_60mK.csv", SWEEP)]


def test_failed_job_records_why_and_a_crashed_worker_is_replaced(troubled_lab):
    lab = troubled_lab
    client = lab.client()
    failing = lab.upload(client, files=_with_behaviour("fail")).get_json()
    crashing = lab.upload(client, files=_with_behaviour("crash_once")).get_json()
    lab.services.start_workers(1)
    job = lab.wait(client, failing["job_id"])
    assert job["status"] == "failed"
    assert "did not converge (simulated failure)" in job["error"]
    assert "fitting the first sweep" in job["step"]
    job = lab.wait(client, crashing["job_id"])
    assert job["status"] == "done", job["error"]
    assert job["attempts"] == 2
    events = client.get(
        f"/api/events?subject={crashing['job_id']}", headers=lab.headers("aude")
    ).get_json()["events"]
    assert "job.interrupted" in [e["action"] for e in events]
    with lab.services.storage.read() as conn:
        drafts = conn.execute(
            select(func.count())
            .select_from(st.certificates)
            .where(st.certificates.c.run_id == crashing["run_id"])
        ).scalar()
    assert drafts == 1  # the crashed attempt left no half-written certificate


def test_restart_requeues_jobs_interrupted_by_a_crash(troubled_lab):
    lab = troubled_lab
    client = lab.client()
    upload = lab.upload(client).get_json()
    # The service died while a worker (pid that no longer exists) was fitting this run.
    with lab.services.storage.write() as conn:
        conn.execute(
            st.jobs.update()
            .where(st.jobs.c.id == upload["job_id"])
            .values(
                status="running",
                claimed_by=f"{socket.gethostname()}:999999999:gone",
                attempts=1,
                started_at=utc_now(),
                heartbeat_at=utc_now(),
                fraction=0.4,
                step="sampling",
            )
        )
    # Jobs of live workers elsewhere with a fresh heartbeat are left alone.
    assert recover_interrupted(lab.services.storage, stale_after=3600) == [upload["job_id"]]
    status = client.get(f"/api/jobs/{upload['job_id']}", headers=lab.headers("olga")).get_json()
    assert status["status"] == "queued" and "interrupted at 'sampling'" in status["step"]
    lab.services.start_workers(1)
    job = lab.wait(client, upload["job_id"])
    assert job["status"] == "done" and job["attempts"] == 2


def test_jobs_interrupted_too_often_are_failed(troubled_lab):
    lab = troubled_lab
    upload = lab.upload(lab.client()).get_json()
    with lab.services.storage.write() as conn:
        conn.execute(
            st.jobs.update()
            .where(st.jobs.c.id == upload["job_id"])
            .values(
                status="running",
                claimed_by="elsewhere:1:x",
                attempts=3,
                heartbeat_at="2000-01-01T00:00:00.000000Z",
            )
        )
    assert recover_interrupted(lab.services.storage) == [upload["job_id"]]
    status = (
        lab.client().get(f"/api/jobs/{upload['job_id']}", headers=lab.headers("olga")).get_json()
    )
    assert status["status"] == "failed" and "interrupted 3 times" in status["error"]


def test_separate_worker_command_runs_queued_jobs(tmp_path):
    """``coldcert work`` (a process of its own, as on another machine) takes jobs from the queue."""
    import signal
    import subprocess
    import sys

    lab = make_lab(tmp_path)  # the web side: accepts the upload, starts no workers
    client = lab.client()
    upload = lab.upload(client).get_json()
    worker = subprocess.Popen(
        [
            sys.executable,
            "-m",
            "service.cli.main",
            "work",
            "--quick",
            "--instance",
            lab.app.instance_path,
        ],
        stderr=subprocess.PIPE,
        text=True,
    )
    try:
        job = lab.wait(client, upload["job_id"], timeout=180)
        assert job["status"] == "done", job["error"]
        assert job["certificate_id"]
    finally:
        worker.send_signal(signal.SIGTERM)
        try:
            worker.wait(timeout=30)
        except subprocess.TimeoutExpired:  # pragma: no cover - reported below
            worker.kill()
            raise
    assert worker.returncode == 0
    assert "worker process(es)" in worker.stderr.read()


def test_output_files_are_kept_signed_verified_and_reproduced(troubled_lab):
    from service.intake import load_run
    from service.queue.jobs import import_string
    from service.storage import sha256_hex

    lab = troubled_lab
    client = lab.client()
    upload = lab.upload(client, files=_with_behaviour("output_file")).get_json()
    lab.services.start_workers(1)
    job = lab.wait(client, upload["job_id"])
    assert job["status"] == "done", job["error"]
    cert = job["certificate_id"]
    reply = client.get(f"/api/certificates/{cert}/files/table.csv", headers=lab.headers("olga"))
    assert reply.status_code == 200
    assert reply.headers["Content-Disposition"].endswith(f'filename="{cert}-table.csv"')
    value = client.get(f"/api/certificates/{cert}", headers=lab.headers("olga")).get_json()[
        "record"
    ]["results"][0]["value"]
    assert reply.data == f"temperature_K\n{value!r}\n".encode()
    html = client.get(f"/api/certificates/{cert}/html", headers=lab.headers("olga")).data
    assert b'<section id="job-extra">' in html  # the job's own section survives re-rendering
    missing = client.get(f"/api/certificates/{cert}/files/other.csv", headers=lab.headers("olga"))
    assert missing.status_code == 404 and "table.csv" in missing.get_json()["error"]
    issued = client.post(f"/api/certificates/{cert}/issue", headers=lab.headers("arno"))
    assert issued.status_code == 200, issued.get_json()
    archive = lab.services.archive
    body = archive.signed_entry(cert)["entry"]["body"]
    assert body["extra_files"]["table.csv"]["sha256"] == sha256_hex(reply.data)
    assert archive.verify(cert).valid
    certify = import_string("tests.fake_analysis:misbehaving_certify")
    report = archive.reproduce(cert, certify, load_run)
    assert report.identical and report.files_compared == 1
    # The stored output file is covered by verify like the raw files.
    lab.services.storage.blobs.path(sha256_hex(reply.data)).write_bytes(b"temperature_K\n1\n")
    problems = " ".join(archive.verify(cert).as_dict()["problems"])
    assert "output file table.csv" in problems and "altered" in problems


def test_reproduce_compares_output_files_byte_for_byte(troubled_lab):
    from service.intake import load_run
    from service.queue.jobs import import_string

    lab = troubled_lab
    client = lab.client()
    upload = lab.upload(client, files=_with_behaviour("unstable_output_file")).get_json()
    lab.services.start_workers(1)
    job = lab.wait(client, upload["job_id"])
    certify = import_string("tests.fake_analysis:misbehaving_certify")
    report = lab.services.archive.reproduce(job["certificate_id"], certify, load_run)
    assert not report.identical
    assert [m.path for m in report.mismatches] == ["file table.csv"]
