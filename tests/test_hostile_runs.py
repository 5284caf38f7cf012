"""Runs that are valid files but awkward data, through the whole service (upload → worker → job):
a sweep recorded downwards, one conductance 25 % off, one bias typed with a wrong exponent.
Each must end in a draft certificate or in a refusal that names the file (and line where there
is one) — never in a crashed job (an IndexError, a singular matrix, walkers that cannot start).
"""

from __future__ import annotations

import pytest

from tests.service_support import running_lab, small_run_files

RUN_TOML, SWEEP = (data for _, data in small_run_files())
NAME = "sweep_03_60mK.csv"
#: Exceptions that are refusals with a reason, not crashes.
REFUSALS = ("IntakeError", "CertificationRefused")


def _rows(sweep: bytes) -> tuple[list[bytes], list[bytes]]:
    lines = sweep.splitlines(keepends=True)
    head = [line for line in lines if line.startswith(b"#") or line.startswith(b"bias_V")]
    return head, [line for line in lines if line not in head]


def downward() -> bytes:
    head, rows = _rows(SWEEP)
    return b"".join(head + rows[::-1])


def one_conductance_off() -> bytes:
    head, rows = _rows(SWEEP)
    i = len(rows) // 3
    bias, g = rows[i].decode().strip().split(",")
    rows[i] = f"{bias},{float(g) * 1.25:.8e}\n".encode()
    return b"".join(head + rows)


def one_bias_wrong_exponent() -> bytes:
    head, rows = _rows(SWEEP)
    i = len(rows) // 4
    bias, g = rows[i].decode().strip().split(",")
    mantissa, exponent = bias.split("e")
    rows[i] = f"{mantissa}e{int(exponent) + 3:+03d},{g}\n".encode()
    return b"".join(head + rows)


@pytest.fixture(scope="module")
def lab(tmp_path_factory):
    yield from running_lab(tmp_path_factory.mktemp("awkward-runs"))


@pytest.mark.slow
@pytest.mark.parametrize("make", [downward, one_conductance_off, one_bias_wrong_exponent],
                         ids=lambda f: f.__name__)
def test_an_awkward_sweep_gives_a_certificate_or_a_named_refusal(lab, make):
    client = lab.client()
    reply = lab.upload(client, files=[("run.toml", RUN_TOML), (NAME, make())])
    body = reply.get_json()
    if reply.status_code != 202:
        # Refused at upload: that is a named refusal too.
        assert 400 <= reply.status_code < 500 and body["file"] == NAME, body
        return
    job = lab.wait(client, body["job_id"], timeout=900)
    if job["status"] == "done":
        assert job["certificate_id"]
        return
    error = job["error"] or ""
    assert error.split(":", 1)[0] in REFUSALS, f"crashed job: {error}"
    assert NAME in error, f"the refusal does not name the file: {error}"
