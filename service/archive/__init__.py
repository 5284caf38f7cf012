"""The audit archive: canonical records, a signed hash chain, lifecycle, verify and reproduce.

A certificate's record is a JSON document. To make "the same record" a matter of bytes, every
record is written in one canonical form: keys sorted, UTF-8, no insignificant whitespace, floats
as Python's shortest round-trip repr (so parsing and re-serialising gives back the same bytes),
and no NaN or infinity (JSON has none). The SHA-256 of those bytes identifies the record.

Issuing a certificate appends an *entry* to a chain: the entry holds the full record, the raw
files' SHA-256 digests, the seed and software versions of the analysis, who submitted and who
approved it, its sequence number and the SHA-256 of the entry before it. The lab's Ed25519 key
(RFC 8032) signs the entry's canonical bytes. Altering any entry breaks its own hash and
signature; re-signing it with a stolen key would still break the link from the next entry. A
withdrawal is an entry too, so it cannot be quietly undone. Amending an issued certificate makes
a new revision that names the one it replaces and why (ISO/IEC 17025:2017 7.8.8); the old one
becomes *superseded* and stays in the chain untouched.

The lifecycle is draft → issued → superseded | withdrawn (a draft may also be withdrawn before
issue). Issuing needs an approver who is neither the person who submitted the data nor the one
who prepared the draft (four eyes).
"""

from __future__ import annotations

import json
import logging
import math
import os
import platform
import tempfile
from collections.abc import Callable, Iterable, Mapping
from dataclasses import asdict, dataclass, field
from importlib import metadata as importlib_metadata
from pathlib import Path
from typing import Any

from cryptography.exceptions import InvalidSignature
from cryptography.hazmat.primitives import serialization
from cryptography.hazmat.primitives.asymmetric.ed25519 import (
    Ed25519PrivateKey,
    Ed25519PublicKey,
)
from sqlalchemy import Connection, and_, func, or_, select

from service import storage as st
from service.render.dcc import missing_for_issue
from service.storage import Storage, sha256_hex, utc_now

logger = logging.getLogger(__name__)

GENESIS_SHA256 = "0" * 64
STATES = ("draft", "issued", "superseded", "withdrawn")
SIGNED_RECORD_FORMAT = "coldcert-signed-entry/1"

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
    """Correct ``record`` in place; a table (``customer``) is merged key by key, so correcting
    its name keeps its address."""
    for key, value in corrections.items():
        if isinstance(value, Mapping) and isinstance(record.get(key), Mapping):
            record[key] = {**record[key], **value}
        else:
            record[key] = value


class ArchiveError(Exception):
    """A refused archive operation, with a message a lab user can act on."""

    def __init__(self, message: str, status: int = 409) -> None:
        super().__init__(message)
        self.status = status


class NotFound(ArchiveError):
    def __init__(self, message: str) -> None:
        super().__init__(message, status=404)


# --------------------------------------------------------------------------------------------
# Canonical JSON, digests, signatures


def canonical_json(obj: Any) -> bytes:
    """Canonical bytes of a JSON-compatible value (see the module docstring).

    Raises ValueError naming the offending path for NaN/infinity or non-JSON types, because a
    record that cannot round-trip exactly cannot be verified years later.
    """
    _check_finite(obj, "$")
    try:
        return _dumps(obj)
    except TypeError as exc:
        raise ValueError(f"record is not plain JSON data: {exc}") from None


def _dumps(obj: Any) -> bytes:
    # The canonical form itself; allow_nan=False still refuses NaN/inf, without naming the path.
    return json.dumps(
        obj, sort_keys=True, ensure_ascii=False, separators=(",", ":"), allow_nan=False
    ).encode("utf-8")


def _refuse_constant(name: str) -> float:
    raise ValueError(f"{name} is not allowed in a canonical record")


def parse_record(data: bytes | str) -> Any:
    """Parse stored canonical JSON (refusing NaN/Infinity tokens that json.loads would accept)."""
    return json.loads(data, parse_constant=_refuse_constant)


def _check_finite(obj: Any, path: str) -> None:
    kind = type(obj)
    if kind is str or kind is int or kind is bool or obj is None:
        return
    if kind is float:
        if not math.isfinite(obj):
            raise ValueError(f"record field {path} is {obj!r}; JSON records cannot hold NaN/inf")
    elif isinstance(obj, float):
        _check_finite(float(obj), path)
    elif isinstance(obj, Mapping):
        for key, value in obj.items():
            if not isinstance(key, str):
                raise ValueError(f"record field {path} has a non-string key {key!r}")
            _check_finite(value, f"{path}.{key}")
    elif isinstance(obj, list | tuple):
        for index, value in enumerate(obj):
            _check_finite(value, f"{path}[{index}]")


