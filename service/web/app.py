"""The Flask application factory: one service instance = one instance folder.

The instance folder holds everything the service owns: the SQLite database (WAL mode), the blob
folder of raw files, the lab's signing key and the session secret. It is created on first start.
A PostgreSQL (or other SQLAlchemy) URL in ``DATABASE_URL`` replaces the SQLite file; nothing else
changes.
"""

from __future__ import annotations

import atexit
import logging
import os
import secrets
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from flask import Flask, jsonify, render_template, request
from werkzeug.exceptions import HTTPException

from service.archive import Archive, LabKey
from service.queue.jobs import WorkerPool, WorkerSettings
from service.storage import Storage, default_database_url

logger = logging.getLogger(__name__)

DEFAULTS: dict[str, Any] = {
    # Largest accepted request (a whole zipped run folder); Flask answers 413 above it.
    "MAX_CONTENT_LENGTH": 64 * 1024 * 1024,
    # Largest total unpacked size of an uploaded archive (guards against zip bombs).
    "MAX_RUN_BYTES": 256 * 1024 * 1024,
    "MAX_RUN_FILES": 500,
    "DATABASE_URL": None,
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
    # The laboratory's copy of the DCC 3.3.0 dcc.xsd; when set (here or by COLDCERT_DCC_SCHEMA),
    # every DCC rendering is validated against it before it is served.
    "DCC_SCHEMA": None,
    "SESSION_COOKIE_HTTPONLY": True,
    "SESSION_COOKIE_SAMESITE": "Lax",
}


@dataclass
class Services:
    """What the blueprints need, kept on ``app.extensions["coldcert"]``."""

    storage: Storage
    archive: Archive
    key: LabKey
    worker_settings: WorkerSettings
    pool: WorkerPool | None = None

    def start_workers(self, processes: int) -> WorkerPool:
        if self.pool is None:
            self.pool = WorkerPool(self.worker_settings, processes)
            self.pool.start()
        return self.pool

    def stop_workers(self) -> None:
        if self.pool is not None:
            self.pool.stop()
            self.pool = None


def _secret_key(instance: Path) -> str:
    path = instance / "session_secret"
    if not path.exists():
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
        with os.fdopen(fd, "w") as handle:
            handle.write(secrets.token_hex(32))
    return path.read_text().strip()


def create_app(config: Mapping[str, Any] | None = None) -> Flask:
    """Build the service. ``config`` overrides ``DEFAULTS`` and ``instance/config.py``.

    Set ``INSTANCE_PATH`` to choose the instance folder (tests use a temporary one) and
    ``START_WORKERS`` to start the background worker processes with the app.
    """
    config = dict(config or {})
    instance_path = config.pop("INSTANCE_PATH", None) or os.environ.get("COLDCERT_INSTANCE")
    app = Flask(
        __name__,
        instance_path=str(Path(instance_path).resolve()) if instance_path else None,
        instance_relative_config=True,
    )
    app.config.from_mapping(DEFAULTS)
    app.config.from_pyfile("config.py", silent=True)
    app.config.update(config)
    instance = Path(app.instance_path)
    instance.mkdir(parents=True, exist_ok=True)
    if not app.config.get("SECRET_KEY"):
        app.config["SECRET_KEY"] = _secret_key(instance)

    database_url = app.config["DATABASE_URL"] or default_database_url(instance)
    storage = Storage(database_url, instance / "blobs")
    storage.create_schema()
    key = LabKey.load_or_create(instance / "keys")
    try:
        trusted = [bytes.fromhex(h) for h in app.config.get("TRUSTED_PUBLIC_KEYS", ())]
    except ValueError:
        raise ValueError("TRUSTED_PUBLIC_KEYS must list Ed25519 public keys as hex") from None
    archive = Archive(
        storage,
        key,
        number_prefix=app.config["CERTIFICATE_PREFIX"],
        trusted_public_keys=trusted,
    )
    settings = WorkerSettings(
        database_url=database_url,
        blob_root=str(instance / "blobs"),
        key_dir=str(instance / "keys"),
        certify=app.config["CERTIFY"],
        load_run=app.config["LOAD_RUN"],
        number_prefix=app.config["CERTIFICATE_PREFIX"],
        options=dict(app.config["ANALYSIS_OPTIONS"]),
    )
    services = Services(storage, archive, key, settings)
    app.extensions["coldcert"] = services

    from service.web import api, auth, pages

    app.register_blueprint(auth.bp)
    app.register_blueprint(api.bp)
    app.register_blueprint(pages.bp)

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
        logger.exception("unexpected error on %s %s", request.method, request.path)
        message = f"internal error ({type(exc).__name__}); nothing was changed — see the log"
        if request.path.startswith("/api/"):
            response = jsonify(error=message)
            response.status_code = 500
            return response
        return render_template("error.html", code=500, message=message), 500

    if app.config["START_WORKERS"]:
        services.start_workers(app.config["WORKERS"])
        atexit.register(services.stop_workers)
    return app
