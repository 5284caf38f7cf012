"""Accepting a run over HTTP: several files in one request, or one zip/tar of the run folder.

An upload is unpacked into a private temporary folder and validated by the same
``service.intake.load_run`` the command line uses, so the web and the CLI accept and refuse the
same runs with the same messages. Only when the whole run is accepted are its raw bytes stored
(content-addressed, unchanged) and a job queued; a refused upload leaves nothing behind.

Archives are untrusted: a member whose path is absolute or climbs out with ``..``, a link, a
device, too many members or too many unpacked bytes (a "zip bomb") is refused before anything is
written.
"""

from __future__ import annotations

import io
import json
import secrets
import tarfile
import tempfile
import zipfile
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from pathlib import Path, PurePosixPath
from typing import Any

from sqlalchemy import select

from service import storage as st
from service.archive import Archive
from service.queue.jobs import enqueue, new_id
from service.storage import Storage

ARCHIVE_SUFFIXES = (".zip", ".tar", ".tar.gz", ".tgz", ".tar.bz2", ".tar.xz")
MAX_SEED = 2**63 - 1


class UploadError(Exception):
    """A refused upload: message plus, where known, the file, line and field at fault."""

    def __init__(
        self,
        message: str,
        file: str | None = None,
        line: int | None = None,
        field: str | None = None,
        status: int = 400,
    ) -> None:
        super().__init__(message)
        self.message, self.file, self.line, self.field, self.status = (
            message,
            file,
            line,
            field,
            status,
        )

    def as_dict(self) -> dict[str, Any]:
        where = ""
        if self.file:
            where = self.file + (f":{self.line}" if self.line else "") + ": "
        if self.field:
            where += f"{self.field}: "
        return {
            "error": where + self.message,
            "message": self.message,
            "file": self.file,
            "line": self.line,
            "field": self.field,
        }


@dataclass(frozen=True)
class Accepted:
    run_id: str
    job_id: str
    kind: str
    item: str
    seed: int
    files: list[dict[str, Any]]
    ignored: list[str]


def _check_member_name(name: str, archive_name: str) -> str | None:
    """Normalised relative path of an archive member, None for folders; refuses escapes."""
    if name.endswith("/"):
        return None
    path = PurePosixPath(name.replace("\\", "/"))
    if path.is_absolute() or ".." in path.parts or (path.parts and ":" in path.parts[0]):
        raise UploadError(
            f"member {name!r} points outside the run folder; the archive is refused",
            file=archive_name,
        )
    parts = [p for p in path.parts if p not in ("", ".")]
    return "/".join(parts) if parts else None


def unpack_zip(data: bytes, archive_name: str, max_bytes: int, max_files: int) -> dict[str, bytes]:
    try:
        archive = zipfile.ZipFile(io.BytesIO(data))
    except zipfile.BadZipFile:
        raise UploadError("not a readable zip archive", file=archive_name) from None
    members = archive.infolist()
    if len(members) > max_files:
        raise UploadError(f"more than {max_files} members", file=archive_name, status=413)
    total = sum(m.file_size for m in members)
    if total > max_bytes:
        raise UploadError(
            f"unpacks to {total} bytes, more than the limit of {max_bytes}",
            file=archive_name,
            status=413,
        )
    out: dict[str, bytes] = {}
    for member in members:
        name = _check_member_name(member.filename, archive_name)
        mode = member.external_attr >> 16
        if mode and (mode & 0o170000) == 0o120000:
            raise UploadError(f"member {member.filename!r} is a link; refused", file=archive_name)
        if name is None or member.is_dir():
            continue
        with archive.open(member) as handle:
            # Read at most the declared size + 1: a lying header cannot inflate past the limit.
            content = handle.read(member.file_size + 1)
        if len(content) != member.file_size:
            raise UploadError(f"member {name!r} is corrupt", file=archive_name)
        out[name] = content
    return out


def unpack_tar(data: bytes, archive_name: str, max_bytes: int, max_files: int) -> dict[str, bytes]:
    try:
        archive = tarfile.open(fileobj=io.BytesIO(data), mode="r:*")
    except (tarfile.TarError, EOFError, OSError):
        raise UploadError("not a readable tar archive", file=archive_name) from None
    out: dict[str, bytes] = {}
    total = 0
    with archive:
        for count, member in enumerate(archive, start=1):
            if count > max_files:
                raise UploadError(f"more than {max_files} members", file=archive_name, status=413)
            name = _check_member_name(member.name, archive_name)
            if member.isdir():
                continue
            if not member.isfile():
                raise UploadError(
                    f"member {member.name!r} is a link or device; only plain files are accepted",
                    file=archive_name,
                )
            total += member.size
            if total > max_bytes:
                raise UploadError(
                    f"unpacks to more than the limit of {max_bytes} bytes",
                    file=archive_name,
                    status=413,
                )
            if name is None:
                continue
            handle = archive.extractfile(member)
            out[name] = handle.read() if handle is not None else b""
    return out


