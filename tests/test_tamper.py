"""The tamper suite: edit every stored column and every blob the way an intruder with file access
could, and check that verify catches each edit that changes anything a reader is shown.

"A reader" is every route that shows stored data: the certificate's metadata and renderings (JSON,
HTML, signed entry, DCC XML), its output files, the run it came from and the search list. For
each tampering the suite records what those routes answer before and after; an edit that changes
any answer must make both ``verify`` of the certificate and ``verify --all`` fail. An edit that
changes nothing a reader sees may pass (e.g. an unused registry column), and is counted apart.
No reader may answer 5xx on a tampered archive.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest
from sqlalchemy import select

from service import storage as st
from service.archive import ArchiveError
from tests.hostile_support import database_file, draft, raw_sql, user
from tests.service_support import make_lab

RAW = b"time_s,current_A,pump_on\n0,1e-10,1\n1,0,0\n"


@pytest.fixture(scope="module")
def lab(tmp_path_factory):
    lab = make_lab(tmp_path_factory.mktemp("tamper"))
    services = lab.services
    olga, arno = user(services, "olga"), user(services, "arno")
    certs = {}
    for name, seed in (("A", 11), ("B", 12), ("W", 13), ("S", 14), ("D", 15)):
        files = [("record.csv", RAW + f"{seed},1e-10,1\n".encode())]
        certs[name] = draft(services, olga, seed, files)
    for name in ("A", "B", "W", "S"):
        services.archive.issue(certs[name], arno)
    services.archive.withdraw(certs["W"], arno, "pump drifted after shipment")
    certs["S2"] = services.archive.amend(certs["S"], olga, "customer address corrected",
                                         {"customer": {"name": "Quillfen Metrology Ltd"}})
    services.archive.issue(certs["S2"], arno)
    lab.certs = certs
    yield lab
    services.storage.dispose()


def _run_id(lab, cert: str) -> str:
    with lab.services.storage.read() as conn:
        return conn.execute(
            select(st.certificates.c.run_id).where(st.certificates.c.id == cert)
        ).scalar_one()


def reader_view(lab, cert: str, run_id: str) -> dict[str, tuple[int, bytes]]:
    client = lab.client()
    paths = [
        f"/api/certificates/{cert}",
        f"/api/certificates/{cert}/json",
        f"/api/certificates/{cert}/html",
        f"/api/certificates/{cert}/signed",
        f"/api/certificates/{cert}/xml",
        f"/api/certificates/{cert}/files/table.csv",
        f"/api/runs/{run_id}",
        f"/api/certificates?q={cert}",
    ]
    view = {}
    for path in paths:
        reply = client.get(path, headers=lab.headers("aude"))
        view[path] = (reply.status_code, reply.data)
    return view


def detected(lab, cert: str) -> tuple[bool, bool]:
    """(verify of the certificate failed, verify of the whole archive failed)."""
    try:
        one = not lab.services.archive.verify(cert).valid
    except ArchiveError:
        one = True
    everything, _ = lab.services.archive.verify_all()
    return one, not everything


def assert_clean(lab):
    for cert in lab.certs.values():
        assert lab.services.archive.verify(cert).valid, cert
    assert lab.services.archive.verify_all()[0]


# ---- the reported findings, one by one ------------------------------------------------------


def _withdrawal_sequence(lab, cert: str) -> int:
    with lab.services.storage.read() as conn:
        return conn.execute(
            select(st.chain.c.sequence)
            .where(st.chain.c.certificate_id == cert)
            .where(st.chain.c.entry_type == "withdrawal")
        ).scalar_one()


def _saved_row(db: Path, table: str, key: str, value) -> tuple[list[str], tuple]:
    with raw_sql(db) as sql:
        cursor = sql.execute(f"SELECT * FROM {table} WHERE {key} = ?", (value,))
        return [d[0] for d in cursor.description], cursor.fetchone()


def _put_back(db: Path, table: str, key: str, value, saved) -> None:
    columns, row = saved
    with raw_sql(db) as sql:
        assignments = ", ".join(f"{c} = ?" for c in columns)
        sql.execute(f"UPDATE {table} SET {assignments} WHERE {key} = ?", (*row, value))


def test_undoing_a_withdrawal_in_the_index_columns_is_caught(lab):
    cert = lab.certs["W"]
    db = database_file(lab.services)
    withdrawal = _withdrawal_sequence(lab, cert)
    saved_cert = _saved_row(db, "certificates", "id", cert)
    saved_entry = _saved_row(db, "chain", "sequence", withdrawal)
    with raw_sql(db) as sql:
        sql.execute(
            "UPDATE certificates SET state = 'issued', withdrawn_reason = NULL, "
            "withdrawn_at = NULL WHERE id = ?",
            (cert,),
        )
        sql.execute(
            "UPDATE chain SET entry_type = 'issue', certificate_id = ? WHERE sequence = ?",
            (lab.certs["B"], withdrawal),
        )
    try:
        report = lab.services.archive.verify(cert)
        assert not report.valid
        assert any("withdraw" in p for p in report.as_dict()["problems"]), report.as_dict()
        ok, problems = lab.services.archive.verify_all()
        assert not ok and any("withdraw" in p.detail for p in problems)
        page = lab.client().get(f"/api/certificates/{cert}/verify", headers=lab.headers("aude"))
        assert page.status_code == 200 and page.get_json()["valid"] is False
    finally:
        _put_back(db, "certificates", "id", cert, saved_cert)
        _put_back(db, "chain", "sequence", withdrawal, saved_entry)
    assert_clean(lab)


def test_a_withdrawal_undone_in_the_certificate_row_alone_is_refused_on_reading(lab):
    cert = lab.certs["W"]
    db = database_file(lab.services)
    saved = _saved_row(db, "certificates", "id", cert)
    with raw_sql(db) as sql:
        sql.execute(
            "UPDATE certificates SET state = 'issued', withdrawn_reason = NULL, "
            "withdrawn_at = NULL WHERE id = ?",
            (cert,),
        )
    try:
        for fmt in ("html", "json", "pdf", "xml"):
            reply = lab.client().get(f"/api/certificates/{cert}/{fmt}", headers=lab.headers("aude"))
            assert reply.status_code == 409, (fmt, reply.status_code)
            assert "signed chain" in reply.get_json()["error"]
        assert not lab.services.archive.verify(cert).valid
    finally:
        _put_back(db, "certificates", "id", cert, saved)
    assert_clean(lab)


def test_plots_of_another_certificate_are_never_shown(lab):
    a, b = lab.certs["A"], lab.certs["B"]
    db = database_file(lab.services)
    client = lab.client()
    own = client.get(f"/api/certificates/{a}/html", headers=lab.headers("aude")).data
    assert b"seed 11" in own
    with lab.services.storage.read() as conn:
        rows = dict(conn.execute(select(st.certificates.c.id, st.certificates.c.plots_sha256)).all())
    with raw_sql(db) as sql:
        sql.execute("UPDATE certificates SET plots_sha256 = ? WHERE id = ?", (rows[b], a))
    try:
        reply = client.get(f"/api/certificates/{a}/html", headers=lab.headers("aude"))
        assert reply.status_code < 500
        assert b"seed 12" not in reply.data
        assert not lab.services.archive.verify(a).valid
    finally:
        with raw_sql(db) as sql:
            sql.execute("UPDATE certificates SET plots_sha256 = ? WHERE id = ?", (rows[a], a))
    assert_clean(lab)


def test_a_swapped_pdf_cache_file_is_not_served(lab):
    a, b = lab.certs["A"], lab.certs["B"]
    client = lab.client()
    pdf_a = client.get(f"/api/certificates/{a}/pdf", headers=lab.headers("aude")).data
    pdf_b = client.get(f"/api/certificates/{b}/pdf", headers=lab.headers("aude")).data
    assert pdf_a != pdf_b and pdf_a.startswith(b"%PDF")
    cache = Path(lab.app.instance_path) / "cache" / "pdf"
    files = sorted(p for p in cache.iterdir() if p.is_file())
    by_content = {p.read_bytes(): p for p in files}
    path_a, path_b = by_content[pdf_a], by_content[pdf_b]
    saved = path_a.read_bytes()
    shutil.copyfile(path_b, path_a)
    try:
        again = client.get(f"/api/certificates/{a}/pdf", headers=lab.headers("aude"))
        assert again.status_code == 200
        assert again.data == pdf_a
    finally:
        if path_a.exists():
            path_a.write_bytes(saved)


# ---- the whole matrix -------------------------------------------------------------------------


def _column_tamperings(lab):
    """(label, target certificate, table, key column, key value, column, new value)."""
    with lab.services.storage.read() as conn:
        cert_rows = {r.id: dict(r._mapping) for r in conn.execute(select(st.certificates))}
        chain_rows = [dict(r._mapping) for r in conn.execute(select(st.chain))]
        run_rows = {r.id: dict(r._mapping) for r in conn.execute(select(st.runs))}
        file_rows = [dict(r._mapping) for r in conn.execute(select(st.run_files))]
    out = []
    # An issued, a withdrawn and a superseded certificate; B is the peer whose values are borrowed.
    other_for = {"A": "B", "W": "B", "S": "B"}
    for name, other in other_for.items():
        cert, peer = lab.certs[name], lab.certs[other]
        row, peer_row = cert_rows[cert], cert_rows[peer]
        for column, value in row.items():
            if column == "id":
                continue
            new = peer_row[column]
            if new == value or column == "sequence":  # unique: point it at no entry
                new = _altered(value) if column != "sequence" else value + 1000
            out.append((f"certificates.{column} of {name}", cert, "certificates", "id", cert,
                        column, new))
        for chain_row in chain_rows:
            if chain_row["certificate_id"] != cert:
                continue
            for column, value in chain_row.items():
                if column == "sequence":
                    continue
                out.append((f"chain.{column} of {chain_row['entry_type']} of {name}", cert,
                            "chain", "sequence", chain_row["sequence"], column, _altered(value)))
            # The index columns pointing elsewhere (what an intruder hiding an entry would do).
            out.append((f"chain.certificate_id of {chain_row['entry_type']} of {name} → {other}",
                        cert, "chain", "sequence", chain_row["sequence"], "certificate_id", peer))
            flipped = "withdrawal" if chain_row["entry_type"] == "issue" else "issue"
            out.append((f"chain.entry_type of {chain_row['entry_type']} of {name} → {flipped}",
                        cert, "chain", "sequence", chain_row["sequence"], "entry_type", flipped))
        run = run_rows[row["run_id"]]
        peer_run = run_rows[peer_row["run_id"]]
        for column, value in run.items():
            if column == "id":
                continue
            new = peer_run[column] if peer_run[column] != value else _altered(value)
            out.append((f"runs.{column} of {name}", cert, "runs", "id", run["id"], column, new))
        for file_row in file_rows:
            if file_row["run_id"] != row["run_id"]:
                continue
            for column in ("name", "sha256", "size"):
                out.append((f"run_files.{column} of {name}", cert, "run_files", "run_id",
                            file_row["run_id"], column, _altered(file_row[column])))
    return out


def _altered(value):
    if value is None:
        return "2026-02-30T00:00:00.000000Z"
    if isinstance(value, bool):
        return not value
    if isinstance(value, int):
        return value + 1
    if isinstance(value, float):
        return value * 1.5 + 1
    text = str(value)
    if len(text) >= 64 and all(c in "0123456789abcdef" for c in text[:64]):
        return text[:-1] + ("0" if text[-1] != "0" else "1")
    if text.startswith("{") and text.endswith("}"):
        # JSON held in a column: change a value inside, keep it parseable.
        for digit in "0123456789":
            if digit in text:
                swap = "7" if digit != "7" else "3"
                return text.replace(digit, swap, 1)
        return text[:-1] + ',"tampered":1}' if len(text) > 2 else '{"tampered":1}'
    if text.isdigit():
        return str(int(text) + 1)
    return text + "x"


def _apply(sql, table: str, key: str, key_value, column: str, value) -> object:
    old = sql.execute(f"SELECT {column} FROM {table} WHERE {key} = ?", (key_value,)).fetchall()
    sql.execute(f"UPDATE {table} SET {column} = ? WHERE {key} = ?", (value, key_value))
    sql.commit()
    return old


def _restore(sql, table: str, key: str, key_value, column: str, old) -> None:
    # Rows keyed by a non-unique column (run_files by run_id) hold one value per run here.
    sql.execute(f"UPDATE {table} SET {column} = ? WHERE {key} = ?", (old[0][0], key_value))
    sql.commit()


@pytest.mark.slow
def test_every_column_tampering_a_reader_sees_is_detected(lab):
    db = database_file(lab.services)
    baseline = {}
    missed, served_5xx, seen, harmless = [], [], 0, []
    with raw_sql(db) as sql:
        sql.execute("PRAGMA synchronous=OFF")  # this connection only; a test, not the service
        for tampering in _column_tamperings(lab):
            outcome = _one_tampering(lab, sql, baseline, *tampering)
            if outcome is None:
                continue
            label, changed, caught, failures = outcome
            served_5xx += failures
            if changed:
                seen += 1
                if not caught:
                    missed.append(label)
            elif not caught:
                harmless.append(label)
    assert_clean(lab)
    print(f"\ncolumn tamperings: {seen} changed what a reader sees, {len(missed)} missed; "
          f"{len(harmless)} changed nothing a reader sees and passed: {harmless}")
    assert not served_5xx, served_5xx
    assert not missed, "\n".join(missed)


def _one_tampering(lab, sql, baseline, label, cert, table, key, key_value, column, value):
    if cert not in baseline:
        baseline[cert] = reader_view(lab, cert, _run_id(lab, cert))
    run_id = _run_id(lab, cert)
    old = _apply(sql, table, key, key_value, column, value)
    try:
        after = reader_view(lab, cert, run_id)
        changed = [p for p in after if after[p] != baseline[cert][p]]
        failures = [f"{label}: {p} → {after[p][0]}" for p in after if after[p][0] >= 500]
        one, everything = detected(lab, cert)
        detail = f"{label}: readers changed {changed}; verify caught certificate={one} archive={everything}"
        return detail, bool(changed), one and everything, failures
    finally:
        _restore(sql, table, key, key_value, column, old)


def _blob_paths(lab, cert: str) -> dict[str, str]:
    info = lab.services.archive.get(cert)
    digests = {f"raw file {f['name']}": f["sha256"] for f in info["files"]}
    digests["plots"] = info["plots_sha256"]
    for name, entry in info["extra_files"].items():
        digests[f"output file {name}"] = entry["sha256"]
    return digests


BYTE_CLASSES = {
    "first byte flipped": lambda b: bytes([b[0] ^ 0x01]) + b[1:],
    "middle byte flipped": lambda b: b[: len(b) // 2] + bytes([b[len(b) // 2] ^ 0x20]) + b[len(b) // 2 + 1 :],
    "last byte flipped": lambda b: b[:-1] + bytes([b[-1] ^ 0x01]),
    "truncated": lambda b: b[:-1],
    "appended": lambda b: b + b"\n",
    "emptied": lambda b: b"",
    "deleted": None,
}


@pytest.mark.parametrize("byte_class", list(BYTE_CLASSES))
def test_every_blob_byte_class_is_detected_or_refused(lab, byte_class):
    cert = lab.certs["A"]
    run_id = _run_id(lab, cert)
    baseline = reader_view(lab, cert, run_id)
    for what, digest in _blob_paths(lab, cert).items():
        path = lab.services.storage.blobs.path(digest)
        saved = path.read_bytes()
        change = BYTE_CLASSES[byte_class]
        if change is None:
            path.unlink()
        else:
            path.write_bytes(change(saved))
        try:
            after = reader_view(lab, cert, run_id)
            assert all(status < 500 for status, _ in after.values()), (what, after)
            changed = [p for p in after if after[p] != baseline[p]]
            # A reader may refuse (409), never show the altered bytes as if they were signed.
            for p in changed:
                assert after[p][0] == 409, f"{what} {byte_class}: {p} served altered content"
            one, everything = detected(lab, cert)
            assert one and everything, f"{what} {byte_class} not detected"
        finally:
            path.write_bytes(saved)
    assert_clean(lab)
