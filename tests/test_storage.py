"""Storage: blob folder (content addressing, atomic writes), SQLite WAL, write serialisation."""

from __future__ import annotations

import hashlib
import os
import threading

import pytest
from sqlalchemy import select
from sqlalchemy.exc import DBAPIError

from service import storage as st
from service.storage import BlobStore, Storage, default_database_url


@pytest.fixture()
def store(tmp_path):
    storage = Storage(default_database_url(tmp_path), tmp_path / "blobs")
    storage.create_schema()
    yield storage
    storage.dispose()


def test_blob_is_content_addressed_and_unchanged(tmp_path):
    blobs = BlobStore(tmp_path / "blobs")
    data = b"# sweep: 1\nbias_V,conductance_S\n0.0,1e-5\n"
    digest = blobs.put(data)
    assert digest == hashlib.sha256(data).hexdigest()
    path = blobs.path(digest)
    assert path.relative_to(tmp_path / "blobs").parts == (digest[:2], digest[2:4], digest)
    assert path.read_bytes() == data
    assert blobs.get(digest) == data
    # Idempotent: the same content stores once.
    assert blobs.put(data) == digest
    assert blobs.digest_on_disk(digest) == digest
    assert list((tmp_path / "blobs" / "tmp").iterdir()) == []


def test_blob_write_failure_leaves_nothing_under_the_name(tmp_path, monkeypatch):
    blobs = BlobStore(tmp_path / "blobs")

    def crash(*_args, **_kwargs):
        raise OSError("disk full (simulated)")

    monkeypatch.setattr(st.os, "replace", crash)
    with pytest.raises(OSError, match="simulated"):
        blobs.put(b"partial upload")
    digest = hashlib.sha256(b"partial upload").hexdigest()
    assert not blobs.exists(digest)
    assert list((tmp_path / "blobs" / "tmp").iterdir()) == []


def test_missing_and_altered_blobs_are_detected(tmp_path):
    blobs = BlobStore(tmp_path / "blobs")
    digest = blobs.put(b"abc")
    with pytest.raises(KeyError, match="missing"):
        blobs.get("0" * 64)
    assert blobs.digest_on_disk("0" * 64) is None
    blobs.path(digest).write_bytes(b"abd")
    assert blobs.digest_on_disk(digest) != digest
    with pytest.raises(ValueError, match="SHA-256"):
        blobs.path("../../etc/passwd")


def test_sqlite_runs_in_wal_mode(store):
    with store.read() as conn:
        assert conn.exec_driver_sql("PRAGMA journal_mode").scalar() == "wal"
        assert conn.exec_driver_sql("PRAGMA foreign_keys").scalar() == 1


def test_event_log_is_append_only(store):
    with store.write() as conn:
        conn.execute(st.events.insert().values(at=st.utc_now(), actor="a", action="x"))
    with pytest.raises(DBAPIError, match="append-only"), store.write() as conn:
        conn.execute(st.events.update().values(actor="someone else"))
    with pytest.raises(DBAPIError, match="append-only"), store.write() as conn:
        conn.execute(st.events.delete())
    with store.read() as conn:
        assert conn.execute(select(st.events.c.actor)).scalars().all() == ["a"]


def test_failed_transaction_rolls_back(store):
    with pytest.raises(RuntimeError), store.write() as conn:
        store.next_counter(conn, "n")
        raise RuntimeError("boom")
    with store.write() as conn:
        assert store.next_counter(conn, "n") == 1


def test_concurrent_writers_are_serialised(tmp_path):
    # Two engines on one file stand for two processes (service and worker).
    url = default_database_url(tmp_path)
    first = Storage(url, tmp_path / "blobs")
    first.create_schema()
    second = Storage(url, tmp_path / "blobs")
    errors: list[BaseException] = []

    def bump(storage: Storage) -> None:
        try:
            for _ in range(100):
                with storage.write() as conn:
                    storage.next_counter(conn, "shared")
        except BaseException as exc:  # pragma: no cover - reported below
            errors.append(exc)

    threads = [threading.Thread(target=bump, args=(s,)) for s in (first, second, first)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert errors == []
    with first.write() as conn:
        assert first.next_counter(conn, "shared") == 301
    first.dispose()
    second.dispose()


def test_database_file_lives_in_instance_folder(tmp_path):
    url = default_database_url(tmp_path)
    assert url.startswith("sqlite:///") and url.endswith("coldcert.sqlite3")
    storage = Storage(url, tmp_path / "blobs")
    storage.create_schema()
    assert os.path.exists(tmp_path / "coldcert.sqlite3")
    storage.dispose()
