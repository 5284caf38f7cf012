"""Helpers shared by the service tests: an app on a temporary instance folder, people with
tokens, a small real run taken from the bundled example, a live server on 127.0.0.1."""

from __future__ import annotations

import io
import json
import os
import threading
import time
import urllib.error
import urllib.request
import uuid
import zipfile
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pytest

from service.web.app import create_app
from service.web.auth import create_token, create_user
from service.web.server import production_server

EXAMPLE = Path(__file__).resolve().parents[1] / "example_runs" / "cbt-hollowmere"
PASSWORD = "correct horse battery"

#: One sweep of the example run with its manifest: a real run, small enough for fast tests.
SMALL_RUN = ("run.toml", "sweep_03_60mK.csv")

PEOPLE = {
    "olga": "operator",
    "arno": "approver",
    "bea": "approver",
    "aude": "auditor",
    "adam": "admin",
    "pat": "operator,approver",  # may do both, but never on the same certificate
}


def small_run_files() -> list[tuple[str, bytes]]:
    return [(name, (EXAMPLE / name).read_bytes()) for name in SMALL_RUN]


def zip_of(files: list[tuple[str, bytes]], folder: str = "run-folder") -> bytes:
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w") as archive:
        for name, data in files:
            archive.writestr(f"{folder}/{name}" if folder else name, data)
    return buffer.getvalue()


@dataclass
class Lab:
    app: Any
    tokens: dict[str, str] = field(default_factory=dict)

    @property
    def services(self):
        return self.app.extensions["coldcert"]

    def client(self):
        return self.app.test_client()

    def headers(self, who: str) -> dict[str, str]:
        return {"Authorization": f"Bearer {self.tokens[who]}"}

    def upload(self, client, who: str = "olga", files=None, **form):
        files = small_run_files() if files is None else files
        data = {"files": [(io.BytesIO(content), name) for name, content in files], **form}
        return client.post(
            "/api/runs", data=data, headers=self.headers(who), content_type="multipart/form-data"
        )

    def wait(self, client, job_id: str, who: str = "olga", timeout: float = 180.0) -> dict:
        deadline = time.monotonic() + timeout
        seen = []
        while time.monotonic() < deadline:
            job = client.get(f"/api/jobs/{job_id}", headers=self.headers(who)).get_json()
            seen.append((job["status"], job["fraction"]))
            if job["status"] in ("done", "failed"):
                job["seen"] = seen
                return job
            time.sleep(0.2)
        raise AssertionError(f"job {job_id} did not finish in {timeout} s; last {seen[-1:]}")


def make_lab(tmp_path: Path, **config: Any) -> Lab:
    settings = {
        "INSTANCE_PATH": str(tmp_path / "instance"),
        "TESTING": True,
        "ANALYSIS_OPTIONS": {"fast": True},
        "WORKERS": 1,
        **config,
    }
    app = create_app(settings)
    lab = Lab(app)
    storage = lab.services.storage
    for name, roles in PEOPLE.items():
        create_user(storage, name, roles, password=PASSWORD, display_name=name.title())
        lab.tokens[name] = create_token(storage, name, "tests")
    return lab


def running_lab(folder: Path, **config: Any) -> Iterator[Lab]:
    """A lab with one embedded analysis worker, for a fixture to ``yield from``; stops the worker
    and closes the database afterwards."""
    lab = make_lab(folder, **config)
    lab.services.start_workers(1)
    yield lab
    lab.services.stop_workers()
    lab.services.storage.dispose()


class LiveServer:
    """The real app on the production server (waitress, as `coldcert serve` runs it) on
    127.0.0.1, a free port, in a thread."""

    def __init__(self, app, proxy: str | None = None) -> None:
        self.server = production_server(app, "127.0.0.1", 0, threads=8, proxy=proxy)
        self.url = f"http://127.0.0.1:{self.server.effective_port}"
        self.thread = threading.Thread(target=self.server.run, daemon=True)

    def __enter__(self) -> LiveServer:
        self.thread.start()
        return self

    def __exit__(self, *exc) -> None:
        self.server.close()
        self.thread.join(10)

    def request(
        self,
        method: str,
        path: str,
        token: str | None = None,
        body: dict | None = None,
        files: list[tuple[str, bytes]] | None = None,
        fields: dict[str, str] | None = None,
    ) -> tuple[int, dict[str, str], bytes]:
        headers = {"Accept": "application/json"}
        data = None
        if token:
            headers["Authorization"] = f"Bearer {token}"
        if files is not None:
            boundary = uuid.uuid4().hex
            parts = []
            for key, value in (fields or {}).items():
                parts.append(
                    f'--{boundary}\r\nContent-Disposition: form-data; name="{key}"\r\n\r\n'
                    f"{value}\r\n".encode()
                )
            for name, content in files:
                parts.append(
                    f'--{boundary}\r\nContent-Disposition: form-data; name="files"; '
                    f'filename="{name}"\r\nContent-Type: application/octet-stream\r\n\r\n'.encode()
                    + content
                    + b"\r\n"
                )
            parts.append(f"--{boundary}--\r\n".encode())
            data = b"".join(parts)
            headers["Content-Type"] = f"multipart/form-data; boundary={boundary}"
        elif body is not None:
            data = json.dumps(body).encode()
            headers["Content-Type"] = "application/json"
        request = urllib.request.Request(self.url + path, data=data, method=method, headers=headers)
        try:
            with urllib.request.urlopen(request, timeout=60) as reply:
                return reply.status, dict(reply.headers), reply.read()
        except urllib.error.HTTPError as reply:
            return reply.code, dict(reply.headers), reply.read()


def server_url(variable: str, scheme: str, purpose: str) -> str:
    """The URL of a test server named by ``variable``, or skip (fail under CI=true) without one.

    `.ci/run` starts throw-away PostgreSQL and Redis servers on loopback and exports their URLs;
    on a plain clone these tests skip with the reason.
    """
    url = os.environ.get(variable, "")
    if url.startswith(scheme):
        return url
    reason = f"set {variable} to a {scheme} URL to {purpose} (.ci/run starts one)"
    if os.environ.get("CI") == "true":
        pytest.fail(reason + "; CI must supply it")
    pytest.skip(reason)


def reset_server_database(url: str) -> None:
    """Empty a test database server's schema (every table and the migration version), so the
    next ``create_schema`` builds it from the first migration."""
    from sqlalchemy import text

    from service import storage as st
    from service.storage import Storage

    storage = Storage(url, None)
    with storage.engine.begin() as conn:
        st.metadata.drop_all(conn)
        conn.execute(text("DROP TABLE IF EXISTS alembic_version"))
    storage.dispose()


def complete_record(value: float, u: float, **result: Any) -> dict[str, Any]:
    """A stand-in certificate record that states everything ISO/IEC 17025 7.8.2.1 asks for (so
    it can be issued), with one temperature result ``value`` ± ``u`` (k = 2)."""
    return {
        "title": "Calibration certificate",
        "laboratory": {"name": "Archive Test Lab", "address": "1 Test Road"},
        "customer": {"name": "Cryolab North", "address": "North Road"},
        "item": {"description": "test thermometer", "identifier": "T-1"},
        "dates": {"measured": "2026-11-24"},
        "method": {"description": "stand-in analysis for archive tests"},
        "results": [
            {
                "name": "electron temperature",
                **result,
                "value": value,
                "unit": "K",
                "standard_uncertainty": u,
                "expanded_uncertainty": 2 * u,
                "coverage_factor": 2.0,
                "coverage_probability": 0.95,
            }
        ],
    }
