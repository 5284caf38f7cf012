"""The customer's check, without an account: is the file I hold authentic, and is it in force?

``/check`` (a page) and ``/api/public/check`` (JSON) take a certificate number and either the
SHA-256 of the file (computed in the browser by the page's script, or by the customer) or the
file itself, which is hashed as it streams in and never stored. The answer is the one of
:func:`service.archive.items.public_check`: authentic or not and, only when authentic, the
state (issued, superseded by which revision, withdrawn and why). Nothing else is revealed.

Each check is throttled per client address by Flask-Limiter (in-memory counters by default;
``RATELIMIT_STORAGE_URI`` names a shared store such as Redis when several server processes
answer). Behind a reverse proxy, name it in ``TRUSTED_PROXY`` so that the client address is the
customer's and not the proxy's. Loading the empty page is not counted.
"""

from __future__ import annotations

import hashlib
from typing import Any

from flask import Blueprint, Flask, current_app, jsonify, render_template, request
from flask_limiter import Limiter
from flask_limiter.util import get_remote_address

from service.archive.items import public_check

bp = Blueprint("public", __name__)

#: Checks per client address (Flask-Limiter's rate-limit string notation).
DEFAULT_LIMIT = "20 per minute;200 per day"
_CHUNK = 1 << 16


def _archive():
    return current_app.extensions["coldcert"].archive


def _file_sha256() -> str | None:
    """SHA-256 of an uploaded file, read in chunks and discarded (never stored)."""
    upload = request.files.get("file")
    if upload is None or not upload.filename:
        return None
    digest = hashlib.sha256()
    while True:
        chunk = upload.stream.read(_CHUNK)
        if not chunk:
            break
        digest.update(chunk)
    return digest.hexdigest()


def _question() -> tuple[str, str]:
    certificate_id = (request.values.get("id") or "").strip()
    sha256 = _file_sha256() or (request.values.get("sha256") or "").strip().lower()
    return certificate_id, sha256


def _asked() -> bool:
    """A check was asked for (a number alone, as in the PDF's QR link, only fills the form)."""
    upload = request.files.get("file")
    return bool(request.values.get("sha256") or (upload is not None and upload.filename))


@bp.route("/check", methods=["GET", "POST"])
def check_page():
    uploaded = bool(request.files.get("file") and request.files["file"].filename)
    certificate_id, sha256 = _question()
    answer: dict[str, Any] | None = None
    problem = None
    if _asked():
        try:
            answer = public_check(_archive(), certificate_id, sha256)
        except ValueError as exc:
            problem = str(exc)
    return render_template(
        "check.html",
        answer=answer,
        problem=problem,
        certificate_id=certificate_id,
        sha256=sha256,
        fingerprint_by="the server (the file was not kept)" if uploaded else "you or your browser",
    )


@bp.route("/api/public/check", methods=["GET", "POST"])
def check_api():
    certificate_id, sha256 = _question()
    if not _asked():
        response = jsonify(
            error="give the certificate number (id) and sha256, or the file", field="sha256"
        )
        response.status_code = 400
        return response
    try:
        return jsonify(public_check(_archive(), certificate_id, sha256))
    except ValueError as exc:
        field = "sha256" if "SHA-256" in str(exc) else "id"
        response = jsonify(error=str(exc), field=field)
        response.status_code = 400
        return response


def init_app(app: Flask) -> Limiter:
    """Register the blueprint and throttle its two routes with a limiter of this app's own."""
    app.config.setdefault("PUBLIC_CHECK_LIMIT", DEFAULT_LIMIT)
    app.config.setdefault("RATELIMIT_STORAGE_URI", "memory://")
    app.config.setdefault("RATELIMIT_HEADERS_ENABLED", True)
    app.register_blueprint(bp)
    limiter = Limiter(get_remote_address, app=app, default_limits=[])
    # One budget for the page and the API together.
    limit = limiter.shared_limit(
        lambda: current_app.config["PUBLIC_CHECK_LIMIT"],
        scope="public-check",
        exempt_when=lambda: not _asked(),
        error_message="too many checks from your address; wait a minute and try again",
    )
    for endpoint in ("public.check_page", "public.check_api"):
        app.view_functions[endpoint] = limit(app.view_functions[endpoint])
    app.extensions["coldcert_limiter"] = limiter
    return limiter
