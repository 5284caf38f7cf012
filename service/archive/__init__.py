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

    @classmethod
    def load_for_reading(cls, key_dir: str | os.PathLike[str]) -> LabKey | PublicLabKey:
        """The lab key of a read-only archive copy: the private key if the copy has it, else
        only the public key (all that verifying needs); nothing is created."""
        key_dir = Path(key_dir)
        private_path = key_dir / cls.PRIVATE_NAME
        if private_path.is_file():
            loaded = serialization.load_pem_private_key(private_path.read_bytes(), password=None)
            if isinstance(loaded, Ed25519PrivateKey):
                return cls(loaded)
        public_path = key_dir / cls.PUBLIC_NAME
        if not public_path.is_file():
            raise ArchiveError(
                f"{key_dir} holds neither the lab's private nor its public key "
                f"({cls.PUBLIC_NAME}); verification needs the public key"
            )
        public = serialization.load_pem_public_key(public_path.read_bytes())
        if not isinstance(public, Ed25519PublicKey):
            raise ArchiveError(f"{public_path} does not hold an Ed25519 public key")
        return PublicLabKey(public)


class PublicLabKey:
    """The lab's public key alone: verifies, never signs (a read-only archive copy)."""

    def __init__(self, public: Ed25519PublicKey) -> None:
        self._public = public
        self.public_raw: bytes = public.public_bytes(
            serialization.Encoding.Raw, serialization.PublicFormat.Raw
        )
        self.key_id: str = sha256_hex(self.public_raw)[:16]

    def sign(self, data: bytes) -> str:
        raise ArchiveError("this archive copy is open read-only and holds no signing key", 503)

    def public_pem(self) -> str:
        return self._public.public_bytes(
            serialization.Encoding.PEM, serialization.PublicFormat.SubjectPublicKeyInfo
        ).decode("ascii")

    public_info = LabKey.public_info


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


@dataclass
class SignedFacts:
    """What the signed chain entries say about certificates (filled while scanning the chain)."""

    #: certificate id -> (sequence, body) of its issue entry
    issues: dict[str, tuple[int, dict[str, Any]]] = field(default_factory=dict)
    #: certificate id -> (sequence, body) of its withdrawal entry
    withdrawals: dict[str, tuple[int, dict[str, Any]]] = field(default_factory=dict)
    #: certificate id -> id of the issued revision that replaces it
    successors: dict[str, str] = field(default_factory=dict)
    #: sequences of entries that failed a check (their content cannot be trusted)
    damaged: list[int] = field(default_factory=list)
    checks_by_sequence: dict[int, list[Check]] = field(default_factory=dict)
    naming: dict[str, list[int]] = field(default_factory=dict)
    last: int = 0

    def add(self, sequence: int, entry: Mapping[str, Any]) -> None:
        body = entry.get("body")
        if not isinstance(body, dict):
            return
        cid = body.get("certificate_id")
        if not isinstance(cid, str):
            return
        self.naming.setdefault(cid, []).append(sequence)
        if entry.get("entry_type") == "issue":
            self.issues.setdefault(cid, (sequence, body))
            replaces = body.get("replaces")
            if isinstance(replaces, str):
                self.successors[replaces] = cid
                self.naming.setdefault(replaces, []).append(sequence)
        elif entry.get("entry_type") == "withdrawal":
            self.withdrawals.setdefault(cid, (sequence, body))

    def sequences_naming(self, certificate_id: str) -> list[int]:
        return list(self.naming.get(certificate_id, []))


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


def _loads_or(text: str | None) -> Any:
    """A JSON column's value, or a marker that it does not parse (so it compares unequal)."""
    try:
        return json.loads(text) if text is not None else None
    except ValueError:
        return ("unparsable", text)


def _short(value: Any) -> str:
    text = repr(value) if not isinstance(value, dict | list) else json.dumps(value, sort_keys=True)
    return text if len(text) <= 80 else text[:77] + "…"


class IntegrityError(ArchiveError):
    """Stored data that fails its check against the signed entry when read (HTTP 409)."""

    def __init__(self, message: str) -> None:
        super().__init__(
            message + "; nothing is shown from it — an auditor should run verify", status=409
        )


