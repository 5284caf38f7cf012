"""Background jobs: fits run in worker processes, never inside a web request.

The queue is the ``jobs`` table. A worker claims the oldest queued job with one atomic UPDATE
(so any number of worker processes, on this machine or others sharing a PostgreSQL database,
never take the same job), reports progress (fraction done and the current step) into the row,
and finishes by writing the draft certificate and the job's final status in a single transaction:
a crash leaves the job either fully done or still marked running, never half-written.

A running job carries a heartbeat. When the service starts, and periodically while it runs, jobs
whose worker is gone (its process no longer exists on this host, or its heartbeat is stale) are
marked as interrupted in the event log and queued again; after ``MAX_ATTEMPTS`` interruptions a
job is failed with the reason, so a run that kills its worker cannot loop for ever.
"""

from __future__ import annotations

import contextlib
import importlib
import json
import logging
import multiprocessing
import os
import socket
import threading
import time
import traceback
import uuid
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

from sqlalchemy import Connection, and_, select

from service import storage as st
from service.archive import Archive, analysis_output, log_event, software_versions
from service.storage import Storage, pid_alive, utc_now

logger = logging.getLogger(__name__)

MAX_ATTEMPTS = 3
HEARTBEAT_SECONDS = 2.0
STALE_AFTER_SECONDS = 60.0
PROGRESS_MIN_INTERVAL = 0.25


def import_string(path: str) -> Callable[..., Any]:
    """``"package.module:attribute"`` → the attribute (so workers can be told what to run)."""
    module, _, attribute = path.partition(":")
    return getattr(importlib.import_module(module), attribute)


def new_id(prefix: str) -> str:
    return f"{prefix}-{uuid.uuid4().hex[:12]}"


def enqueue(
    conn: Connection,
    *,
    purpose: str,
    run_id: str,
    requested_by: Mapping[str, Any],
    certificate_id: str | None = None,
) -> str:
    job_id = new_id("job")
    conn.execute(
        st.jobs.insert().values(
            id=job_id,
            purpose=purpose,
            run_id=run_id,
            certificate_id=certificate_id,
            requested_by=requested_by["id"],
            status="queued",
            fraction=0.0,
            step="waiting for a worker",
            attempts=0,
            created_at=utc_now(),
        )
    )
    log_event(conn, requested_by["username"], "job.queued", job_id, {"purpose": purpose})
    return job_id


#: How often a failed job may be queued again by hand (e.g. a valid run whose workers were
#: killed by restarts three times); beyond it, upload the run again.
MAX_RETRIES = 2


class RetryRefused(Exception):
    """A job that cannot be queued again; ``status`` is the HTTP answer (404 or 409)."""

    def __init__(self, message: str, status: int = 409) -> None:
        super().__init__(message)
        self.status = status


def retry(storage: Storage, job_id: str, requested_by: Mapping[str, Any]) -> dict[str, Any]:
    """Queue a failed job again, at most ``MAX_RETRIES`` times; each retry is in the event log."""
    with storage.write() as conn:
        row = conn.execute(select(st.jobs).where(st.jobs.c.id == job_id)).first()
        if row is None:
            raise RetryRefused(f"job {job_id} not found", 404)
        if row.status != "failed":
            raise RetryRefused(f"job {job_id} is {row.status}; only a failed job can be retried")
        done = conn.execute(
            select(st.events.c.id)
            .where(st.events.c.action == "job.retried")
            .where(st.events.c.subject == job_id)
        ).all()
        if len(done) >= MAX_RETRIES:
            raise RetryRefused(
                f"job {job_id} was retried {len(done)} times already (the limit); its last "
                f"error: {row.error}. Check the run and upload it again"
            )
        conn.execute(
            st.jobs.update()
            .where(and_(st.jobs.c.id == job_id, st.jobs.c.status == "failed"))
            .values(
                status="queued",
                attempts=0,
                error=None,
                claimed_by=None,
                fraction=0.0,
                finished_at=None,
                dispatched_at=None,
                step=f"queued again by {requested_by['username']} "
                f"(retry {len(done) + 1} of {MAX_RETRIES})",
            )
        )
        log_event(
            conn,
            requested_by["username"],
            "job.retried",
            job_id,
            {"retry": len(done) + 1, "previous_error": row.error},
        )
    return {"job_id": job_id, "status": "queued", "retry": len(done) + 1,
            "retries_left": MAX_RETRIES - len(done) - 1}


