"""The same storage code on a PostgreSQL server instead of SQLite.

Runs when ``COLDCERT_TEST_DATABASE_URL`` names an empty PostgreSQL database, e.g.
``postgresql+psycopg://coldcert@127.0.0.1:55432/coldcert`` (needs the ``postgres`` extra).
The embedded default (SQLite) is what every other test exercises; this file checks that a lab
moving to a database server gets the same lifecycle, chain, verification and job queue.
"""

from __future__ import annotations

import os
import threading

import pytest
from sqlalchemy import text

from service import storage as st
from service.archive import Archive, LabKey
from service.queue.jobs import claim, enqueue
from service.storage import Storage, utc_now

URL = os.environ.get("COLDCERT_TEST_DATABASE_URL", "")
pytestmark = pytest.mark.skipif(
    not URL.startswith("postgresql"), reason="set COLDCERT_TEST_DATABASE_URL to a PostgreSQL URL"
)


@pytest.fixture()
def server_storage(tmp_path):
    storage = Storage(URL, tmp_path / "blobs")
    with storage.engine.begin() as conn:
        st.metadata.drop_all(conn)
    storage.create_schema()
    yield storage
    with storage.engine.begin() as conn:
        st.metadata.drop_all(conn)
    storage.dispose()


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
                    record={
                        "results": [{"value": 0.1 * n, "unit": "K"}],
                        "customer": {"name": "A"},
                    },
                )
            )
        archive.issue(ids[-1], people["arno"])
    amended = archive.amend(ids[0], people["olga"], "name", {"customer": {"name": "B"}})
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
