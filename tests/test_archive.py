"""Archive: canonical JSON, SHA-256 and Ed25519 against published vectors, lifecycle, four eyes,
hash chain, tamper detection, offline verification and bit-for-bit reproduction."""

from __future__ import annotations

import json
import sqlite3
import stat
from pathlib import Path

import numpy as np
import pytest
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
from sqlalchemy import select

from service import storage as st
from service.archive import (
    GENESIS_SHA256,
    Archive,
    ArchiveError,
    LabKey,
    canonical_json,
    compare_numbers,
    record_sha256,
    verify_signature,
    verify_signed_document,
)
from service.storage import Storage, default_database_url, sha256_hex
from tests.service_support import complete_record

# ---- published test vectors -----------------------------------------------------------------


def test_sha256_of_abc_fips_180_2():
    # FIPS 180-2, Appendix B.1 ("abc" one-block message); value quoted in docs/physics.md 6.
    assert sha256_hex(b"abc") == (
        "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    )


# RFC 8032 section 7.1, TEST 1 (empty message); values quoted in docs/physics.md 6.
RFC8032_SECRET = "9d61b19deffd5a60ba844af492ec2cc44449c5697b326919703bac031cae7f60"
RFC8032_PUBLIC = "d75a980182b10ab7d54bfed3c964073a0ee172f3daa62325af021a68f707511a"
RFC8032_SIGNATURE = (
    "e5564300c360ac729086e2cc806e828a84877f1eb8e5d974d873e065224901555"
    "fb8821590a33bacc61e39701cf9b46bd25bf5f0595bbe24655141438e7a100b"
)


def test_ed25519_rfc8032_test_1():
    key = LabKey(Ed25519PrivateKey.from_private_bytes(bytes.fromhex(RFC8032_SECRET)))
    assert key.public_raw.hex() == RFC8032_PUBLIC
    assert key.sign(b"") == RFC8032_SIGNATURE
    assert verify_signature(bytes.fromhex(RFC8032_PUBLIC), b"", RFC8032_SIGNATURE)
    # One flipped bit in message or signature must fail.
    assert not verify_signature(bytes.fromhex(RFC8032_PUBLIC), b"\x00", RFC8032_SIGNATURE)
    bad = RFC8032_SIGNATURE[:-1] + ("a" if RFC8032_SIGNATURE[-1] != "a" else "b")
    assert not verify_signature(bytes.fromhex(RFC8032_PUBLIC), b"", bad)


# ---- canonical JSON ---------------------------------------------------------------------------


def test_canonical_json_form():
    value = {"b": [1, 2.5, None, True], "a": {"z": "Ω", "y": 0.1}, "c": 1e-20}
    data = canonical_json(value)
    # Sorted keys, no whitespace, UTF-8 (not \u escapes), shortest round-trip float repr.
    assert data == '{"a":{"y":0.1,"z":"Ω"},"b":[1,2.5,null,true],"c":1e-20}'.encode()
    assert canonical_json(json.loads(data)) == data
    # Key order of the input does not matter.
    assert canonical_json(dict(reversed(list(value.items())))) == data
    assert record_sha256(value) == sha256_hex(data)


def test_canonical_json_round_trips_every_float_exactly():
    rng = np.random.default_rng(20261201)
    values = [float(v) for v in rng.standard_normal(500) * 10.0 ** rng.integers(-30, 30, 500)]
    assert json.loads(canonical_json(values)) == values


@pytest.mark.parametrize("bad", [float("nan"), float("inf"), -float("inf")])
def test_canonical_json_refuses_non_finite_numbers_naming_the_field(bad):
    with pytest.raises(ValueError, match=r"results\[0\]\.value"):
        canonical_json({"results": [{"value": bad}]})


def test_lab_key_created_once_private_to_owner(tmp_path):
    key = LabKey.load_or_create(tmp_path / "keys")
    private = tmp_path / "keys" / LabKey.PRIVATE_NAME
    assert stat.S_IMODE(private.stat().st_mode) == 0o600
    assert (tmp_path / "keys" / LabKey.PUBLIC_NAME).read_text() == key.public_pem()
    again = LabKey.load_or_create(tmp_path / "keys")
    assert again.public_raw == key.public_raw
    assert again.key_id == key.key_id == sha256_hex(key.public_raw)[:16]


# ---- lifecycle --------------------------------------------------------------------------------


def _fake_load_run(folder: Path) -> Path:
    return folder


def _fake_certify(run: Path, seed: int, progress=None) -> dict:
    """Deterministic stand-in for an analysis: numbers depend on the file bytes and the seed."""
    column = np.loadtxt(run / "sweep.csv", delimiter=",", skiprows=1, usecols=1)
    rng = np.random.default_rng(seed)
    draws = column.mean() + column.std() * rng.standard_normal(64)
    if progress:
        progress(1.0, "done")
    u = float(draws.std(ddof=1))
    # Everything ISO/IEC 17025 7.8.2.1 asks a certificate to state, so that it can be issued.
    return complete_record(
        float(draws.mean()),
        u,
        sweep="sweep.csv",
        budget={"effective_degrees_of_freedom": None},
    )


class Lab:
    """An archive with three people and a helper to take a run to a draft."""

    def __init__(self, root: Path) -> None:
        self.storage = Storage(default_database_url(root), root / "blobs")
        self.storage.create_schema()
        self.key = LabKey.load_or_create(root / "keys")
        self.archive = Archive(self.storage, self.key)
        self.people = {}
        with self.storage.write() as conn:
            for name, roles in (
                ("olga", "operator"),
                ("arno", "approver"),
                ("bea", "approver"),
            ):
                uid = conn.execute(
                    st.users.insert().values(
                        username=name,
                        display_name=name.title(),
                        roles=roles,
                        active=True,
                        created_at=st.utc_now(),
                    )
                ).inserted_primary_key[0]
                self.people[name] = {"id": uid, "username": name, "display_name": name.title()}
        self.runs = 0

    def draft(
        self, submitter="olga", data=b"bias_V,conductance_S\n0,1.0\n1,2.0\n2,4.0\n", seed=7
    ) -> str:
        self.runs += 1
        run_id = f"run-{self.runs}"
        record = _fake_certify_from_bytes(data, seed)
        with self.storage.write() as conn:
            self.archive.record_run(
                conn,
                run_id=run_id,
                kind="cbt_thermometry",
                item="CBT sensor SN 42",
                manifest={"item": "CBT sensor SN 42"},
                files=[("sweep.csv", data)],
                seed=seed,
                submitter=self.people[submitter],
            )
            return self.archive.create_draft(
                conn,
                run_id=run_id,
                record=record,
                seed=seed,
                software={"coldcert": "test"},
                submitter=self.people[submitter],
            )


def _fake_certify_from_bytes(data: bytes, seed: int) -> dict:
    import tempfile

    with tempfile.TemporaryDirectory() as tmp:
        (Path(tmp) / "sweep.csv").write_bytes(data)
        return _fake_certify(Path(tmp), seed)


@pytest.fixture()
def lab(tmp_path):
    lab = Lab(tmp_path)
    yield lab
    lab.storage.dispose()


def test_four_eyes_submitter_cannot_issue(lab):
    cert = lab.draft(submitter="arno")  # an approver who submitted the data himself
    with pytest.raises(ArchiveError, match="four-eyes") as info:
        lab.archive.issue(cert, lab.people["arno"])
    assert info.value.status == 403
    assert lab.archive.get(cert)["state"] == "draft"
    issued = lab.archive.issue(cert, lab.people["bea"])
    assert issued["sequence"] == 1


def test_issue_builds_a_signed_chain(lab):
    first = lab.draft()
    second = lab.draft(seed=8)
    a = lab.archive.issue(first, lab.people["arno"])
    b = lab.archive.issue(second, lab.people["bea"])
    assert (a["sequence"], b["sequence"]) == (1, 2)
    entry_a = lab.archive.signed_entry(first)
    entry_b = lab.archive.signed_entry(second)
    assert entry_a["entry"]["previous_sha256"] == GENESIS_SHA256
    assert entry_b["entry"]["previous_sha256"] == entry_a["sha256"]
    assert sha256_hex(canonical_json(entry_b["entry"])) == entry_b["sha256"]
    body = entry_b["entry"]["body"]
    assert body["approved_by"]["username"] == "bea"
    assert body["submitted_by"]["username"] == "olga"
    assert body["analysis"]["seed"] == 8
    assert body["run"]["files"][0]["sha256"] == sha256_hex(
        b"bias_V,conductance_S\n0,1.0\n1,2.0\n2,4.0\n"
    )
    record = lab.archive.get(second)["record"]
    assert record["certificate_id"] == second
    assert record["dates"]["issued"] == body["issued_at"][:10]
    assert record["people"]["approver"] == "Bea"
    assert record["state"] == "issued" and record["revision"] == 1
    for cert in (first, second):
        report = lab.archive.verify(cert)
        assert report.valid, report.as_dict()["problems"]
    ok, problems = lab.archive.verify_all()
    assert ok, problems
    # Issued records cannot be issued again.
    with pytest.raises(ArchiveError, match="only a draft"):
        lab.archive.issue(first, lab.people["bea"])


def test_amendment_supersedes_and_names_what_it_replaces(lab):
    original = lab.draft()
    lab.archive.issue(original, lab.people["arno"])
    with pytest.raises(ArchiveError, match="reason"):
        lab.archive.amend(original, lab.people["olga"], "  ")
    with pytest.raises(ArchiveError, match="results"):
        lab.archive.amend(original, lab.people["olga"], "typo", {"results": []})
    amended = lab.archive.amend(
        original,
        lab.people["olga"],
        "customer name misspelt",
        {"customer": {"name": "Cryolab Nord"}},
    )
    assert amended == f"{original}-R2"
    with pytest.raises(ArchiveError, match="already pending"):
        lab.archive.amend(original, lab.people["olga"], "again")
    # The person who prepared the amendment cannot issue it.
    lab.people["olga"]["roles"] = "approver"
    with pytest.raises(ArchiveError, match="four-eyes"):
        lab.archive.issue(amended, lab.people["olga"])
    lab.archive.issue(amended, lab.people["bea"])
    old, new = lab.archive.get(original), lab.archive.get(amended)
    assert old["state"] == "superseded" and old["superseded_by"] == amended
    assert new["record"]["replaces"] == original
    assert new["record"]["amendment_reason"] == "customer name misspelt"
    assert new["record"]["customer"]["name"] == "Cryolab Nord"
    assert new["record"]["results"] == old["record"]["results"]
    signed = lab.archive.signed_entry(amended)["entry"]["body"]
    assert signed["replaces"] == original and signed["revision"] == 2
    for cert in (original, amended):
        assert lab.archive.verify(cert).valid
    with pytest.raises(ArchiveError, match="superseded"):
        lab.archive.amend(original, lab.people["olga"], "once more")


def test_withdrawal_is_a_signed_chain_entry(lab):
    cert = lab.draft()
    lab.archive.issue(cert, lab.people["arno"])
    with pytest.raises(ArchiveError, match="reason"):
        lab.archive.withdraw(cert, lab.people["arno"], "")
    result = lab.archive.withdraw(cert, lab.people["arno"], "sensor found damaged")
    assert result["sequence"] == 2
    info = lab.archive.get(cert)
    assert info["state"] == "withdrawn"
    assert info["record"]["withdrawn_reason"] == "sensor found damaged"
    assert lab.archive.verify(cert).valid
    with pytest.raises(ArchiveError, match="already withdrawn"):
        lab.archive.withdraw(cert, lab.people["arno"], "again")
    # Quietly "un-withdrawing" in the database is caught.
    with lab.storage.write() as conn:
        conn.execute(
            st.certificates.update().where(st.certificates.c.id == cert).values(state="issued")
        )
    report = lab.archive.verify(cert)
    assert not report.valid
    assert any("disagrees with the signed chain" in p for p in report.as_dict()["problems"])


def test_draft_can_be_discarded_without_signature(lab):
    cert = lab.draft()
    lab.archive.withdraw(cert, lab.people["arno"], "wrong sensor uploaded")
    assert lab.archive.get(cert)["state"] == "withdrawn"
    with lab.storage.read() as conn:
        assert conn.execute(select(st.chain)).first() is None
    with pytest.raises(ArchiveError, match="carries no signature"):
        lab.archive.signed_entry(cert)


def test_chain_rows_are_append_only(lab):
    cert = lab.draft()
    lab.archive.issue(cert, lab.people["arno"])
    with pytest.raises(Exception, match="append-only"), lab.storage.write() as conn:
        conn.execute(st.chain.update().values(signature="00"))


def _tamper(db: Path, sql: str, *params) -> None:
    # An attacker with file access drops the append-only trigger first.
    conn = sqlite3.connect(db)
    conn.execute("DROP TRIGGER IF EXISTS chain_no_update")
    conn.execute(sql, params)
    conn.commit()
    conn.close()


def test_one_changed_byte_in_an_issued_record_is_found(lab, tmp_path):
    first, second, third = lab.draft(), lab.draft(seed=2), lab.draft(seed=3)
    for cert in (first, second, third):
        lab.archive.issue(cert, lab.people["arno"])
    with lab.storage.read() as conn:
        text = conn.execute(select(st.chain.c.entry_json).where(st.chain.c.sequence == 2)).scalar()
    marker = '"unit":"K"'
    assert marker in text
    _tamper(
        tmp_path / "coldcert.sqlite3",
        "UPDATE chain SET entry_json = ? WHERE sequence = 2",
        text.replace(marker, '"unit":"k"', 1),
    )
    report = lab.archive.verify(second).as_dict()
    assert not report["valid"]
    problems = " | ".join(report["problems"])
    assert "chain entry 2" in problems and "altered after it was signed" in problems
    assert "signature does not verify" in problems
    # Later records fail because their chain passes through entry 2. An earlier record's own
    # entry still checks out, but a damaged later entry could hide its withdrawal or amendment,
    # so it is not reported valid either; the report says why.
    earlier = lab.archive.verify(first).as_dict()
    assert not earlier["valid"]
    assert all("chain entry 1 " not in p for p in earlier["problems"])
    assert any("chain entry 2" in p and "could be hidden" in p for p in earlier["problems"])
    assert not lab.archive.verify(third).valid
    ok, problems = lab.archive.verify_all()
    assert not ok and any("chain entry 2" in c.detail for c in problems)


def test_rehashing_a_tampered_record_still_breaks_signature_and_link(lab, tmp_path):
    first, second = lab.draft(), lab.draft(seed=2)
    lab.archive.issue(first, lab.people["arno"])
    lab.archive.issue(second, lab.people["arno"])
    entry = lab.archive.signed_entry(first)["entry"]
    entry["body"]["certificate"]["results"][0]["value"] *= 1.01
    forged = canonical_json(entry)
    _tamper(
        tmp_path / "coldcert.sqlite3",
        "UPDATE chain SET entry_json = ?, sha256 = ? WHERE sequence = 1",
        forged.decode(),
        sha256_hex(forged),
    )
    problems = " | ".join(lab.archive.verify(second).as_dict()["problems"])
    assert "signature does not verify" in problems
    assert "chain is broken" in problems


def test_altered_raw_file_is_named(lab):
    data = b"bias_V,conductance_S\n0,1.0\n1,2.5\n"
    cert = lab.draft(data=data)
    lab.archive.issue(cert, lab.people["arno"])
    path = lab.storage.blobs.path(sha256_hex(data))
    path.write_bytes(data.replace(b"2.5", b"2.6"))
    report = lab.archive.verify(cert).as_dict()
    assert not report["valid"]
    assert any("raw file sweep.csv" in p and "altered" in p for p in report["problems"])
    path.unlink()
    assert any("missing" in p for p in lab.archive.verify(cert).as_dict()["problems"])


def test_signed_export_verifies_offline(lab):
    cert = lab.draft()
    lab.archive.issue(cert, lab.people["arno"])
    document = json.loads(json.dumps(lab.archive.signed_entry(cert)))
    assert all(c.ok for c in verify_signed_document(document, lab.key.public_raw))
    document["entry"]["body"]["certificate"]["results"][0]["unit"] = "mK"
    checks = verify_signed_document(document, lab.key.public_raw)
    assert [c.what for c in checks if not c.ok] == ["hash", "signature"]
    other = Ed25519PrivateKey.generate().public_key().public_bytes_raw()
    fresh = lab.archive.signed_entry(cert)
    assert not all(c.ok for c in verify_signed_document(fresh, other))


def test_reproduce_matches_bit_for_bit(lab):
    cert = lab.draft(seed=11)
    lab.archive.issue(cert, lab.people["arno"])
    seen = []
    report = lab.archive.reproduce(
        cert, _fake_certify, _fake_load_run, progress=lambda f, s: seen.append((f, s))
    )
    assert report.identical, report.mismatches
    assert report.numbers_compared >= 3
    assert report.seed == 11
    assert seen == [(1.0, "done")]


def test_reproduce_reports_each_number_that_differs(lab):
    cert = lab.draft(seed=11)

    def one_ulp_off(run, seed, progress=None):
        out = _fake_certify(run, seed)
        out["results"][0]["value"] = float(np.nextafter(out["results"][0]["value"], np.inf))
        return out

    report = lab.archive.reproduce(cert, one_ulp_off, _fake_load_run)
    assert not report.identical
    assert [m.path for m in report.mismatches] == ["results[0].value"]
    other_seed = lab.archive.reproduce(
        cert, lambda run, seed, p=None: _fake_certify(run, seed + 1), _fake_load_run
    )
    assert not other_seed.identical


def test_compare_numbers_counts_missing_and_null():
    count, mismatches = compare_numbers(
        {"a": 1.0, "b": None, "c": [1, 2]}, {"a": 1.0, "b": 0.0, "c": [1]}
    )
    assert count == 4
    assert {m.path for m in mismatches} == {"b", "c[1]"}


def test_key_change_keeps_old_entries_verifiable(lab, tmp_path):
    first = lab.draft()
    lab.archive.issue(first, lab.people["arno"])
    new_key = LabKey.load_or_create(tmp_path / "new-keys")
    forgetful = Archive(lab.storage, new_key)
    problems = " ".join(forgetful.verify(first).as_dict()["problems"])
    assert "key unknown to this archive" in problems
    rotated = Archive(lab.storage, new_key, trusted_public_keys=[lab.key.public_raw])
    assert rotated.verify(first).valid
    second = lab.draft(seed=5)
    rotated.issue(second, lab.people["bea"])
    assert rotated.signed_entry(second)["entry"]["key_id"] == new_key.key_id
    ok, problems = rotated.verify_all()
    assert ok, problems
