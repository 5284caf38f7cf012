"""Throughput of the job queues: reproduce N archived certificates with 1 and 2 workers of the
distributed queue (Celery, Redis broker) and of the embedded pool. Prints figures; asserts nothing.

    .venv/bin/python benchmarks/bench_queue.py [--jobs 40] [--work 100] [--broker URL]
                                               [--database URL]

Setup: N runs are uploaded and certified (embedded pool, 2 workers), so the archive holds N draft
certificates. Then, for each queue and worker count, the workers are started and warmed up (one
job each, so interpreter start and imports are not timed), N reproduction jobs are queued at once,
and the wall time from queueing to the last job done gives the throughput (jobs per minute) and
the scaling ratio from 1 to 2 workers (target >= 1.7 on a 2-core machine).

The job is the stand-in analysis of tests/fake_analysis.py ("cpu_bound": ``--work`` rounds of a
200 x 200 symmetric eigenvalue problem, about 20 ms each on one core), because the benchmark is
about the queue, not the science; each reproduction still compares every number bit for bit.

Broker: ``--broker`` or $COLDCERT_BENCH_BROKER_URL, else a throw-away Redis from .ci/redis.sh
(stopped at the end). Database: ``--database`` or $COLDCERT_BENCH_DATABASE_URL (e.g. the
PostgreSQL of .ci/postgres.sh; its tables are dropped and re-created), else SQLite in a temporary
instance shared by the workers. On a shared machine, run it when the machine is quiet: other
load lowers the ratio.
"""

from __future__ import annotations

import argparse
import os
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

from sqlalchemy import func, select  # noqa: E402

from service import storage as st  # noqa: E402
from service.queue.jobs import enqueue  # noqa: E402
from tests.service_support import (  # noqa: E402
    make_lab,
    reset_server_database,
    small_run_files,
)

FAKE = "tests.fake_analysis:misbehaving_certify"


def _run_files(work: int) -> list[tuple[str, bytes]]:
    files = dict(small_run_files())
    files["run.toml"] = files["run.toml"].replace(
        b"[run]\n", f'[run]\ntest_behaviour = "cpu_bound"\ntest_work = {work}\n'.encode()
    )
    return list(files.items())


def _wait_all(storage, job_ids: list[str], timeout: float) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        with storage.read() as conn:
            rows = conn.execute(
                select(st.jobs.c.status, func.count())
                .where(st.jobs.c.id.in_(job_ids))
                .group_by(st.jobs.c.status)
            ).all()
        counts = dict(rows)
        if counts.get("failed"):
            with storage.read() as conn:
                error = conn.execute(
                    select(st.jobs.c.error).where(
                        st.jobs.c.id.in_(job_ids), st.jobs.c.status == "failed"
                    )
                ).scalar()
            raise RuntimeError(f"{counts['failed']} job(s) failed, e.g.: {error}")
        if counts.get("done", 0) == len(job_ids):
            return
        time.sleep(0.05)
    raise RuntimeError(f"jobs not finished after {timeout} s: {counts}")


def _reproductions(lab, certificates: list[str]) -> list[str]:
    services = lab.services
    auditor = {"id": None, "username": "aude"}
    with services.storage.read() as conn:
        auditor["id"] = conn.execute(
            select(st.users.c.id).where(st.users.c.username == "aude")
        ).scalar()
        runs = dict(
            conn.execute(
                select(st.certificates.c.id, st.certificates.c.run_id).where(
                    st.certificates.c.id.in_(certificates)
                )
            ).all()
        )
    with services.storage.write() as conn:
        ids = [
            enqueue(
                conn,
                purpose="reproduce",
                run_id=runs[cert],
                requested_by=auditor,
                certificate_id=cert,
            )
            for cert in certificates
        ]
    for job_id in ids:
        services.submit(job_id)
    return ids


def _timed(lab, certificates: list[str], warmup: list[str], timeout: float) -> float:
    _wait_all(lab.services.storage, _reproductions(lab, warmup), timeout)
    start = time.perf_counter()
    _wait_all(lab.services.storage, _reproductions(lab, certificates), timeout)
    return time.perf_counter() - start


