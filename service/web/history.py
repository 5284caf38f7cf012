"""Pages and API routes about items: history, items due, impact of a change, bulk reproduction.

Readers (operator, approver, auditor) see histories and due dates; the impact search and bulk
reproduction are for auditors and approvers, like single verification and reproduction. The
laboratory's recall policy is the ``RECALL_POLICY`` setting (see docs/history.md).
"""

from __future__ import annotations

import json
import os
from datetime import date
from pathlib import Path
from typing import Any

from flask import (
    Blueprint,
    Response,
    current_app,
    flash,
    jsonify,
    redirect,
    render_template,
    request,
    url_for,
)

from service.archive import ArchiveError, NotFound, canonical_json
from service.archive.history import (
    HistoryInputError,
    build_history,
    checked_policy,
    public_history,
)
from service.archive.items import (
    impact,
    item_entries,
    recall_overview,
    result_movements,
)
from service.queue.jobs import job_status
from service.render.history_pdf import render_history_pdf
from service.render.history_plots import history_plots
from service.storage import sha256_hex
from service.web.api import AUDIT, READERS, error, queue_reproduction, services
from service.web.auth import roles_required

bp = Blueprint("history", __name__)

RECALL_STATUSES = ("overdue", "due", "in date")


def _policy() -> dict[str, Any]:
    return checked_policy(current_app.config.get("RECALL_POLICY"))


@bp.errorhandler(HistoryInputError)
def _policy_error(exc: HistoryInputError):
    # A setting of the laboratory's (or an unreadable record): say which, never a bare 500.
    if request.path.startswith("/api/"):
        return error(500, str(exc))
    return render_template("error.html", code=500, message=str(exc)), 500


def _history(item: str) -> dict[str, Any]:
    return build_history(
        item, item_entries(services().archive, item), policy=_policy(), today=date.today()
    )


def _cached(history: dict[str, Any], kind: str, make):
    """Plots or PDF of a history, kept in the instance's cache folder: both are pure functions
    of the history's data (which includes today's date), so a key of its digest never serves a
    stale figure. Safe to delete, like the certificate PDF cache."""
    try:
        key = sha256_hex(canonical_json({"history": public_history(history), "kind": kind}))
    except ValueError:  # a value JSON cannot hold: compute without the cache
        return make()
    path = Path(current_app.instance_path) / "cache" / "history" / f"{key}.{kind}"
    if path.is_file():
        data = path.read_bytes()
        return json.loads(data) if kind == "plots" else data
    value = make()
    data = canonical_json(value) if kind == "plots" else value
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_suffix(f".{os.getpid()}.tmp")
    tmp.write_bytes(data)
    os.replace(tmp, path)
    return value


def _plots(history: dict[str, Any]) -> dict[str, str]:
    return _cached(history, "plots", lambda: history_plots(history))


def _fraction(text: str | None) -> float:
    try:
        value = float(text) if text not in (None, "") else 0.1
    except ValueError:
        raise ValueError("fraction must be a number, e.g. 0.1 for a tenth of U") from None
    if not 0 < value <= 10:
        raise ValueError("fraction must lie between 0 and 10 (a multiple of U)")
    return value


# ---- API -------------------------------------------------------------------------------------


@bp.get("/api/items/<path:item>/history")
@roles_required(*READERS)
def api_history(item: str):
    try:
        return jsonify(public_history(_history(item)))
    except NotFound as exc:
        return error(404, str(exc))
    except HistoryInputError as exc:
        return error(409, str(exc))


@bp.get("/api/items/<path:item>/history.pdf")
@roles_required(*READERS)
def api_history_pdf(item: str):
    try:
        history = _history(item)
    except NotFound as exc:
        return error(404, str(exc))
    pdf = _cached(history, "pdf", lambda: render_history_pdf(history, _plots(history)))
    response = Response(pdf, mimetype="application/pdf")
    safe = "".join(ch if ch.isalnum() or ch in "-_." else "_" for ch in item)
    response.headers["Content-Disposition"] = f'attachment; filename="history-{safe}.pdf"'
    return response


@bp.get("/api/items/due")
@roles_required(*READERS)
def api_due():
    status = request.args.get("status") or None
    if status and status not in RECALL_STATUSES:
        return error(400, f"status must be one of {', '.join(RECALL_STATUSES)}", field="status")
    rows = recall_overview(services().archive, _policy(), date.today())
    if status:
        rows = [r for r in rows if r["status"] == status]
    return jsonify(items=rows, count=len(rows), today=date.today().isoformat())


def _impact_query(args) -> dict[str, Any]:
    return {
        "software": args.get("software") or None,
        "model": args.get("model") or None,
        "date_from": args.get("from") or None,
        "date_to": args.get("to") or None,
        "in_force_only": args.get("in_force") in ("1", "true", "on"),
    }


@bp.get("/api/impact")
@roles_required(*AUDIT)
def api_impact():
    try:
        found = impact(services().archive, **_impact_query(request.args))
    except ValueError as exc:
        return error(400, str(exc))
    return jsonify(certificates=found, count=len(found))


