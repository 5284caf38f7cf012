"""A certificate's lifecycle: run accepted → draft → issued → superseded | withdrawn.

A draft may also be withdrawn (discarded) before issue. Issuing needs an approver who is neither
the person who submitted the data nor the one who prepared the draft (four eyes), and a record
that states everything an issued certificate must (ISO/IEC 17025:2017 7.8.2.1). Amending an
issued certificate makes a new revision that names the one it replaces and why (7.8.8); the old
one becomes *superseded* and stays in the chain untouched. Issue and withdrawal are signed chain
entries (:mod:`service.archive.chain`), so neither can be quietly undone.
"""

from __future__ import annotations

import json
from collections.abc import Iterable, Mapping
from typing import Any

from sqlalchemy import Connection, and_, select

from service import storage as st
from service.archive.canonical import canonical_json
from service.archive.chain import append_entry
from service.archive.errors import ArchiveError, NotFound
from service.archive.keys import LabKey, PublicLabKey
from service.archive.stored import (
    Blobs,
    certificate_row,
    log_event,
    run_files,
    user_ref,
    user_row,
)
from service.render.dcc import missing_for_issue
from service.storage import Storage, utc_now

STATES = ("draft", "issued", "superseded", "withdrawn")

# Record fields the service writes itself; an amendment may not "correct" them, and reproduce
# does not expect a fresh analysis to produce them. (The issue date and approver go into the
# record's own "dates.issued" and "people.approver".)
SERVICE_FIELDS = (
    "certificate_id",
    "analysis_id",
    "revision",
    "replaces",
    "amendment_reason",
    "state",
    "superseded_by",
    "withdrawn_reason",
    "corrected_fields",
)
# Record fields that come from the analysis; amending them would break reproducibility, so an
# amendment that needs different numbers must come from a new run.
ANALYSIS_FIELDS = (
    "results",
    "sections",
    "diagnostics",
    "inputs",
    "reproducibility",
    "schema",
    "job",
)


def _correctable(corrections: Mapping[str, Any] | None, what: str) -> dict[str, Any]:
    """The corrections, refused if they touch service fields or analysis results."""
    corrections = dict(corrections or {})
    refused = [k for k in corrections if k in SERVICE_FIELDS or k in ANALYSIS_FIELDS]
    if refused:
        raise ArchiveError(
            f"field(s) {', '.join(sorted(refused))} cannot be corrected by {what}; "
            "service fields are set by the archive and results need a new run",
            400,
        )
    return corrections


def _apply_corrections(record: dict[str, Any], corrections: Mapping[str, Any]) -> None:
    """Correct ``record`` in place and list the corrected fields; a table (``customer``) is
    merged key by key, so correcting its name keeps its address."""
    earlier = set(record.get("corrected_fields") or [])
    for key, value in corrections.items():
        if isinstance(value, Mapping) and isinstance(record.get(key), Mapping):
            record[key] = {**record[key], **value}
        else:
            record[key] = value
    record["corrected_fields"] = sorted(earlier | set(corrections))


