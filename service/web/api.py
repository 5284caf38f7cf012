"""The JSON API (``/api/...``). Every route names the roles it admits; the OpenAPI document in
``service/web/openapi.py`` describes the same routes and a test walks all of them."""

from __future__ import annotations

import json
import logging
import mimetypes
import os
from pathlib import Path
from typing import Any

from flask import Blueprint, Response, current_app, g, jsonify, request, url_for
from sqlalchemy import select

from service import storage as st
from service.archive import ArchiveError, canonical_json, log_event
from service.archive.items import record_rendering
from service.queue.jobs import RetryRefused, enqueue, import_string, job_status, retry
from service.storage import sha256_hex
from service.web.auth import (
    AuthError,
    TokenAlreadyRevoked,
    TokenNotFound,
    create_token_entry,
    create_user,
    list_tokens,
    list_users,
    revoke_token,
    roles_required,
    update_user,
)
from service.web.openapi import openapi_document
from service.web.upload import UploadError, accept_run, parse_seed

bp = Blueprint("api", __name__, url_prefix="/api")
logger = logging.getLogger(__name__)

READERS = ("operator", "approver", "auditor")
AUDIT = ("auditor", "approver")
RENDERINGS = {
    "json": "application/json",
    "signed": "application/json",
    "html": "text/html; charset=utf-8",
    "pdf": "application/pdf",
    "xml": "application/xml",
}


def services():
    return current_app.extensions["coldcert"]


def error(status: int, message: str, **extra: Any) -> Response:
    response = jsonify(error=message, **extra)
    response.status_code = status
    return response


@bp.errorhandler(UploadError)
def _upload_error(exc: UploadError):
    response = jsonify(exc.as_dict())
    response.status_code = exc.status
    return response


@bp.errorhandler(ArchiveError)
def _archive_error(exc: ArchiveError):
    return error(exc.status, str(exc))


@bp.errorhandler(AuthError)
def _auth_error(exc: AuthError):
    return error(400, str(exc))


def _json_body() -> dict[str, Any]:
    body = request.get_json(silent=True)
    if body is None:
        if request.form:
            return request.form.to_dict()
        return {}
    if not isinstance(body, dict):
        raise UploadError("the request body must be a JSON object")
    return body


# ---- open routes ------------------------------------------------------------------------------


@bp.get("/health")
def health():
    """Database reachable; the job queue's depth and the analysis workers seen."""
    with services().storage.read() as conn:
        conn.execute(select(1))
    queue = services().queue_health()
    status = "ok" if queue.get("broker_ok", True) else "degraded"
    return jsonify(status=status, queue=queue)


@bp.get("/openapi.json")
def openapi():
    return jsonify(openapi_document())


@bp.get("/public-key")
def public_key():
    """The lab's Ed25519 public key, published so anyone can check a signed certificate."""
    return jsonify(services().key.public_info())


# ---- runs and jobs ----------------------------------------------------------------------------


def accept_uploaded(uploads: list[tuple[str, bytes]]):
    """Validate and store the files of the current request as a run (API and web form alike)."""
    accepted = accept_run(
        services().storage,
        services().archive,
        import_string(current_app.config["LOAD_RUN"]),
        uploads,
        g.user,
        seed=parse_seed(request.form.get("seed")),
        replaces=request.form.get("replaces") or None,
        reason=request.form.get("reason"),
        max_bytes=current_app.config["MAX_RUN_BYTES"],
        max_files=current_app.config["MAX_RUN_FILES"],
    )
    services().submit(accepted.job_id)
    return accepted


@bp.post("/runs")
@roles_required("operator")
def upload_run():
    uploads = [(f.filename or "", f.read()) for f in request.files.getlist("files")]
    uploads += [(f.filename or "", f.read()) for f in request.files.getlist("archive")]
    accepted = accept_uploaded(uploads)
    response = jsonify(
        run_id=accepted.run_id,
        job_id=accepted.job_id,
        kind=accepted.kind,
        item=accepted.item,
        seed=accepted.seed,
        files=accepted.files,
        ignored=accepted.ignored,
        job_url=url_for("api.get_job", job_id=accepted.job_id),
    )
    response.status_code = 202
    response.headers["Location"] = url_for("api.get_job", job_id=accepted.job_id)
    return response


