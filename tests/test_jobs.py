"""Background jobs: a failing analysis records why, a worker killed mid-fit is replaced and its
job re-run, a restart re-queues jobs whose worker is gone, and a job interrupted too often is
failed with the reason. The analysis here misbehaves on purpose (tests/fake_analysis.py)."""

from __future__ import annotations

import io
import os
import socket

import pytest
from sqlalchemy import func, select

from service import storage as st
from service.queue.jobs import recover_interrupted
from service.storage import Storage, default_database_url, utc_now
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
    assert f"Certificate {cert}".encode() in html and b"end of certificate" in html  # re-rendered from the record
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


def _running(storage, job_id: str, claimed_by: str, attempts: int) -> None:
    with storage.write() as conn:
        conn.execute(
            st.jobs.update()
            .where(st.jobs.c.id == job_id)
            .values(
                status="running",
                claimed_by=claimed_by,
                attempts=attempts,
                started_at=utc_now(),
                heartbeat_at=utc_now(),
                step="sampling",
            )
        )


def test_take_runs_a_job_once_however_often_its_message_arrives(troubled_lab):
    """The distributed queue delivers at least once; take() makes the job run at most once at a
    time and resumes it only when its holder is gone."""
    from service.queue.jobs import take

    lab = troubled_lab
    storage = lab.services.storage
    job_id = lab.upload(lab.client()).get_json()["job_id"]
    me = f"{socket.gethostname()}:{os.getpid()}:first"
    taken = take(storage, job_id, me)
    assert taken["status"] == "running" and taken["attempts"] == 1
    # A second delivery while the holder (this live process) works on it: nothing happens.
    assert take(storage, job_id, f"{socket.gethostname()}:{os.getpid()}:second") is None
    # Its holder's process is gone: the next delivery takes the job again, as attempt 2.
    _running(storage, job_id, f"{socket.gethostname()}:999999999:gone", attempts=1)
    again = take(storage, job_id, me)
    assert again["attempts"] == 2 and again["claimed_by"] == me
    events = lab.services.archive.events(subject=job_id)
    assert "job.interrupted" in [e["action"] for e in events]
    # Interrupted MAX_ATTEMPTS times: failed with the reason, not taken.
    _running(storage, job_id, f"{socket.gethostname()}:999999999:gone", attempts=3)
    assert take(storage, job_id, me) is None
    status = lab.client().get(f"/api/jobs/{job_id}", headers=lab.headers("olga")).get_json()
    assert status["status"] == "failed" and "interrupted 3 times" in status["error"]
    assert take(storage, job_id, me) is None  # failed stays failed
    assert take(storage, "job-nosuchjob", me) is None


def test_the_database_refuses_a_second_draft_from_one_job(troubled_lab):
    from sqlalchemy.exc import IntegrityError

    lab = troubled_lab
    upload = lab.upload(lab.client()).get_json()
    olga = {"id": 1, "username": "olga"}
    with lab.services.storage.read() as conn:
        olga["id"] = conn.execute(
            select(st.users.c.id).where(st.users.c.username == "olga")
        ).scalar()
    draft = {
        "run_id": upload["run_id"],
        "record": {"results": [{"value": 0.05, "unit": "K"}]},
        "seed": 1,
        "software": {},
        "submitter": olga,
        "job_id": upload["job_id"],
    }
    with lab.services.storage.write() as conn:
        lab.services.archive.create_draft(conn, **draft)
    with pytest.raises(IntegrityError), lab.services.storage.write() as conn:
        lab.services.archive.create_draft(conn, **draft)


def test_an_archive_without_the_key_drafts_but_cannot_sign(troubled_lab):
    from service.archive import Archive, ArchiveError

    lab = troubled_lab
    client = lab.client()
    upload = lab.upload(client).get_json()
    lab.services.start_workers(1)  # worker processes open their archive without the key
    job = lab.wait(client, upload["job_id"])
    assert job["status"] == "done", job["error"]
    keyless = Archive(lab.services.storage, None)
    approver = {"id": 2, "username": "arno", "display_name": "Arno"}
    with pytest.raises(ArchiveError, match="no signing key"):
        keyless.issue(job["certificate_id"], approver)
    assert keyless.get(job["certificate_id"])["state"] == "draft"


def test_health_reports_the_embedded_queue(troubled_lab):
    lab = troubled_lab
    lab.upload(lab.client())
    health = lab.client().get("/api/health").get_json()
    assert health["status"] == "ok"
    assert health["queue"]["mode"] == "embedded" and health["queue"]["workers_seen"] == 0
    assert health["queue"]["jobs"]["queued"] == 1
    lab.services.start_workers(1)
    health = lab.client().get("/api/health").get_json()
    assert health["queue"]["workers_seen"] == 1


def test_progress_never_moves_backwards(tmp_path):
    # Sweeps fitted side by side report out of order; the job's progress must only grow.
    from service.cli.run_commands import ProgressBar
    from service.queue.jobs import ProgressReporter

    storage = Storage(default_database_url(tmp_path), tmp_path / "blobs")
    reporter = ProgressReporter(storage, "job-x", "worker-x")
    for fraction in (0.2, 0.6, 0.4, 0.5, 0.9):
        reporter(fraction, "fitting")
    assert reporter.latest[0] == 0.9
    bar = ProgressBar(io.StringIO())
    for fraction in (0.3, 0.1):
        bar(fraction, "x")
    assert bar.last == 0.3
    storage.dispose()