def record_sha256(obj: Any) -> str:
    return sha256_hex(canonical_json(obj))


class LabKey:
    """The laboratory's Ed25519 signing key (RFC 8032), kept in the instance folder."""

    PRIVATE_NAME = "lab_ed25519_private.pem"
    PUBLIC_NAME = "lab_ed25519_public.pem"

    def __init__(self, private_key: Ed25519PrivateKey) -> None:
        self._private = private_key
        self.public_raw: bytes = private_key.public_key().public_bytes(
            serialization.Encoding.Raw, serialization.PublicFormat.Raw
        )
        self.key_id: str = sha256_hex(self.public_raw)[:16]

    @classmethod
    def load_or_create(cls, key_dir: str | os.PathLike[str]) -> LabKey:
        """Load the lab key, creating it (readable by the owner only) on first start."""
        key_dir = Path(key_dir)
        key_dir.mkdir(parents=True, exist_ok=True)
        private_path = key_dir / cls.PRIVATE_NAME
        if private_path.exists():
            loaded = serialization.load_pem_private_key(private_path.read_bytes(), password=None)
            if not isinstance(loaded, Ed25519PrivateKey):
                raise ArchiveError(f"{private_path} does not hold an Ed25519 private key")
            key = cls(loaded)
        else:
            key = cls(Ed25519PrivateKey.generate())
            pem = key._private.private_bytes(
                serialization.Encoding.PEM,
                serialization.PrivateFormat.PKCS8,
                serialization.NoEncryption(),
            )
            _write_exclusive(private_path, pem, mode=0o600)
            logger.info("created lab signing key %s in %s", key.key_id, key_dir)
        public_path = key_dir / cls.PUBLIC_NAME
        if not public_path.exists():
            _write_exclusive(public_path, key.public_pem().encode("ascii"), mode=0o644)
        return key

    def sign(self, data: bytes) -> str:
        return self._private.sign(data).hex()

    def public_pem(self) -> str:
        return (
            self._private.public_key()
            .public_bytes(
                serialization.Encoding.PEM, serialization.PublicFormat.SubjectPublicKeyInfo
            )
            .decode("ascii")
        )

    def public_info(self) -> dict[str, str]:
        return {
            "algorithm": "Ed25519",
            "key_id": self.key_id,
            "public_key_hex": self.public_raw.hex(),
            "public_key_pem": self.public_pem(),
        }


def _write_exclusive(path: Path, data: bytes, mode: int) -> None:
    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, mode)
    with os.fdopen(fd, "wb") as handle:
        handle.write(data)
        handle.flush()
        os.fsync(handle.fileno())


def verify_signature(public_raw: bytes, data: bytes, signature_hex: str) -> bool:
    """True if ``signature_hex`` is a valid Ed25519 signature of ``data`` (RFC 8032 5.1.7)."""
    try:
        public = Ed25519PublicKey.from_public_bytes(public_raw)
    except ValueError:
        return False
    return _signature_ok(public, data, signature_hex)


def _signature_ok(public: Ed25519PublicKey, data: bytes, signature_hex: str) -> bool:
    try:
        public.verify(bytes.fromhex(signature_hex), data)
    except (InvalidSignature, ValueError):
        return False
    return True


def software_versions() -> dict[str, str]:
    """Versions of everything that decides the numbers of an analysis."""
    versions = {"python": platform.python_version()}
    for package in ("coldcert", "numpy", "scipy", "emcee"):
        try:
            versions[package] = importlib_metadata.version(package)
        except importlib_metadata.PackageNotFoundError:
            versions[package] = "unknown"
    return versions


# --------------------------------------------------------------------------------------------
# Reports


@dataclass(frozen=True)
class Check:
    """One verification step: what was checked, whether it passed, and why not."""

    what: str
    ok: bool
    detail: str


@dataclass(frozen=True)
class VerifyReport:
    certificate_id: str
    state: str
    sequence: int | None
    valid: bool
    checks: tuple[Check, ...]

    def as_dict(self) -> dict[str, Any]:
        return {
            "certificate_id": self.certificate_id,
            "state": self.state,
            "sequence": self.sequence,
            "valid": self.valid,
            "checks": [asdict(c) for c in self.checks],
            "problems": [c.detail for c in self.checks if not c.ok],
        }


@dataclass(frozen=True)
class Mismatch:
    path: str
    archived: Any
    reproduced: Any


