"""Server-rendered web pages: upload, progress, certificates, issue, archive search, verify.

No build step and no framework on the browser side: plain HTML forms (each carrying the session's
CSRF token) and one small script that polls the job API to show live progress.
"""

from __future__ import annotations

import json
from typing import Any

from flask import (
    Blueprint,
    flash,
    g,
    redirect,
    render_template,
    request,
    url_for,
)
from sqlalchemy import func, select

from service import storage as st
from service.archive import ArchiveError, log_event
from service.queue.jobs import job_status
from service.web.api import READERS, accept_uploaded, queue_reproduction, services, verify_and_log
from service.web.auth import (
    ROLES,
    AuthError,
    create_token,
    create_user,
    list_users,
    roles_required,
    update_user,
)
from service.web.upload import UploadError

bp = Blueprint("pages", __name__)


@bp.get("/")
def home():
    if g.user is None:
        return redirect(url_for("auth.login"))
    storage = services().storage
    with storage.read() as conn:
        jobs = conn.execute(
            select(
                st.jobs.c.id,
                st.jobs.c.purpose,
                st.jobs.c.status,
                st.jobs.c.fraction,
                st.jobs.c.step,
                st.jobs.c.run_id,
                st.jobs.c.certificate_id,
                st.jobs.c.created_at,
            )
            .order_by(st.jobs.c.created_at.desc())
            .limit(15)
        ).all()
    drafts = services().archive.search(state="draft", limit=50)
    return render_template("home.html", jobs=jobs, drafts=drafts)


@bp.post("/upload")
@roles_required("operator")
def upload():
    uploads = [(f.filename or "", f.read()) for f in request.files.getlist("files") if f.filename]
    try:
        accepted = accept_uploaded(uploads)
    except UploadError as exc:
        flash("Upload refused — " + exc.as_dict()["error"], "error")
        return redirect(url_for("pages.home")), 303
    return redirect(url_for("pages.run", run_id=accepted.run_id), 303)


@bp.get("/runs/<run_id>")
@roles_required(*READERS)
def run(run_id: str):
    with services().storage.read() as conn:
        row = conn.execute(select(st.runs).where(st.runs.c.id == run_id)).first()
        if row is None:
            return render_template("error.html", code=404, message=f"run {run_id} not found"), 404
        files = services().archive.run_files(conn, run_id)
        job_ids = (
            conn.execute(
                select(st.jobs.c.id)
                .where(st.jobs.c.run_id == run_id)
                .order_by(st.jobs.c.created_at)
            )
            .scalars()
            .all()
        )
    jobs = [job_status(services().storage, j) for j in job_ids]
    return render_template("run.html", run=row, files=files, jobs=jobs)


@bp.get("/jobs/<job_id>")
@roles_required(*READERS)
def job(job_id: str):
    info = job_status(services().storage, job_id)
    if info is None:
        return render_template("error.html", code=404, message=f"job {job_id} not found"), 404
    return render_template("job.html", job=info)


@bp.get("/certificates")
@roles_required(*READERS)
def certificates():
    args = request.args
    state = args.get("state") or None
    if state not in (None, "draft", "issued", "superseded", "withdrawn"):
        state = None
    found = services().archive.search(
        item=args.get("item") or None,
        kind=args.get("kind") or None,
        state=state,
        date_from=args.get("from") or None,
        date_to=args.get("to") or None,
        text=args.get("q") or None,
    )
    return render_template("certificates.html", found=found, args=args)


@bp.get("/certificates/<certificate_id>")
@roles_required(*READERS)
def certificate(certificate_id: str):
    try:
        info = services().archive.get(certificate_id)
    except ArchiveError as exc:
        return render_template("error.html", code=exc.status, message=str(exc)), exc.status
    editable = ["customer", "item", "laboratory", "dates", "conditions", "title", "traceability"]
    current = {k: info["record"].get(k) for k in editable if k in info["record"]}
    return render_template(
        "certificate.html",
        info=info,
        record=info["record"],
        four_eyes_blocked=g.user["username"] == info["submitted_by"],
        corrections_example=json.dumps({"customer": current.get("customer")}, ensure_ascii=False),
    )


def _act(certificate_id: str, action, success: str):
    try:
        action()
    except (ArchiveError, AuthError) as exc:
        flash(str(exc), "error")
    else:
        flash(success, "ok")
    return redirect(url_for("pages.certificate", certificate_id=certificate_id), 303)


def _confirmed(certificate_id: str, what: str) -> bool:
    """Signing and withdrawing cannot be undone: the form's confirmation box must be ticked."""
    if request.form.get("confirm") == "yes":
        return True
    flash(f"Nothing done: tick the box confirming that you {what} {certificate_id}.", "error")
    return False


@bp.post("/certificates/<certificate_id>/issue")
@roles_required("approver")
def issue(certificate_id: str):
    if not _confirmed(certificate_id, "reviewed and authorise the issue of"):
        return redirect(url_for("pages.certificate", certificate_id=certificate_id), 303)
    return _act(
        certificate_id,
        lambda: services().archive.issue(certificate_id, g.user),
        f"{certificate_id} issued and signed.",
    )


