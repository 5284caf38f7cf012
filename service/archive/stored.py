"""Rows and blobs as the archive keeps them: looking up a certificate, a user or a run's files,
storing a blob once, reading one back only if it still hashes to its name, and the event log."""

from __future__ import annotations

import json
from collections.abc import Iterable, Mapping
from pathlib import Path
from typing import Any

from sqlalchemy import Connection, select

from service import storage as st
from service.archive.errors import ArchiveError, IntegrityError, NotFound
from service.storage import Storage, sha256_hex, utc_now


def certificate_row(conn: Connection, certificate_id: str):
    """The certificate's row; NotFound (404) if there is none."""
    row = conn.execute(
        select(st.certificates).where(st.certificates.c.id == certificate_id)
    ).first()
    if row is None:
        raise NotFound(f"certificate {certificate_id} not found")
    return row


def user_row(conn: Connection, user_id: int) -> dict[str, Any]:
    """A user's row as a dict; an unknown id reads as user "?"."""
    row = conn.execute(select(st.users).where(st.users.c.id == user_id)).first()
    return dict(row._mapping) if row is not None else {"username": "?", "display_name": ""}


def user_ref(user: Mapping[str, Any]) -> dict[str, str]:
    return {"username": user["username"], "display_name": user.get("display_name") or ""}


def run_files(conn: Connection, run_id: str) -> list[dict[str, Any]]:
    """A run's raw files (name, SHA-256, size), by name."""
    rows = conn.execute(
        select(st.run_files.c.name, st.run_files.c.sha256, st.run_files.c.size)
        .where(st.run_files.c.run_id == run_id)
        .order_by(st.run_files.c.name)
    ).all()
    return [dict(r._mapping) for r in rows]


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


class Blobs:
    """The archive's view of the blob store: content-addressed, registered in the database,
    checked against their digest on every read."""

    def __init__(self, storage: Storage) -> None:
        self.storage = storage

    def put(self, conn: Connection, data: bytes) -> str:
        """Store ``data`` (once) and register it; return its SHA-256."""
        digest = self.storage.blobs.put(data)
        self.register(conn, digest, len(data))
        return digest

    def register(self, conn: Connection, digest: str, size: int | None = None) -> None:
        exists = conn.execute(select(st.blobs.c.sha256).where(st.blobs.c.sha256 == digest)).first()
        if exists is None:
            if size is None:
                size = self.storage.blobs.size(digest)
            conn.execute(st.blobs.insert().values(sha256=digest, size=size, stored_at=utc_now()))

    def checked(self, digest: str, what: str) -> bytes:
        """A stored blob's bytes, refused unless they still hash to ``digest``."""
        try:
            data = self.storage.blobs.get(digest)
        except (KeyError, ValueError):
            raise IntegrityError(f"{what} ({digest}) is missing from the blob folder") from None
        if sha256_hex(data) != digest:
            raise IntegrityError(f"{what} no longer matches its SHA-256 {digest}; it was altered")
        return data

    def plots(self, plots_sha256: str | None) -> dict[str, str]:
        """The figures kept with a certificate for its renderings (none if it has none)."""
        if not plots_sha256:
            return {}
        stored = json.loads(self.checked(plots_sha256, "the certificate's plots"))
        return dict(stored.get("plots") or {})

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