def job_status(storage: Storage, job_id: str) -> dict[str, Any] | None:
    with storage.read() as conn:
        row = conn.execute(select(st.jobs).where(st.jobs.c.id == job_id)).first()
    if row is None:
        return None
    info = dict(row._mapping)
    info["result"] = json.loads(info.pop("result_json") or "null")
    info.pop("claimed_by", None)
    return info


def _host_id() -> str:
    return socket.gethostname()


def holder_gone(row: Any, stale_after: float = STALE_AFTER_SECONDS) -> bool:
    """Whether a running job's worker is gone: its process no longer exists on this host, or its
    heartbeat is older than ``stale_after`` seconds (a worker elsewhere that stopped beating)."""
    cutoff = (datetime.now(UTC) - timedelta(seconds=stale_after)).strftime("%Y-%m-%dT%H:%M:%S.%fZ")
    owner_host, _, rest = (row.claimed_by or "").partition(":")
    pid_text = rest.split(":", 1)[0]
    dead_here = owner_host == _host_id() and pid_text.isdigit() and not pid_alive(int(pid_text))
    stale = (row.heartbeat_at or row.started_at or "") < cutoff
    return dead_here or stale


def interrupted_values(row: Any) -> dict[str, Any]:
    """The job row's new values once its worker is gone: queued again, or failed for good
    after ``MAX_ATTEMPTS`` attempts (so a run that kills its worker cannot loop for ever)."""
    if row.attempts >= MAX_ATTEMPTS:
        return {
            "status": "failed",
            "error": f"interrupted {row.attempts} times (worker died each time); "
            "giving up — check the run's size and the service log",
            "finished_at": utc_now(),
        }
    return {
        "status": "queued",
        "claimed_by": None,
        "fraction": 0.0,
        "step": f"interrupted at '{row.step}'; queued again",
        "dispatched_at": None,
    }


def mark_interrupted(conn: Connection, row: Any) -> str | None:
    """Record that ``row``'s worker is gone; returns the job's new status (None if another
    process recorded it first)."""
    values = interrupted_values(row)
    result = conn.execute(
        st.jobs.update()
        .where(
            and_(
                st.jobs.c.id == row.id,
                st.jobs.c.status == "running",
                st.jobs.c.claimed_by == row.claimed_by,
            )
        )
        .values(**values)
    )
    if result.rowcount != 1:
        return None
    log_event(
        conn,
        "service",
        "job.interrupted",
        row.id,
        {"step": row.step, "attempts": row.attempts, "now": values["status"]},
    )
    return values["status"]


def recover_interrupted(storage: Storage, stale_after: float = STALE_AFTER_SECONDS) -> list[str]:
    """Re-queue jobs whose worker died; fail those interrupted too often. Returns job ids."""
    recovered = []
    with storage.write() as conn:
        rows = conn.execute(select(st.jobs).where(st.jobs.c.status == "running")).all()
        for row in rows:
            if holder_gone(row, stale_after) and mark_interrupted(conn, row) is not None:
                recovered.append(row.id)
    return recovered


def claim(storage: Storage, worker: str) -> dict[str, Any] | None:
    """Atomically take the oldest queued job for ``worker``; None if there is none."""
    with storage.write() as conn:
        row = conn.execute(
            select(st.jobs.c.id, st.jobs.c.attempts)
            .where(st.jobs.c.status == "queued")
            .order_by(st.jobs.c.created_at)
            .limit(1)
            .with_for_update(skip_locked=True)
        ).first()
        if row is None:
            return None
        now = utc_now()
        result = conn.execute(
            st.jobs.update()
            .where(and_(st.jobs.c.id == row.id, st.jobs.c.status == "queued"))
            .values(
                status="running",
                claimed_by=worker,
                started_at=now,
                heartbeat_at=now,
                attempts=row.attempts + 1,
                step="starting",
            )
        )
        if result.rowcount != 1:
            return None
        job = conn.execute(select(st.jobs).where(st.jobs.c.id == row.id)).one()
        return dict(job._mapping)


