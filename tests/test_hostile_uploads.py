"""Hostile and malformed uploads: every one is refused with a 4xx that names the member, file or
field at fault, and leaves nothing stored; decompression stops at the limit.

The uploads are built here from the bundled example run; no analysis runs (no workers are
started), since an accepted run only queues a job.
"""

from __future__ import annotations

import io
import struct
import tarfile
import tracemalloc
import zipfile

import pytest
from sqlalchemy import func, select

from service import storage as st
from tests.service_support import make_lab, small_run_files, zip_of

RUN_TOML, SWEEP = (data for _, data in small_run_files())
SWEEP_NAME = "sweep_03_60mK.csv"


@pytest.fixture(scope="module")
def lab(tmp_path_factory):
    lab = make_lab(tmp_path_factory.mktemp("hostile"))
    yield lab
    lab.services.storage.dispose()


def stored(lab) -> tuple[int, int, int]:
    with lab.services.storage.read() as conn:
        runs = conn.execute(select(func.count()).select_from(st.runs)).scalar()
        jobs = conn.execute(select(func.count()).select_from(st.jobs)).scalar()
    root = lab.services.storage.blobs.root
    blobs = sum(1 for p in root.rglob("*") if p.is_file() and "tmp" not in p.relative_to(root).parts)
    return runs, jobs, blobs


def refused(lab, files, status=400, **form) -> dict:
    before = stored(lab)
    reply = lab.upload(lab.client(), files=files, **form)
    body = reply.get_json()
    assert reply.status_code == status, (reply.status_code, body)
    assert body and body.get("error"), body
    assert stored(lab) == before, "a refused upload left something stored"
    return body


def _run_zip(compression: int) -> bytearray:
    """The example run (manifest and one sweep) as zip bytes, ready to be damaged."""
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", compression=compression) as archive:
        archive.writestr("run.toml", RUN_TOML)
        archive.writestr(SWEEP_NAME, SWEEP)
    return bytearray(buffer.getvalue())


def _corrupt_deflated_member() -> bytes:
    data = _run_zip(zipfile.ZIP_DEFLATED)
    # Overwrite the middle of the sweep's compressed data (after its local header).
    start = data.find(SWEEP_NAME.encode()) + len(SWEEP_NAME) + 40
    for i in range(start, start + 64):
        data[i] = 0xFF
    return bytes(data)


def _bad_crc_member() -> bytes:
    data = _run_zip(zipfile.ZIP_STORED)
    at = data.find(b"1.51517583e-05")
    data[at] = ord("2")
    return bytes(data)


def _unknown_compression() -> bytes:
    data = _run_zip(zipfile.ZIP_STORED)
    # Compression method 99 (AES, unsupported) in both the local and the central header.
    for signature, offset in ((b"PK\x03\x04", 8), (b"PK\x01\x02", 10)):
        at = 0
        while (at := data.find(signature, at)) != -1:
            data[at + offset : at + offset + 2] = struct.pack("<H", 99)
            at += 4
    return bytes(data)