def _signed_view(body: Mapping[str, Any]) -> dict[str, Any]:
    """The fields of a certificate's metadata that an issue entry signs, taken from it."""
    run = body.get("run") or {}
    analysis = body.get("analysis") or {}
    view = {
        "revision": body.get("revision"),
        "replaces": body.get("replaces"),
        "amendment_reason": body.get("amendment_reason"),
        "issued_at": body.get("issued_at"),
        "issued_by": (body.get("approved_by") or {}).get("username"),
        "submitted_by": (body.get("submitted_by") or {}).get("username"),
        "run_id": run.get("id"),
        "kind": run.get("kind"),
        "item": run.get("item"),
        "files": [dict(f) for f in run.get("files") or []],
        "seed": analysis.get("seed"),
        "software": analysis.get("software"),
        "options": analysis.get("options"),
        "plots_sha256": body.get("plots_sha256"),
        "extra_files": body.get("extra_files") or {},
    }
    if "drafted_at" in body:
        view["created_at"] = body["drafted_at"]
    return view


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
        key: LabKey | None,
        *,
        number_prefix: str = "CC",
        trusted_public_keys: Iterable[bytes] = (),
    ) -> None:
        """``key`` is the lab's signing key; None for an analysis worker, which drafts but never
        signs (issuing and withdrawing stay with the process that holds the key)."""
        self.storage = storage
        self.key = key
        self.number_prefix = number_prefix
        # Keys the lab used before a key rotation still verify their old entries.
        self.public_keys = {key.key_id: key.public_raw} if key is not None else {}
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
                size = self.storage.blobs.size(digest)
            conn.execute(st.blobs.insert().values(sha256=digest, size=size, stored_at=utc_now()))

    def presentation(self, plots_sha256: str | None) -> tuple[dict[str, str], list[str]]:
        """(plots, extra HTML sections) kept with a certificate for its renderings."""
        if not plots_sha256:
            return {}, []
        stored = json.loads(self.checked_blob(plots_sha256, "the certificate's plots"))
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
        if self.key is None:
            raise ArchiveError("this process holds no signing key (an analysis worker cannot sign)", 500)
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
            run_submitter = self._user(conn, run.submitted_by)
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
                    "manifest": json.loads(run.manifest_json),
                    "submitted_by": user_ref(run_submitter),
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
    #
    # Everything a rendering, a download or a reproduction reads of an issued certificate comes
    # from its signed entry, whose hash and signature are checked on every read; stored blobs are
    # hashed on every read; the lifecycle state kept in the database is checked against the
    # signed entries that set it. A failed check refuses the read (IntegrityError, HTTP 409)
    # rather than show something the signature does not cover.

    def checked_blob(self, digest: str, what: str) -> bytes:
        """A stored blob's bytes, refused unless they still hash to ``digest``."""
        try:
            data = self.storage.blobs.get(digest)
        except (KeyError, ValueError):
            raise IntegrityError(f"{what} ({digest}) is missing from the blob folder") from None
        if sha256_hex(data) != digest:
            raise IntegrityError(f"{what} no longer matches its SHA-256 {digest}; it was altered")
        return data

    def _checked_entry(self, chain_row, certificate_id: str) -> dict[str, Any]:
        data = chain_row.entry_json.encode("utf-8")
        public = self._public_key(chain_row.key_id)
        if (
            public is None
            or sha256_hex(data) != chain_row.sha256
            or not _signature_ok(public, data, chain_row.signature)
        ):
            raise IntegrityError(
                f"{certificate_id}: chain entry {chain_row.sequence} fails its hash or signature "
                "check"
            )
        entry = parse_record(data)
        if not isinstance(entry, dict) or not isinstance(entry.get("body"), dict):
            raise IntegrityError(f"{certificate_id}: chain entry {chain_row.sequence} is malformed")
        return entry

    def _signed_issue(self, conn: Connection, row) -> tuple[Any, dict[str, Any]]:
        """The issue entry of an issued certificate, checked on this read."""
        chain_row = conn.execute(select(st.chain).where(st.chain.c.sequence == row.sequence)).first()
        if chain_row is None:
            raise IntegrityError(f"{row.id}: its signed entry {row.sequence} is missing")
        entry = self._checked_entry(chain_row, row.id)
        if (
            entry.get("entry_type") != "issue"
            or entry.get("sequence") != row.sequence
            or entry["body"].get("certificate_id") != row.id
        ):
            raise IntegrityError(f"{row.id}: chain entry {row.sequence} is not its issue entry")
        return chain_row, entry

    def _signed_lifecycle(self, conn: Connection, row) -> dict[str, Any]:
        """State, successor and withdrawal of an issued certificate, from its signed entries."""
        withdrawal = None
        for chain_row in conn.execute(
            select(st.chain)
            .where(st.chain.c.certificate_id == row.id)
            .where(st.chain.c.sequence != row.sequence)
        ):
            entry = self._checked_entry(chain_row, row.id)
            if entry["body"].get("certificate_id") != row.id:
                raise IntegrityError(f"{row.id}: chain entry {chain_row.sequence} names another certificate")
            if entry.get("entry_type") == "withdrawal":
                withdrawal = entry["body"]
        successor = None
        successor_row = conn.execute(
            select(st.certificates.c.id, st.certificates.c.sequence)
            .where(st.certificates.c.replaces == row.id)
            .where(st.certificates.c.sequence.is_not(None))
        ).first()
        if successor_row is not None:
            _, entry = self._signed_issue(conn, successor_row)
            if entry["body"].get("replaces") == row.id:
                successor = successor_row.id
        state = "withdrawn" if withdrawal else "superseded" if successor else "issued"
        lifecycle = {
            "state": state,
            "superseded_by": successor,
            "withdrawn_reason": withdrawal.get("reason") if withdrawal else None,
            "withdrawn_at": withdrawal.get("withdrawn_at") if withdrawal else None,
        }
        stored = {key: getattr(row, key) for key in lifecycle}
        if stored != lifecycle:
            differing = ", ".join(
                f"{key} {stored[key]!r} (signed: {lifecycle[key]!r})"
                for key in lifecycle
                if stored[key] != lifecycle[key]
            )
            raise IntegrityError(f"{row.id}: the database's lifecycle disagrees with the signed chain: {differing}")
        return lifecycle

    def get(self, certificate_id: str) -> dict[str, Any]:
        """Certificate metadata plus its record; once issued, everything from the signed entry."""
        with self.storage.read() as conn:
            row = self._row(conn, certificate_id)
            info = dict(row._mapping)
            record = json.loads(info.pop("record_json"))
            info["software"] = json.loads(info.pop("software_json"))
            info["options"] = json.loads(info.pop("options_json"))
            info["extra_files"] = json.loads(info.pop("extras_json"))
            # The queue's link to the job that drafted it is for the queue alone (one draft per
            # job); it is not under the signature, so readers are not shown it.
            info.pop("job_id", None)
            info["submitted_by"] = self._user(conn, row.submitted_by)["username"]
            info["issued_by"] = (
                self._user(conn, row.issued_by)["username"] if row.issued_by else None
            )
            info["files"] = self.run_files(conn, row.run_id)
            if row.sequence is not None:
                chain_row, entry = self._signed_issue(conn, row)
                body = entry["body"]
                record = body["certificate"]
                info.update(_signed_view(body))
                info.update(self._signed_lifecycle(conn, row))
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

    def signed_entry(self, certificate_id: str) -> dict[str, Any]:
        """The issued entry with its digest, signature and public key, for offline checking."""
        with self.storage.read() as conn:
            row = self._row(conn, certificate_id)
            if row.sequence is None:
                raise ArchiveError(f"{certificate_id} is a {row.state} and carries no signature")
            chain_row, entry = self._signed_issue(conn, row)
        return {
            "entry": entry,
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
    #
    # The signed entries are the truth; every other copy (the chain table's index columns, the
    # certificate row's state and columns, the run's row and file list) is compared with them.
    # The state a certificate should have is derived from the signed content alone: issued by
    # its issue entry, withdrawn by a withdrawal entry naming it, superseded by a later issue
    # entry that names it in "replaces". An entry whose own checks fail could hide any of those,
    # so it makes every certificate's verification fail, with the reason.

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
            canonical = isinstance(entry, dict) and _dumps(entry) == data
        except (ValueError, TypeError):
            entry, canonical = None, False
        if not canonical:
            checks.append(Check("canonical", False, f"{label}: stored text is not canonical JSON"))
            entry = entry if isinstance(entry, dict) else None
        public = self._public_key(row.key_id)
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
        if entry is not None:
            # The table's columns are indexes into the signed text; each must say the same.
            body = entry.get("body") if isinstance(entry.get("body"), dict) else {}
            signed_columns = {
                "entry_type": entry.get("entry_type"),
                "certificate_id": body.get("certificate_id"),
                "key_id": entry.get("key_id"),
                "recorded_at": entry.get("recorded_at"),
            }
            for column, signed_value in signed_columns.items():
                stored = getattr(row, column)
                if stored != signed_value:
                    checks.append(
                        Check(
                            "index",
                            False,
                            f"{label}: column {column} is {stored!r} but the signed entry says "
                            f"{signed_value!r}; the index was edited",
                        )
                    )
        return checks, entry

    def _public_key(self, key_id: str) -> Ed25519PublicKey | None:
        public = self._public_key_objects.get(key_id)
        if public is None and key_id in self.public_keys:
            public = Ed25519PublicKey.from_public_bytes(self.public_keys[key_id])
            self._public_key_objects[key_id] = public
        return public

    def _scan_chain(self, conn: Connection) -> tuple[list[Check], SignedFacts]:
        """Check every chain entry and gather what the signed entries say about certificates."""
        checks: list[Check] = []
        facts = SignedFacts()
        previous, expected = GENESIS_SHA256, 1
        for row in conn.execute(select(st.chain).order_by(st.chain.c.sequence)):
            if row.sequence != expected:
                checks.append(Check("chain", False, f"chain entry {expected} is missing"))
                facts.damaged.append(expected)
            entry_checks, entry = self._check_entry(row, previous, expected)
            checks.extend(entry_checks)
            facts.checks_by_sequence[row.sequence] = entry_checks
            if not all(c.ok for c in entry_checks) or entry is None:
                facts.damaged.append(row.sequence)
            if entry is not None:
                facts.add(row.sequence, entry)
            previous, expected = row.sha256, row.sequence + 1
        facts.last = expected - 1
        return checks, facts

    def _check_files(self, files: Iterable[Mapping[str, Any]], cache: dict) -> list[Check]:
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

    def _consistency(self, row, facts: SignedFacts, db: DatabaseCopies, blob_cache: dict) -> list[Check]:
        """Compare a certificate's database copies with what the signed chain says."""
        cid = row.id
        checks: list[Check] = []
        issue = facts.issues.get(cid)
        withdrawal = facts.withdrawals.get(cid)
        successor = facts.successors.get(cid)
        files = db.files.get(row.run_id, [])
        if issue is None:
            never = row.sequence is None and row.state in ("draft", "withdrawn")
            checks.append(
                Check(
                    "state",
                    never and withdrawal is None,
                    f"{cid} is a {row.state} that was never issued; nothing is signed"
                    if never and withdrawal is None
                    else f"{cid}: the database says '{row.state}' (sequence {row.sequence}) but "
                    "no signed issue entry names it",
                )
            )
            checks.extend(self._check_files(files, blob_cache))
            return checks
        sequence, body = issue
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
            "software_json": (_loads_or(row.software_json), analysis.get("software")),
            "options_json": (_loads_or(row.options_json), analysis.get("options")),
            "plots_sha256": (row.plots_sha256, body.get("plots_sha256")),
            "extras_json": (_loads_or(row.extras_json), body.get("extra_files") or {}),
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
                        f"{cid}: certificates.{column} is {_short(stored)} but the signed chain "
                        f"says {_short(signed)}; the signed entries are authoritative",
                    )
                )
        if not any(c.what == "state" for c in checks):
            checks.append(Check("state", True, f"state '{row.state}' agrees with the chain"))
        db_record = _loads_or(row.record_json)
        same = isinstance(db_record, dict) and canonical_json(db_record) == canonical_json(
            body.get("certificate")
        )
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
        signed_files = [dict(f) for f in run.get("files") or [] if isinstance(f, Mapping)]
        if signed_files != files:
            checks.append(
                Check(
                    "raw file",
                    False,
                    "the run's file list in the database differs from the signed record",
                )
            )
        run_row = db.runs.get(row.run_id)
        if run_row is None:
            checks.append(Check("database", False, f"{cid}: its run {row.run_id} is missing"))
        else:
            run_expected = {
                "kind": (run_row.kind, run.get("kind")),
                "item": (run_row.item, run.get("item")),
                "seed": (run_row.seed, analysis.get("seed")),
            }
            if "manifest" in run:
                run_expected["manifest_json"] = (_loads_or(run_row.manifest_json), run["manifest"])
            if "submitted_at" in run:
                run_expected["submitted_at"] = (run_row.submitted_at, run["submitted_at"])
            if "submitted_by" in run:
                run_expected["submitted_by"] = (
                    db.users.get(run_row.submitted_by),
                    (run["submitted_by"] or {}).get("username"),
                )
            if "replaces" in run:
                run_expected["replaces"] = (run_row.replaces, run["replaces"])
                run_expected["amendment_reason"] = (
                    run_row.amendment_reason,
                    run.get("amendment_reason"),
                )
            for column, (stored, signed) in run_expected.items():
                if stored != signed:
                    checks.append(
                        Check(
                            "database",
                            False,
                            f"{cid}: runs.{column} of {row.run_id} is {_short(stored)} but the "
                            f"signed entry says {_short(signed)}",
                        )
                    )
        checks.extend(self._check_files(signed_files, blob_cache))
        checks.extend(self._check_files(_derived_files(body), blob_cache))
        return checks

    def verify_chain(
        self, upto: int | None = None, files_out: list[tuple[str, list]] | None = None
    ) -> list[Check]:
        """Check every chain entry from the first up to ``upto`` (all if None)."""
        with self.storage.read() as conn:
            checks, facts = self._scan_chain(conn)
        if upto is not None:
            checks = [c for s, cs in facts.checks_by_sequence.items() if s <= upto for c in cs]
            if facts.last < upto:
                checks.append(Check("chain", False, f"chain ends at {facts.last}, before {upto}"))
        if files_out is not None:
            for cid, (_, body) in facts.issues.items():
                files = list((body.get("run") or {}).get("files") or [])
                files_out.append((cid, files + _derived_files(body)))
        return checks

    def verify(self, certificate_id: str) -> VerifyReport:
        """Signatures, chain, index columns, stored files and every database copy of one
        certificate, against the signed entries."""
        with self.storage.read() as conn:
            row = self._row(conn, certificate_id)
            chain_checks, facts = self._scan_chain(conn)
            checks: list[Check] = []
            issue = facts.issues.get(certificate_id)
            mine = facts.sequences_naming(certificate_id)
            last = max(mine + [row.sequence or 0])
            # Entries up to this certificate's last one: every check (they are what it rests on).
            for sequence in sorted(facts.checks_by_sequence):
                if sequence <= last:
                    checks.extend(facts.checks_by_sequence[sequence])
            if issue is None and row.sequence is not None and row.sequence > facts.last:
                checks.append(
                    Check("chain", False, f"chain ends at {facts.last}, before {row.sequence}")
                )
            # Later entries: a damaged one could hide a withdrawal or an amendment of this one.
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
            checks, facts = self._scan_chain(conn)
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
        with self.storage.blobs.scratch("reproduce") as tmp:
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
    extra = body.get("extra_files") if isinstance(body.get("extra_files"), Mapping) else {}
    for name, entry in sorted(extra.items()):
        digest = entry.get("sha256") if isinstance(entry, Mapping) else None
        files.append({"name": f"output file {name}", "sha256": digest})
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