@dataclass(frozen=True)
class ReproduceReport:
    certificate_id: str
    seed: int
    identical: bool
    numbers_compared: int
    mismatches: tuple[Mismatch, ...]
    software_recorded: dict[str, str]
    software_now: dict[str, str]
    skipped_paths: tuple[str, ...] = field(default_factory=tuple)
    files_compared: int = 0

    @property
    def same_software(self) -> bool:
        return self.software_recorded == self.software_now

    def as_dict(self) -> dict[str, Any]:
        return {
            "certificate_id": self.certificate_id,
            "seed": self.seed,
            "identical": self.identical,
            "numbers_compared": self.numbers_compared,
            "files_compared": self.files_compared,
            "mismatches": [asdict(m) for m in self.mismatches],
            "software_recorded": self.software_recorded,
            "software_now": self.software_now,
            "same_software": self.same_software,
            "skipped_paths": list(self.skipped_paths),
        }


def numeric_leaves(obj: Any, path: str = "") -> dict[str, Any]:
    """Every number (and null where a number may stand) in a JSON value, keyed by its path."""
    out: dict[str, Any] = {}
    if isinstance(obj, bool) or isinstance(obj, str):
        return out
    if obj is None or isinstance(obj, int | float):
        out[path or "$"] = obj
    elif isinstance(obj, Mapping):
        for key, value in obj.items():
            out.update(numeric_leaves(value, f"{path}.{key}" if path else str(key)))
    elif isinstance(obj, list | tuple):
        for index, value in enumerate(obj):
            out.update(numeric_leaves(value, f"{path}[{index}]"))
    return out


def _same_number(a: Any, b: Any) -> bool:
    if a is None or b is None:
        return a is None and b is None
    # Bit for bit: the IEEE-754 binary64 values must be identical (float.hex is exact).
    return float(a).hex() == float(b).hex()


def compare_numbers(
    archived: Mapping[str, Any], reproduced: Mapping[str, Any], skip: Iterable[str] = ()
) -> tuple[int, tuple[Mismatch, ...]]:
    """Compare every number of two records; return (count compared, mismatches)."""
    skip = tuple(skip)

    def skipped(path: str) -> bool:
        return any(path == s or path.startswith(s + ".") or path.startswith(s + "[") for s in skip)

    left = {p: v for p, v in numeric_leaves(archived).items() if not skipped(p)}
    right = {p: v for p, v in numeric_leaves(reproduced).items() if not skipped(p)}
    mismatches = []
    for path in sorted(set(left) | set(right)):
        if path not in right:
            mismatches.append(Mismatch(path, left[path], "absent"))
        elif path not in left:
            mismatches.append(Mismatch(path, "absent", right[path]))
        elif not _same_number(left[path], right[path]):
            mismatches.append(Mismatch(path, left[path], right[path]))
    return len(set(left) | set(right)), tuple(mismatches)


# --------------------------------------------------------------------------------------------
# The archive


def user_ref(user: Mapping[str, Any]) -> dict[str, str]:
    return {"username": user["username"], "display_name": user.get("display_name") or ""}


def log_event(
    conn: Connection, actor: str, action: str, subject: str = "", detail: Mapping | None = None
) -> None:
    """Append to the event log (inside the caller's transaction, so it commits with the act)."""
    conn.execute(
        st.events.insert().values(
            at=utc_now(),
            actor=actor,
            action=action,
            subject=subject,
            detail_json=json.dumps(detail or {}, sort_keys=True),
        )
    )


