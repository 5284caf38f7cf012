"""Reading an issued certificate from its signed entries, checked on every read.

Everything a rendering, a download or a reproduction reads of an issued certificate comes from
its signed entry, whose hash and signature are checked on every read; the lifecycle state kept
in the database is checked against the signed entries that set it. A failed check refuses the
read (IntegrityError, HTTP 409) rather than show something the signature does not cover.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from sqlalchemy import Connection, select

from service import storage as st
from service.archive.canonical import parse_record
from service.archive.errors import IntegrityError
from service.archive.keys import KeyRing
from service.storage import sha256_hex


def checked_entry(chain_row, keys: KeyRing, certificate_id: str) -> dict[str, Any]:
    """A chain row's entry, refused unless its hash and signature hold."""
    data = chain_row.entry_json.encode("utf-8")
    if sha256_hex(data) != chain_row.sha256 or not keys.verifies(
        chain_row.key_id, data, chain_row.signature
    ):
        raise IntegrityError(
            f"{certificate_id}: chain entry {chain_row.sequence} fails its hash or signature "
            "check"
        )
    entry = parse_record(data)
    if not isinstance(entry, dict) or not isinstance(entry.get("body"), dict):
        raise IntegrityError(f"{certificate_id}: chain entry {chain_row.sequence} is malformed")
    return entry


def signed_issue(conn: Connection, keys: KeyRing, row) -> tuple[Any, dict[str, Any]]:
    """The issue entry of an issued certificate, checked on this read."""
    chain_row = conn.execute(select(st.chain).where(st.chain.c.sequence == row.sequence)).first()
    if chain_row is None:
        raise IntegrityError(f"{row.id}: its signed entry {row.sequence} is missing")
    entry = checked_entry(chain_row, keys, row.id)
    if (
        entry.get("entry_type") != "issue"
        or entry.get("sequence") != row.sequence
        or entry["body"].get("certificate_id") != row.id
    ):
        raise IntegrityError(f"{row.id}: chain entry {row.sequence} is not its issue entry")
    return chain_row, entry


def signed_lifecycle(conn: Connection, keys: KeyRing, row) -> dict[str, Any]:
    """State, successor and withdrawal of an issued certificate, from its signed entries."""
    withdrawal = None
    for chain_row in conn.execute(
        select(st.chain)
        .where(st.chain.c.certificate_id == row.id)
        .where(st.chain.c.sequence != row.sequence)
    ):
        entry = checked_entry(chain_row, keys, row.id)
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
        _, entry = signed_issue(conn, keys, successor_row)
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


def signed_view(body: Mapping[str, Any]) -> dict[str, Any]:
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


def derived_files(body: Mapping[str, Any]) -> list[dict[str, Any]]:
    """The stored outputs a signed entry names besides the raw files: plots and extra files."""
    files = []
    if body.get("plots_sha256"):
        files.append({"name": "plots of the certificate", "sha256": body["plots_sha256"]})
    extra = body.get("extra_files") if isinstance(body.get("extra_files"), Mapping) else {}
    for name, entry in sorted(extra.items()):
        digest = entry.get("sha256") if isinstance(entry, Mapping) else None
        files.append({"name": f"output file {name}", "sha256": digest})
    return files
