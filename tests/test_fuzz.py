"""Property-based fuzzing (Hypothesis) of intake, the command line and the upload route.

Properties: intake accepts a run or raises ``IntakeError`` (never anything else); ``coldcert
check`` never ends in a traceback; the upload route never answers 5xx, a refusal carries an error
message and stores nothing, an acceptance stores exactly the files it lists.

The number of examples is bounded for CI (the whole file runs in well under two minutes on a
shared 2-core machine); ``COLDCERT_FUZZ_EXAMPLES=5000 pytest tests/test_fuzz.py`` is the longer
run, and ``benchmarks/fuzz_uploads.py`` sends ten thousand uploads to a live server.
"""

from __future__ import annotations

import contextlib
import io
import os
import tempfile
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as hs
from sqlalchemy import func, select

from service import storage as st
from tests.fuzz_strategies import SEEDS, UPLOADS, csv_files, manifests, plain_uploads
from tests.service_support import make_lab

EXAMPLES = int(os.environ.get("COLDCERT_FUZZ_EXAMPLES", "60"))
FUZZ = settings(
    max_examples=EXAMPLES,
    deadline=None,
    derandomize=os.environ.get("COLDCERT_FUZZ_RANDOM") != "1",
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture,
                           HealthCheck.data_too_large],
    database=None,
)


@FUZZ
@given(csv=csv_files(), manifest=hs.none() | manifests())
def test_intake_accepts_or_refuses_with_intake_error(csv, manifest):
    from service.intake import IntakeError, load_files

    named = {"sweep.csv": csv}
    if manifest is not None:
        named["run.toml"] = manifest
    try:
        load_files(named)
    except IntakeError as exc:
        assert exc.message and str(exc)


@FUZZ
@given(files=plain_uploads())
def test_command_line_check_never_ends_in_a_traceback(files):
    from service.cli.main import main

    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp) / "run"
        folder.mkdir()
        for name, data in files:
            target = folder / Path(name).name
            with contextlib.suppress(OSError, ValueError):
                target.write_bytes(data)
        err = io.StringIO()
        with contextlib.redirect_stderr(err), contextlib.redirect_stdout(io.StringIO()):
            try:
                status = main(["check", str(folder)])
            except SystemExit as exc:  # argparse
                status = exc.code
        assert status in (0, 2), (status, err.getvalue())
        if status == 2:
            assert err.getvalue().startswith("coldcert: error: ")


@pytest.fixture(scope="module")
def lab(tmp_path_factory):
    lab = make_lab(tmp_path_factory.mktemp("fuzz"))
    yield lab
    lab.services.storage.dispose()


def _counts(lab):
    with lab.services.storage.read() as conn:
        return tuple(
            conn.execute(select(func.count()).select_from(table)).scalar()
            for table in (st.runs, st.run_files, st.jobs, st.blobs)
        )


@FUZZ
@given(files=UPLOADS, seed=SEEDS)
def test_upload_route_never_answers_5xx(lab, files, seed):
    form = {} if seed is None else {"seed": seed}
    before = _counts(lab)
    reply = lab.upload(lab.client(), files=files, **form)
    body = reply.get_json(silent=True)
    assert reply.status_code < 500, (reply.status_code, body)
    if reply.status_code >= 400:
        assert body and body.get("error"), body
        assert _counts(lab) == before, "a refused upload stored something"
    else:
        assert reply.status_code == 202, body
        runs, run_files, jobs, _ = _counts(lab)
        assert (runs, jobs) == (before[0] + 1, before[2] + 1)
        assert run_files == before[1] + len(body["files"])