def take(
    storage: Storage, job_id: str, worker: str, stale_after: float = STALE_AFTER_SECONDS
) -> dict[str, Any] | None:
    """Take the job a queue message names, if it still has to run; None for a duplicate.

    The distributed queue's counterpart of :func:`claim`. A queued job is taken. A running job
    whose holder is gone (see :func:`holder_gone`) was interrupted: it is taken again, or failed
    once it has used ``MAX_ATTEMPTS``. A job that is done, failed, or held by a live worker is
    left alone, so a message delivered twice runs the job once.
    """
    with storage.write() as conn:
        row = conn.execute(
            select(st.jobs).where(st.jobs.c.id == job_id).with_for_update()
        ).first()
        if row is None:
            logger.warning("queue message for unknown job %s dropped", job_id)
            return None
        if row.status == "running" and holder_gone(row, stale_after):
            if mark_interrupted(conn, row) != "queued":
                return None
        elif row.status != "queued":
            return None
        now = utc_now()
        conn.execute(
            st.jobs.update()
            .where(and_(st.jobs.c.id == job_id, st.jobs.c.status == "queued"))
            .values(
                status="running",
                claimed_by=worker,
                started_at=now,
                heartbeat_at=now,
                attempts=st.jobs.c.attempts + 1,
                step="starting",
            )
        )
        return dict(conn.execute(select(st.jobs).where(st.jobs.c.id == job_id)).one()._mapping)


class ProgressReporter:
    """Writes progress into the job row, at most every ``PROGRESS_MIN_INTERVAL`` seconds."""

    def __init__(self, storage: Storage, job_id: str, worker: str) -> None:
        self.storage, self.job_id, self.worker = storage, job_id, worker
        self._last = 0.0
        self._lock = threading.Lock()
        self.latest: tuple[float, str] = (0.0, "starting")

    def __call__(self, fraction: float, step: str = "") -> None:
        # Never backwards: sweeps fitted side by side report their own fractions out of order.
        fraction = min(max(float(fraction), self.latest[0], 0.0), 1.0)
        self.latest = (fraction, str(step))
        now = time.monotonic()
        if now - self._last < PROGRESS_MIN_INTERVAL and fraction < 1.0:
            return
        self._last = now
        self.write()

    def write(self) -> None:
        with self._lock:
            fraction, step = self.latest
            try:
                with self.storage.write() as conn:
                    conn.execute(
                        st.jobs.update()
                        .where(
                            and_(st.jobs.c.id == self.job_id, st.jobs.c.claimed_by == self.worker)
                        )
                        .values(fraction=fraction, step=step[:500], heartbeat_at=utc_now())
                    )
            except Exception:  # progress is advisory; never let it kill a fit
                logger.exception("could not record progress of %s", self.job_id)


@dataclass
class WorkerSettings:
    database_url: str
    blob_root: str
    blob_store: str = "auto"
    certify: str = "service.calibrations.certify:certify_run"
    load_run: str = "service.intake:load_run"
    number_prefix: str = "CC"
    poll_seconds: float = 0.2
    #: Keyword options for the analysis (e.g. {"fast": True}); recorded with each certificate.
    options: dict[str, Any] = field(default_factory=dict)

    #: The lab's public keys (hex): the current one and earlier ones. Reading an issued
    #: certificate (a reproduction) checks its signed entry; drafting needs no key at all.
    public_keys: list[str] = field(default_factory=list)

    def open_archive(self, storage: Storage) -> Archive:
        """The archive as a worker sees it: it drafts and verifies, it never signs."""
        return Archive(
            storage,
            None,
            number_prefix=self.number_prefix,
            trusted_public_keys=[bytes.fromhex(h) for h in self.public_keys],
        )

    def open_storage(self, read_only: bool = False) -> Storage:
        return Storage(self.database_url, self.blob_root, self.blob_store, read_only=read_only)


def execute(
    storage: Storage,
    archive: Archive,
    job: Mapping[str, Any],
    worker: str,
    certify: Callable[..., Any],
    load_run: Callable[[Path], Any],
    options: Mapping[str, Any] | None = None,
) -> None:
    """Run one claimed job to the end, recording success or the reason for failure."""
    options = dict(options or {})
    progress = ProgressReporter(storage, job["id"], worker)
    with _heartbeat(progress):
        try:
            with storage.read() as conn:
                run = conn.execute(select(st.runs).where(st.runs.c.id == job["run_id"])).one()
                requester = conn.execute(
                    select(st.users).where(st.users.c.id == job["requested_by"])
                ).one()
            if job["purpose"] == "certify":
                _draft(storage, archive, job, worker, run, requester, certify, load_run, options,
                       progress)
            elif job["purpose"] == "reproduce":
                _reproduce(storage, archive, job, worker, requester, certify, load_run, progress)
            else:
                raise ValueError(f"unknown job purpose {job['purpose']!r}")
        except Exception as exc:
            _record_failure(storage, job, worker, exc, progress.latest[1])