def _queue_many(ids: list[str]) -> list[dict[str, str]]:
    jobs = []
    for cid in ids:
        info = services().archive.get(cid)
        if info["state"] not in ("issued", "superseded", "withdrawn"):
            raise ArchiveError(
                f"{cid} is a {info['state']}; only issued certificates are reproduced"
            )
        jobs.append({"certificate_id": cid, "job_id": queue_reproduction(cid)})
    return jobs


@bp.post("/api/impact/reproduce")
@roles_required(*AUDIT)
def api_bulk_reproduce():
    body = request.get_json(silent=True) or {}
    ids = body.get("certificate_ids") if isinstance(body, dict) else None
    if not isinstance(ids, list) or not ids or not all(isinstance(i, str) for i in ids):
        return error(
            400,
            "certificate_ids must be a non-empty list of certificate numbers",
            field="certificate_ids",
        )
    if len(ids) > 500:
        return error(400, "at most 500 certificates per request", field="certificate_ids")
    try:
        fraction = _fraction(str(body.get("fraction", "0.1")))
        jobs = _queue_many(list(dict.fromkeys(ids)))
    except ValueError as exc:
        return error(400, str(exc), field="fraction")
    except ArchiveError as exc:
        return error(exc.status, str(exc))
    report = url_for(
        "history.api_bulk_report", jobs=",".join(j["job_id"] for j in jobs), fraction=fraction
    )
    response = jsonify(jobs=jobs, fraction=fraction, report_url=report)
    response.status_code = 202
    return response


def bulk_report(job_ids: list[str], fraction: float) -> dict[str, Any]:
    """Status of each reproduction and, once done, the results that moved by > fraction × U."""
    rows = []
    for job_id in job_ids:
        info = job_status(services().storage, job_id)
        if info is None or info.get("purpose") != "reproduce":
            rows.append({"job_id": job_id, "status": "unknown"})
            continue
        row: dict[str, Any] = {
            "job_id": job_id,
            "certificate_id": info.get("certificate_id"),
            "status": info["status"],
            "error": info.get("error"),
        }
        report = info.get("result")
        if info["status"] == "done" and isinstance(report, dict):
            record = services().archive.get(info["certificate_id"])["record"]
            moved = result_movements(record, report, fraction)
            row.update(
                identical=report.get("identical"),
                same_software=report.get("same_software"),
                other_mismatches=sum(
                    1
                    for m in report.get("mismatches") or []
                    if not str(m.get("path", "")).startswith("results[")
                ),
                moved=moved,
                moved_beyond_fraction=[m for m in moved if m["exceeds"]],
            )
        rows.append(row)
    finished = all(r["status"] in ("done", "failed", "unknown") for r in rows)
    return {
        "fraction_of_U": fraction,
        "finished": finished,
        "jobs": rows,
        "certificates_with_moves": sorted(
            r["certificate_id"] for r in rows if r.get("moved_beyond_fraction")
        ),
    }


@bp.get("/api/impact/reproduce")
@roles_required(*AUDIT)
def api_bulk_report():
    ids = [j for j in (request.args.get("jobs") or "").split(",") if j]
    try:
        fraction = _fraction(request.args.get("fraction"))
    except ValueError as exc:
        return error(400, str(exc), field="fraction")
    return jsonify(bulk_report(ids, fraction))


# ---- pages -----------------------------------------------------------------------------------


@bp.get("/items/<path:item>")
@roles_required(*READERS)
def item_page(item: str):
    try:
        history = _history(item)
    except NotFound as exc:
        return render_template("error.html", code=404, message=str(exc)), 404
    return render_template("item_history.html", h=history, plots=_plots(history))


@bp.get("/due")
@roles_required(*READERS)
def due_page():
    rows = recall_overview(services().archive, _policy(), date.today())
    return render_template("due.html", rows=rows, today=date.today().isoformat())


@bp.route("/impact", methods=["GET", "POST"])
@roles_required(*AUDIT)
def impact_page():
    if request.method == "POST":
        ids = request.form.getlist("certificate_id")
        try:
            fraction = _fraction(request.form.get("fraction"))
            jobs = _queue_many(ids) if ids else []
        except (ValueError, ArchiveError) as exc:
            flash(str(exc), "error")
            return redirect(url_for("history.impact_page"), 303)
        if not jobs:
            flash("select at least one certificate to reproduce", "error")
            return redirect(url_for("history.impact_page"), 303)
        return redirect(
            url_for(
                "history.bulk_page", jobs=",".join(j["job_id"] for j in jobs), fraction=fraction
            ),
            303,
        )
    query = _impact_query(request.args)
    found, problem = None, None
    if any(v for k, v in query.items() if k != "in_force_only"):
        try:
            found = impact(services().archive, **query)
        except ValueError as exc:
            problem = str(exc)
    return render_template("impact.html", found=found, problem=problem, args=request.args)


@bp.get("/impact/reproduce")
@roles_required(*AUDIT)
def bulk_page():
    ids = [j for j in (request.args.get("jobs") or "").split(",") if j]
    try:
        fraction = _fraction(request.args.get("fraction"))
    except ValueError as exc:
        return render_template("error.html", code=400, message=str(exc)), 400
    return render_template("bulk_reproduce.html", report=bulk_report(ids, fraction))