@bp.get("/runs/<run_id>")
@roles_required(*READERS)
def get_run(run_id: str):
    storage = services().storage
    with storage.read() as conn:
        row = conn.execute(select(st.runs).where(st.runs.c.id == run_id)).first()
        if row is None:
            return error(404, f"run {run_id} not found")
        files = services().archive.run_files(conn, run_id)
        job_rows = conn.execute(
            select(st.jobs.c.id, st.jobs.c.purpose, st.jobs.c.status, st.jobs.c.certificate_id)
            .where(st.jobs.c.run_id == run_id)
            .order_by(st.jobs.c.created_at)
        ).all()
    info = dict(row._mapping)
    info["manifest"] = json.loads(info.pop("manifest_json"))
    info["files"] = files
    info["jobs"] = [dict(j._mapping) for j in job_rows]
    return jsonify(info)


@bp.post("/jobs/<job_id>/retry")
@roles_required("operator", "approver")
def retry_job(job_id: str):
    """Queue a failed job again (bounded; see queue.jobs.MAX_RETRIES)."""
    try:
        result = retry(services().storage, job_id, g.user)
    except RetryRefused as exc:
        return error(exc.status, str(exc))
    response = jsonify(**result, job_url=url_for("api.get_job", job_id=job_id))
    response.status_code = 202
    return response


@bp.get("/jobs/<job_id>")
@roles_required(*READERS)
def get_job(job_id: str):
    info = job_status(services().storage, job_id)
    if info is None:
        return error(404, f"job {job_id} not found")
    if info.get("certificate_id"):
        info["certificate_url"] = url_for(
            "api.get_certificate", certificate_id=info["certificate_id"]
        )
    return jsonify(info)


# ---- certificates -----------------------------------------------------------------------------


@bp.get("/certificates")
@roles_required(*READERS)
def search_certificates():
    args = request.args
    limit = args.get("limit", "200")
    if not limit.isdigit() or not 1 <= int(limit) <= 1000:
        return error(400, "limit must be a whole number from 1 to 1000", field="limit")
    state = args.get("state") or None
    if state and state not in ("draft", "issued", "superseded", "withdrawn"):
        return error(400, "state must be draft, issued, superseded or withdrawn", field="state")
    found = services().archive.search(
        item=args.get("item") or None,
        kind=args.get("kind") or None,
        state=state,
        date_from=args.get("from") or None,
        date_to=args.get("to") or None,
        text=args.get("q") or None,
        limit=int(limit),
    )
    return jsonify(certificates=found, count=len(found))


@bp.get("/certificates/<certificate_id>")
@roles_required(*READERS)
def get_certificate(certificate_id: str):
    return jsonify(services().archive.get(certificate_id))


def seal_of(info: dict[str, Any]) -> dict[str, Any] | None:
    """The signature details an issued certificate's renderings show (None for a draft)."""
    if info.get("sequence") is None:
        return None
    return {
        "sequence": info["sequence"],
        "sha256": info["sha256"],
        "key_id": info.get("key_id") or services().key.key_id,
        "public_key_url": url_for("api.public_key", _external=True),
    }


def _cached_pdf(
    record: dict[str, Any],
    plots_sha256: str | None,
    check: dict[str, str] | None = None,
    seal: dict[str, Any] | None = None,
) -> bytes:
    """PDF of a record; laying out the plots takes seconds, so identical requests reuse it.

    The PDF is a pure function of the record, the plots and the check block (reportlab's
    invariant mode). The cache is keyed by the SHA-256 of those inputs and each file is named
    with the SHA-256 of its own bytes as well, checked on every read: a damaged or swapped file
    is laid out again, never served (``KEY-PDFSHA256.pdf``).
    """
    from service.render.pdf import RENDERER_VERSION, render_pdf

    key = sha256_hex(
        canonical_json(
            {"record": record, "plots": plots_sha256, "renderer": RENDERER_VERSION,
             "check": check, "seal": seal}
        )
    )
    folder = Path(current_app.instance_path) / "cache" / "pdf"
    for path in sorted(folder.glob(f"{key}-*.pdf")):
        data = path.read_bytes()
        if path.stem == f"{key}-{sha256_hex(data)}":
            return data
        logger.warning("PDF cache file %s does not match its name; laying out again", path.name)
        path.unlink(missing_ok=True)
    pdf = render_pdf(record, services().archive.plots(plots_sha256), check=check, seal=seal)
    path = folder / f"{key}-{sha256_hex(pdf)}.pdf"
    folder.mkdir(parents=True, exist_ok=True)
    tmp = path.with_suffix(f".{os.getpid()}.tmp")
    tmp.write_bytes(pdf)
    os.replace(tmp, path)
    return pdf


