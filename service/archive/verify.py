"""Verify: the signed entries against every other copy the database and blob store keep.

The signed entries are the truth; every other copy (the chain table's index columns, the
certificate row's state and columns, the run's row and file list, the stored files) is compared
with them. An entry whose own checks fail could hide a withdrawal or an amendment, so it makes
the verification of every certificate before it in the chain fail too, with the reason.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Any

from sqlalchemy import Connection, select

from service import storage as st
from service.archive.canonical import canonical_json, loads_or_marker, short_repr
from service.archive.chain import SignedFacts, scan_chain
from service.archive.keys import KeyRing, verify_signature
from service.archive.reports import Check, VerifyReport
from service.archive.signed import derived_files
from service.archive.stored import certificate_row
from service.storage import Storage, sha256_hex


@dataclass
class DatabaseCopies:
    """The rows a consistency check compares with the signed entries, fetched in bulk."""

    files: dict[str, list[dict[str, Any]]]
    runs: dict[str, Any]
    users: dict[int, str]

    @classmethod
    def load(cls, conn: Connection, run_id: str | None = None) -> DatabaseCopies:
        file_query = select(st.run_files.c.run_id, st.run_files.c.name, st.run_files.c.sha256,
                            st.run_files.c.size).order_by(st.run_files.c.run_id, st.run_files.c.name)
        run_query = select(st.runs)
        if run_id is not None:
            file_query = file_query.where(st.run_files.c.run_id == run_id)
            run_query = run_query.where(st.runs.c.id == run_id)
        files: dict[str, list[dict[str, Any]]] = {}
        for r in conn.execute(file_query):
            files.setdefault(r.run_id, []).append({"name": r.name, "sha256": r.sha256, "size": r.size})
        runs = {r.id: r for r in conn.execute(run_query)}
        users = dict(conn.execute(select(st.users.c.id, st.users.c.username)).all())
        return cls(files, runs, users)


class Verifier:
    """Checks of the chain, of one certificate and of the whole archive."""

    def __init__(self, storage: Storage, keys: KeyRing) -> None:
        self.storage = storage
        self.keys = keys

    def verify_chain(
        self, upto: int | None = None, files_out: list[tuple[str, list]] | None = None
    ) -> list[Check]:
        """Check every chain entry from the first up to ``upto`` (all if None)."""
        with self.storage.read() as conn:
            checks, facts = scan_chain(conn, self.keys)
        if upto is not None:
            checks = [c for s, cs in facts.checks_by_sequence.items() if s <= upto for c in cs]
            if facts.last < upto:
                checks.append(Check("chain", False, f"chain ends at {facts.last}, before {upto}"))
        if files_out is not None:
            for cid, (_, body) in facts.issues.items():
                files = list((body.get("run") or {}).get("files") or [])
                files_out.append((cid, files + derived_files(body)))
        return checks

    def verify(self, certificate_id: str) -> VerifyReport:
        """Signatures, chain, index columns, stored files and every database copy of one
        certificate, against the signed entries."""
        with self.storage.read() as conn:
            row = certificate_row(conn, certificate_id)
            _, facts = scan_chain(conn, self.keys)
            checks = _chain_checks_for(certificate_id, row, facts)
            copies = DatabaseCopies.load(conn, run_id=row.run_id)
            checks.extend(self._consistency(row, facts, copies, {}))
        return VerifyReport(
            certificate_id=certificate_id,
            state=row.state,
            sequence=row.sequence,
            valid=all(c.ok for c in checks),
            checks=tuple(checks),
        )

    def verify_all(self) -> tuple[bool, list[Check]]:
        """The whole chain, every certificate's database copies and every stored file it names
        (each blob hashed once)."""
        with self.storage.read() as conn:
            checks, facts = scan_chain(conn, self.keys)
            checks = [c for c in checks if not c.ok]
            cache: dict[str, str | None] = {}
            rows = conn.execute(select(st.certificates).order_by(st.certificates.c.id)).all()
            copies = DatabaseCopies.load(conn)
            known = set()
            for row in rows:
                known.add(row.id)
                for check in self._consistency(row, facts, copies, cache):
                    if not check.ok:
                        detail = check.detail
                        if not detail.startswith(row.id):
                            detail = f"{row.id}: {detail}"
                        checks.append(Check(check.what, False, detail))
            for cid, (sequence, _) in facts.issues.items():
                if cid not in known:
                    checks.append(
                        Check(
                            "database",
                            False,
                            f"chain entry {sequence} issues {cid}, which has no certificate row",
                        )
                    )
        return (not checks), checks

    def _consistency(
        self, row, facts: SignedFacts, db: DatabaseCopies, blob_cache: dict
    ) -> list[Check]:
        """Compare a certificate's database copies with what the signed chain says."""
        cid = row.id
        issue = facts.issues.get(cid)
        files = db.files.get(row.run_id, [])
        if issue is None:
            withdrawal = facts.withdrawals.get(cid)
            never = row.sequence is None and row.state in ("draft", "withdrawn")
            checks = [
                Check(
                    "state",
                    never and withdrawal is None,
                    f"{cid} is a {row.state} that was never issued; nothing is signed"
                    if never and withdrawal is None
                    else f"{cid}: the database says '{row.state}' (sequence {row.sequence}) but "
                    "no signed issue entry names it",
                )
            ]
            return checks + self._check_files(files, blob_cache)
        sequence, body = issue
        checks = _certificate_row_checks(row, sequence, body, facts, db)
        checks.append(_record_check(row, body))
        run = body.get("run") if isinstance(body.get("run"), dict) else {}
        signed_files = [dict(f) for f in run.get("files") or [] if isinstance(f, Mapping)]
        if signed_files != files:
            checks.append(
                Check(
                    "raw file",
                    False,
                    "the run's file list in the database differs from the signed record",
                )
            )
        checks.extend(_run_row_checks(row, body, db))
        checks.extend(self._check_files(signed_files, blob_cache))
        checks.extend(self._check_files(derived_files(body), blob_cache))
        return checks

    def _check_files(self, files: Iterable[Mapping[str, Any]], cache: dict) -> list[Check]:
        """Each stored file hashed (once per digest, through ``cache``) against its name."""
        checks = []
        for entry in files:
            digest = entry.get("sha256") if isinstance(entry, Mapping) else None
            name = entry.get("name", "?") if isinstance(entry, Mapping) else "?"
            try:
                if digest not in cache:
                    cache[digest] = self.storage.blobs.digest_on_disk(digest)
            except (ValueError, TypeError):
                checks.append(Check("raw file", False, f"{name}: {digest!r} is not a SHA-256"))
                continue
            found = cache[digest]
            if found is None:
                checks.append(Check("raw file", False, f"raw file {name} ({digest}) is missing"))
            elif found != digest:
                checks.append(
                    Check(
                        "raw file",
                        False,
                        f"raw file {name} has SHA-256 {found} but was archived as "
                        f"{digest}; the stored file was altered",
                    )
                )
            else:
                checks.append(Check("raw file", True, f"raw file {name} intact"))
        return checks


