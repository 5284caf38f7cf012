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
import zipfile
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from pathlib import Path, PurePosixPath
from typing import Any

from sqlalchemy import select

from service import storage as st
from service.archive import Archive
from service.intake.core import MAX_FILE_BYTES
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


# ---- names --------------------------------------------------------------------------------------

#: Longest part of a path most file systems store (ext4, NTFS, APFS: 255 bytes).
MAX_NAME_PART_BYTES = 255
#: Read archive members in pieces of this size, so memory stays bounded whatever they unpack to.
CHUNK_BYTES = 1 << 20


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
    for part in parts:
        _check_name_part(part, f"member {name[:80]!r}", archive_name)
    return "/".join(parts) if parts else None


def _check_name_part(part: str, what: str, file: str) -> None:
    if len(part.encode("utf-8", "surrogatepass")) > MAX_NAME_PART_BYTES:
        raise UploadError(
            f"{what}: a name part is longer than {MAX_NAME_PART_BYTES} bytes; rename it",
            file=file[:300],
        )
    if any(ord(c) < 32 or ord(c) == 127 for c in part):
        raise UploadError(f"{what}: the name holds control characters", file=file[:300])
    try:
        part.encode("utf-8")
    except UnicodeEncodeError:
        raise UploadError(f"{what}: the name is not valid Unicode", file=file[:300]) from None


def _run_names(members: list[str], archive_name: str) -> dict[str, str]:
    """Run-relative name of each file member; a single top-level folder is the run itself.

    Refuses two members with one name and a name that is both a file and a folder.
    """
    seen: set[str] = set()
    for name in members:
        if name in seen:
            raise UploadError(f"member {name!r} appears twice in the archive", file=archive_name)
        seen.add(name)
    for name in members:
        parts = name.split("/")
        for depth in range(1, len(parts)):
            folder = "/".join(parts[:depth])
            if folder in seen:
                raise UploadError(
                    f"member {folder!r} is both a file and the folder of {name!r}",
                    file=archive_name,
                )
    tops = {name.split("/", 1)[0] for name in members}
    if len(tops) == 1 and all("/" in name for name in members):
        return {name: name.split("/", 1)[1] for name in members}
    return {name: name for name in members}


def _is_run_file(name: str) -> bool:
    """The files intake reads: ``run.toml`` and ``*.csv`` at the top of the run folder."""
    return "/" not in name and (name == "run.toml" or name.lower().endswith(".csv"))


class _Writer:
    """Writes accepted members into the run folder, counting bytes against the limits."""

    def __init__(self, folder: Path, archive_name: str, max_bytes: int) -> None:
        self.folder, self.archive_name, self.max_bytes = folder, archive_name, max_bytes
        self.total = 0

    def copy(self, name: str, member: str, handle) -> None:
        limit = min(MAX_FILE_BYTES, self.max_bytes - self.total)
        written = 0
        with (self.folder / name).open("wb") as out:
            while True:
                chunk = handle.read(CHUNK_BYTES)
                if not chunk:
                    break
                written += len(chunk)
                if written > limit:
                    which = (
                        f"the per-file limit of {MAX_FILE_BYTES // 2**20} MiB"
                        if limit == MAX_FILE_BYTES
                        else f"the run limit of {self.max_bytes} bytes"
                    )
                    raise UploadError(
                        f"member {member!r} unpacks to more than {which}; refused",
                        file=self.archive_name,
                        status=413,
                    )
                out.write(chunk)
        self.total += written


def _damaged(archive_name: str, member: str | None, exc: BaseException) -> UploadError:
    what = f"member {member!r} cannot be unpacked" if member else "the archive cannot be read"
    reason = str(exc) or type(exc).__name__
    return UploadError(f"{what} ({reason}); the archive is damaged or uses an unsupported "
                       "format", file=archive_name)


def unpack_zip(
    data: bytes, archive_name: str, folder: Path, max_bytes: int, max_files: int
) -> list[str]:
    """Unpack the run files of a zip into ``folder``; return the names of members left out."""
    try:
        archive = zipfile.ZipFile(io.BytesIO(data))
        members = archive.infolist()
    except zipfile.BadZipFile:
        raise UploadError("not a readable zip archive", file=archive_name) from None
    except Exception as exc:  # a damaged directory can fail in many ways inside zipfile
        raise _damaged(archive_name, None, exc) from None
    if len(members) > max_files:
        raise UploadError(f"more than {max_files} members", file=archive_name, status=413)
    total = sum(m.file_size for m in members)
    if total > max_bytes:
        raise UploadError(
            f"unpacks to {total} bytes, more than the limit of {max_bytes}",
            file=archive_name,
            status=413,
        )
    files = {}
    for member in members:
        name = _check_member_name(member.filename, archive_name)
        mode = member.external_attr >> 16
        if mode and (mode & 0o170000) == 0o120000:
            raise UploadError(f"member {member.filename!r} is a link; refused", file=archive_name)
        if name is not None and not member.is_dir():
            files[name] = member
    names = _run_names(list(files), archive_name)
    writer = _Writer(folder, archive_name, max_bytes)
    ignored = []
    for name, member in files.items():
        run_name = names[name]
        if not _is_run_file(run_name):
            ignored.append(run_name)
            continue
        if member.file_size > MAX_FILE_BYTES:
            raise UploadError(
                f"member {name!r} unpacks to {member.file_size} bytes, more than the per-file "
                f"limit of {MAX_FILE_BYTES // 2**20} MiB",
                file=archive_name,
                status=413,
            )
        try:
            with archive.open(member) as handle:
                writer.copy(run_name, name, handle)
        except UploadError:
            raise
        except Exception as exc:  # corrupt data: zlib, CRC, method, encryption, truncation…
            raise _damaged(archive_name, name, exc) from None
    return ignored


