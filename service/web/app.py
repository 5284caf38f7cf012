"""The Flask application factory: one service instance = one instance folder.

The instance folder holds everything the service owns: the SQLite database (WAL mode), the blob
folder of raw files, the lab's signing key and the session secret. It is created on first start.
A PostgreSQL (or other SQLAlchemy) URL in ``DATABASE_URL`` replaces the SQLite file; nothing else
changes.
"""

from __future__ import annotations

import atexit
import errno
import logging
import os
import secrets
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from flask import Config, Flask, g, has_request_context, jsonify, render_template, request
from flask.sessions import SecureCookieSessionInterface
from werkzeug.exceptions import HTTPException

from service.archive import Archive, LabKey
from service.queue.engine import BROKER_ENV, EngineQueue, EngineSettings, queue_counts
from service.queue.jobs import WorkerPool, WorkerSettings
from service.storage import Storage, default_database_url

#: Environment variable naming the database (overrides ``DATABASE_URL`` of ``config.py``), so a
#: worker machine can be configured without an instance folder.
DATABASE_ENV = "COLDCERT_DATABASE_URL"

logger = logging.getLogger(__name__)

DEFAULTS: dict[str, Any] = {
    # Largest accepted request (a whole zipped run folder); Flask answers 413 above it.
    "MAX_CONTENT_LENGTH": 64 * 1024 * 1024,
    # Largest total unpacked size of an uploaded archive (guards against zip bombs).
    "MAX_RUN_BYTES": 256 * 1024 * 1024,
    "MAX_RUN_FILES": 500,
    "DATABASE_URL": None,
    # Where raw files, plots and output files live: "folder" (instance/blobs), "database" (the
    # blob_data table; no shared folder for workers elsewhere) or "auto" (folder with SQLite,
    # database with a server).
    "BLOB_STORE": "auto",
    # A broker URL (e.g. redis://host:6379/0) moves analysis jobs to the distributed queue
    # (Celery); None keeps the embedded worker pool. COLDCERT_BROKER_URL sets it too.
    "BROKER_URL": None,
    # Distributed queue: seconds a job may run before it is stopped and failed.
    "JOB_TIME_LIMIT": 3600,
    # Distributed queue: seconds after the time limit before a fit that does not stop when asked
    # has its process ended (the job is then failed at once, not left "running").
    "JOB_STOP_GRACE": 30,
    # Distributed queue: seconds before Redis re-delivers a message whose worker vanished;
    # None = JOB_TIME_LIMIT + 330 s. Must exceed the longest job.
    "BROKER_VISIBILITY_TIMEOUT": None,
    # The lab's public key (hex, as /api/public-key shows it) for analysis workers on machines
    # without the instance folder: a reproduction checks the signed entry it re-runs.
    # COLDCERT_LAB_PUBLIC_KEY sets it too.
    "LAB_PUBLIC_KEY": None,
    "WORKERS": 2,
    "START_WORKERS": False,
    "CERTIFY": "service.calibrations.certify:certify_run",
    "LOAD_RUN": "service.intake:load_run",
    "CERTIFICATE_PREFIX": "CC",
    # Keyword options passed to the analysis and recorded with each certificate ({"fast": True}
    # selects the short MCMC settings meant for tests and quick looks).
    "ANALYSIS_OPTIONS": {},
    # Public keys (hex) of lab keys used before a key change, so their entries still verify.
    "TRUSTED_PUBLIC_KEYS": (),
    # The laboratory's recall policy: maximum permissible change per tracked quantity and the
    # interval bounds (docs/history.md). Empty: the default interval of service.archive.history.
    "RECALL_POLICY": {},
    # Where customers check a certificate (printed on the PDF with a QR code); None: this
    # service's own /check page as the request reached it.
    "PUBLIC_CHECK_URL": None,
    # The laboratory's copy of the DCC 3.3.0 dcc.xsd; when set (here or by COLDCERT_DCC_SCHEMA),
    # every DCC rendering is validated against it before it is served.
    "DCC_SCHEMA": None,
    # The reverse proxy in front of `coldcert serve` (its address, e.g. "127.0.0.1"): the server
    # believes its X-Forwarded-For/-Proto/-Host headers and removes them from anyone else.
    # `coldcert serve --proxy ADDRESS` sets it too. With TLS ending at the proxy, cookies are
    # then marked Secure.
    "TRUSTED_PROXY": None,
    # Only for another WSGI server than `coldcert serve` (which checks the proxy's address):
    # how many proxies' X-Forwarded-* headers to believe, whoever sent them (0: none). Setting
    # both this and TRUSTED_PROXY is refused: the headers would be applied twice.
    "TRUSTED_PROXIES": 0,
    # Open the instance for reading only (an audit copy); also chosen when the folder or the
    # database file cannot be written. Changes answer 503; nothing is created.
    "READ_ONLY": False,
    "SESSION_COOKIE_HTTPONLY": True,
    "SESSION_COOKIE_SAMESITE": "Lax",
}


