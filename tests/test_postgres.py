"""The same storage code on a PostgreSQL server instead of SQLite.

Runs when ``COLDCERT_TEST_DATABASE_URL`` names an empty PostgreSQL database, e.g.
``postgresql+psycopg://coldcert@127.0.0.1:55432/coldcert`` (needs the ``postgres`` extra).
The embedded default (SQLite) is what every other test exercises; this file checks that a lab
moving to a database server gets the same lifecycle, chain, verification and job queue.
"""

from __future__ import annotations

import threading

import pytest
from sqlalchemy import text

from service import storage as st
from service.archive import Archive, LabKey
from service.queue.jobs import claim, enqueue
from service.storage import Storage, utc_now
from tests.service_support import complete_record, reset_server_database, server_url


@pytest.fixture()
def server_storage(tmp_path):
    url = server_url("COLDCERT_TEST_DATABASE_URL", "postgresql", "test the storage on a server")
    reset_server_database(url)
    storage = Storage(url, tmp_path / "blobs")
    storage.create_schema()
    yield storage
    storage.dispose()
    reset_server_database(url)


def _people(storage: Storage) -> dict[str, dict]:
    people = {}
    with storage.write() as conn:
        for name in ("olga", "arno"):
            uid = conn.execute(
                st.users.insert().values(
                    username=name,
                    display_name=name,
                    roles="operator",
                    active=True,
                    created_at=utc_now(),
                )
            ).inserted_primary_key[0]
            people[name] = {"id": uid, "username": name, "display_name": name}
    return people


def test_lifecycle_chain_and_verify_on_postgresql(server_storage, tmp_path):
    storage = server_storage
    archive = Archive(storage, LabKey.load_or_create(tmp_path / "keys"))
    people = _people(storage)
    data = b"bias_V,conductance_S\n0,1.5\n"
    ids = []
    for n in range(3):
        with storage.write() as conn:
            archive.record_run(
                conn,
                run_id=f"run-{n}",
                kind="cbt_thermometry",
                item="CBT SN 7",
                manifest={},
                files=[("s.csv", data)],
                seed=n,
                submitter=people["olga"],
            )
            ids.append(
                archive.create_draft(
                    conn,
                    run_id=f"run-{n}",
                    seed=n,
                    software={},
                    submitter=people["olga"],
                    record=complete_record(0.1 * n, 0.001),
                )
            )
        archive.issue(ids[-1], people["arno"])
    amended = archive.amend(
        ids[0], people["olga"], "name", {"customer": {"name": "B", "address": "North Road"}}
    )
    archive.issue(amended, people["arno"])
    archive.withdraw(ids[1], people["arno"], "damaged")
    for cert in ids + [amended]:
        report = archive.verify(cert)
        assert report.valid, report.as_dict()["problems"]
    ok, problems = archive.verify_all()
    assert ok, problems
    assert [c["id"] for c in archive.search(state="superseded")] == [ids[0]]
    assert len(archive.search(item="cbt sn", date_from=utc_now()[:10])) == 4
    # Tampering is caught on the server too.
    with storage.engine.begin() as conn:
        conn.execute(
            text(
                "UPDATE chain SET entry_json = replace(entry_json, '\"K\"', '\"mK\"') "
                "WHERE sequence = 2"
            )
        )
    assert not archive.verify(ids[1]).valid


def test_job_claims_are_exclusive_on_postgresql(server_storage):
    storage = server_storage
    people = _people(storage)
    archive = Archive(
        storage,
        LabKey(
            __import__(
                "cryptography.hazmat.primitives.asymmetric.ed25519", fromlist=["x"]
            ).Ed25519PrivateKey.generate()
        ),
    )
    with storage.write() as conn:
        archive.record_run(
            conn,
            run_id="r",
            kind="cbt_thermometry",
            item="",
            manifest={},
            files=[("s.csv", b"x")],
            seed=1,
            submitter=people["olga"],
        )
        for _ in range(40):
            enqueue(conn, purpose="certify", run_id="r", requested_by=people["olga"])
    taken: list[str] = []
    lock = threading.Lock()

    def worker(name: str) -> None:
        while (job := claim(storage, name)) is not None:
            with lock:
                taken.append(job["id"])

    threads = [threading.Thread(target=worker, args=(f"w{i}",)) for i in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert len(taken) == 40 == len(set(taken))


def test_item_history_and_public_check_on_postgresql(server_storage, tmp_path):
    from datetime import date, timedelta
    from types import SimpleNamespace

    from service.archive.items import (
        impact,
        item_history,
        public_check,
        recall_overview,
        record_rendering,
    )
    from tests import history_records as hr

    storage = server_storage
    archive = Archive(storage, LabKey.load_or_create(tmp_path / "keys"))
    _people(storage)
    lab = SimpleNamespace(services=SimpleNamespace(storage=storage, archive=archive))
    day = [(date.today() - timedelta(days=d)).isoformat() for d in (400, 250, 100)]
    ids = [
        hr.archive_certificate(lab, hr.pump_record("P 9", d, deviation_ppm=-1.0, gate_V=-0.39))
        for d in day
    ]
    archive.withdraw(ids[1], {"id": 2, "username": "arno"}, "damaged")
    h = item_history(archive, "P 9", {}, date.today())
    assert [c["state"] for c in h["certificates"]] == ["issued", "withdrawn", "issued"]
    assert h["in_force"] == [ids[0], ids[2]]
    assert [r["item"] for r in recall_overview(archive, {}, date.today())] == ["P 9"]
    assert [c["certificate_id"] for c in impact(archive, software="0.1.0")] == ids
    digest = "ab" * 32
    record_rendering(archive, ids[1], "pdf", digest)
    record_rendering(archive, ids[1], "pdf", digest)  # noted once
    answer = public_check(archive, ids[1], digest)
    assert answer["authentic"] and answer["withdrawn_reason"] == "damaged"
    assert not public_check(archive, ids[0], digest)["authentic"]


def test_blobs_live_in_the_database_and_are_checked_on_read(server_storage):
    """On a server the raw files need no shared folder: the same SHA-256-addressed store, kept
    in a table, and verify sees an altered row as it sees an altered file."""
    import hashlib

    from service.storage import DatabaseBlobStore

    blobs = server_storage.blobs
    assert isinstance(blobs, DatabaseBlobStore)
    data = b"bias_V,conductance_S\n0,1.5\n"
    digest = blobs.put(data)
    assert digest == hashlib.sha256(data).hexdigest()  # reference: Python's hashlib
    assert blobs.put(data) == digest and blobs.get(digest) == data
    assert blobs.size(digest) == len(data) and blobs.digest_on_disk(digest) == digest
    with server_storage.engine.begin() as conn:
        assert conn.execute(text("SELECT count(*) FROM blob_data")).scalar() == 1
        conn.execute(text("UPDATE blob_data SET data = 'altered'::bytea"))
    assert blobs.digest_on_disk(digest) not in (None, digest)
    assert blobs.digest_on_disk("0" * 64) is None
    with pytest.raises(KeyError, match="missing"):
        blobs.get("0" * 64)
    with pytest.raises(ValueError):
        blobs.get("../../etc/passwd")
