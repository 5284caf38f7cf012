"""The signed hash chain: appending an entry, and checking every entry in order.

Each entry holds its sequence number, its type (issue, withdrawal), the SHA-256 of the entry
before it, when it was recorded, the signing key's id and a body. The lab's Ed25519 key signs
the entry's canonical bytes. Altering an entry breaks its own hash and signature; re-signing it
with a stolen key would still break the link from the next entry. The table's other columns
(type, certificate, key, time) are indexes into the signed text and are checked against it.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from sqlalchemy import Connection, select

from service import storage as st
from service.archive.canonical import canonical_dumps, canonical_json, parse_record
from service.archive.errors import ArchiveError
from service.archive.keys import KeyRing, LabKey, PublicLabKey
from service.archive.reports import Check
from service.storage import Storage, sha256_hex, utc_now

GENESIS_SHA256 = "0" * 64
SIGNED_RECORD_FORMAT = "coldcert-signed-entry/1"


def append_entry(
    conn: Connection,
    storage: Storage,
    key: LabKey | PublicLabKey | None,
    entry_type: str,
    certificate_id: str,
    body: Mapping[str, Any],
) -> tuple[int, str]:
    """Sign ``body`` as the chain's next entry and store it; return (sequence, SHA-256)."""
    if key is None:
        raise ArchiveError("this process holds no signing key (an analysis worker cannot sign)", 500)
    # The counter row lock serialises appends on servers; on SQLite the write transaction
    # (BEGIN IMMEDIATE) already does.
    sequence = storage.next_counter(conn, "chain")
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
        "key_id": key.key_id,
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
            signature=key.sign(data),
            key_id=key.key_id,
            recorded_at=recorded_at,
        )
    )
    return sequence, digest


# --------------------------------------------------------------------------------------------
# Checking the whole chain
#
# The signed entries are the truth. The state a certificate should have is derived from the
# signed content alone: issued by its issue entry, withdrawn by a withdrawal entry naming it,
# superseded by a later issue entry that names it in "replaces". An entry whose own checks fail
# could hide any of those, so it is remembered as damaged.


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


def scan_chain(conn: Connection, keys: KeyRing) -> tuple[list[Check], SignedFacts]:
    """Check every chain entry and gather what the signed entries say about certificates."""
    checks: list[Check] = []
    facts = SignedFacts()
    previous, expected = GENESIS_SHA256, 1
    for row in conn.execute(select(st.chain).order_by(st.chain.c.sequence)):
        if row.sequence != expected:
            checks.append(Check("chain", False, f"chain entry {expected} is missing"))
            facts.damaged.append(expected)
        entry_checks, entry = check_entry(row, keys, previous, expected)
        checks.extend(entry_checks)
        facts.checks_by_sequence[row.sequence] = entry_checks
        if not all(c.ok for c in entry_checks) or entry is None:
            facts.damaged.append(row.sequence)
        if entry is not None:
            facts.add(row.sequence, entry)
        previous, expected = row.sha256, row.sequence + 1
    facts.last = expected - 1
    return checks, facts


def check_entry(
    row, keys: KeyRing, expected_previous: str, expected_sequence: int
) -> tuple[list[Check], dict[str, Any] | None]:
    """Every check of one stored chain entry; return them and the parsed entry (None if its
    text is not a JSON object)."""
    label = f"chain entry {row.sequence} ({row.entry_type} of {row.certificate_id})"
    data = row.entry_json.encode("utf-8")
    checks = [_hash_check(label, data, row.sha256)]
    entry = _parsed_canonical(label, data, checks)
    checks.append(_signature_check(label, data, row, keys))
    checks.append(_link_check(label, row, entry, expected_previous))
    if entry is not None:
        if entry.get("sequence") != expected_sequence:
            checks.append(
                Check(
                    "chain",
                    False,
                    f"{label}: signed sequence {entry.get('sequence')} differs from its "
                    f"position {expected_sequence}",
                )
            )
        checks.extend(_index_checks(label, row, entry))
    return checks, entry


def _hash_check(label: str, data: bytes, recorded: str) -> Check:
    digest = sha256_hex(data)
    return Check(
        "hash",
        digest == recorded,
        f"{label}: content SHA-256 matches the recorded {recorded[:16]}…"
        if digest == recorded
        else f"{label}: content SHA-256 {digest} does not match the recorded "
        f"{recorded}; the record was altered after it was signed",
    )


def _parsed_canonical(label: str, data: bytes, checks: list[Check]) -> dict[str, Any] | None:
    """The entry parsed from its stored text; a failed "canonical" check is added to
    ``checks`` when the text is not the canonical form of a JSON object."""
    try:
        entry = parse_record(data)
        canonical = isinstance(entry, dict) and canonical_dumps(entry) == data
    except (ValueError, TypeError):
        entry, canonical = None, False
    if not canonical:
        checks.append(Check("canonical", False, f"{label}: stored text is not canonical JSON"))
    return entry if isinstance(entry, dict) else None


def _signature_check(label: str, data: bytes, row, keys: KeyRing) -> Check:
    known = keys.public(row.key_id) is not None
    signed = keys.verifies(row.key_id, data, row.signature)
    return Check(
        "signature",
        signed,
        f"{label}: Ed25519 signature valid (key {row.key_id})"
        if signed
        else f"{label}: Ed25519 signature does not verify with lab key {row.key_id}"
        + ("" if known else " (key unknown to this archive)"),
    )


def _link_check(label: str, row, entry: Mapping[str, Any] | None, expected_previous: str) -> Check:
    linked = row.previous_sha256 == expected_previous and (
        entry is None or entry.get("previous_sha256") == expected_previous
    )
    return Check(
        "chain",
        linked,
        f"{label}: links to the previous entry"
        if linked
        else f"{label}: names previous SHA-256 "
        f"{(entry or {}).get('previous_sha256', row.previous_sha256)}, but entry "
        f"{row.sequence - 1} has {expected_previous}; the chain is broken here",
    )


def _index_checks(label: str, row, entry: Mapping[str, Any]) -> list[Check]:
    """The table's columns are indexes into the signed text; each must say the same."""
    body = entry.get("body") if isinstance(entry.get("body"), dict) else {}
    signed_columns = {
        "entry_type": entry.get("entry_type"),
        "certificate_id": body.get("certificate_id"),
        "key_id": entry.get("key_id"),
        "recorded_at": entry.get("recorded_at"),
    }
    return [
        Check(
            "index",
            False,
            f"{label}: column {column} is {getattr(row, column)!r} but the signed entry says "
            f"{signed_value!r}; the index was edited",
        )
        for column, signed_value in signed_columns.items()
        if getattr(row, column) != signed_value
    ]