@bp.post("/certificates/<certificate_id>/withdraw")
@roles_required("approver")
def withdraw(certificate_id: str):
    if not _confirmed(certificate_id, "withdraw"):
        return redirect(url_for("pages.certificate", certificate_id=certificate_id), 303)
    reason = request.form.get("reason", "")
    return _act(
        certificate_id,
        lambda: services().archive.withdraw(certificate_id, g.user, reason),
        f"{certificate_id} withdrawn.",
    )


@bp.post("/certificates/<certificate_id>/corrections")
@roles_required("operator")
def correct(certificate_id: str):
    """The draft page's form: one text field per missing or corrected administrative value."""
    corrections: dict[str, Any] = {}
    for name, value in request.form.items():
        table, dot, key = name.partition(".")
        if name == "csrf_token" or not value.strip():
            continue
        if dot:
            corrections.setdefault(table, {})[key] = value.strip()
        else:
            corrections[name] = value.strip()
    try:
        missing = services().archive.correct_draft(certificate_id, g.user, corrections)
    except ArchiveError as exc:
        flash(str(exc), "error")
    else:
        flash(
            f"{certificate_id} corrected"
            + (f"; still missing: {', '.join(m['field'] for m in missing)}." if missing else
               "; it states everything a certificate must and can be issued."),
            "ok",
        )
    return redirect(url_for("pages.certificate", certificate_id=certificate_id), 303)


@bp.post("/certificates/<certificate_id>/amend")
@roles_required("operator")
def amend(certificate_id: str):
    try:
        corrections = json.loads(request.form.get("corrections") or "{}")
        if not isinstance(corrections, dict):
            raise ValueError
    except ValueError:
        flash('Corrections must be a JSON object, e.g. {"customer": {"name": "…"}}', "error")
        return redirect(url_for("pages.certificate", certificate_id=certificate_id), 303)
    try:
        new_id = services().archive.amend(
            certificate_id, g.user, request.form.get("reason", ""), corrections
        )
    except ArchiveError as exc:
        flash(str(exc), "error")
        return redirect(url_for("pages.certificate", certificate_id=certificate_id), 303)
    flash(f"Amendment {new_id} drafted; an approver must issue it.", "ok")
    return redirect(url_for("pages.certificate", certificate_id=new_id), 303)


@bp.get("/certificates/<certificate_id>/verify")
@roles_required("auditor", "approver")
def verify(certificate_id: str):
    try:
        report = verify_and_log(certificate_id)
    except ArchiveError as exc:
        return render_template("error.html", code=exc.status, message=str(exc)), exc.status
    return render_template("verify.html", report=report.as_dict())


@bp.post("/certificates/<certificate_id>/reproduce")
@roles_required("auditor", "approver")
def reproduce(certificate_id: str):
    job_id = queue_reproduction(certificate_id)
    return redirect(url_for("pages.job", job_id=job_id), 303)


@bp.get("/audit")
@roles_required("auditor", "admin")
def audit():
    chain_report = None
    if request.args.get("verify") == "all" and "auditor" in g.user["roles"]:
        ok, problems = services().archive.verify_all()
        with services().storage.read() as conn:
            entries = conn.execute(select(func.count()).select_from(st.chain)).scalar()
        chain_report = {"valid": ok, "entries": entries, "problems": [p.detail for p in problems]}
        with services().storage.write() as conn:
            log_event(conn, g.user["username"], "archive.verified", "", {"valid": ok})
    return render_template(
        "audit.html", events=services().archive.events(limit=300), chain_report=chain_report
    )


@bp.route("/users", methods=["GET", "POST"])
@roles_required("admin")
def users():
    """People: add a person, change roles or disable an account, make an API token.

    A refused form comes back with what was typed and the field at fault marked.
    """
    token, error_field, form = None, None, {}
    if request.method == "POST":
        action = request.form.get("action", "add")
        try:
            if action == "token":
                token = create_token(
                    services().storage,
                    request.form.get("username", ""),
                    request.form.get("label", ""),
                    actor=g.user["username"],
                )
                flash("Token created; copy it now, it is not shown again.", "ok")
            elif action == "update":
                username = request.form.get("username", "")
                update_user(
                    services().storage,
                    username,
                    roles=request.form.getlist("roles"),
                    active=request.form.get("active") == "on",
                    actor=g.user["username"],
                )
                flash(f"{username} updated.", "ok")
            else:
                create_user(
                    services().storage,
                    request.form.get("username", "").strip(),
                    request.form.getlist("roles"),
                    password=request.form.get("password") or None,
                    display_name=request.form.get("display_name", ""),
                    actor=g.user["username"],
                )
                flash("User added.", "ok")
        except AuthError as exc:
            flash(f"{exc.field}: {exc}" if exc.field else str(exc), "error")
            error_field = exc.field
            form = {
                "action": action,
                "username": request.form.get("username", ""),
                "display_name": request.form.get("display_name", ""),
                "roles": request.form.getlist("roles"),
            }
    return render_template(
        "users.html",
        users=list_users(services().storage),
        roles=ROLES,
        token=token,
        error_field=error_field,
        form=form,
    ), (400 if error_field else 200)
