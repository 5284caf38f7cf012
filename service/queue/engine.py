"""Analysis jobs on an existing distributed task queue: Celery with a Redis broker.

The database stays the record of every job (status, progress, attempts, result, the draft it
made), exactly as with the embedded worker pool; the broker only carries "job X is ready"
messages to worker processes on any number of machines. The job itself runs through the same
``execute`` function as in the embedded pool, with the run's recorded seed, the same analysis
options and the same software-version record, so a certificate is bit for bit the same whichever
mode produced it.

Delivery is at least once. A message is acknowledged only after the job has finished
(``acks_late``); if the process running it dies (SIGKILL, out of memory, power cut) the broker
hands the message to another worker (``reject_on_worker_lost``, and for a lost machine Redis's
visibility timeout), and each worker reserves one message at a time (prefetch 1) so no job
waits behind a long fit it was not given. Running a job twice is harmless: a worker first *takes*
the job in the database, which succeeds only for a queued job or one whose holder is gone, and
the draft is written in the same transaction that checks the job is still held by this worker.
A duplicate delivery of a job that is done, failed, or held by a live worker does nothing.

The database, not the broker, decides what still has to run: the web process re-publishes queued
jobs whose message was never sent (broker down at upload time) or was lost (a broker restarted
without its append-only file), and re-queues jobs whose worker stopped beating. Attempts are
bounded (``jobs.MAX_ATTEMPTS``); a fit longer than the per-job time limit is stopped and failed
with that reason. Workers need the database URL, the broker URL and the lab's public settings,
never the signing key: issuing stays in the web process.
"""

from __future__ import annotations

import logging
import os
import sys
import threading
import time
import uuid
from dataclasses import asdict, dataclass
from typing import Any

from sqlalchemy import func, select
from sqlalchemy.exc import OperationalError

from service import storage as st
from service.archive import log_event
from service.queue.jobs import (
    WorkerSettings,
    _host_id,
    execute,
    import_string,
    recover_interrupted,
    take,
)
from service.storage import Storage, utc_now

logger = logging.getLogger(__name__)

#: Environment variable naming the broker; setting it (or ``BROKER_URL`` in the instance's
#: ``config.py``) moves the analysis jobs from the embedded pool to the distributed queue.
BROKER_ENV = "COLDCERT_BROKER_URL"
QUEUE_NAME = "coldcert-jobs"
TASK_NAME = "coldcert.run_job"


@dataclass
class EngineSettings:
    broker_url: str
    #: Per-job limit in seconds: the fit is stopped and the job failed with this reason.
    time_limit: float = 3600.0
    #: Seconds after which Redis hands an unacknowledged message to another worker (a worker
    #: machine that vanished). Must exceed the longest job; default: time limit + 5 minutes.
    visibility_timeout: float | None = None
    #: Retries of a delivery that failed for a transient reason (database unreachable).
    max_retries: int = 3
    #: Seconds between the soft limit (the fit is asked to stop) and the hard one (its process
    #: is killed, for a fit stuck where it cannot be interrupted, e.g. inside a C library).
    hard_grace: float = 30.0

    @property
    def hard_time_limit(self) -> float:
        return self.time_limit + self.hard_grace

    @property
    def effective_visibility_timeout(self) -> float:
        if self.visibility_timeout is not None:
            return float(self.visibility_timeout)
        return self.hard_time_limit + 300.0


def redact(url: str) -> str:
    """The broker URL without its password, for logs and the health report."""
    scheme, sep, rest = url.partition("://")
    if not sep or "@" not in rest:
        return url
    credentials, _, host = rest.rpartition("@")
    user = credentials.split(":", 1)[0]
    return f"{scheme}://{user + ':***' if ':' in credentials else user}@{host}"