class _SessionInterface(SecureCookieSessionInterface):
    """Session cookies carry ``Secure`` whenever the request came over TLS (directly, or through
    the reverse proxy of ``TRUSTED_PROXY``), so a cookie set over https is never sent in clear."""

    def get_cookie_secure(self, app: Flask) -> bool:
        return bool(super().get_cookie_secure(app) or (has_request_context() and request.is_secure))


def csp_nonce() -> str:
    """A fresh random nonce per response, for the inline scripts of our own templates."""
    if "csp_nonce" not in g:
        g.csp_nonce = secrets.token_urlsafe(16)
    return g.csp_nonce


def content_security_policy() -> str:
    return (
        "default-src 'self'; "
        f"script-src 'self' 'nonce-{csp_nonce()}'; "
        "style-src 'self' 'unsafe-inline'; img-src 'self' data:; object-src 'none'; "
        "base-uri 'none'; frame-ancestors 'self'; form-action 'self'"
    )


#: errno values meaning "the disk (or the user's quota on it) is full".
_FULL_ERRNOS = {errno.ENOSPC, errno.EDQUOT}


def _storage_full(exc: BaseException, instance: Path) -> str | None:
    """An operator's message if ``exc`` (or what caused it) is a full disk, else None."""
    seen = set()
    while exc is not None and id(exc) not in seen:
        seen.add(id(exc))
        if isinstance(exc, OSError) and exc.errno in _FULL_ERRNOS:
            where = Path(str(exc.filename)).parent if exc.filename else instance
            return (
                f"no space left on the disk holding {where}; nothing was stored — free space "
                "or extend the volume, then send the request again"
            )
        text = str(exc).lower()
        if "database or disk is full" in text or "could not extend file" in text:
            return (
                "the database's disk is full; nothing was stored — free space on the volume "
                "holding the database, then send the request again"
            )
        exc = exc.__cause__ or exc.__context__
    return None


@dataclass
class Services:
    """What the blueprints need, kept on ``app.extensions["coldcert"]``."""

    storage: Storage
    archive: Archive
    key: LabKey
    worker_settings: WorkerSettings
    pool: WorkerPool | None = None
    #: The distributed queue (Celery) when a broker is configured; None for the embedded pool.
    engine: EngineQueue | None = None

    def start_workers(self, processes: int) -> WorkerPool | None:
        """Embedded mode: start ``processes`` local worker processes. Distributed mode: start
        the dispatcher that publishes queued jobs (the workers are ``coldcert work``)."""
        if self.engine is not None:
            self.engine.start()
            return None
        if int(processes) <= 0:
            # "--workers 0" means none: this process only serves; `coldcert work` runs the jobs.
            logger.info("no analysis workers started here; queued jobs wait for `coldcert work`")
            return self.pool
        if self.pool is None:
            self.pool = WorkerPool(self.worker_settings, processes)
            self.pool.start()
        return self.pool

    def stop_workers(self) -> None:
        if self.engine is not None:
            self.engine.stop()
        if self.pool is not None:
            self.pool.stop()
            self.pool = None

    def submit(self, job_id: str) -> None:
        """Hand a newly queued job (already committed) to the workers. The embedded pool polls
        the table; the distributed queue gets a message now (or from the next sweep)."""
        if self.engine is not None:
            self.engine.submit(job_id)

    def queue_health(self) -> dict[str, Any]:
        """Queue depth and the workers seen, for the health endpoint."""
        report: dict[str, Any] = {"jobs": queue_counts(self.storage)}
        if self.engine is not None:
            report.update(self.engine.health())
        else:
            alive = 0 if self.pool is None else self.pool.alive()
            report.update(mode="embedded", workers_seen=alive)
        return report