def _truncated_targz() -> bytes:
    buffer = io.BytesIO()
    with tarfile.open(fileobj=buffer, mode="w:gz") as archive:
        for name, content in small_run_files():
            info = tarfile.TarInfo(f"run/{name}")
            info.size = len(content)
            archive.addfile(info, io.BytesIO(content))
    data = buffer.getvalue()
    return data[: len(data) // 2]


def _corrupt_targz() -> bytes:
    buffer = io.BytesIO()
    with tarfile.open(fileobj=buffer, mode="w:gz") as archive:
        for name, content in small_run_files():
            info = tarfile.TarInfo(f"run/{name}")
            info.size = len(content)
            archive.addfile(info, io.BytesIO(content))
    data = bytearray(buffer.getvalue())
    for i in range(len(data) // 2, len(data) // 2 + 32):
        data[i] ^= 0x5A
    return bytes(data)


@pytest.mark.parametrize(
    "name, make, expect",
    [
        ("corrupt.zip", _corrupt_deflated_member, SWEEP_NAME),
        ("crc.zip", _bad_crc_member, SWEEP_NAME),
        ("method.zip", _unknown_compression, "compression"),
        ("half.tar.gz", _truncated_targz, "half.tar.gz"),
        ("corrupt.tar.gz", _corrupt_targz, "corrupt.tar.gz"),
    ],
)
def test_damaged_archives_are_refused_naming_the_member(lab, name, make, expect):
    body = refused(lab, [(name, make())])
    assert body["file"] == name
    assert expect in body["error"], body


def test_a_seed_beyond_64_bits_in_the_manifest_is_refused(lab):
    manifest = RUN_TOML.replace(b"seed = 424242", b"seed = 18446744073709551616")
    body = refused(lab, [("run.toml", manifest), (SWEEP_NAME, SWEEP)])
    assert body["file"] == "run.toml" and body["field"] == "run.seed", body


def test_a_file_name_over_255_bytes_is_refused(lab):
    long_name = "s" * 300 + ".csv"
    body = refused(lab, [("run.toml", RUN_TOML), (long_name, SWEEP)])
    assert "255" in body["error"], body
    body = refused(lab, [("run.zip", zip_of([("run.toml", RUN_TOML), (long_name, SWEEP)]))])
    assert "255" in body["error"] and body["file"] == "run.zip", body


def test_a_member_that_is_both_file_and_folder_is_refused(lab):
    files = [("run.toml", RUN_TOML), ("a.csv", SWEEP), ("a.csv/b.csv", SWEEP)]
    body = refused(lab, [("run.zip", zip_of(files, folder=""))])
    assert "a.csv" in body["error"] and body["file"] == "run.zip", body


def test_a_zip_bomb_stops_at_the_limit_in_bounded_memory(lab):
    # 200 MiB of zeros deflate to about 200 KB; the per-file limit of intake is 50 MiB.
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", compression=zipfile.ZIP_DEFLATED) as archive:
        archive.writestr("run.toml", RUN_TOML)
        with archive.open("bomb.csv", "w", force_zip64=True) as member:
            chunk = b"0" * (1 << 20)
            for _ in range(200):
                member.write(chunk)
    bomb = buffer.getvalue()
    assert len(bomb) < 1_000_000
    tracemalloc.start()
    try:
        body = refused(lab, [("bomb.zip", bomb)], status=413)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert "bomb.csv" in body["error"], body
    # Python-level allocations while refusing: far below the 50 MiB a full read would take.
    assert peak < 16 * 2**20, f"peak {peak / 2**20:.1f} MiB"


# ---- item 10: quiet acceptance ----------------------------------------------------------------


def _sweep_with(extra: bytes) -> bytes:
    return SWEEP.replace(b"# device:", extra + b"# device:", 1)


@pytest.mark.parametrize(
    "extra, field",
    [
        (b"# unknown_key: 1\n", "unknown_key"),
        (b"# : 1\n", None),
        (b"# sweep_ended: yesterday\n", "sweep_ended"),
        (b"# sweep_ended: 9999-99-99\n", "sweep_ended"),
        ("# parallel_rows: １０\n".encode(), "parallel_rows"),
    ],
    ids=["unknown-key", "empty-key", "date-word", "date-impossible", "fullwidth-digits"],
)
def test_doubtful_metadata_is_refused_naming_file_line_and_key(lab, extra, field):
    sweep = _sweep_with(extra)
    if field == "parallel_rows":
        sweep = sweep.replace(b"# parallel_rows: 10\n", b"", 1)
    body = refused(lab, [("run.toml", RUN_TOML), (SWEEP_NAME, sweep)])
    assert body["file"] == SWEEP_NAME and body["line"], body
    if field:
        assert body["field"] == field, body


def test_a_seed_in_fullwidth_digits_is_refused(lab):
    body = refused(lab, [("run.toml", RUN_TOML), (SWEEP_NAME, SWEEP)], seed="１２３")
    assert body["field"] == "seed", body


def test_files_of_no_known_job_are_named(lab):
    other = b"temperature_K,pressure_Pa\n1,2\n2,3\n"
    body = refused(lab, [("run.toml", RUN_TOML.replace(b'kind = "cbt_thermometry"\n', b"")),
                         ("fridge_log.csv", other)])
    assert "fridge_log.csv" in body["error"], body
