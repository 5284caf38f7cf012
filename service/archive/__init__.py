"""The audit archive: canonical records, a signed hash chain, lifecycle, verify and reproduce.

A certificate's record is a JSON document, kept in one canonical form whose SHA-256 identifies
it (:mod:`.canonical`). Issuing a certificate appends an *entry* to a chain: the entry holds the
full record, the raw files' SHA-256 digests, the seed and software versions of the analysis, who
submitted and who approved it, its sequence number and the SHA-256 of the entry before it; the
lab's Ed25519 key (RFC 8032, :mod:`.keys`) signs the entry's canonical bytes (:mod:`.chain`).
A withdrawal is an entry too, so it cannot be quietly undone. The lifecycle is draft → issued →
superseded | withdrawn (:mod:`.lifecycle`). Readers of an issued certificate get only what its
signed entry says, checked on every read (:mod:`.signed`, :mod:`.reading`); verify compares
every other copy with the signed entries (:mod:`.verify`); reproduce re-runs the analysis on the
archived raw data (:mod:`.reproduce`).

:class:`Archive` is the facade the web service, the queue and the CLI use: it holds one
instance's storage and keys and hands each call to the module that does it.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Mapping
from pathlib import Path
from typing import Any

from sqlalchemy import Connection

from service.archive.canonical import canonical_json, parse_record, record_sha256
from service.archive.chain import GENESIS_SHA256, SIGNED_RECORD_FORMAT
from service.archive.errors import ArchiveError, IntegrityError, NotFound
from service.archive.keys import KeyRing, LabKey, PublicLabKey, verify_signature
from service.archive.lifecycle import ANALYSIS_FIELDS, SERVICE_FIELDS, STATES, Lifecycle
from service.archive.reading import certificate_info, events, search, signed_document
from service.archive.reports import Check, Mismatch, ReproduceReport, VerifyReport
from service.archive.reproduce import (
    AnalysisOutput,
    analysis_output,
    compare_numbers,
    numeric_leaves,
    reproduce,
    software_versions,
)
from service.archive.stored import Blobs, log_event, run_files, user_ref
from service.archive.verify import Verifier, verify_signed_document
from service.storage import Storage

__all__ = [
    "ANALYSIS_FIELDS",
    "GENESIS_SHA256",
    "SERVICE_FIELDS",
    "SIGNED_RECORD_FORMAT",
    "STATES",
    "AnalysisOutput",
    "Archive",
    "ArchiveError",
    "Check",
    "IntegrityError",
    "LabKey",
    "Mismatch",
    "NotFound",
    "PublicLabKey",
    "ReproduceReport",
    "VerifyReport",
    "analysis_output",
    "canonical_json",
    "compare_numbers",
    "log_event",
    "numeric_leaves",
    "parse_record",
    "record_sha256",
    "software_versions",
    "user_ref",
    "verify_signature",
    "verify_signed_document",
]


class Archive:
    """Runs, certificates and the signed chain of one service instance (a facade)."""

    def __init__(
        self,
        storage: Storage,
        key: LabKey | PublicLabKey | None,
        *,
        number_prefix: str = "CC",
        trusted_public_keys: Iterable[bytes] = (),
    ) -> None:
        """``key`` is the lab's signing key; None for an analysis worker, which drafts but never
        signs (issuing and withdrawing stay with the process that holds the key).
        ``trusted_public_keys`` are keys the lab used before a key rotation: they still verify
        their old entries."""
        self.storage = storage
        self.key = key
        self.number_prefix = number_prefix
        self.keys = KeyRing(key, trusted_public_keys)
        #: key id -> raw public key of every key this archive accepts
        self.public_keys = self.keys.raw
        self.blobs = Blobs(storage)
        self.lifecycle = Lifecycle(storage, key, number_prefix)
        self.verifier = Verifier(storage, self.keys)

    # ---- runs and drafts (service.archive.lifecycle) -----------------------------------------

    def record_run(self, conn: Connection, **run: Any) -> list[dict[str, Any]]:
        """Store an accepted run's raw files and its row (:meth:`Lifecycle.record_run`)."""
        return self.lifecycle.record_run(conn, **run)

    def create_draft(self, conn: Connection, **draft: Any) -> str:
        """Store a draft certificate from an analysis record (:meth:`Lifecycle.create_draft`)."""
        return self.lifecycle.create_draft(conn, **draft)

    def amend(
        self,
        certificate_id: str,
        user: Mapping[str, Any],
        reason: str,
        corrections: Mapping[str, Any] | None = None,
    ) -> str:
        return self.lifecycle.amend(certificate_id, user, reason, corrections)

    def correct_draft(
        self, certificate_id: str, user: Mapping[str, Any], corrections: Mapping[str, Any]
    ) -> list[dict[str, str]]:
        return self.lifecycle.correct_draft(certificate_id, user, corrections)

    def issue(self, certificate_id: str, approver: Mapping[str, Any]) -> dict[str, Any]:
        return self.lifecycle.issue(certificate_id, approver)

    def withdraw(self, certificate_id: str, user: Mapping[str, Any], reason: str) -> dict:
        return self.lifecycle.withdraw(certificate_id, user, reason)

    # ---- stored files (service.archive.stored) -----------------------------------------------

    def run_files(self, conn: Connection, run_id: str) -> list[dict[str, Any]]:
        return run_files(conn, run_id)

    def materialise_run(self, files: Iterable[Mapping[str, Any]], folder: Path) -> Path:
        return self.blobs.materialise_run(files, folder)

    def checked_blob(self, digest: str, what: str) -> bytes:
        return self.blobs.checked(digest, what)

    def plots(self, plots_sha256: str | None) -> dict[str, str]:
        return self.blobs.plots(plots_sha256)

    # ---- reading (service.archive.reading) ---------------------------------------------------

    def get(self, certificate_id: str) -> dict[str, Any]:
        return certificate_info(self.storage, self.keys, certificate_id)

    def signed_entry(self, certificate_id: str) -> dict[str, Any]:
        return signed_document(self.storage, self.keys, certificate_id)

    def search(self, **filters: Any) -> list[dict[str, Any]]:
        return search(self.storage, **filters)

    def events(self, subject: str | None = None, limit: int = 500) -> list[dict[str, Any]]:
        return events(self.storage, subject, limit)

    # ---- verify and reproduce (service.archive.verify, service.archive.reproduce) ------------

    def verify_chain(
        self, upto: int | None = None, files_out: list[tuple[str, list]] | None = None
    ) -> list[Check]:
        return self.verifier.verify_chain(upto, files_out)

    def verify(self, certificate_id: str) -> VerifyReport:
        return self.verifier.verify(certificate_id)

    def verify_all(self) -> tuple[bool, list[Check]]:
        return self.verifier.verify_all()

    def reproduce(
        self,
        certificate_id: str,
        certify: Callable[..., Any],
        load_run: Callable[[Path], Any],
        progress: Callable[[float, str], None] | None = None,
    ) -> ReproduceReport:
        """Re-run the archived analysis on the archived raw data and compare every number."""
        info = self.get(certificate_id)
        return reproduce(certificate_id, info, self.blobs, certify, load_run, progress)
