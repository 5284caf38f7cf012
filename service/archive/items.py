"""Archive queries about items and changes: an item's certificates, items due, impact of a
change, movements found by bulk reproduction, and the customer's public check.

Reading only, except :func:`record_rendering`, which notes the SHA-256 of every file of an issued
certificate that the service hands out, so that a customer can later show the file and ask
whether it is authentic. The science lives in analysis/ and service.archive.history.
"""

from __future__ import annotations

import json
import re
from collections.abc import Iterable, Mapping
from datetime import date
from typing import Any

from sqlalchemy import and_, func, select
from sqlalchemy.exc import IntegrityError

from service import storage as st
from service.archive import Archive, NotFound
from service.archive.history import CertificateEntry, build_history
from service.storage import utc_now

#: States in which a certificate has been issued (it has a signed chain entry).
ISSUED_STATES = ("issued", "superseded", "withdrawn")
SHA256_PATTERN = re.compile(r"^[0-9a-f]{64}$")


# --------------------------------------------------------------------------------------------
# An item's certificates


def item_entries(archive: Archive, item: str) -> list[CertificateEntry]:
    """Every certificate of ``item`` (exact identifier), all revisions and states."""
    c = st.certificates.c
    with archive.storage.read() as conn:
        ids = [r.id for r in conn.execute(select(c.id).where(c.item == item)).all()]
    if not ids:
        raise NotFound(f"no certificate of item {item!r} in the archive")
    entries = []
    for cid in ids:
        info = archive.get(cid)
        entries.append(
            CertificateEntry(
                certificate_id=cid,
                revision=int(info["revision"]),
                state=info["state"],
                kind=info["kind"],
                item=info["item"],
                record=info["record"],
                issued_at=info.get("issued_at"),
                created_at=info.get("created_at"),
                replaces=info.get("replaces"),
                superseded_by=info.get("superseded_by"),
                withdrawn_reason=info.get("withdrawn_reason"),
            )
        )
    return entries


def item_history(
    archive: Archive,
    item: str,
    policy: Mapping[str, Any] | None,
    today: date | None = None,
    departures: bool = True,
) -> dict[str, Any]:
    return build_history(
        item, item_entries(archive, item), policy=policy, today=today, departures=departures
    )


def items_with_issued(archive: Archive) -> list[str]:
    c = st.certificates.c
    with archive.storage.read() as conn:
        rows = conn.execute(
            select(c.item).where(and_(c.state == "issued", c.item != "")).distinct()
        ).all()
    return sorted(r.item for r in rows)


def recall_overview(
    archive: Archive, policy: Mapping[str, Any] | None, today: date | None = None
) -> list[dict[str, Any]]:
    """Every item with a certificate in force: its due date and status, soonest first."""
    today = today or date.today()
    out = []
    for item in items_with_issued(archive):
        h = item_history(archive, item, policy, today, departures=False)
        recall = h["recall"]
        last = next(
            (c for c in reversed(h["certificates"]) if c["certificate_id"] in h["in_force"]), {}
        )
        out.append(
            {
                "item": item,
                "kinds": h["kinds"],
                "customer": last.get("customer"),
                "last_certificate": last.get("certificate_id"),
                "changed": h["changed"],
                **recall,
            }
        )
    out.sort(key=lambda r: (r.get("due_date") or "9999-12-31", r["item"]))
    return out


# --------------------------------------------------------------------------------------------
# Impact of a change


def _models_of(record: Mapping[str, Any]) -> list[str]:
    names = {str(m) for m in (record.get("method") or {}).get("models") or []}
    names |= {
        str(r["model"])
        for r in record.get("results") or []
        if isinstance(r, Mapping) and r.get("model")
    }
    return sorted(names)


def parse_software(spec: str) -> tuple[str, str]:
    """'0.1.0' -> ('coldcert', '0.1.0'); 'scipy=1.17.1' -> ('scipy', '1.17.1')."""
    spec = spec.strip()
    if "=" in spec:
        name, _, version = spec.partition("=")
        return name.strip().lower(), version.strip()
    return "coldcert", spec


def impact(
    archive: Archive,
    *,
    software: str | None = None,
    model: str | None = None,
    date_from: str | None = None,
    date_to: str | None = None,
    in_force_only: bool = False,
) -> list[dict[str, Any]]:
    """Issued certificates (in force, superseded or withdrawn) that used a software version, a
    model (substring of the model names the record lists), or were issued in a date range;
    with no criterion, every issued certificate."""
    c = st.certificates.c
    conditions = [c.state.in_(("issued",) if in_force_only else ISSUED_STATES)]
    if date_from:
        conditions.append(c.issued_at >= date_from)
    if date_to:
        conditions.append(c.issued_at <= date_to + "\uffff")
    with archive.storage.read() as conn:
        rows = conn.execute(
            select(c.id, c.software_json).where(and_(*conditions)).order_by(c.issued_at)
        ).all()
    wanted = parse_software(software) if software else None
    out = []
    for row in rows:
        recorded = json.loads(row.software_json or "{}")
        if wanted and str(recorded.get(wanted[0], "")) != wanted[1]:
            continue
        info = archive.get(row.id)
        record = info["record"]
        models = _models_of(record)
        if model and not any(model.lower() in m.lower() for m in models):
            continue
        out.append(
            {
                "certificate_id": row.id,
                "state": info["state"],
                "item": info["item"],
                "customer": (record.get("customer") or {}).get("name"),
                "kind": info["kind"],
                "issued_at": info.get("issued_at"),
                "superseded_by": info.get("superseded_by"),
                "software": recorded,
                "models": models,
            }
        )
    return out