def engine_settings(config: Mapping[str, Any]) -> EngineSettings:
    """The distributed queue's settings from the service configuration."""
    timeout = config.get("BROKER_VISIBILITY_TIMEOUT")
    return EngineSettings(
        broker_url=str(config["BROKER_URL"]),
        time_limit=float(config.get("JOB_TIME_LIMIT") or 3600),
        hard_grace=float(config.get("JOB_STOP_GRACE") or 30),
        visibility_timeout=float(timeout) if timeout is not None else None,
    )


def _unwritable(instance: Path) -> bool:
    """An existing instance whose folder or database this process may not write (an auditor's
    read-only copy, a backup on read-only media)."""
    database = instance / "coldcert.sqlite3"
    if not instance.is_dir():
        return False
    return not os.access(instance, os.W_OK) or (
        database.is_file() and not os.access(database, os.W_OK)
    )


def _secret_key(instance: Path, read_only: bool = False) -> str:
    path = instance / "session_secret"
    if read_only and not path.is_file():
        return secrets.token_hex(32)  # sessions of a read-only copy last as long as the process
    if not path.exists():
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
        with os.fdopen(fd, "w") as handle:
            handle.write(secrets.token_hex(32))
    return path.read_text().strip()


def load_config(instance: Path, overrides: Mapping[str, Any] | None = None) -> Config:
    """``DEFAULTS``, then ``instance/config.py``, then the environment, then ``overrides``."""
    config = Config(str(instance))
    config.from_mapping(DEFAULTS)
    config.from_pyfile("config.py", silent=True)
    for key, variable in (
        ("DATABASE_URL", DATABASE_ENV),
        ("BROKER_URL", BROKER_ENV),
        ("LAB_PUBLIC_KEY", "COLDCERT_LAB_PUBLIC_KEY"),
    ):
        if os.environ.get(variable):
            config[key] = os.environ[variable]
    config.update({k: v for k, v in (overrides or {}).items() if k != "INSTANCE_PATH"})
    return config


def _public_hex(pem: Path) -> str:
    from cryptography.hazmat.primitives import serialization

    public = serialization.load_pem_public_key(pem.read_bytes())
    return public.public_bytes(serialization.Encoding.Raw, serialization.PublicFormat.Raw).hex()


def worker_settings(config: Mapping[str, Any], instance: Path) -> WorkerSettings:
    """What an analysis worker needs: database, blob store and the lab's public settings (never
    the signing key)."""
    public_keys = [config["LAB_PUBLIC_KEY"]] if config.get("LAB_PUBLIC_KEY") else []
    public_keys += list(config.get("TRUSTED_PUBLIC_KEYS", ()))
    pem = instance / "keys" / LabKey.PUBLIC_NAME
    if pem.is_file():  # a copy of the lab's public key, e.g. on the web machine itself
        public_keys.append(_public_hex(pem))
    return WorkerSettings(
        public_keys=public_keys,
        database_url=config["DATABASE_URL"] or default_database_url(instance),
        blob_root=str(instance / "blobs"),
        blob_store=config["BLOB_STORE"],
        certify=config["CERTIFY"],
        load_run=config["LOAD_RUN"],
        number_prefix=config["CERTIFICATE_PREFIX"],
        options=dict(config["ANALYSIS_OPTIONS"]),
    )


def create_app(config: Mapping[str, Any] | None = None) -> Flask:
    """Build the service. ``config`` overrides ``DEFAULTS`` and ``instance/config.py``.

    Set ``INSTANCE_PATH`` to choose the instance folder (tests use a temporary one) and
    ``START_WORKERS`` to start the background worker processes with the app.
    """
    instance_path = (config or {}).get("INSTANCE_PATH") or os.environ.get("COLDCERT_INSTANCE")
    app = Flask(
        __name__,
        instance_path=str(Path(instance_path).resolve()) if instance_path else None,
        instance_relative_config=True,
    )
    app.session_interface = _SessionInterface()
    app.jinja_env.globals["csp_nonce"] = csp_nonce
    instance = Path(app.instance_path)
    app.config.update(load_config(instance, config))
    proxies = int(app.config.get("TRUSTED_PROXIES") or 0)
    if proxies > 0 and app.config.get("TRUSTED_PROXY"):
        raise ValueError(
            "configuration: TRUSTED_PROXY (the proxy's address, for `coldcert serve`) and "
            "TRUSTED_PROXIES (a count, for another WSGI server) are both set; set only one"
        )
    if proxies > 0:
        from werkzeug.middleware.proxy_fix import ProxyFix

        app.wsgi_app = ProxyFix(app.wsgi_app, x_for=proxies, x_proto=proxies, x_host=proxies)
    read_only = bool(app.config["READ_ONLY"]) or _unwritable(instance)
    app.config["READ_ONLY"] = read_only
    if read_only:
        logger.warning("instance %s is open read-only: nothing can be changed", instance)
    else:
        instance.mkdir(parents=True, exist_ok=True)
    if not app.config.get("SECRET_KEY"):
        app.config["SECRET_KEY"] = _secret_key(instance, read_only)

    services = _open_services(app.config, instance, read_only)
    app.extensions["coldcert"] = services

    from service.web import api, auth, history, pages, public

    app.register_blueprint(auth.bp)
    app.register_blueprint(api.bp)
    app.register_blueprint(pages.bp)
    app.register_blueprint(history.bp)
    public.init_app(app)

    _install_handlers(app, instance, read_only)
    if app.config["START_WORKERS"] and not read_only:
        services.start_workers(app.config["WORKERS"])
        atexit.register(services.stop_workers)
    return app