def check_block(info: dict[str, Any]) -> dict[str, str] | None:
    """What an issued certificate's PDF says about checking it: its number, the SHA-256 of its
    signed record, and the public page where a customer checks the file they hold."""
    if info.get("sequence") is None or not info.get("sha256"):
        return None
    base = current_app.config.get("PUBLIC_CHECK_URL") or url_for(
        "public.check_page", _external=True
    )
    return {
        "certificate_id": info["id"],
        "signed_record_sha256": info["sha256"],
        "url": f"{base}?id={info['id']}",
    }


def render(info: dict[str, Any], fmt: str) -> tuple[bytes | str, str]:
    """A rendering of a certificate: (content, media type)."""
    record = info["record"]
    if fmt == "json":
        return json.dumps(record, sort_keys=True, indent=2, ensure_ascii=False), RENDERINGS[fmt]
    if fmt == "signed":
        document = services().archive.signed_entry(info["id"])
        return json.dumps(document, sort_keys=True, indent=2, ensure_ascii=False), RENDERINGS[fmt]
    if fmt == "html":
        from service.render.html import render_html

        plots = services().archive.plots(info.get("plots_sha256"))
        return render_html(record, plots, seal_of(info)), RENDERINGS[fmt]
    if fmt == "pdf":
        return _cached_pdf(
            record, info.get("plots_sha256"), check_block(info), seal_of(info)
        ), RENDERINGS[fmt]
    if fmt == "xml":
        from service.render.dcc import configured_schema, render_dcc, validate_dcc

        document = render_dcc(record)
        schema = configured_schema(current_app.config.get("DCC_SCHEMA"))
        if schema is not None:
            validate_dcc(document, schema)
        return document, RENDERINGS[fmt]
    raise ArchiveError(f"unknown format {fmt!r}; choose {', '.join(RENDERINGS)}", 404)


@bp.get("/certificates/<certificate_id>/<fmt>")
@roles_required(*READERS)
def get_rendering(certificate_id: str, fmt: str):
    if fmt not in RENDERINGS:
        return error(404, f"unknown format {fmt!r}; choose {', '.join(RENDERINGS)}")
    info = services().archive.get(certificate_id)
    try:
        content, media = render(info, fmt)
    except ValueError as exc:
        return error(409, str(exc))
    if info.get("sequence") is not None and not current_app.config.get("READ_ONLY"):
        # A file of an issued certificate leaves the service: note its SHA-256, so that the
        # customer holding it can later check it on the public page (not from an auditor's
        # read-only copy, which writes nothing).
        data = content.encode("utf-8") if isinstance(content, str) else content
        record_rendering(services().archive, certificate_id, fmt, sha256_hex(data))
    response = Response(content, mimetype=media.split(";")[0])
    response.headers["Content-Type"] = media
    extension = "json" if fmt == "signed" else fmt
    suffix = "-signed" if fmt == "signed" else ""
    response.headers["Content-Disposition"] = (
        f"{'inline' if fmt == 'html' else 'attachment'}; "
        f'filename="{certificate_id}{suffix}.{extension}"'
    )
    return response


@bp.get("/certificates/<certificate_id>/files/<name>")
@roles_required(*READERS)
def get_output_file(certificate_id: str, name: str):
    """An output file of the analysis kept with the certificate (e.g. calibration_table.csv)."""
    info = services().archive.get(certificate_id)
    entry = info["extra_files"].get(name)
    if entry is None:
        names = ", ".join(sorted(info["extra_files"])) or "none"
        return error(404, f"{certificate_id} has no output file {name!r} (it has: {names})")
    data = services().archive.checked_blob(entry["sha256"], f"output file {name} of {certificate_id}")
    media = mimetypes.guess_type(name)[0] or "application/octet-stream"
    response = Response(data, mimetype=media)
    response.headers["Content-Disposition"] = f'attachment; filename="{certificate_id}-{name}"'
    return response


@bp.post("/certificates/<certificate_id>/issue")
@roles_required("approver")
def issue_certificate(certificate_id: str):
    return jsonify(services().archive.issue(certificate_id, g.user))


@bp.post("/certificates/<certificate_id>/withdraw")
@roles_required("approver")
def withdraw_certificate(certificate_id: str):
    body = _json_body()
    return jsonify(services().archive.withdraw(certificate_id, g.user, body.get("reason", "")))


def _corrections(body: dict[str, Any]) -> dict[str, Any] | None:
    """The ``corrections`` object of a request body (a JSON object or its text), else None."""
    corrections = body.get("corrections") or {}
    if isinstance(corrections, str):
        try:
            corrections = json.loads(corrections)
        except ValueError:
            return None
    return corrections if isinstance(corrections, dict) else None