def make_celery(engine: EngineSettings, worker: WorkerSettings) -> Any:
    """A Celery application carrying coldcert's one task and its delivery guarantees."""
    from celery import Celery

    app = Celery("coldcert", broker=engine.broker_url, set_as_current=False)
    app.conf.update(
        task_default_queue=QUEUE_NAME,
        task_serializer="json",
        accept_content=["json"],
        task_ignore_result=True,  # results live in the jobs table
        task_acks_late=True,
        task_reject_on_worker_lost=True,
        worker_prefetch_multiplier=1,
        task_soft_time_limit=engine.time_limit,
        task_time_limit=engine.hard_time_limit,
        broker_transport_options={
            "visibility_timeout": engine.effective_visibility_timeout,
            # An upload must not hang on a broker that is away: the job stays queued in the
            # database and the sweeper sends it later.
            "socket_connect_timeout": 3,
        },
        broker_connection_retry_on_startup=True,
        broker_connection_timeout=5,
        task_publish_retry_policy={"max_retries": 3, "interval_start": 0.2, "interval_step": 0.5},
        worker_hijack_root_logger=False,
        worker_send_task_events=False,
        # What a worker process needs to run a job; read after the fork, see _context().
        coldcert_worker=asdict(worker),
    )

    limit = engine.time_limit

    class JobTask(app.Task):  # type: ignore[name-defined,misc]
        def on_failure(self, exc, task_id, args, kwargs, einfo):  # noqa: ANN001
            # Celery calls this in the worker's main process when the hard limit killed the
            # process running the fit; without it the job would stay "running" until the
            # stale-heartbeat check re-queued it, to be killed again.
            if type(exc).__name__ == "TimeLimitExceeded" and args:
                fail_overrun_job(self.app, str(args[0]), limit)

    @app.task(
        name=TASK_NAME,
        base=JobTask,
        bind=True,
        autoretry_for=(OperationalError,),
        max_retries=engine.max_retries,
        retry_backoff=2,
        retry_jitter=True,
    )
    def run_job(task, job_id: str) -> str:
        return run_delivered_job(task.app, job_id)

    return app


class _Context:
    """Per-process state of an engine worker: database, archive (without a key), analysis."""

    def __init__(self, settings: WorkerSettings) -> None:
        self.pid = os.getpid()
        self.settings = settings
        self.storage = settings.open_storage()
        self.archive = settings.open_archive(self.storage)
        self.certify = import_string(settings.certify)
        self.load_run = import_string(settings.load_run)


_context_lock = threading.Lock()
_contexts: dict[int, _Context] = {}


def _context(app: Any) -> _Context:
    # Database connections must not cross a fork: each worker process builds its own.
    with _context_lock:
        ctx = _contexts.get(os.getpid())
        if ctx is None:
            ctx = _Context(WorkerSettings(**app.conf.coldcert_worker))
            _contexts.clear()
            _contexts[ctx.pid] = ctx
        return ctx


def run_delivered_job(app: Any, job_id: str) -> str:
    """Body of the Celery task: take the job, run it as the embedded pool would."""
    ctx = _context(app)
    worker = f"{_host_id()}:{os.getpid()}:{uuid.uuid4().hex[:8]}"
    job = take(ctx.storage, job_id, worker)
    if job is None:
        return "skipped"
    execute(ctx.storage, ctx.archive, job, worker, ctx.certify, ctx.load_run, ctx.settings.options)
    return "ran"


def fail_overrun_job(app: Any, job_id: str, limit: float) -> bool:
    """Fail a job whose process the hard time limit killed; False if it was no longer running.

    Whoever held the job is gone (the pool process was killed), so the row is failed whatever its
    holder, but only while it is still "running": a job that finished, or was already re-queued
    by the stale-heartbeat check, is left alone."""
    ctx = _context(app)
    reason = (
        f"the analysis ran longer than the per-job time limit ({limit:g} s), did not stop when "
        "asked, and its process was ended"
    )
    with ctx.storage.write() as conn:
        result = conn.execute(
            st.jobs.update()
            .where((st.jobs.c.id == job_id) & (st.jobs.c.status == "running"))
            .values(status="failed", error=reason, finished_at=utc_now(), step="stopped")
        )
        if result.rowcount != 1:
            return False
        log_event(conn, "service", "job.failed", job_id, {"error": reason})
    logger.error("job %s: %s", job_id, reason)
    return True


