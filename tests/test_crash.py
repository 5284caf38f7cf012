"""The crash suite: SIGKILL the whole service (web process and workers, as a power cut would)
during concurrent uploads and fits, start it again, and check that nothing acknowledged is
lost, nothing partial is visible and no temporary raw data is left behind.

The service runs in a process group of its own on 127.0.0.1 with one worker and the canned
analysis (tests/hostile_support.py), slowed down so that fits are in flight when it is killed.
"""

from __future__ import annotations

import hashlib
import json
import os
import signal
import sqlite3
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest

from tests.service_support import LiveServer, small_run_files

ROOT = Path(__file__).resolve().parents[1]
SERVER = r"""
import json, sys
from pathlib import Path
from werkzeug.serving import make_server
from service.web.app import create_app
from service.web.auth import create_token, create_user
folder = Path(sys.argv[1])
app = create_app({"INSTANCE_PATH": str(folder / "instance"), "START_WORKERS": True,
                  "WORKERS": 1, "CERTIFY": "tests.hostile_support:canned_certify"})
tokens = folder / "tokens.json"
if not tokens.exists():
    storage = app.extensions["coldcert"].storage
    create_user(storage, "olga", "operator,auditor")
    tokens.write_text(json.dumps({"olga": create_token(storage, "olga")}))
server = make_server("127.0.0.1", 0, app, threaded=True)
print(server.server_port, flush=True)
server.serve_forever()
"""


class Service:
    def __init__(self, folder: Path) -> None:
        env = {**os.environ, "COLDCERT_CANNED_DELAY": "0.4", "PYTHONPATH": str(ROOT)}
        self.proc = subprocess.Popen(
            [sys.executable, "-c", SERVER, str(folder)], cwd=ROOT, env=env,
            stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True,
            start_new_session=True,
        )
        port = self.proc.stdout.readline().strip()
        assert port.isdigit(), "the service did not start"
        self.client = LiveServer.__new__(LiveServer)
        self.client.url = f"http://127.0.0.1:{port}"
        self.token = json.loads((folder / "tokens.json").read_text())["olga"]

    def pids(self) -> set[int]:
        out = subprocess.run(["ps", "-o", "pid=", "-g", str(self.proc.pid)],
                             capture_output=True, text=True).stdout
        return {int(p) for p in out.split()}

    def kill(self) -> None:
        os.killpg(self.proc.pid, signal.SIGKILL)
        self.proc.wait(10)

    def stop(self) -> None:
        with_group = self.proc.poll() is None
        if with_group:
            os.killpg(self.proc.pid, signal.SIGTERM)
            try:
                self.proc.wait(20)
            except subprocess.TimeoutExpired:
                os.killpg(self.proc.pid, signal.SIGKILL)
                self.proc.wait(10)


@pytest.mark.slow
def test_sigkill_during_uploads_and_fits_loses_nothing_acknowledged(tmp_path):
    files = small_run_files()
    service = Service(tmp_path)
    acknowledged: list[dict] = []
    stop = threading.Event()

    def uploader() -> None:
        while not stop.is_set():
            try:
                status, _, body = service.client.request("POST", "/api/runs", token=service.token,
                                                         files=files)
            except OSError:
                return  # the service is gone
            if status == 202:
                acknowledged.append(json.loads(body))

    threads = [threading.Thread(target=uploader) for _ in range(3)]
    try:
        for thread in threads:
            thread.start()
        deadline = time.monotonic() + 60
        while len(acknowledged) < 8 and time.monotonic() < deadline:
            time.sleep(0.1)
        killed = service.pids()
        service.kill()
    finally:
        stop.set()
        for thread in threads:
            thread.join(30)
    assert len(acknowledged) >= 8

    instance = tmp_path / "instance"
    service = Service(tmp_path)
    try:
        pending = {a["job_id"] for a in acknowledged}
        deadline = time.monotonic() + 240
        while pending and time.monotonic() < deadline:
            for job in sorted(pending):
                status, _, body = service.client.request("GET", f"/api/jobs/{job}",
                                                         token=service.token)
                assert status == 200, (job, status, body)
                job_info = json.loads(body)
                if job_info["status"] in ("done", "failed"):
                    pending.discard(job)
                    # The canned analysis never fails: a failure here is the crash's doing.
                    assert job_info["status"] == "done", job_info
            time.sleep(0.5)
        assert not pending, f"jobs never finished after the restart: {sorted(pending)}"
        for accepted in acknowledged:
            status, _, body = service.client.request("GET", f"/api/runs/{accepted['run_id']}",
                                                     token=service.token)
            assert status == 200, f"acknowledged run {accepted['run_id']} is lost"
            assert [f["sha256"] for f in json.loads(body)["files"]] == [
                f["sha256"] for f in accepted["files"]
            ]
    finally:
        service.stop()

    # Nothing partial: every blob the database names is whole, every job is finished, and each
    # finished certify job has exactly its draft.
    db = sqlite3.connect(instance / "coldcert.sqlite3")
    try:
        for (digest,) in db.execute("SELECT sha256 FROM blobs"):
            path = instance / "blobs" / digest[:2] / digest[2:4] / digest
            assert hashlib.sha256(path.read_bytes()).hexdigest() == digest
        stuck = db.execute("SELECT id, status FROM jobs WHERE status IN ('queued', 'running')")
        assert stuck.fetchall() == []
        orphans = db.execute(
            "SELECT j.id FROM jobs j LEFT JOIN certificates c ON c.id = j.certificate_id "
            "WHERE j.status = 'done' AND c.id IS NULL"
        ).fetchall()
        assert orphans == []
    finally:
        db.close()
    # No temporary raw data of the killed processes is left.
    leftovers = [
        p.name for p in (instance / "blobs" / "tmp").iterdir()
        if any(f"{pid}@" in p.name for pid in killed)
    ]
    assert leftovers == []