def _open_services(config: Mapping[str, Any], instance: Path, read_only: bool) -> Services:
    """Storage (schema migrated, scratch cleaned), the lab key, the archive and the queue."""
    settings = worker_settings(config, instance)
    storage = settings.open_storage(read_only=read_only)
    storage.create_schema()
    # Raw data a killed process left in temporary folders (an upload being checked, a fit).
    storage.blobs.clean_scratch()
    if read_only:
        key = LabKey.load_for_reading(instance / "keys")
    else:
        key = LabKey.load_or_create(instance / "keys")
    try:
        trusted = [bytes.fromhex(h) for h in config.get("TRUSTED_PUBLIC_KEYS", ())]
    except ValueError:
        raise ValueError("TRUSTED_PUBLIC_KEYS must list Ed25519 public keys as hex") from None
    archive = Archive(
        storage,
        key,
        number_prefix=config["CERTIFICATE_PREFIX"],
        trusted_public_keys=trusted,
    )
    settings.public_keys = [key.public_raw.hex(), *settings.public_keys]
    services = Services(storage, archive, key, settings)
    if config["BROKER_URL"]:
        services.engine = EngineQueue(storage, settings, engine_settings(config))
    return services


def _install_handlers(app: Flask, instance: Path, read_only: bool) -> None:
    """Error pages and JSON errors, security headers, and the read-only refusal."""

    @app.errorhandler(HTTPException)
    def _http_error(exc: HTTPException):
        # Every error is an answer a person can act on; never a bare stack trace.
        message = exc.description or exc.name
        if exc.code == 413:
            limit = app.config["MAX_CONTENT_LENGTH"] // (1024 * 1024)
            message = f"the upload is larger than the limit of {limit} MiB"
        if request.path.startswith("/api/") or request.accept_mimetypes.best == "application/json":
            response = jsonify(error=message)
            response.status_code = exc.code or 500
            return response
        return render_template("error.html", code=exc.code, message=message), exc.code

    @app.errorhandler(Exception)
    def _unexpected(exc: Exception):
        full = _storage_full(exc, instance)
        if full is not None:
            logger.error("%s %s: %s", request.method, request.path, full)
            code, message = 507, full
        else:
            logger.exception("unexpected error on %s %s", request.method, request.path)
            code = 500
            message = f"internal error ({type(exc).__name__}); nothing was changed — see the log"
        if request.path.startswith("/api/"):
            response = jsonify(error=message)
            response.status_code = code
            return response
        return render_template("error.html", code=code, message=message), code

    @app.after_request
    def _security_headers(response):
        # Browsers must not guess content types (a stored CSV served as HTML), and pages run only
        # our own scripts (the one inline script carries the per-response nonce).
        response.headers.setdefault("X-Content-Type-Options", "nosniff")
        if response.mimetype == "text/html":
            response.headers.setdefault("Content-Security-Policy", content_security_policy())
            response.headers.setdefault("Referrer-Policy", "same-origin")
        return response

    @app.before_request
    def _refuse_changes_when_read_only():
        if read_only and request.method in ("POST", "PUT", "PATCH", "DELETE") and (
            request.endpoint != "auth.login"
        ):
            message = "this instance is open read-only (an audit copy); nothing can be changed"
            if request.path.startswith("/api/"):
                response = jsonify(error=message)
                response.status_code = 503
                return response
            return render_template("error.html", code=503, message=message), 503
        return None
