"""Helpers for the hostile-input, tamper and crash suites: a canned analysis that needs no MCMC,
certificates taken to any lifecycle state through the archive directly, and raw database edits
made the way an intruder with file access would make them (append-only triggers dropped first).

The canned analysis is not science: it returns the bundled pump example's record with its first
value shifted by the seed, one SVG plot and one output file, so that every
stored part a rendering reads exists and differs between certificates.
"""

from __future__ import annotations

import contextlib
import copy
import json
import sqlite3
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

EXAMPLE_RECORD = (
    Path(__file__).resolve().parents[1]
    / "example_runs"
    / "pump-quillfen-certificate"
    / "certificate.json"
)


@dataclass
class CannedOutput:
    record: dict[str, Any]
    plots: dict[str, str] = field(default_factory=dict)
    extra_files: dict[str, bytes] = field(default_factory=dict)


def canned_output(seed: int) -> CannedOutput:
    record = copy.deepcopy(json.loads(EXAMPLE_RECORD.read_text(encoding="utf-8")))
    record["results"][0]["value"] = float(record["results"][0]["value"]) + seed * 1e-9
    record["results"][0].pop("reported", None)
    marker = f"seed {seed}"
    svg = (
        '<svg xmlns="http://www.w3.org/2000/svg" width="120" height="40" viewBox="0 0 120 40">'
        f'<text x="4" y="24">{marker}</text></svg>'
    )
    return CannedOutput(
        record=record,
        plots={"fit": svg},
        extra_files={"table.csv": f"seed,value\n{seed},{record['results'][0]['value']!r}\n".encode()},
    )


def canned_certify(run: Any, seed: int, progress=None, **options: Any) -> CannedOutput:
    """A stand-in analysis for the service machinery (see the module docstring).

    ``COLDCERT_CANNED_DELAY`` (seconds) makes it take that long, so that a test can kill the
    service while fits are in flight."""
    import os
    import time

    delay = float(os.environ.get("COLDCERT_CANNED_DELAY", "0") or 0)
    if progress:
        progress(0.5, "canned analysis")
    time.sleep(delay)
    if progress:
        progress(1.0, "canned analysis")
    return canned_output(seed)


def draft(services, submitter: dict, seed: int, files: list[tuple[str, bytes]]) -> str:
    """Record a run and draft its certificate from the canned analysis; return the id."""
    from service.queue.jobs import new_id

    output = canned_output(seed)
    run_id = new_id("run")
    archive = services.archive
    with services.storage.write() as conn:
        archive.record_run(
            conn,
            run_id=run_id,
            kind="pump_verification",
            item=f"pump SN {seed}",
            manifest={"item": {"name": f"pump SN {seed}"}, "run": {"seed": seed}},
            files=files,
            seed=seed,
            submitter=submitter,
        )
        return archive.create_draft(
            conn,
            run_id=run_id,
            record=output.record,
            seed=seed,
            software={"coldcert": "canned"},
            submitter=submitter,
            options={"fast": True},
            plots=output.plots,
            extra_files=output.extra_files,
        )


def user(services, username: str) -> dict[str, Any]:
    from sqlalchemy import select

    from service import storage as st

    with services.storage.read() as conn:
        row = conn.execute(select(st.users).where(st.users.c.username == username)).one()
    return dict(row._mapping)


def database_file(services) -> Path:
    url = services.storage.engine.url
    return Path(url.database)


@contextlib.contextmanager
def raw_sql(db: Path):
    """A plain sqlite3 connection with the append-only triggers dropped (restored afterwards)."""
    conn = sqlite3.connect(db, timeout=60)
    triggers = conn.execute(
        "SELECT name, sql FROM sqlite_master WHERE type = 'trigger'"
    ).fetchall()
    for name, _ in triggers:
        conn.execute(f"DROP TRIGGER {name}")
    conn.commit()
    try:
        yield conn
        conn.commit()
    finally:
        for _, sql in triggers:
            conn.execute(sql)
        conn.commit()
        conn.close()