@contextlib.contextmanager
def _heartbeat(progress: ProgressReporter):
    """Re-write the job's progress (and so its heartbeat) every HEARTBEAT_SECONDS meanwhile,
    so that a long fit is not taken for a dead worker."""
    beat_stop = threading.Event()

    def heartbeat() -> None:
        while not beat_stop.wait(HEARTBEAT_SECONDS):
            progress.write()

    beater = threading.Thread(target=heartbeat, daemon=True)
    beater.start()
    try:
        yield
    finally:
        beat_stop.set()
        beater.join(timeout=5)


def _draft(
    storage: Storage,
    archive: Archive,
    job: Mapping[str, Any],
    worker: str,
    run: Any,
    requester: Any,
    certify: Callable[..., Any],
    load_run: Callable[[Path], Any],
    options: dict[str, Any],
    progress: ProgressReporter,
) -> None:
    """A certify job: analyse the run's archived raw files and store the draft certificate."""
    with storage.read() as conn:
        files = archive.run_files(conn, run.id)
    progress(0.0, "loading the archived raw files")
    with storage.blobs.scratch("job") as tmp:
        folder = archive.materialise_run(files, Path(tmp) / "run")
        loaded = load_run(folder)
        output = analysis_output(certify(loaded, run.seed, progress, **options))
    progress(1.0, "writing the draft certificate")
    with storage.write() as conn:
        cert_id = archive.create_draft(
            conn,
            run_id=run.id,
            record=output.record,
            seed=run.seed,
            software=software_versions(),
            submitter=dict(requester._mapping),
            replaces=run.replaces,
            amendment_reason=run.amendment_reason,
            options=options,
            plots=output.plots,
            extra_files=output.extra_files,
            job_id=job["id"],
        )
        _finish(conn, job["id"], worker, {"certificate_id": cert_id}, cert_id)


def _reproduce(
    storage: Storage,
    archive: Archive,
    job: Mapping[str, Any],
    worker: str,
    requester: Any,
    certify: Callable[..., Any],
    load_run: Callable[[Path], Any],
    progress: ProgressReporter,
) -> None:
    """A reproduce job: re-run an archived analysis and keep the comparison as the result."""
    report = archive.reproduce(job["certificate_id"], certify, load_run, progress)
    with storage.write() as conn:
        _finish(conn, job["id"], worker, report.as_dict(), job["certificate_id"])
        log_event(
            conn,
            requester.username,
            "certificate.reproduced",
            job["certificate_id"],
            {"identical": report.identical, "mismatches": len(report.mismatches)},
        )


def _record_failure(
    storage: Storage, job: Mapping[str, Any], worker: str, exc: Exception, step: str
) -> None:
    """Mark the job failed with the reason and the step it failed in (if it is still ours)."""
    logger.warning("job %s failed: %s", job["id"], exc)
    reason = _failure_reason(exc)
    with storage.write() as conn:
        conn.execute(
            st.jobs.update()
            .where(and_(st.jobs.c.id == job["id"], st.jobs.c.claimed_by == worker))
            .values(
                status="failed",
                error=reason,
                finished_at=utc_now(),
                step=f"failed during: {step}",
            )
        )
        log_event(conn, "service", "job.failed", job["id"], {"error": reason})


def _failure_reason(exc: BaseException) -> str:
    if type(exc).__name__ == "SoftTimeLimitExceeded":  # the distributed queue's per-job limit
        return "the analysis ran longer than the per-job time limit and was stopped"
    parts = [f"{type(exc).__name__}: {exc}"]
    for attr in ("file", "line", "field"):
        value = getattr(exc, attr, None)
        if value is not None:
            parts.append(f"{attr} {value}")
    where = traceback.extract_tb(exc.__traceback__)[-1:] if exc.__traceback__ else []
    if where:
        parts.append(f"(at {Path(where[0].filename).name}:{where[0].lineno})")
    return "; ".join(parts)[:2000]