def _strip_common_folder(named: dict[str, bytes]) -> dict[str, bytes]:
    # A zipped folder "run-17/..." is the run itself; drop that single top-level folder.
    tops = {name.split("/", 1)[0] for name in named}
    if len(tops) == 1 and all("/" in name for name in named):
        return {name.split("/", 1)[1]: data for name, data in named.items()}
    return named


def collect(
    uploads: Iterable[tuple[str, bytes]], max_bytes: int, max_files: int
) -> dict[str, bytes]:
    """{relative name: bytes} of a run from uploaded files (plain or one archive)."""
    uploads = list(uploads)
    if not uploads:
        raise UploadError(
            "no files in the upload: send the run's run.toml and CSV files as 'files', "
            "or one .zip/.tar of the run folder"
        )
    if len(uploads) > max_files:
        raise UploadError(f"more than {max_files} files in one upload", status=413)
    archives = [n for n, _ in uploads if n.lower().endswith(ARCHIVE_SUFFIXES)]
    if archives:
        if len(uploads) != 1:
            raise UploadError(
                "send either one archive of the run folder or the plain files, not both",
                file=archives[0],
            )
        name, data = uploads[0]
        unpack = unpack_zip if name.lower().endswith(".zip") else unpack_tar
        named = _strip_common_folder(unpack(data, name, max_bytes, max_files))
        if not named:
            raise UploadError("the archive is empty", file=name)
        return named
    named = {}
    for name, data in uploads:
        clean = PurePosixPath(name.replace("\\", "/")).name
        if not clean or clean in (".", "..") or clean != name.replace("\\", "/").split("/")[-1]:
            raise UploadError("file name is not usable", file=name)
        if clean in named:
            raise UploadError("two uploaded files have the same name", file=clean)
        named[clean] = data
    return named


def _item_label(manifest: Mapping[str, Any]) -> str:
    item = manifest.get("item")
    if isinstance(item, Mapping):
        keys = ("description", "name", "model", "identifier", "serial_number", "serial")
        parts = [str(item[k]) for k in keys if isinstance(item.get(k), str | int) and item[k]]
        return " · ".join(parts)[:400]
    return str(item or "")[:400]


def parse_seed(text: str | None) -> int | None:
    if text is None or str(text).strip() == "":
        return None
    try:
        seed = int(str(text).strip())
    except ValueError:
        raise UploadError("expected a whole number", field="seed") from None
    if not 0 <= seed <= MAX_SEED:
        raise UploadError(f"expected a whole number from 0 to {MAX_SEED}", field="seed")
    return seed


def accept_run(
    storage: Storage,
    archive: Archive,
    load_run: Callable[[Path], Any],
    uploads: Iterable[tuple[str, bytes]],
    submitter: Mapping[str, Any],
    *,
    seed: int | None = None,
    replaces: str | None = None,
    reason: str | None = None,
    max_bytes: int,
    max_files: int,
) -> Accepted:
    """Validate an upload like the CLI would; store it and queue the fit only if accepted."""
    from service.intake import IntakeError

    named = collect(uploads, max_bytes, max_files)
    if replaces and not (reason or "").strip():
        raise UploadError(
            "an amendment must say why it replaces the earlier certificate", field="reason"
        )
    with tempfile.TemporaryDirectory(prefix="coldcert-upload-") as tmp:
        folder = Path(tmp) / "run"
        folder.mkdir()
        for name, data in named.items():
            target = folder / name
            target.parent.mkdir(parents=True, exist_ok=True)
            target.write_bytes(data)
        try:
            run = load_run(folder)
        except IntakeError as exc:
            raise UploadError(exc.message, exc.file, exc.line, exc.field) from None
    # Keep exactly the files the analysis reads (top-level run.toml and *.csv).
    used = {f.name for f in run.files}
    if "run.toml" in named:
        used.add("run.toml")
    kept = [(name, named[name]) for name in sorted(used)]
    ignored = sorted(set(named) - used)
    manifest = run.manifest or {}
    if seed is None:
        manifest_seed = manifest.get("run", {}).get("seed")
        seed = int(manifest_seed) if manifest_seed is not None else secrets.randbelow(2**31)
    item = _item_label(manifest)
    run_id = new_id("run")
    with storage.write() as conn:
        if replaces:
            old = conn.execute(
                select(st.certificates.c.state).where(st.certificates.c.id == replaces)
            ).first()
            if old is None:
                raise UploadError(f"no certificate {replaces}", field="replaces", status=404)
            if old.state != "issued":
                raise UploadError(
                    f"{replaces} is {old.state}; only an issued certificate can be amended",
                    field="replaces",
                    status=409,
                )
        files = archive.record_run(
            conn,
            run_id=run_id,
            kind=run.kind,
            item=item,
            manifest=json.loads(json.dumps(manifest, default=str)),
            files=kept,
            seed=seed,
            submitter=submitter,
            replaces=replaces,
            amendment_reason=(reason or "").strip() or None,
        )
        job_id = enqueue(conn, purpose="certify", run_id=run_id, requested_by=submitter)
    return Accepted(run_id, job_id, run.kind, item, seed, files, ignored)