class EngineQueue:
    """The service side of the distributed queue: publish jobs, re-publish lost ones, report."""

    SWEEP_SECONDS = 5.0
    RECOVER_SECONDS = 15.0
    #: A queued job whose message was published this long ago, while the broker holds no
    #: message at all, was lost by the broker and is published again.
    LOST_AFTER_SECONDS = 30.0
    PING_CACHE_SECONDS = 10.0

    def __init__(self, storage: Storage, worker: WorkerSettings, engine: EngineSettings) -> None:
        self.storage = storage
        self.engine = engine
        self.celery = make_celery(engine, worker)
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._lock = threading.Lock()
        self._ping: tuple[float, list[str]] | None = None
        self._last_recovery = 0.0

    # ---- publishing ------------------------------------------------------------------------

    def submit(self, job_id: str) -> bool:
        """Publish one job now; False (and the sweeper retries) when the broker is away."""
        try:
            self.celery.send_task(TASK_NAME, args=[job_id], queue=QUEUE_NAME, retry=False)
        except Exception as exc:  # the job stays queued in the database; sweep() sends it
            logger.warning(
                "could not publish %s to %s: %s", job_id, redact(self.engine.broker_url), exc
            )
            return False
        with self.storage.write() as conn:
            conn.execute(
                st.jobs.update().where(st.jobs.c.id == job_id).values(dispatched_at=utc_now())
            )
        return True

    def broker_depth(self) -> int:
        """Messages waiting in the broker's queue (not counting those being worked on)."""
        with self.celery.connection_for_read() as conn:
            conn.ensure_connection(max_retries=1, timeout=2)
            return int(conn.default_channel.queue_declare(QUEUE_NAME, passive=False).message_count)

    def sweep(self) -> list[str]:
        """Publish what the broker does not have; returns the job ids published."""
        now = time.monotonic()
        if now - self._last_recovery >= self.RECOVER_SECONDS:
            recover_interrupted(self.storage)
            self._last_recovery = now
        with self.storage.read() as conn:
            pending = conn.execute(
                select(st.jobs.c.id, st.jobs.c.dispatched_at)
                .where(st.jobs.c.status == "queued")
                .order_by(st.jobs.c.created_at)
            ).all()
        if not pending:
            return []
        unsent = [r.id for r in pending if r.dispatched_at is None]
        cutoff = _iso_ago(self.LOST_AFTER_SECONDS)
        old = [r.id for r in pending if r.dispatched_at is not None and r.dispatched_at < cutoff]
        if old:
            try:
                if self.broker_depth() == 0:
                    logger.warning(
                        "broker holds no message for %d queued job(s); re-sending", len(old)
                    )
                    unsent += old
            except Exception as exc:
                logger.warning("broker unreachable (%s); will retry", exc)
                return []
        return [job_id for job_id in unsent if self.submit(job_id)]

    def start(self) -> None:
        if self._thread is None:
            self._thread = threading.Thread(target=self._run, name="coldcert-dispatch", daemon=True)
            self._thread.start()

    def _run(self) -> None:
        while not self._stop.wait(self.SWEEP_SECONDS):
            try:
                self.sweep()
            except Exception:  # never let the sweeper die; the next round tries again
                logger.exception("job sweep failed")

    def stop(self) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join(10)
            self._thread = None

    # ---- health ----------------------------------------------------------------------------

    def workers_seen(self, fresh: bool = False) -> list[str]:
        """Names of the workers that answered a ping (cached a few seconds unless ``fresh``)."""
        with self._lock:
            recent = self._ping and time.monotonic() - self._ping[0] < self.PING_CACHE_SECONDS
            if recent and not fresh:
                return self._ping[1]
        replies = self.celery.control.ping(timeout=1.0) or []
        names = sorted(name for reply in replies for name in reply)
        with self._lock:
            self._ping = (time.monotonic(), names)
        return names

    def health(self) -> dict[str, Any]:
        """Mode, broker reachable, messages waiting in it, and how many workers answered."""
        report: dict[str, Any] = {"mode": "distributed", "broker_ok": True}
        try:
            report["broker_messages"] = self.broker_depth()
            report["workers_seen"] = len(self.workers_seen())
        except Exception as exc:
            logger.warning("broker %s unreachable: %s", redact(self.engine.broker_url), exc)
            report.update(broker_ok=False, broker_messages=None, workers_seen=0)
        return report


def _iso_ago(seconds: float) -> str:
    from datetime import UTC, datetime, timedelta

    return (datetime.now(UTC) - timedelta(seconds=seconds)).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def worker_argv(processes: int, node: str | None = None, loglevel: str = "INFO") -> list[str]:
    """Command-line of a Celery worker for ``coldcert work`` in engine mode."""
    node = node or f"coldcert-{uuid.uuid4().hex[:6]}@{_host_id()}"
    # prefork: one process per fit, time limits enforced; Windows has no fork, so one process
    # per `coldcert work` there (start several for more).
    pool = "solo" if sys.platform == "win32" else "prefork"
    argv = ["worker", f"--loglevel={loglevel}", f"--hostname={node}", f"--queues={QUEUE_NAME}"]
    argv += [f"--pool={pool}", f"--concurrency={1 if pool == 'solo' else max(1, processes)}"]
    argv += ["--without-gossip", "--without-mingle"]
    return argv


def queue_counts(storage: Storage) -> dict[str, int]:
    with storage.read() as conn:
        rows = conn.execute(select(st.jobs.c.status, func.count()).group_by(st.jobs.c.status)).all()
    counts = {status: 0 for status in ("queued", "running", "done", "failed")}
    counts.update({status: int(n) for status, n in rows})
    return counts