def _engine_workers(lab, log_path: Path, database: str, broker: str, count: int):
    # The web side's instance folder: with SQLite the workers share its database file and blob
    # folder (one machine); with PostgreSQL they need only the URLs.
    instance = Path(lab.app.instance_path)
    (instance / "config.py").write_text(f"CERTIFY = {FAKE!r}\n")
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    command = [sys.executable, "-m", "service.cli.main", "work", "--quick"]
    command += ["--processes", str(count), "--instance", str(instance)]
    command += ["--database", database, "--broker", broker]
    log = open(log_path, "w")  # noqa: SIM115 - closed after the process
    proc = subprocess.Popen(
        command, cwd=ROOT, env=env, stdout=log, stderr=log, start_new_session=True
    )
    deadline = time.monotonic() + 120
    while not lab.services.engine.workers_seen(fresh=True):
        if time.monotonic() > deadline or proc.poll() is not None:
            raise RuntimeError(f"engine worker did not start; see {log_path}")
        time.sleep(0.5)
    return proc, log


def _stop(proc, log) -> None:
    os.killpg(proc.pid, signal.SIGTERM)
    try:
        proc.wait(timeout=60)
    except subprocess.TimeoutExpired:
        os.killpg(proc.pid, signal.SIGKILL)
        proc.wait()
    log.close()


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--jobs", type=int, default=40, help="certificates to reproduce")
    parser.add_argument("--work", type=int, default=100, help="eigenvalue rounds per job")
    parser.add_argument("--broker", default=os.environ.get("COLDCERT_BENCH_BROKER_URL"))
    parser.add_argument("--database", default=os.environ.get("COLDCERT_BENCH_DATABASE_URL"))
    parser.add_argument("--timeout", type=float, default=900.0, help="per measurement, seconds")
    args = parser.parse_args()

    started_broker = None
    if not args.broker:
        args.broker = subprocess.run(
            ["bash", str(ROOT / ".ci" / "redis.sh")], check=True, capture_output=True, text=True
        ).stdout.strip()
        started_broker = args.broker
    import redis

    try:
        with tempfile.TemporaryDirectory(prefix="coldcert-bench-queue-") as tmp:
            root = Path(tmp)
            config = {"CERTIFY": FAKE, "BROKER_URL": None}
            if args.database:
                reset_server_database(args.database)
                config["DATABASE_URL"] = args.database
            lab = make_lab(root / "web", **config)
            database = lab.services.worker_settings.database_url
            print(f"database {database.split('@')[-1]}, broker {args.broker}")
            print(f"{args.jobs} certificates, stand-in job of {args.work} eigenvalue rounds")

            # The archive: N drafts certified by the embedded pool.
            client = lab.client()
            files = _run_files(args.work)
            uploads = [lab.upload(client, files=files, seed=str(1000 + i)).get_json()
                       for i in range(args.jobs + 2)]
            lab.services.start_workers(2)
            _wait_all(lab.services.storage, [u["job_id"] for u in uploads], args.timeout)
            lab.services.stop_workers()
            with lab.services.storage.read() as conn:
                certificates = list(
                    conn.execute(
                        select(st.certificates.c.id).order_by(st.certificates.c.id)
                    ).scalars()
                )
            warmup, certificates = certificates[:2], certificates[2:]

            results: dict[tuple[str, int], float] = {}
            for count in (1, 2):
                lab.services.start_workers(count)
                seconds = _timed(lab, certificates, warmup[:count], args.timeout)
                lab.services.stop_workers()
                results[("embedded pool", count)] = seconds

            from service.queue.engine import EngineQueue
            from service.web.app import engine_settings

            redis.Redis.from_url(args.broker).flushdb()
            lab.services.engine = EngineQueue(
                lab.services.storage,
                lab.services.worker_settings,
                engine_settings({"BROKER_URL": args.broker, "JOB_TIME_LIMIT": args.timeout}),
            )
            for count in (1, 2):
                proc, log = _engine_workers(
                    lab, root / f"worker-{count}.log", database, args.broker, count
                )
                try:
                    seconds = _timed(lab, certificates, warmup[:count], args.timeout)
                finally:
                    _stop(proc, log)
                results[("distributed (Celery + Redis)", count)] = seconds
            lab.services.storage.dispose()

        print(f"\n{'queue':<30} {'workers':>7} {'wall s':>8} {'jobs/min':>9} {'scaling':>8}")
        for (queue, count), seconds in results.items():
            rate = 60.0 * len(certificates) / seconds
            base = results[(queue, 1)]
            print(f"{queue:<30} {count:>7} {seconds:>8.1f} {rate:>9.1f} {base / seconds:>7.2f}x")
        print("(scaling = wall time with 1 worker / wall time with this many; target >= 1.7x)")
        print(f"machine load average now: {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores")
    finally:
        if started_broker:
            redis.Redis.from_url(started_broker).shutdown(nosave=True)


if __name__ == "__main__":
    main()