def _finish(
    conn: Connection, job_id: str, worker: str, result: Mapping, certificate_id: str | None
) -> None:
    updated = conn.execute(
        st.jobs.update()
        .where(and_(st.jobs.c.id == job_id, st.jobs.c.claimed_by == worker))
        .values(
            status="done",
            fraction=1.0,
            step="done",
            finished_at=utc_now(),
            result_json=json.dumps(result, sort_keys=True),
            certificate_id=certificate_id,
        )
    )
    if updated.rowcount != 1:
        # Our claim was taken away (we were presumed dead); roll back rather than double-write.
        raise RuntimeError(f"job {job_id} is no longer held by this worker")
    log_event(conn, "service", "job.done", job_id, {"certificate_id": certificate_id})


def worker_main(settings: WorkerSettings, stop: Any) -> None:
    """Entry point of a worker process: claim and run jobs until ``stop`` is set."""
    logging.basicConfig(level=logging.INFO)
    storage = settings.open_storage()
    # Workers draft; they never sign, so they get no key.
    archive = settings.open_archive(storage)
    certify = import_string(settings.certify)
    load_run = import_string(settings.load_run)
    worker = f"{_host_id()}:{os.getpid()}:{uuid.uuid4().hex[:8]}"
    # A worker whose service was killed outright (no chance to set ``stop``) must not linger.
    parent = multiprocessing.parent_process()
    last_recovery = 0.0
    try:
        while not stop.is_set() and (parent is None or parent.is_alive()):
            job = claim(storage, worker)
            if job is None:
                if time.monotonic() - last_recovery > STALE_AFTER_SECONDS / 4:
                    recover_interrupted(storage)
                    last_recovery = time.monotonic()
                stop.wait(settings.poll_seconds)
                continue
            execute(storage, archive, job, worker, certify, load_run, settings.options)
    finally:
        storage.dispose()


class WorkerPool:
    """Worker processes of the embedded service, restarted if one dies."""

    def __init__(self, settings: WorkerSettings, processes: int = 2) -> None:
        self.settings = settings
        self.count = max(1, int(processes))
        # "spawn": a fresh interpreter per worker; forking a process that runs Flask threads and
        # holds database connections is unsafe.
        self._ctx = multiprocessing.get_context("spawn")
        self._stop = self._ctx.Event()
        self._procs: list[multiprocessing.process.BaseProcess] = []
        self._watch: threading.Thread | None = None
        self._watch_stop = threading.Event()

    def _spawn(self):
        proc = self._ctx.Process(
            target=worker_main,
            args=(self.settings, self._stop),
            daemon=True,
            name="coldcert-worker",
        )
        proc.start()
        return proc

    def start(self) -> None:
        storage = self.settings.open_storage()
        try:
            requeued = recover_interrupted(storage, stale_after=STALE_AFTER_SECONDS)
            storage.blobs.clean_scratch()
        finally:
            storage.dispose()
        if requeued:
            logger.warning("re-queued %d interrupted job(s): %s", len(requeued), requeued)
        self._procs = [self._spawn() for _ in range(self.count)]
        self._watch = threading.Thread(target=self._supervise, daemon=True)
        self._watch.start()

    def _supervise(self) -> None:
        delay = 1.0
        while not self._watch_stop.wait(delay):
            died = False
            for index, proc in enumerate(self._procs):
                if not proc.is_alive() and not self._stop.is_set():
                    died = True
                    logger.error("worker %s died (exit %s); restarting", proc.pid, proc.exitcode)
                    storage = self.settings.open_storage()
                    try:
                        recover_interrupted(storage, stale_after=STALE_AFTER_SECONDS)
                    finally:
                        storage.dispose()
                    self._procs[index] = self._spawn()
            # Back off if workers keep dying at start (e.g. a broken installation).
            delay = min(delay * 2, 60.0) if died else 1.0

    def alive(self) -> int:
        """Worker processes of this pool that are running now."""
        return sum(1 for proc in self._procs if proc.is_alive())

    @property
    def pids(self) -> list[int | None]:
        return [p.pid for p in self._procs]

    def stop(self, timeout: float = 10.0) -> None:
        self._watch_stop.set()
        self._stop.set()
        deadline = time.monotonic() + timeout
        for proc in self._procs:
            proc.join(max(0.1, deadline - time.monotonic()))
            if proc.is_alive():
                proc.terminate()
                proc.join(2)
        self._procs = []