class Lifecycle:
    """The acts that change the archive: accept a run, draft, correct, amend, issue, withdraw."""

    def __init__(
        self, storage: Storage, key: LabKey | PublicLabKey | None, number_prefix: str
    ) -> None:
        self.storage = storage
        self.key = key
        self.number_prefix = number_prefix
        self.blobs = Blobs(storage)

    # ---- runs -------------------------------------------------------------------------------

    def record_run(
        self,
        conn: Connection,
        *,
        run_id: str,
        kind: str,
        item: str,
        manifest: Mapping[str, Any],
        files: Iterable[tuple[str, bytes]],
        seed: int,
        submitter: Mapping[str, Any],
        replaces: str | None = None,
        amendment_reason: str | None = None,
    ) -> list[dict[str, Any]]:
        """Store an accepted run's raw files (unchanged) and its row; return the file list."""
        stored = []
        for name, data in files:
            digest = self.blobs.put(conn, data)
            stored.append({"name": name, "sha256": digest, "size": len(data)})
        conn.execute(
            st.runs.insert().values(
                id=run_id,
                kind=kind,
                item=item,
                submitted_by=submitter["id"],
                submitted_at=utc_now(),
                manifest_json=json.dumps(manifest, sort_keys=True, default=str),
                seed=seed,
                replaces=replaces,
                amendment_reason=amendment_reason,
            )
        )
        for entry in stored:
            conn.execute(st.run_files.insert().values(run_id=run_id, **entry))
        log_event(
            conn,
            submitter["username"],
            "run.accepted",
            run_id,
            {"kind": kind, "item": item, "files": stored, "seed": seed},
        )
        return stored

    # ---- drafts -----------------------------------------------------------------------------

    def create_draft(
        self,
        conn: Connection,
        *,
        run_id: str,
        record: Mapping[str, Any],
        seed: int,
        software: Mapping[str, str],
        submitter: Mapping[str, Any],
        replaces: str | None = None,
        amendment_reason: str | None = None,
        options: Mapping[str, Any] | None = None,
        plots: Mapping[str, str] | None = None,
        plots_sha256: str | None = None,
        extra_files: Mapping[str, bytes] | None = None,
        extras: Mapping[str, Mapping[str, Any]] | None = None,
        job_id: str | None = None,
    ) -> str:
        """Store a draft certificate made from an analysis record; return its id.

        The service numbers certificates itself (unique, sequential per year); an identifier the
        analysis derived from its inputs is kept as ``analysis_id``. ``job_id`` names the job
        that made the draft; the database refuses a second draft for the same job.
        """
        run = conn.execute(select(st.runs).where(st.runs.c.id == run_id)).first()
        if run is None:
            raise NotFound(f"run {run_id} not found")
        number, revision = self._number_and_revision(conn, replaces, amendment_reason)
        cert_id = number if revision == 1 else f"{number}-R{revision}"
        document = _draft_document(record, cert_id, revision, replaces, amendment_reason)
        if plots:
            # Figures are not part of the record, but part of how it is shown, so they are kept
            # (and named in the signed entry) for renderings later.
            plots_sha256 = self.blobs.put(conn, canonical_json({"plots": dict(plots)}))
        extras = {name: dict(entry) for name, entry in (extras or {}).items()}
        for name, data in sorted((extra_files or {}).items()):
            extras[name] = {"sha256": self.blobs.put(conn, data), "size": len(data)}
        conn.execute(
            st.certificates.insert().values(
                id=cert_id,
                number=number,
                revision=revision,
                run_id=run_id,
                kind=run.kind,
                item=run.item,
                state="draft",
                record_json=canonical_json(document).decode("utf-8"),
                seed=seed,
                software_json=json.dumps(dict(software), sort_keys=True),
                options_json=json.dumps(dict(options or {}), sort_keys=True),
                plots_sha256=plots_sha256,
                extras_json=json.dumps(extras, sort_keys=True),
                submitted_by=submitter["id"],
                created_at=utc_now(),
                replaces=replaces,
                amendment_reason=amendment_reason,
                job_id=job_id,
            )
        )
        log_event(
            conn,
            submitter["username"],
            "certificate.drafted",
            cert_id,
            {"run_id": run_id, "replaces": replaces, "reason": amendment_reason},
        )
        return cert_id

    def _number_and_revision(
        self, conn: Connection, replaces: str | None, amendment_reason: str | None
    ) -> tuple[str, int]:
        """A new certificate's number and revision 1, or an amendment's next revision."""
        if not replaces:
            year = utc_now()[:4]
            n = self.storage.next_counter(conn, f"certificate-number-{year}")
            return f"{self.number_prefix}-{year}-{n:05d}", 1
        old = certificate_row(conn, replaces)
        if old.state != "issued":
            raise ArchiveError(
                f"{replaces} is {old.state}; only an issued certificate can be amended"
            )
        if not amendment_reason:
            raise ArchiveError("an amendment must say why it replaces the earlier revision")
        return old.number, old.revision + 1

    def amend(
        self,
        certificate_id: str,
        user: Mapping[str, Any],
        reason: str,
        corrections: Mapping[str, Any] | None = None,
    ) -> str:
        """Draft a new revision of an issued certificate with corrected administrative fields."""
        reason = (reason or "").strip()
        if not reason:
            raise ArchiveError("give the reason for the amendment (ISO/IEC 17025 7.8.8)", 400)
        corrections = _correctable(corrections, "an amendment")
        with self.storage.write() as conn:
            old = certificate_row(conn, certificate_id)
            if old.state != "issued":
                raise ArchiveError(
                    f"{certificate_id} is {old.state}; only an issued certificate can be amended"
                )
            pending = conn.execute(
                select(st.certificates.c.id).where(
                    and_(
                        st.certificates.c.replaces == certificate_id,
                        st.certificates.c.state == "draft",
                    )
                )
            ).first()
            if pending is not None:
                raise ArchiveError(f"amendment {pending.id} of {certificate_id} is already pending")
            record = json.loads(old.record_json)
            for key in SERVICE_FIELDS:
                if key not in ("analysis_id", "corrected_fields"):
                    record.pop(key, None)
            _apply_corrections(record, corrections)
            new_id = self.create_draft(
                conn,
                run_id=old.run_id,
                record=record,
                seed=old.seed,
                software=json.loads(old.software_json),
                submitter=user,
                replaces=certificate_id,
                amendment_reason=reason,
                options=json.loads(old.options_json),
                plots_sha256=old.plots_sha256,
                extras=json.loads(old.extras_json),
            )
        return new_id

    def correct_draft(
        self, certificate_id: str, user: Mapping[str, Any], corrections: Mapping[str, Any]
    ) -> list[dict[str, str]]:
        """Fill or correct administrative fields of a draft before it is issued.

        A draft is not signed yet, so it is corrected in place (the fields are listed in
        ``corrected_fields`` and the change is in the event log); a table such as ``customer``
        is merged key by key. Returns what the draft still lacks (:func:`missing_for_issue`).
        """
        corrections = _correctable(corrections, "a correction")
        if not corrections:
            raise ArchiveError("no corrections given", 400)
        with self.storage.write() as conn:
            row = certificate_row(conn, certificate_id)
            if row.state != "draft":
                raise ArchiveError(
                    f"{certificate_id} is {row.state}; an issued certificate is changed only by "
                    "an amendment (a new revision)"
                )
            record = json.loads(row.record_json)
            _apply_corrections(record, corrections)
            item = (record.get("item") or {}).get("identifier") or row.item
            # The item index of the run and its certificates follows the correction only while
            # nothing about the run is signed yet (the signed entry names the run's item, and
            # verify compares both index columns with it).
            signed = conn.execute(
                select(st.certificates.c.id).where(
                    and_(st.certificates.c.run_id == row.run_id,
                         st.certificates.c.sequence.is_not(None))
                )
            ).first()
            values: dict[str, Any] = {"record_json": canonical_json(record).decode("utf-8")}
            if signed is None and item != row.item:
                values["item"] = item
                conn.execute(st.runs.update().where(st.runs.c.id == row.run_id).values(item=item))
            conn.execute(
                st.certificates.update()
                .where(st.certificates.c.id == certificate_id)
                .values(**values)
            )
            log_event(
                conn, user["username"], "certificate.corrected", certificate_id,
                {"fields": sorted(corrections)},
            )
        return missing_for_issue(record)

    # ---- issue / withdraw -------------------------------------------------------------------

    def issue(self, certificate_id: str, approver: Mapping[str, Any]) -> dict[str, Any]:
        """Issue a draft: four-eyes check, sign, chain, and supersede the revision it replaces."""
        with self.storage.write() as conn:
            row = certificate_row(conn, certificate_id)
            run = self._issuable_run(conn, row, approver)
            issued_at = utc_now()
            record = json.loads(row.record_json)
            _refuse_incomplete(certificate_id, record)
            record["state"] = "issued"
            record.setdefault("dates", {})["issued"] = issued_at[:10]
            record.setdefault("people", {})["approver"] = (
                approver.get("display_name") or approver["username"]
            )
            body = _issue_body(conn, row, run, record, approver, issued_at)
            sequence, digest = append_entry(
                conn, self.storage, self.key, "issue", certificate_id, body
            )
            conn.execute(
                st.certificates.update()
                .where(st.certificates.c.id == certificate_id)
                .values(
                    state="issued",
                    issued_by=approver["id"],
                    issued_at=issued_at,
                    sequence=sequence,
                    record_json=canonical_json(record).decode("utf-8"),
                )
            )
            if row.replaces:
                conn.execute(
                    st.certificates.update()
                    .where(st.certificates.c.id == row.replaces)
                    .values(state="superseded", superseded_by=certificate_id)
                )
            log_event(
                conn,
                approver["username"],
                "certificate.issued",
                certificate_id,
                {"sequence": sequence, "sha256": digest, "replaces": row.replaces},
            )
        return {"certificate_id": certificate_id, "sequence": sequence, "sha256": digest}

    def _issuable_run(self, conn: Connection, row, approver: Mapping[str, Any]):
        """The draft's run, once the draft may be issued by ``approver`` (four eyes, and the
        revision it replaces still issued)."""
        certificate_id = row.id
        if row.state != "draft":
            raise ArchiveError(f"{certificate_id} is {row.state}; only a draft can be issued")
        run = conn.execute(select(st.runs).where(st.runs.c.id == row.run_id)).one()
        if approver["id"] in (row.submitted_by, run.submitted_by):
            raise ArchiveError(
                f"{approver['username']} submitted {certificate_id} (or its data) and cannot "
                "also issue it; another approver must review it (four-eyes rule)",
                403,
            )
        if row.replaces:
            old = certificate_row(conn, row.replaces)
            if old.state != "issued":
                raise ArchiveError(
                    f"{row.replaces} is {old.state}; this amendment can no longer be issued"
                )
        return run

    def withdraw(self, certificate_id: str, user: Mapping[str, Any], reason: str) -> dict:
        """Withdraw an issued certificate (a signed chain entry) or discard a draft."""
        reason = (reason or "").strip()
        if not reason:
            raise ArchiveError("give the reason for the withdrawal", 400)
        with self.storage.write() as conn:
            row = certificate_row(conn, certificate_id)
            if row.state not in ("draft", "issued"):
                raise ArchiveError(f"{certificate_id} is already {row.state}")
            now = utc_now()
            result: dict[str, Any] = {"certificate_id": certificate_id, "sequence": None}
            if row.state == "issued":
                body = {
                    "certificate_id": certificate_id,
                    "reason": reason,
                    "withdrawn_by": user_ref(user),
                    "withdrawn_at": now,
                }
                result["sequence"], result["sha256"] = append_entry(
                    conn, self.storage, self.key, "withdrawal", certificate_id, body
                )
            conn.execute(
                st.certificates.update()
                .where(st.certificates.c.id == certificate_id)
                .values(state="withdrawn", withdrawn_reason=reason, withdrawn_at=now)
            )
            log_event(
                conn,
                user["username"],
                "certificate.withdrawn",
                certificate_id,
                {"reason": reason, "was": row.state, "sequence": result["sequence"]},
            )
        return result