_RESULT_VALUE = re.compile(r"^results\[(\d+)\]\.value$")


def result_movements(
    record: Mapping[str, Any], report: Mapping[str, Any], fraction: float
) -> list[dict[str, Any]]:
    """Results whose reproduced value differs from the archived one by more than
    ``fraction`` × their expanded uncertainty U (from a reproduce report's mismatches)."""
    results = record.get("results") or []
    out = []
    for m in report.get("mismatches") or []:
        match = _RESULT_VALUE.match(str(m.get("path", "")))
        if not match:
            continue
        i = int(match.group(1))
        if i >= len(results):
            continue
        r = results[i]
        big_u = r.get("expanded_uncertainty")
        old, new = m.get("archived"), m.get("reproduced")
        numbers = isinstance(old, int | float) and isinstance(new, int | float)
        # A result that vanished or became non-numeric has certainly moved.
        moved = abs(new - old) / big_u if numbers and big_u else None
        out.append(
            {
                "index": i,
                "name": r.get("name"),
                "sweep": r.get("sweep"),
                "archived": old,
                "reproduced": new,
                "expanded_uncertainty": big_u,
                "moved_by_U": moved,
                "exceeds": moved is None or moved > fraction,
            }
        )
    return out


# --------------------------------------------------------------------------------------------
# The customer's check


def record_rendering(archive: Archive, certificate_id: str, rendering: str, sha256: str) -> None:
    """Note that a file of an issued certificate with this SHA-256 left the service."""
    t = st.served_files
    match = and_(t.c.certificate_id == certificate_id, t.c.sha256 == sha256)
    with archive.storage.read() as conn:
        if conn.execute(select(t.c.sha256).where(match)).first() is not None:
            return
    try:
        with archive.storage.write() as conn:
            if conn.execute(select(t.c.sha256).where(match)).first() is None:
                conn.execute(
                    t.insert().values(
                        certificate_id=certificate_id,
                        sha256=sha256,
                        rendering=rendering,
                        first_served_at=utc_now(),
                    )
                )
    except IntegrityError:
        # Another process noted the same file between our check and insert (on a server
        # database); the digest is recorded either way.
        pass


NOT_AUTHENTIC = (
    "No issued certificate with this number matches this file. Check the number and that the "
    "file is exactly as you received it; otherwise ask the laboratory."
)


def public_check(archive: Archive, certificate_id: str, sha256: str) -> dict[str, Any]:
    """Whether a file with this SHA-256 is one the service issued for this certificate, and if
    so the certificate's state and its replacement. Nothing else is revealed: an unknown number,
    a draft and a wrong file give the same answer."""
    certificate_id = (certificate_id or "").strip()
    sha256 = (sha256 or "").strip().lower()
    if not SHA256_PATTERN.match(sha256):
        raise ValueError("the SHA-256 must be 64 hexadecimal digits")
    if not certificate_id or len(certificate_id) > 60:
        raise ValueError("give the certificate number as printed on the certificate")
    c = st.certificates.c
    t = st.served_files
    with archive.storage.read() as conn:
        row = conn.execute(
            select(c.id, c.state, c.superseded_by, c.withdrawn_reason, c.sequence).where(
                c.id == certificate_id
            )
        ).first()
        known = (
            row is not None
            and row.state in ISSUED_STATES
            and row.sequence is not None
            and conn.execute(
                select(func.count())
                .select_from(t)
                .where(and_(t.c.certificate_id == certificate_id, t.c.sha256 == sha256))
            ).scalar_one()
            > 0
        )
        if not known:
            return {"certificate_id": certificate_id, "authentic": False, "message": NOT_AUTHENTIC}
        answer: dict[str, Any] = {
            "certificate_id": certificate_id,
            "authentic": True,
            "state": row.state,
        }
        if row.state == "superseded":
            answer["superseded_by"] = row.superseded_by
            answer["current_revision"] = _end_of_chain(conn, row.superseded_by)
        if row.state == "withdrawn":
            answer["withdrawn_reason"] = row.withdrawn_reason
    answer["message"] = {
        "issued": "Authentic, and in force.",
        "superseded": f"Authentic, but superseded by {answer.get('superseded_by')}: use that "
        "revision.",
        "withdrawn": "Authentic, but withdrawn by the laboratory; do not rely on it.",
    }[row.state]
    return answer


def _end_of_chain(conn, certificate_id: str | None) -> dict[str, Any] | None:
    """The last revision reached by following superseded_by, with its state."""
    c = st.certificates.c
    seen: set[str] = set()
    current = None
    while certificate_id and certificate_id not in seen:
        seen.add(certificate_id)
        row = conn.execute(
            select(c.id, c.state, c.superseded_by).where(c.id == certificate_id)
        ).first()
        if row is None:
            break
        current = {"certificate_id": row.id, "state": row.state}
        certificate_id = row.superseded_by if row.state == "superseded" else None
    return current


def served_digests(archive: Archive, certificate_ids: Iterable[str]) -> dict[str, list[str]]:
    t = st.served_files
    ids = list(certificate_ids)
    with archive.storage.read() as conn:
        rows = conn.execute(
            select(t.c.certificate_id, t.c.sha256).where(t.c.certificate_id.in_(ids))
        ).all()
    out: dict[str, list[str]] = {i: [] for i in ids}
    for r in rows:
        out[r.certificate_id].append(r.sha256)
    return out