def _chain_checks_for(certificate_id: str, row, facts: SignedFacts) -> list[Check]:
    """The chain checks one certificate rests on: every entry up to its last one, and any
    damaged entry after it (which could hide its withdrawal or amendment)."""
    checks: list[Check] = []
    last = max(facts.sequences_naming(certificate_id) + [row.sequence or 0])
    for sequence in sorted(facts.checks_by_sequence):
        if sequence <= last:
            checks.extend(facts.checks_by_sequence[sequence])
    if (
        facts.issues.get(certificate_id) is None
        and row.sequence is not None
        and row.sequence > facts.last
    ):
        checks.append(Check("chain", False, f"chain ends at {facts.last}, before {row.sequence}"))
    for sequence in facts.damaged:
        if sequence > last:
            checks.append(
                Check(
                    "chain",
                    False,
                    f"chain entry {sequence} (after {certificate_id}) fails its checks; "
                    f"a withdrawal or amendment of {certificate_id} recorded there could "
                    "be hidden",
                )
            )
    return checks


def _certificate_row_checks(
    row, sequence: int, body: Mapping[str, Any], facts: SignedFacts, db: DatabaseCopies
) -> list[Check]:
    """Every column of the certificate's row against its signed issue entry and the state the
    signed entries give it."""
    cid = row.id
    withdrawal = facts.withdrawals.get(cid)
    successor = facts.successors.get(cid)
    signed_state = "withdrawn" if withdrawal else "superseded" if successor else "issued"
    run = body.get("run") if isinstance(body.get("run"), dict) else {}
    analysis = body.get("analysis") if isinstance(body.get("analysis"), dict) else {}
    users = db.users
    expected: dict[str, tuple[Any, Any]] = {
        "state": (row.state, signed_state),
        "sequence": (row.sequence, sequence),
        "revision": (row.revision, body.get("revision")),
        "run_id": (row.run_id, run.get("id")),
        "kind": (row.kind, run.get("kind")),
        "item": (row.item, run.get("item")),
        "seed": (row.seed, analysis.get("seed")),
        "software_json": (loads_or_marker(row.software_json), analysis.get("software")),
        "options_json": (loads_or_marker(row.options_json), analysis.get("options")),
        "plots_sha256": (row.plots_sha256, body.get("plots_sha256")),
        "extras_json": (loads_or_marker(row.extras_json), body.get("extra_files") or {}),
        "replaces": (row.replaces, body.get("replaces")),
        "amendment_reason": (row.amendment_reason, body.get("amendment_reason")),
        "issued_at": (row.issued_at, body.get("issued_at")),
        "issued_by": (users.get(row.issued_by), (body.get("approved_by") or {}).get("username")),
        "submitted_by": (
            users.get(row.submitted_by),
            (body.get("submitted_by") or {}).get("username"),
        ),
        "number": (
            row.id == row.number
            if row.revision == 1
            else row.id == f"{row.number}-R{row.revision}",
            True,
        ),
        "superseded_by": (row.superseded_by, successor),
        "withdrawn_reason": (
            row.withdrawn_reason,
            (withdrawal[1].get("reason") if withdrawal else None),
        ),
        "withdrawn_at": (
            row.withdrawn_at,
            (withdrawal[1].get("withdrawn_at") if withdrawal else None),
        ),
    }
    if "drafted_at" in body:
        expected["created_at"] = (row.created_at, body["drafted_at"])
    checks = []
    for column, (stored, signed) in expected.items():
        if stored != signed and column == "state":
            checks.append(
                Check(
                    "state",
                    False,
                    f"state '{stored}' disagrees with the signed chain entries, which make "
                    f"{cid} {signed}"
                    + (f" (withdrawal entry {withdrawal[0]})" if withdrawal else ""),
                )
            )
        elif stored != signed:
            checks.append(
                Check(
                    "database",
                    False,
                    f"{cid}: certificates.{column} is {short_repr(stored)} but the signed chain "
                    f"says {short_repr(signed)}; the signed entries are authoritative",
                )
            )
    if not any(c.what == "state" for c in checks):
        checks.append(Check("state", True, f"state '{row.state}' agrees with the chain"))
    return checks