def unpack_tar(
    data: bytes, archive_name: str, folder: Path, max_bytes: int, max_files: int
) -> list[str]:
    """Unpack the run files of a tar (optionally compressed) into ``folder``; return the names
    of members left out."""
    try:
        archive = tarfile.open(fileobj=io.BytesIO(data), mode="r:*")
    except Exception:  # tarfile, gzip, bz2 and lzma each raise their own errors
        raise UploadError("not a readable tar archive", file=archive_name) from None
    members = {}
    total = 0
    current = None
    try:
        with archive:
            for count, member in enumerate(archive, start=1):
                current = member.name
                if count > max_files:
                    raise UploadError(
                        f"more than {max_files} members", file=archive_name, status=413
                    )
                name = _check_member_name(member.name, archive_name)
                if member.isdir():
                    continue
                if not member.isfile():
                    raise UploadError(
                        f"member {member.name!r} is a link or device; only plain files are "
                        "accepted",
                        file=archive_name,
                    )
                total += member.size
                if total > max_bytes:
                    raise UploadError(
                        f"unpacks to more than the limit of {max_bytes} bytes",
                        file=archive_name,
                        status=413,
                    )
                if name is not None:
                    members[name] = member
            current = None
            names = _run_names(list(members), archive_name)
            writer = _Writer(folder, archive_name, max_bytes)
            ignored = []
            for name, member in members.items():
                run_name = names[name]
                if not _is_run_file(run_name):
                    ignored.append(run_name)
                    continue
                current = name
                handle = archive.extractfile(member)
                writer.copy(run_name, name, handle if handle is not None else io.BytesIO())
    except UploadError:
        raise
    except Exception as exc:  # truncated or corrupt compressed stream, bad headers
        raise _damaged(archive_name, current, exc) from None
    return ignored


def unpack(
    uploads: Iterable[tuple[str, bytes]], folder: Path, max_bytes: int, max_files: int
) -> list[str]:
    """Write the run files of an upload (plain files or one archive) into ``folder``.

    Returns the names of the files left out (anything but ``run.toml`` and ``*.csv`` at the top
    of the run folder); those are never decompressed.
    """
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
                file=archives[0][:300],
            )
        name, data = uploads[0]
        _check_name_part(PurePosixPath(name.replace("\\", "/")).name or name, "archive name", name)
        unpacker = unpack_zip if name.lower().endswith(".zip") else unpack_tar
        ignored = unpacker(data, name, folder, max_bytes, max_files)
        if not any(folder.iterdir()) and not ignored:
            raise UploadError("the archive is empty", file=name)
        return ignored
    named: dict[str, bytes] = {}
    for name, data in uploads:
        clean = PurePosixPath(name.replace("\\", "/")).name
        if not clean or clean in (".", "..") or clean != name.replace("\\", "/").split("/")[-1]:
            raise UploadError("file name is not usable", file=name[:300])
        _check_name_part(clean, f"file {clean[:80]!r}", clean)
        if clean in named:
            raise UploadError("two uploaded files have the same name", file=clean)
        named[clean] = data
    ignored = []
    for name, data in named.items():
        if not _is_run_file(name):
            ignored.append(name)
            continue
        if len(data) > MAX_FILE_BYTES:
            raise UploadError(
                f"the file is larger than the per-file limit of {MAX_FILE_BYTES // 2**20} MiB",
                file=name,
                status=413,
            )
        (folder / name).write_bytes(data)
    return ignored


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
    text = str(text).strip()
    # ASCII digits only: int() would also take full-width or other scripts' digits ("１２３").
    if not (text.isascii() and text.isdigit()):
        raise UploadError(
            f"expected a whole number from 0 to {MAX_SEED} in ASCII digits, got {text[:40]!r}",
            field="seed",
        )
    seed = int(text)
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

    if replaces and not (reason or "").strip():
        raise UploadError(
            "an amendment must say why it replaces the earlier certificate", field="reason"
        )
    with storage.blobs.scratch("upload") as tmp:
        folder = Path(tmp) / "run"
        folder.mkdir()
        ignored = unpack(uploads, folder, max_bytes, max_files)
        try:
            run = load_run(folder)
        except IntakeError as exc:
            raise UploadError(exc.message, exc.file, exc.line, exc.field) from None
        # Keep exactly the files the analysis reads (top-level run.toml and *.csv).
        used = {f.name for f in run.files}
        if (folder / "run.toml").is_file():
            used.add("run.toml")
        kept = [(name, (folder / name).read_bytes()) for name in sorted(used)]
        ignored = sorted(set(ignored) | {p.name for p in folder.iterdir()} - used)
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
