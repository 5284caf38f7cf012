"""Reading the archive: one certificate (from its signed entry once issued), its signed
document for offline checking, search, and the event log."""

from __future__ import annotations

import json
from typing import Any

from sqlalchemy import Connection, and_, func, or_, select

from service import storage as st
from service.archive.errors import ArchiveError, IntegrityError
from service.archive.keys import KeyRing
from service.archive.signed import signed_issue, signed_lifecycle, signed_view
from service.archive.stored import certificate_row, run_files, user_row
from service.render.dcc import missing_for_issue
from service.storage import Storage


def certificate_info(storage: Storage, keys: KeyRing, certificate_id: str) -> dict[str, Any]:
    """Certificate metadata plus its record; once issued, everything from the signed entry."""
    with storage.read() as conn:
        row = certificate_row(conn, certificate_id)
        info = _row_info(conn, row)
        record = json.loads(info.pop("record_json"))
        if row.sequence is not None:
            chain_row, entry = signed_issue(conn, keys, row)
            body = entry["body"]
            record = body["certificate"]
            info.update(signed_view(body))
            info.update(signed_lifecycle(conn, keys, row))
            info["sha256"] = chain_row.sha256
            info["previous_sha256"] = chain_row.previous_sha256
            info["signature"] = chain_row.signature
            info["key_id"] = chain_row.key_id
        elif conn.execute(
            select(st.chain.c.sequence).where(st.chain.c.certificate_id == certificate_id)
        ).first() is not None:
            raise IntegrityError(
                f"{certificate_id}: the database calls it a {row.state}, but the signed chain "
                "holds entries for it"
            )
    # The lifecycle state may have moved on since signing (superseded, withdrawn).
    record = dict(record)
    record["state"] = info["state"]
    if info["state"] == "superseded":
        record["superseded_by"] = info["superseded_by"]
    if info["state"] == "withdrawn":
        record["withdrawn_reason"] = info["withdrawn_reason"]
    info["record"] = record
    info["missing"] = missing_for_issue(record) if info["state"] == "draft" else []
    return info


def _row_info(conn: Connection, row) -> dict[str, Any]:
    """A certificate row as the database holds it, JSON columns parsed, users by name."""
    info = dict(row._mapping)
    info["software"] = json.loads(info.pop("software_json"))
    info["options"] = json.loads(info.pop("options_json"))
    info["extra_files"] = json.loads(info.pop("extras_json"))
    # The queue's link to the job that drafted it is for the queue alone (one draft per job);
    # it is not under the signature, so readers are not shown it.
    info.pop("job_id", None)
    info["submitted_by"] = user_row(conn, row.submitted_by)["username"]
    info["issued_by"] = user_row(conn, row.issued_by)["username"] if row.issued_by else None
    info["files"] = run_files(conn, row.run_id)
    return info


def signed_document(storage: Storage, keys: KeyRing, certificate_id: str) -> dict[str, Any]:
    """The issued entry with its digest, signature and public key, for offline checking."""
    with storage.read() as conn:
        row = certificate_row(conn, certificate_id)
        if row.sequence is None:
            raise ArchiveError(f"{certificate_id} is a {row.state} and carries no signature")
        chain_row, entry = signed_issue(conn, keys, row)
    return {
        "entry": entry,
        "sha256": chain_row.sha256,
        "signature": chain_row.signature,
        "public_key_hex": keys.raw.get(chain_row.key_id, b"").hex(),
    }


def search(
    storage: Storage,
    *,
    item: str | None = None,
    kind: str | None = None,
    state: str | None = None,
    date_from: str | None = None,
    date_to: str | None = None,
    text: str | None = None,
    limit: int = 200,
) -> list[dict[str, Any]]:
    """Certificates matching every filter given, newest draft first."""
    c = st.certificates.c
    query = select(
        c.id,
        c.number,
        c.revision,
        c.kind,
        c.item,
        c.state,
        c.created_at,
        c.issued_at,
        c.sequence,
        c.replaces,
        c.superseded_by,
        c.run_id,
    )
    conditions = []
    if item:
        conditions.append(c.item.ilike(f"%{item}%"))
    if kind:
        conditions.append(c.kind == kind)
    if state:
        conditions.append(c.state == state)
    if date_from:
        conditions.append(func.coalesce(c.issued_at, c.created_at) >= date_from)
    if date_to:
        # Dates are ISO strings; "2026-12-31" must include that whole day.
        conditions.append(func.coalesce(c.issued_at, c.created_at) <= date_to + "\uffff")
    if text:
        conditions.append(or_(c.id.ilike(f"%{text}%"), c.item.ilike(f"%{text}%")))
    if conditions:
        query = query.where(and_(*conditions))
    query = query.order_by(c.created_at.desc()).limit(limit)
    with storage.read() as conn:
        return [dict(r._mapping) for r in conn.execute(query).all()]


def events(storage: Storage, subject: str | None = None, limit: int = 500) -> list[dict[str, Any]]:
    """The event log, newest first (of one subject if given)."""
    query = select(st.events).order_by(st.events.c.id.desc()).limit(limit)
    if subject:
        query = query.where(st.events.c.subject == subject)
    with storage.read() as conn:
        rows = conn.execute(query).all()
    return [{**dict(r._mapping), "detail": json.loads(r.detail_json)} for r in rows]