def _record_check(row, body: Mapping[str, Any]) -> Check:
    db_record = loads_or_marker(row.record_json)
    same = isinstance(db_record, dict) and canonical_json(db_record) == canonical_json(
        body.get("certificate")
    )
    return Check(
        "record",
        same,
        "database copy of the record equals the signed record"
        if same
        else "database copy of the record differs from the signed record "
        "(the signed record is authoritative)",
    )


def _run_row_checks(row, body: Mapping[str, Any], db: DatabaseCopies) -> list[Check]:
    """The run's row against the run the issue entry signs."""
    cid = row.id
    run = body.get("run") if isinstance(body.get("run"), dict) else {}
    analysis = body.get("analysis") if isinstance(body.get("analysis"), dict) else {}
    run_row = db.runs.get(row.run_id)
    if run_row is None:
        return [Check("database", False, f"{cid}: its run {row.run_id} is missing")]
    run_expected = {
        "kind": (run_row.kind, run.get("kind")),
        "item": (run_row.item, run.get("item")),
        "seed": (run_row.seed, analysis.get("seed")),
    }
    if "manifest" in run:
        run_expected["manifest_json"] = (loads_or_marker(run_row.manifest_json), run["manifest"])
    if "submitted_at" in run:
        run_expected["submitted_at"] = (run_row.submitted_at, run["submitted_at"])
    if "submitted_by" in run:
        run_expected["submitted_by"] = (
            db.users.get(run_row.submitted_by),
            (run["submitted_by"] or {}).get("username"),
        )
    if "replaces" in run:
        run_expected["replaces"] = (run_row.replaces, run["replaces"])
        run_expected["amendment_reason"] = (run_row.amendment_reason, run.get("amendment_reason"))
    return [
        Check(
            "database",
            False,
            f"{cid}: runs.{column} of {row.run_id} is {short_repr(stored)} but the "
            f"signed entry says {short_repr(signed)}",
        )
        for column, (stored, signed) in run_expected.items()
        if stored != signed
    ]


def verify_signed_document(
    document: Mapping[str, Any], public_raw: bytes | None = None
) -> list[Check]:
    """Check an exported signed entry offline: its digest and its signature.

    ``public_raw`` is the lab key obtained independently (from the lab's published key); when
    omitted the key embedded in the document is used, which proves integrity but not origin.
    """
    checks = []
    try:
        entry = document["entry"]
        data = canonical_json(entry)
        recorded, signature = document["sha256"], document["signature"]
    except (KeyError, TypeError, ValueError) as exc:
        return [Check("format", False, f"not a signed coldcert entry: {exc}")]
    digest = sha256_hex(data)
    checks.append(
        Check(
            "hash",
            digest == recorded,
            "content SHA-256 matches"
            if digest == recorded
            else f"content SHA-256 {digest} does not match the recorded {recorded}",
        )
    )
    embedded = bytes.fromhex(document.get("public_key_hex") or "")
    key = public_raw if public_raw is not None else embedded
    ok = bool(key) and verify_signature(key, data, signature)
    checks.append(
        Check(
            "signature",
            ok,
            "Ed25519 signature valid" if ok else "Ed25519 signature does not verify",
        )
    )
    if public_raw is not None and embedded and embedded != public_raw:
        checks.append(Check("key", False, "document names a different key from the lab's"))
    return checks