class Archive:
    """Runs, certificates and the signed chain of one service instance."""

    def __init__(
        self,
        storage: Storage,
        key: LabKey,
        *,
        number_prefix: str = "CC",
        trusted_public_keys: Iterable[bytes] = (),
    ) -> None:
        self.storage = storage
        self.key = key
        self.number_prefix = number_prefix
        # Keys the lab used before a key rotation still verify their old entries.
        self.public_keys = {key.key_id: key.public_raw}
        self._public_key_objects: dict[str, Ed25519PublicKey] = {}
        for raw in trusted_public_keys:
            self.public_keys[sha256_hex(raw)[:16]] = raw

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
            digest = self.storage.blobs.put(data)
            self._register_blob(conn, digest, len(data))
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

    def _register_blob(self, conn: Connection, digest: str, size: int | None = None) -> None:
        exists = conn.execute(select(st.blobs.c.sha256).where(st.blobs.c.sha256 == digest)).first()
        if exists is None:
            if size is None:
                size = self.storage.blobs.path(digest).stat().st_size
            conn.execute(st.blobs.insert().values(sha256=digest, size=size, stored_at=utc_now()))

    def presentation(self, plots_sha256: str | None) -> tuple[dict[str, str], list[str]]:
        """(plots, extra HTML sections) kept with a certificate for its renderings."""
        if not plots_sha256:
            return {}, []
        stored = json.loads(self.storage.blobs.get(plots_sha256))
        return dict(stored.get("plots") or {}), list(stored.get("html_sections") or [])

    def plots(self, plots_sha256: str | None) -> dict[str, str]:
        return self.presentation(plots_sha256)[0]

    def run_files(self, conn: Connection, run_id: str) -> list[dict[str, Any]]:
        rows = conn.execute(
            select(st.run_files.c.name, st.run_files.c.sha256, st.run_files.c.size)
            .where(st.run_files.c.run_id == run_id)
            .order_by(st.run_files.c.name)
        ).all()
        return [dict(r._mapping) for r in rows]

    def materialise_run(self, files: Iterable[Mapping[str, Any]], folder: Path) -> Path:
        """Write a run's archived raw files into ``folder`` (for re-analysis)."""
        for entry in files:
            target = (folder / entry["name"]).resolve()
            if folder.resolve() not in target.parents:
                raise ArchiveError(f"archived file name {entry['name']!r} escapes the run folder")
            target.parent.mkdir(parents=True, exist_ok=True)
            data = self.storage.blobs.get(entry["sha256"])
            if sha256_hex(data) != entry["sha256"]:
                raise ArchiveError(
                    f"stored raw file {entry['name']} no longer matches its SHA-256 "
                    f"{entry['sha256']}; the archive copy is damaged"
                )
            target.write_bytes(data)
        return folder

    # ---- drafts -----------------------------------------------------------------------------

    def _new_number(self, conn: Connection) -> str:
        year = utc_now()[:4]
        n = self.storage.next_counter(conn, f"certificate-number-{year}")
        return f"{self.number_prefix}-{year}-{n:05d}"

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
        html_sections: Iterable[str] = (),
        extras: Mapping[str, Mapping[str, Any]] | None = None,
    ) -> str:
        """Store a draft certificate made from an analysis record; return its id.

        The service numbers certificates itself (unique, sequential per year); an identifier the
        analysis derived from its inputs is kept as ``analysis_id``.
        """
        run = conn.execute(select(st.runs).where(st.runs.c.id == run_id)).first()
        if run is None:
            raise NotFound(f"run {run_id} not found")
        if replaces:
            old = self._row(conn, replaces)
            if old.state != "issued":
                raise ArchiveError(
                    f"{replaces} is {old.state}; only an issued certificate can be amended"
                )
            number, revision = old.number, old.revision + 1
            cert_id = f"{number}-R{revision}"
            if not amendment_reason:
                raise ArchiveError("an amendment must say why it replaces the earlier revision")
        else:
            number, revision = self._new_number(conn), 1
            cert_id = number
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
        html_sections = [str(section) for section in html_sections]
        if plots or html_sections:
            # Figures and job-specific HTML sections: not part of the record, but part of how it
            # is shown, so they are kept (and named in the signed entry) for renderings later.
            presentation = {"plots": dict(plots or {}), "html_sections": html_sections}
            plots_sha256 = self.storage.blobs.put(canonical_json(presentation))
            self._register_blob(conn, plots_sha256)
        extras = {name: dict(entry) for name, entry in (extras or {}).items()}
        for name, data in sorted((extra_files or {}).items()):
            digest = self.storage.blobs.put(data)
            self._register_blob(conn, digest, len(data))
            extras[name] = {"sha256": digest, "size": len(data)}
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
            old = self._row(conn, certificate_id)
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
            earlier = set(record.get("corrected_fields") or [])
            for key in SERVICE_FIELDS:
                if key != "analysis_id":
                    record.pop(key, None)
            _apply_corrections(record, corrections)
            record["corrected_fields"] = sorted(earlier | set(corrections))
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
            row = self._row(conn, certificate_id)
            if row.state != "draft":
                raise ArchiveError(
                    f"{certificate_id} is {row.state}; an issued certificate is changed only by "
                    "an amendment (a new revision)"
                )
            record = json.loads(row.record_json)
            _apply_corrections(record, corrections)
            earlier = set(record.get("corrected_fields") or [])
            record["corrected_fields"] = sorted(earlier | set(corrections))
            item = (record.get("item") or {}).get("identifier") or row.item
            conn.execute(
                st.certificates.update()
                .where(st.certificates.c.id == certificate_id)
                .values(record_json=canonical_json(record).decode("utf-8"), item=item)
            )
            log_event(
                conn, user["username"], "certificate.corrected", certificate_id,
                {"fields": sorted(corrections)},
            )
        return missing_for_issue(record)

    # ---- issue / withdraw -------------------------------------------------------------------

    def _row(self, conn: Connection, certificate_id: str):
        row = conn.execute(
            select(st.certificates).where(st.certificates.c.id == certificate_id)
        ).first()
        if row is None:
            raise NotFound(f"certificate {certificate_id} not found")
        return row

    def _user(self, conn: Connection, user_id: int) -> dict[str, Any]:
        row = conn.execute(select(st.users).where(st.users.c.id == user_id)).first()
        return dict(row._mapping) if row is not None else {"username": "?", "display_name": ""}

    def _append(
        self, conn: Connection, entry_type: str, certificate_id: str, body: Mapping[str, Any]
    ) -> tuple[int, str]:
        # The counter row lock serialises appends on servers; on SQLite the write transaction
        # (BEGIN IMMEDIATE) already does.
        sequence = self.storage.next_counter(conn, "chain")
        if sequence == 1:
            previous = GENESIS_SHA256
        else:
            prev_row = conn.execute(
                select(st.chain.c.sha256).where(st.chain.c.sequence == sequence - 1)
            ).first()
            if prev_row is None:
                raise ArchiveError(f"chain entry {sequence - 1} is missing; run verify", 500)
            previous = prev_row.sha256
        recorded_at = utc_now()
        entry = {
            "format": SIGNED_RECORD_FORMAT,
            "sequence": sequence,
            "entry_type": entry_type,
            "previous_sha256": previous,
            "recorded_at": recorded_at,
            "key_id": self.key.key_id,
            "body": body,
        }
        data = canonical_json(entry)
        digest = sha256_hex(data)
        conn.execute(
            st.chain.insert().values(
                sequence=sequence,
                entry_type=entry_type,
                certificate_id=certificate_id,
                entry_json=data.decode("utf-8"),
                sha256=digest,
                previous_sha256=previous,
                signature=self.key.sign(data),
                key_id=self.key.key_id,
                recorded_at=recorded_at,
            )
        )
        return sequence, digest

    def issue(self, certificate_id: str, approver: Mapping[str, Any]) -> dict[str, Any]:
        """Issue a draft: four-eyes check, sign, chain, and supersede the revision it replaces."""
        with self.storage.write() as conn:
            row = self._row(conn, certificate_id)
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
                old = self._row(conn, row.replaces)
                if old.state != "issued":
                    raise ArchiveError(
                        f"{row.replaces} is {old.state}; this amendment can no longer be issued"
                    )
            issued_at = utc_now()
            record = json.loads(row.record_json)
            missing = missing_for_issue(record)
            if missing:
                # ISO/IEC 17025:2017 7.8.2.1: a draft may be incomplete, an issued one may not.
                raise ArchiveError(
                    f"{certificate_id} cannot be issued: it does not state "
                    + "; ".join(f"{m['what']} ({m['field']})" for m in missing)
                    + ". Correct the draft first (its page, or POST "
                    f"/api/certificates/{certificate_id}/corrections)",
                    409,
                )
            record["state"] = "issued"
            record.setdefault("dates", {})["issued"] = issued_at[:10]
            record.setdefault("people", {})["approver"] = (
                approver.get("display_name") or approver["username"]
            )
            submitter = self._user(conn, row.submitted_by)
            body = {
                "certificate_id": certificate_id,
                "revision": row.revision,
                "replaces": row.replaces,
                "amendment_reason": row.amendment_reason,
                "issued_at": issued_at,
                "approved_by": user_ref(approver),
                "submitted_by": user_ref(submitter),
                "run": {
                    "id": row.run_id,
                    "kind": row.kind,
                    "item": row.item,
                    "files": self.run_files(conn, row.run_id),
                },
                "analysis": {
                    "seed": row.seed,
                    "software": json.loads(row.software_json),
                    "options": json.loads(row.options_json),
                },
                "plots_sha256": row.plots_sha256,
                "extra_files": json.loads(row.extras_json),
                "certificate": record,
            }
            sequence, digest = self._append(conn, "issue", certificate_id, body)
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

    def withdraw(self, certificate_id: str, user: Mapping[str, Any], reason: str) -> dict:
        """Withdraw an issued certificate (a signed chain entry) or discard a draft."""
        reason = (reason or "").strip()
        if not reason:
            raise ArchiveError("give the reason for the withdrawal", 400)
        with self.storage.write() as conn:
            row = self._row(conn, certificate_id)
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
                result["sequence"], result["sha256"] = self._append(
                    conn, "withdrawal", certificate_id, body
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

    # ---- reading ----------------------------------------------------------------------------

    def get(self, certificate_id: str) -> dict[str, Any]:
        """Certificate metadata plus its record (the signed copy once issued)."""
        with self.storage.read() as conn:
            row = self._row(conn, certificate_id)
            info = dict(row._mapping)
            record = json.loads(info.pop("record_json"))
            info["software"] = json.loads(info.pop("software_json"))
            info["options"] = json.loads(info.pop("options_json"))
            info["extra_files"] = json.loads(info.pop("extras_json"))
            entry = None
            if row.sequence is not None:
                chain_row = conn.execute(
                    select(st.chain).where(st.chain.c.sequence == row.sequence)
                ).one()
                entry = json.loads(chain_row.entry_json)
                record = entry["body"]["certificate"]
                info["sha256"] = chain_row.sha256
                info["previous_sha256"] = chain_row.previous_sha256
                info["signature"] = chain_row.signature
            info["submitted_by"] = self._user(conn, row.submitted_by)["username"]
            info["issued_by"] = (
                self._user(conn, row.issued_by)["username"] if row.issued_by else None
            )
            info["files"] = self.run_files(conn, row.run_id)
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

    def signed_entry(self, certificate_id: str) -> dict[str, Any]:
        """The issued entry with its digest, signature and public key, for offline checking."""
        with self.storage.read() as conn:
            row = self._row(conn, certificate_id)
            if row.sequence is None:
                raise ArchiveError(f"{certificate_id} is a {row.state} and carries no signature")
            chain_row = conn.execute(
                select(st.chain).where(st.chain.c.sequence == row.sequence)
            ).one()
        return {
            "entry": json.loads(chain_row.entry_json),
            "sha256": chain_row.sha256,
            "signature": chain_row.signature,
            "public_key_hex": self.public_keys.get(chain_row.key_id, b"").hex(),
        }

    def search(
        self,
        *,
        item: str | None = None,
        kind: str | None = None,
        state: str | None = None,
        date_from: str | None = None,
        date_to: str | None = None,
        text: str | None = None,
        limit: int = 200,
    ) -> list[dict[str, Any]]:
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
        with self.storage.read() as conn:
            return [dict(r._mapping) for r in conn.execute(query).all()]

    def events(self, subject: str | None = None, limit: int = 500) -> list[dict[str, Any]]:
        query = select(st.events).order_by(st.events.c.id.desc()).limit(limit)
        if subject:
            query = query.where(st.events.c.subject == subject)
        with self.storage.read() as conn:
            rows = conn.execute(query).all()
        return [{**dict(r._mapping), "detail": json.loads(r.detail_json)} for r in rows]

    # ---- verify -----------------------------------------------------------------------------

    def _check_entry(
        self, row, expected_previous: str, expected_sequence: int
    ) -> tuple[list[Check], dict[str, Any] | None]:
        label = f"chain entry {row.sequence} ({row.entry_type} of {row.certificate_id})"
        checks = []
        data = row.entry_json.encode("utf-8")
        digest = sha256_hex(data)
        checks.append(
            Check(
                "hash",
                digest == row.sha256,
                f"{label}: content SHA-256 matches the recorded {row.sha256[:16]}…"
                if digest == row.sha256
                else f"{label}: content SHA-256 {digest} does not match the recorded "
                f"{row.sha256}; the record was altered after it was signed",
            )
        )
        try:
            entry = parse_record(data)
            canonical = _dumps(entry) == data
        except (ValueError, TypeError):
            entry, canonical = None, False
        if not canonical:
            checks.append(Check("canonical", False, f"{label}: stored text is not canonical JSON"))
        public = self._public_key_objects.get(row.key_id)
        if public is None and row.key_id in self.public_keys:
            public = Ed25519PublicKey.from_public_bytes(self.public_keys[row.key_id])
            self._public_key_objects[row.key_id] = public
        signed = public is not None and _signature_ok(public, data, row.signature)
        checks.append(
            Check(
                "signature",
                signed,
                f"{label}: Ed25519 signature valid (key {row.key_id})"
                if signed
                else f"{label}: Ed25519 signature does not verify with lab key {row.key_id}"
                + ("" if public is not None else " (key unknown to this archive)"),
            )
        )
        linked = row.previous_sha256 == expected_previous and (
            entry is None or entry.get("previous_sha256") == expected_previous
        )
        checks.append(
            Check(
                "chain",
                linked,
                f"{label}: links to the previous entry"
                if linked
                else f"{label}: names previous SHA-256 "
                f"{(entry or {}).get('previous_sha256', row.previous_sha256)}, but entry "
                f"{row.sequence - 1} has {expected_previous}; the chain is broken here",
            )
        )
        if entry is not None and entry.get("sequence") != expected_sequence:
            checks.append(
                Check(
                    "chain",
                    False,
                    f"{label}: signed sequence {entry.get('sequence')} differs from its "
                    f"position {expected_sequence}",
                )
            )
        return checks, entry

    def verify_chain(
        self, upto: int | None = None, files_out: list[tuple[str, list]] | None = None
    ) -> list[Check]:
        """Check every chain entry from the first up to ``upto`` (all if None).

        If ``files_out`` is given, the raw-file lists of the issue entries are appended to it, so
        that a whole-archive check parses each entry only once.
        """
        query = select(st.chain).order_by(st.chain.c.sequence)
        if upto is not None:
            query = query.where(st.chain.c.sequence <= upto)
        checks: list[Check] = []
        previous = GENESIS_SHA256
        expected = 1
        with self.storage.read() as conn:
            for row in conn.execute(query):
                if row.sequence != expected:
                    checks.append(Check("chain", False, f"chain entry {expected} is missing"))
                entry_checks, entry = self._check_entry(row, previous, expected)
                checks.extend(entry_checks)
                if files_out is not None and entry is not None and row.entry_type == "issue":
                    body = entry.get("body") or {}
                    files = list((body.get("run") or {}).get("files") or [])
                    files_out.append((row.certificate_id, files + _derived_files(body)))
                previous, expected = row.sha256, row.sequence + 1
        if upto is not None and expected <= upto:
            checks.append(Check("chain", False, f"chain ends at {expected - 1}, before {upto}"))
        return checks

    def _check_files(self, files: Iterable[Mapping[str, Any]], cache: dict) -> list[Check]:
        checks = []
        for entry in files:
            digest = entry["sha256"]
            if digest not in cache:
                cache[digest] = self.storage.blobs.digest_on_disk(digest)
            found = cache[digest]
            if found is None:
                checks.append(
                    Check("raw file", False, f"raw file {entry['name']} ({digest}) is missing")
                )
            elif found != digest:
                checks.append(
                    Check(
                        "raw file",
                        False,
                        f"raw file {entry['name']} has SHA-256 {found} but was archived as "
                        f"{digest}; the stored file was altered",
                    )
                )
            else:
                checks.append(Check("raw file", True, f"raw file {entry['name']} intact"))
        return checks

    def verify(self, certificate_id: str) -> VerifyReport:
        """Signature, chain up to the record, stored raw files, and lifecycle consistency."""
        with self.storage.read() as conn:
            row = self._row(conn, certificate_id)
            files = self.run_files(conn, row.run_id)
            entries = conn.execute(
                select(st.chain)
                .where(st.chain.c.certificate_id == certificate_id)
                .order_by(st.chain.c.sequence)
            ).all()
            replaced_by = (
                conn.execute(
                    select(st.chain.c.sequence, st.chain.c.entry_json).where(
                        st.chain.c.entry_type == "issue"
                    )
                ).all()
                if row.state == "superseded"
                else []
            )
        checks: list[Check] = []
        if row.sequence is None:
            checks.append(
                Check(
                    "state",
                    row.state in ("draft", "withdrawn") and not entries,
                    f"{certificate_id} is a {row.state} that was never issued; nothing is signed"
                    if not entries
                    else f"{certificate_id} has chain entries but the database says it was never "
                    "issued",
                )
            )
            checks.extend(self._check_files(files, {}))
        else:
            last = max([row.sequence] + [e.sequence for e in entries])
            checks.extend(self.verify_chain(upto=last))
            issue_rows = [e for e in entries if e.entry_type == "issue"]
            if not issue_rows or issue_rows[0].sequence != row.sequence:
                checks.append(
                    Check("state", False, f"no issue entry {row.sequence} for {certificate_id}")
                )
            else:
                try:
                    body = json.loads(issue_rows[0].entry_json)["body"]
                except (ValueError, KeyError):
                    body = {}
                signed_files = body.get("run", {}).get("files", [])
                if [dict(f) for f in signed_files] != files:
                    checks.append(
                        Check(
                            "raw file",
                            False,
                            "the run's file list in the database differs from the signed record",
                        )
                    )
                checks.extend(self._check_files(signed_files, {}))
                checks.extend(self._check_files(_derived_files(body), {}))
                db_record = json.loads(row.record_json)
                same = canonical_json(db_record) == canonical_json(body.get("certificate"))
                checks.append(
                    Check(
                        "record",
                        same,
                        "database copy of the record equals the signed record"
                        if same
                        else "database copy of the record differs from the signed record "
                        "(the signed record is authoritative)",
                    )
                )
            withdrawn = any(e.entry_type == "withdrawal" for e in entries)
            consistent = (row.state == "withdrawn") == withdrawn and row.state in (
                "issued",
                "superseded",
                "withdrawn",
            )
            if row.state == "superseded":
                successor_signed = any(
                    json.loads(e.entry_json)["body"].get("replaces") == certificate_id
                    for e in replaced_by
                )
                consistent = consistent and successor_signed
            checks.append(
                Check(
                    "state",
                    consistent,
                    f"state '{row.state}' agrees with the chain"
                    if consistent
                    else f"state '{row.state}' disagrees with the signed chain entries",
                )
            )
        return VerifyReport(
            certificate_id=certificate_id,
            state=row.state,
            sequence=row.sequence,
            valid=all(c.ok for c in checks),
            checks=tuple(checks),
        )

    def verify_all(self) -> tuple[bool, list[Check]]:
        """The whole chain plus every raw file it names (each blob hashed once)."""
        named: list[tuple[str, list]] = []
        checks = [c for c in self.verify_chain(files_out=named) if not c.ok]
        cache: dict[str, str | None] = {}
        for certificate_id, files in named:
            for check in self._check_files(files, cache):
                if not check.ok:
                    checks.append(Check(check.what, False, f"{certificate_id}: {check.detail}"))
        return (not checks), checks

    # ---- reproduce --------------------------------------------------------------------------

    def reproduce(
        self,
        certificate_id: str,
        certify: Callable[..., Mapping[str, Any]],
        load_run: Callable[[Path], Any],
        progress: Callable[[float, str], None] | None = None,
    ) -> ReproduceReport:
        """Re-run the archived analysis on the archived raw data and compare every number."""
        info = self.get(certificate_id)
        record = info["record"]
        with tempfile.TemporaryDirectory(prefix="coldcert-reproduce-") as tmp:
            folder = self.materialise_run(info["files"], Path(tmp) / "run")
            run = load_run(folder)
            output = analysis_output(certify(run, info["seed"], progress, **info["options"]))
            fresh, fresh_files = output.record, output.extra_files
        skip = list(SERVICE_FIELDS) + ["dates.issued", "people.approver"]
        skip += list(record.get("corrected_fields") or [])
        count, mismatches = compare_numbers(record, fresh, skip)
        # Output files (calibration tables, cycle lists) must come back byte for byte as well.
        archived_files = {k: v["sha256"] for k, v in info["extra_files"].items()}
        fresh_digests = {k: sha256_hex(v) for k, v in fresh_files.items()}
        file_mismatches = tuple(
            Mismatch(
                f"file {name}",
                archived_files.get(name, "absent"),
                fresh_digests.get(name, "absent"),
            )
            for name in sorted(set(archived_files) | set(fresh_digests))
            if archived_files.get(name) != fresh_digests.get(name)
        )
        mismatches = mismatches + file_mismatches
        return ReproduceReport(
            certificate_id=certificate_id,
            seed=info["seed"],
            identical=not mismatches,
            numbers_compared=count,
            mismatches=mismatches,
            files_compared=len(set(archived_files) | set(fresh_digests)),
            software_recorded=info["software"],
            software_now=software_versions(),
            skipped_paths=tuple(skip),
        )


@dataclass(frozen=True)
class AnalysisOutput:
    record: dict[str, Any]
    plots: dict[str, str]
    extra_files: dict[str, bytes]
    html_sections: list[str]


def analysis_output(result: Any) -> AnalysisOutput:
    """What an analysis returned: a record dict, or an object with ``record`` and optionally
    ``plots``, ``extra_files`` and ``html_sections``."""
    if isinstance(result, Mapping):
        return AnalysisOutput(dict(result), {}, {}, [])
    return AnalysisOutput(
        dict(result.record),
        dict(getattr(result, "plots", None) or {}),
        dict(getattr(result, "extra_files", None) or {}),
        list(getattr(result, "html_sections", None) or []),
    )


def _derived_files(body: Mapping[str, Any]) -> list[dict[str, Any]]:
    """The stored outputs a signed entry names besides the raw files: plots and extra files."""
    files = []
    if body.get("plots_sha256"):
        files.append({"name": "plots of the certificate", "sha256": body["plots_sha256"]})
    for name, entry in sorted((body.get("extra_files") or {}).items()):
        files.append({"name": f"output file {name}", "sha256": entry["sha256"]})
    return files


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
