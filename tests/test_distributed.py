"""Analysis jobs through the distributed queue: Celery workers on a real Redis broker and a real
PostgreSQL database, started as `coldcert work` processes the way a lab starts them on other
machines (each with its own instance folder that holds no signing key).

Needs ``COLDCERT_TEST_BROKER_URL`` (a Redis URL; `.ci/redis.sh` starts a throw-away server) and
``COLDCERT_TEST_DATABASE_URL`` (PostgreSQL; `.ci/postgres.sh`). Without them the tests skip; under
CI=true they fail instead. The analysis is the real one with the short MCMC settings, or
tests/fake_analysis.py where the test is about the queue (a slow fit, a crashing worker).
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
from sqlalchemy import func, select

from service import storage as st
from service.archive import SERVICE_FIELDS, canonical_json
from tests.service_support import make_lab, reset_server_database, server_url, small_run_files

REPO = Path(__file__).resolve().parents[1]
FAKE = "tests.fake_analysis:misbehaving_certify"


@pytest.fixture()
def servers():
    purpose = "test the distributed queue"
    return (
        server_url("COLDCERT_TEST_DATABASE_URL", "postgresql", purpose),
        server_url("COLDCERT_TEST_BROKER_URL", "redis", purpose),
    )


class Cluster:
    """A web side (the test's app, PostgreSQL + broker) and `coldcert work` processes."""

    def __init__(self, tmp_path: Path, database: str, broker: str, **config) -> None:
        self.tmp_path, self.database, self.broker = tmp_path, database, broker
        self.worker_config = {"CERTIFY": FAKE, "JOB_TIME_LIMIT": 120, **config}
        self.lab = make_lab(
            tmp_path / "web",
            DATABASE_URL=database,
            BROKER_URL=broker,
            CERTIFY=FAKE,
            BROKER_VISIBILITY_TIMEOUT=600,
        )
        engine = self.lab.services.engine
        engine.SWEEP_SECONDS, engine.RECOVER_SECONDS = 0.5, 1.0
        self.workers: list[subprocess.Popen] = []

    def start_worker(self, name: str) -> subprocess.Popen:
        folder = self.tmp_path / name
        folder.mkdir(parents=True, exist_ok=True)
        # The lab's public configuration only: its public key, never the signing key.
        config = {**self.worker_config, "LAB_PUBLIC_KEY": self.lab.services.key.public_raw.hex()}
        (folder / "config.py").write_text(
            "".join(f"{key} = {value!r}\n" for key, value in config.items())
        )
        env = {**os.environ, "OPENBLAS_NUM_THREADS": "1", "PYTHONPATH": str(REPO)}
        command = [sys.executable, "-m", "service.cli.main", "work", "--quick", "--processes", "1"]
        command += ["--instance", str(folder), "--database", self.database]
        command += ["--broker", self.broker]
        proc = subprocess.Popen(
            command,
            cwd=REPO,
            env=env,
            stdout=subprocess.DEVNULL,
            stderr=open(folder / "worker.log", "w"),  # noqa: SIM115 - closed with the process
            start_new_session=True,  # its own process group: the test can kill the whole worker
        )
        self.workers.append(proc)
        # Ready when it answers the broker's ping (the health endpoint's "workers seen").
        live = sum(1 for w in self.workers if w.poll() is None)
        deadline = time.monotonic() + 120
        while len(self.lab.services.engine.workers_seen(fresh=True)) < live:
            if proc.poll() is not None or time.monotonic() > deadline:
                log = (folder / "worker.log").read_text()[-3000:]
                pytest.fail(f"worker {name} did not start (exit {proc.poll()}):\n{log}")
            time.sleep(0.3)
        return proc

    def drafts_of(self, run_id: str) -> int:
        with self.lab.services.storage.read() as conn:
            return conn.execute(
                select(func.count())
                .select_from(st.certificates)
                .where(st.certificates.c.run_id == run_id)
            ).scalar()

    def job_row(self, job_id: str):
        with self.lab.services.storage.read() as conn:
            return conn.execute(select(st.jobs).where(st.jobs.c.id == job_id)).one()

    def stop(self) -> None:
        for proc in self.workers:  # the whole process group: the worker and its pool
            if proc.poll() is None:
                os.killpg(proc.pid, signal.SIGKILL)
            proc.wait(timeout=30)
        self.lab.services.stop_workers()
        self.lab.services.storage.dispose()


def _reset(database: str, broker: str) -> None:
    import redis

    redis.Redis.from_url(broker).flushdb()
    reset_server_database(database)


@pytest.fixture()
def cluster(tmp_path, servers, monkeypatch):
    monkeypatch.setenv("COLDCERT_TEST_CRASH_MARKER", str(tmp_path / "crashed"))
    _reset(*servers)
    made: list[Cluster] = []

    def make(**config) -> Cluster:
        made.append(Cluster(tmp_path, *servers, **config))
        return made[-1]

    yield make
    for c in made:
        c.stop()


def _behaving(behaviour: str) -> list[tuple[str, bytes]]:
    files = dict(small_run_files())
    files["run.toml"] = files["run.toml"].replace(
        b"[run]\n", f'[run]\ntest_behaviour = "{behaviour}"\n'.encode()
    )
    return list(files.items())


def _comparable(record: dict) -> bytes:
    """The record without the fields the archive itself writes (number, state, dates)."""
    kept = {k: v for k, v in record.items() if k not in SERVICE_FIELDS}
    return canonical_json(kept)


def test_upload_draft_issue_reproduce_and_the_same_certificate_as_the_embedded_pool(
    cluster, tmp_path
):
    c = cluster()
    c.start_worker("worker-a")
    lab, client = c.lab, c.lab.client()
    seed = "20261202"
    upload = lab.upload(client, seed=seed).get_json()
    # The same run and seed through the embedded pool (SQLite, local worker process) meanwhile.
    embedded_lab = make_lab(tmp_path / "embedded")
    try:
        embedded = embedded_lab.upload(embedded_lab.client(), seed=seed).get_json()
        embedded_lab.services.start_workers(1)
        done_here = embedded_lab.wait(embedded_lab.client(), embedded["job_id"])
        assert done_here["status"] == "done", done_here["error"]
        here = embedded_lab.services.archive.get(done_here["certificate_id"])
    finally:
        embedded_lab.services.stop_workers()
        embedded_lab.services.storage.dispose()

    job = lab.wait(client, upload["job_id"])
    assert job["status"] == "done", job["error"]
    cert = job["certificate_id"]
    there = lab.services.archive.get(cert)
    # Bit for bit the same certificate whichever queue ran the analysis: seed, options and
    # software versions recorded alike, and every field of the record equal.
    assert (here["seed"], here["options"], here["software"]) == (
        there["seed"],
        there["options"],
        there["software"],
    )
    assert here["options"] == {"fast": True} and there["seed"] == int(seed)
    assert _comparable(here["record"]) == _comparable(there["record"])

    assert c.drafts_of(upload["run_id"]) == 1
    assert c.job_row(upload["job_id"]).dispatched_at is not None
    # No shared folder: the raw files live in the database, and the worker machine's instance
    # folder never got a signing key.
    with lab.services.storage.read() as conn:
        stored = conn.execute(select(func.count()).select_from(st.blob_data)).scalar()
    assert stored >= 2
    assert not (c.tmp_path / "worker-a" / "keys").exists()
    assert not any((c.tmp_path / "worker-a").rglob("*.pem"))
    issued = client.post(f"/api/certificates/{cert}/issue", headers=lab.headers("arno"))
    assert issued.status_code == 200, issued.get_json()
    reply = client.post(f"/api/certificates/{cert}/reproduce", headers=lab.headers("aude"))
    assert reply.status_code == 202, reply.get_json()
    job = lab.wait(client, reply.get_json()["job_id"], who="aude")
    assert job["status"] == "done", job["error"]
    assert job["result"]["identical"] and job["result"]["numbers_compared"] > 10
    assert lab.services.archive.verify(cert).valid
    health = client.get("/api/health").get_json()
    assert health["queue"]["mode"] == "distributed" and health["queue"]["broker_ok"]
    assert health["queue"]["workers_seen"] == 1
    assert health["queue"]["jobs"]["done"] == 2


def test_worker_killed_mid_fit_loses_nothing_and_drafts_once(cluster):
    c = cluster()
    c.start_worker("worker-a")
    c.start_worker("worker-b")
    lab, client = c.lab, c.lab.client()
    lab.services.start_workers(0)  # the web side's sweeper re-queues what a dead worker held
    upload = lab.upload(client, files=_behaving("slow")).get_json()
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline:
        # Progress reaches the web side through the job row, as with the embedded pool.
        row = c.job_row(upload["job_id"])
        if row.status == "running" and row.fraction > 0.05:
            break
        time.sleep(0.1)
    else:
        pytest.fail(f"the slow job never got going: {row.status} {row.step}")
    killed_holder = row.claimed_by
    # The worker whose pool process holds the job: kill all of it (main process and pool), as
    # a machine losing power would.
    group = os.getpgid(int(killed_holder.split(":")[1]))
    victim = next(w for w in c.workers if w.pid == group)
    os.killpg(group, signal.SIGKILL)
    victim.wait(timeout=10)
    job = lab.wait(client, upload["job_id"], timeout=240)
    assert job["status"] == "done", job["error"]
    row = c.job_row(upload["job_id"])
    assert row.attempts == 2 and row.claimed_by != killed_holder
    assert c.drafts_of(upload["run_id"]) == 1
    events = client.get(
        f"/api/events?subject={upload['job_id']}", headers=lab.headers("aude")
    ).get_json()["events"]
    assert "job.interrupted" in [e["action"] for e in events]


def test_jobs_that_kill_their_worker_or_overrun_the_time_limit_are_failed(cluster):
    c = cluster(JOB_TIME_LIMIT=3, JOB_STOP_GRACE=2)
    c.start_worker("worker-a")
    lab, client = c.lab, c.lab.client()
    crashing = lab.upload(client, files=_behaving("crash_always")).get_json()
    hanging = lab.upload(client, files=_behaving("hang")).get_json()
    stubborn = lab.upload(client, files=_behaving("stubborn")).get_json()
    job = lab.wait(client, crashing["job_id"], timeout=180)
    assert job["status"] == "failed"
    assert "interrupted 3 times" in job["error"]  # bounded attempts, then the reason
    job = lab.wait(client, hanging["job_id"], timeout=120)
    assert job["status"] == "failed"
    assert "time limit" in job["error"]
    # A fit that ignores the soft limit has its process ended at the hard one, and the job is
    # failed then, on its first attempt, not left "running" and re-queued to be killed again.
    job = lab.wait(client, stubborn["job_id"], timeout=120)
    assert job["status"] == "failed"
    assert "did not stop when asked" in job["error"]
    assert c.job_row(stubborn["job_id"]).attempts == 1
    runs = (crashing["run_id"], hanging["run_id"], stubborn["run_id"])
    assert [c.drafts_of(run) for run in runs] == [0, 0, 0]


def _broker_folder(url: str) -> str:
    import redis

    folder = redis.Redis.from_url(url).config_get("dir")["dir"]
    if not Path(folder).name.startswith("coldcert-redis."):
        pytest.skip(f"the broker at {url} was not started by .ci/redis.sh; not restarting it")
    return folder


def test_queued_jobs_survive_a_broker_restart_an_absent_broker_and_a_lost_queue(cluster):
    import redis

    c = cluster()
    lab, client = c.lab, c.lab.client()
    folder = _broker_folder(c.broker)
    uploads = [lab.upload(client, files=_behaving("instant")).get_json() for _ in range(2)]
    subprocess.run(["bash", str(REPO / ".ci" / "redis.sh"), "restart", c.broker], check=True)
    assert lab.services.engine.broker_depth() == 2  # the append-only file kept the messages
    # The broker away during an upload: the run is accepted and its job waits in the database.
    redis.Redis.from_url(c.broker).shutdown()
    away = lab.upload(client, files=_behaving("instant"))
    assert away.status_code == 202, away.get_json()
    uploads.append(away.get_json())
    assert c.job_row(uploads[-1]["job_id"]).dispatched_at is None
    health = client.get("/api/health").get_json()
    assert health["status"] == "degraded" and not health["queue"]["broker_ok"]
    subprocess.run(["bash", str(REPO / ".ci" / "redis.sh"), "start", c.broker, folder], check=True)
    # A broker that lost everything (no persistence): the database still knows what is queued,
    # and the sweeper sends it again.
    redis.Redis.from_url(c.broker).flushdb()
    lab.services.engine.LOST_AFTER_SECONDS = 0.0
    lab.services.start_workers(0)
    c.start_worker("worker-a")
    for upload in uploads:
        job = lab.wait(client, upload["job_id"], timeout=240)
        assert job["status"] == "done", job["error"]
        assert c.drafts_of(upload["run_id"]) == 1


def test_a_message_delivered_twice_runs_the_job_once(cluster):
    c = cluster()
    lab, client = c.lab, c.lab.client()
    upload = lab.upload(client, files=_behaving("instant")).get_json()
    lab.services.engine.submit(upload["job_id"])  # a duplicate message for the same job
    assert lab.services.engine.broker_depth() == 2
    c.start_worker("worker-a")
    job = lab.wait(client, upload["job_id"])
    assert job["status"] == "done", job["error"]
    deadline = time.monotonic() + 60
    while lab.services.engine.broker_depth() and time.monotonic() < deadline:
        time.sleep(0.5)
    time.sleep(2)
    assert c.drafts_of(upload["run_id"]) == 1
    assert c.job_row(upload["job_id"]).attempts == 1
    assert json.loads(c.job_row(upload["job_id"]).result_json)["certificate_id"]