@bp.post("/certificates/<certificate_id>/corrections")
@roles_required("operator")
def correct_draft(certificate_id: str):
    corrections = _corrections(_json_body())
    if corrections is None:
        return error(400, "corrections must be a JSON object", field="corrections")
    missing = services().archive.correct_draft(certificate_id, g.user, corrections)
    return jsonify(certificate_id=certificate_id, missing=missing)


@bp.post("/certificates/<certificate_id>/amend")
@roles_required("operator")
def amend_certificate(certificate_id: str):
    body = _json_body()
    corrections = _corrections(body)
    if corrections is None:
        return error(400, "corrections must be a JSON object", field="corrections")
    new_id = services().archive.amend(certificate_id, g.user, body.get("reason", ""), corrections)
    response = jsonify(
        certificate_id=new_id,
        replaces=certificate_id,
        url=url_for("api.get_certificate", certificate_id=new_id),
    )
    response.status_code = 201
    return response


def verify_and_log(certificate_id: str):
    """Verify one certificate and record who did it (API and web page alike)."""
    report = services().archive.verify(certificate_id)
    if not services().storage.read_only:  # a read-only audit copy cannot log; it only reports
        with services().storage.write() as conn:
            log_event(conn, g.user["username"], "certificate.verified", certificate_id,
                      {"valid": report.valid})
    return report


def queue_reproduction(certificate_id: str) -> str:
    """Queue a re-analysis of an archived certificate from its raw data; returns the job id."""
    info = services().archive.get(certificate_id)
    with services().storage.write() as conn:
        job_id = enqueue(conn, purpose="reproduce", run_id=info["run_id"], requested_by=g.user,
                         certificate_id=certificate_id)
    services().submit(job_id)
    return job_id


@bp.get("/certificates/<certificate_id>/verify")
@roles_required(*AUDIT)
def verify_certificate(certificate_id: str):
    return jsonify(verify_and_log(certificate_id).as_dict())


@bp.post("/certificates/<certificate_id>/reproduce")
@roles_required(*AUDIT)
def reproduce_certificate(certificate_id: str):
    job_id = queue_reproduction(certificate_id)
    response = jsonify(job_id=job_id, job_url=url_for("api.get_job", job_id=job_id))
    response.status_code = 202
    return response


@bp.get("/archive/verify")
@roles_required("auditor")
def verify_archive():
    ok, problems = services().archive.verify_all()
    with services().storage.read() as conn:
        entries = conn.execute(select(st.chain.c.sequence)).all()
    return jsonify(valid=ok, entries=len(entries), problems=[p.detail for p in problems])


@bp.get("/events")
@roles_required("auditor", "admin")
def events():
    return jsonify(events=services().archive.events(subject=request.args.get("subject") or None))


# ---- people -----------------------------------------------------------------------------------


@bp.get("/users")
@roles_required("admin")
def get_users():
    return jsonify(users=list_users(services().storage))


@bp.post("/users")
@roles_required("admin")
def post_user():
    body = _json_body()
    user = create_user(
        services().storage,
        body.get("username", ""),
        body.get("roles", ""),
        password=body.get("password") or None,
        display_name=body.get("display_name", ""),
        actor=g.user["username"],
    )
    response = jsonify(user)
    response.status_code = 201
    return response


@bp.patch("/users/<username>")
@roles_required("admin")
def patch_user(username: str):
    body = _json_body()
    user = update_user(
        services().storage,
        username,
        roles=body.get("roles"),
        active=body.get("active"),
        password=body.get("password"),
        actor=g.user["username"],
    )
    return jsonify(user)


@bp.post("/users/<username>/tokens")
@roles_required("admin")
def post_token(username: str):
    body = _json_body()
    token_id, token = create_token_entry(
        services().storage, username, str(body.get("label", "")), actor=g.user["username"]
    )
    response = jsonify(
        username=username, token=token, token_id=token_id, note="shown once; store it safely"
    )
    response.status_code = 201
    return response


@bp.get("/users/<username>/tokens")
@roles_required("admin")
def get_tokens(username: str):
    return jsonify(username=username, tokens=list_tokens(services().storage, username))


@bp.post("/users/<username>/tokens/<int:token_id>/revoke")
@roles_required("admin")
def revoke(username: str, token_id: int):
    try:
        return jsonify(revoke_token(services().storage, username, token_id, g.user["username"]))
    except TokenNotFound as exc:
        return error(404, str(exc))
    except TokenAlreadyRevoked as exc:
        return error(409, str(exc))