def _draft_document(
    record: Mapping[str, Any],
    cert_id: str,
    revision: int,
    replaces: str | None,
    amendment_reason: str | None,
) -> dict[str, Any]:
    """The analysis record with the service's fields set for a draft."""
    document = json.loads(canonical_json(record))
    if "certificate_id" in document and "analysis_id" not in document:
        document["analysis_id"] = document["certificate_id"]
    document.update(
        certificate_id=cert_id,
        revision=revision,
        replaces=replaces,
        amendment_reason=amendment_reason,
        state="draft",
    )
    document.setdefault("dates", {})["issued"] = None
    document.setdefault("people", {})["approver"] = None
    return document


def _refuse_incomplete(certificate_id: str, record: Mapping[str, Any]) -> None:
    """ISO/IEC 17025:2017 7.8.2.1: a draft may be incomplete, an issued one may not."""
    missing = missing_for_issue(record)
    if missing:
        raise ArchiveError(
            f"{certificate_id} cannot be issued: it does not state "
            + "; ".join(f"{m['what']} ({m['field']})" for m in missing)
            + ". Correct the draft first (its page, or POST "
            f"/api/certificates/{certificate_id}/corrections)",
            409,
        )


def _issue_body(
    conn: Connection, row, run, record: Mapping[str, Any], approver: Mapping[str, Any], issued_at: str
) -> dict[str, Any]:
    """What an issue entry signs: the record, the run and its raw files, the analysis, people."""
    return {
        "certificate_id": row.id,
        "revision": row.revision,
        "replaces": row.replaces,
        "amendment_reason": row.amendment_reason,
        "issued_at": issued_at,
        "approved_by": user_ref(approver),
        "submitted_by": user_ref(user_row(conn, row.submitted_by)),
        "run": {
            "id": row.run_id,
            "kind": row.kind,
            "item": row.item,
            "files": run_files(conn, row.run_id),
            "manifest": json.loads(run.manifest_json),
            "submitted_by": user_ref(user_row(conn, run.submitted_by)),
            "submitted_at": run.submitted_at,
            "replaces": run.replaces,
            "amendment_reason": run.amendment_reason,
        },
        "drafted_at": row.created_at,
        "analysis": {
            "seed": row.seed,
            "software": json.loads(row.software_json),
            "options": json.loads(row.options_json),
        },
        "plots_sha256": row.plots_sha256,
        "extra_files": json.loads(row.extras_json),
        "certificate": record,
    }

