"""Load on the production web server: C concurrent clients for S seconds against read routes and
uploads, on 127.0.0.1. Prints requests, errors and latency percentiles; asserts nothing.

    .venv/bin/python benchmarks/bench_load.py [--clients 50] [--seconds 60] [--upload-share 0.1]

`coldcert serve` (waitress, 8 request threads, no analysis workers so that fits do not compete
for the cores) runs in a process of its own on a free loopback port, on a temporary instance with
an issued certificate. Each client is a thread with its own keep-alive connection that loops
until the time is up, choosing a request at random (fixed seed): the health check, the list of
certificates, one certificate's record, its HTML rendering, its verification, a job's status,
and with probability ``--upload-share`` an upload of a small run (one CBT sweep and its manifest,
validated and stored; the jobs stay queued). Any answer other than the expected status, and any
connection error, counts as an error. Target: 0 errors; p99 latency printed.
"""

from __future__ import annotations

import argparse
import http.client
import json
import os
import random
import signal
import socket
import subprocess
import sys
import tempfile
import threading
import time
import uuid
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from tests.service_support import make_lab, small_run_files  # noqa: E402

ROUTES = ("health", "list", "record", "html", "verify", "job")


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _multipart(files: list[tuple[str, bytes]]) -> tuple[bytes, str]:
    boundary = uuid.uuid4().hex
    parts = [
        f'--{boundary}\r\nContent-Disposition: form-data; name="files"; filename="{name}"\r\n'
        f"Content-Type: application/octet-stream\r\n\r\n".encode()
        + data
        + b"\r\n"
        for name, data in files
    ]
    return b"".join(parts) + f"--{boundary}--\r\n".encode(), boundary


def _prepare(instance: Path) -> dict:
    """An instance with people, tokens and one issued certificate (made in this process)."""
    lab = make_lab(instance.parent, INSTANCE_PATH=str(instance))
    client = lab.client()
    upload = lab.upload(client, seed="7").get_json()
    lab.services.start_workers(1)
    job = lab.wait(client, upload["job_id"], timeout=600)
    lab.services.stop_workers()
    if job["status"] != "done":
        raise RuntimeError(f"could not make the certificate: {job['error']}")
    cert = job["certificate_id"]
    issued = client.post(f"/api/certificates/{cert}/issue", headers=lab.headers("arno"))
    if issued.status_code != 200:
        raise RuntimeError(f"could not issue {cert}: {issued.get_json()}")
    lab.services.storage.dispose()
    return {"certificate": cert, "job": upload["job_id"], "tokens": lab.tokens}


class Client(threading.Thread):
    def __init__(self, index: int, port: int, setup: dict, until: float, upload_share: float):
        super().__init__(daemon=True)
        self.port, self.setup, self.until = port, setup, until
        self.random = random.Random(index)
        self.upload_share = upload_share
        self.samples: list[tuple[str, float]] = []
        self.errors: list[str] = []
        self.body, self.boundary = _multipart(small_run_files())

    def _request(self, conn, kind: str) -> tuple[int, bytes]:
        cert, job = self.setup["certificate"], self.setup["job"]
        reader = {"Authorization": f"Bearer {self.setup['tokens']['aude']}"}
        if kind == "upload":
            headers = {
                "Authorization": f"Bearer {self.setup['tokens']['olga']}",
                "Content-Type": f"multipart/form-data; boundary={self.boundary}",
            }
            conn.request("POST", "/api/runs", body=self.body, headers=headers)
        else:
            path = {
                "health": "/api/health",
                "list": "/api/certificates",
                "record": f"/api/certificates/{cert}",
                "html": f"/api/certificates/{cert}/html",
                "verify": f"/api/certificates/{cert}/verify",
                "job": f"/api/jobs/{job}",
            }[kind]
            conn.request("GET", path, headers=reader)
        reply = conn.getresponse()
        return reply.status, reply.read()

    def run(self) -> None:
        conn = http.client.HTTPConnection("127.0.0.1", self.port, timeout=60)
        while time.monotonic() < self.until:
            upload = self.random.random() < self.upload_share
            kind = "upload" if upload else self.random.choice(ROUTES)
            start = time.perf_counter()
            try:
                status, body = self._request(conn, kind)
            except (OSError, http.client.HTTPException) as exc:
                self.errors.append(f"{kind}: {type(exc).__name__}: {exc}")
                conn.close()
                conn = http.client.HTTPConnection("127.0.0.1", self.port, timeout=60)
                continue
            elapsed = time.perf_counter() - start
            expected = 202 if kind == "upload" else 200
            if status != expected:
                self.errors.append(f"{kind}: HTTP {status}: {body[:200]!r}")
            else:
                self.samples.append((kind, elapsed))
        conn.close()


def _percentile(values: list[float], q: float) -> float:
    ordered = sorted(values)
    if not ordered:
        return float("nan")
    index = min(len(ordered) - 1, max(0, round(q / 100 * len(ordered) + 0.5) - 1))
    return ordered[index]  # nearest-rank percentile (common practice, no source)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--clients", type=int, default=50)
    parser.add_argument("--seconds", type=float, default=60.0)
    parser.add_argument("--upload-share", type=float, default=0.1)
    parser.add_argument("--threads", type=int, default=8, help="waitress request threads")
    args = parser.parse_args()
    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

    with tempfile.TemporaryDirectory(prefix="coldcert-bench-load-") as tmp:
        instance = Path(tmp) / "instance"
        setup = _prepare(instance)
        port = _free_port()
        log = open(Path(tmp) / "server.log", "w")  # noqa: SIM115 - closed below
        server = subprocess.Popen(
            [sys.executable, "-m", "service.cli.main", "serve", "--instance", str(instance),
             "--port", str(port), "--workers", "0", "--threads", str(args.threads)],
            cwd=ROOT, stdout=log, stderr=log, start_new_session=True,
        )  # fmt: skip
        try:
            deadline = time.monotonic() + 60
            while True:
                try:
                    with socket.create_connection(("127.0.0.1", port), timeout=1):
                        break
                except OSError:
                    if time.monotonic() > deadline or server.poll() is not None:
                        raise RuntimeError("coldcert serve did not start") from None
                    time.sleep(0.2)
            until = time.monotonic() + args.seconds
            clients = [
                Client(i, port, setup, until, args.upload_share) for i in range(args.clients)
            ]
            begun = time.perf_counter()
            for c in clients:
                c.start()
            for c in clients:
                c.join(args.seconds + 120)
            wall = time.perf_counter() - begun
        finally:
            os.killpg(server.pid, signal.SIGTERM)
            server.wait(timeout=30)
            log.close()

    samples = [s for c in clients for s in c.samples]
    errors = [e for c in clients for e in c.errors]
    print(f"{args.clients} clients for {args.seconds:.0f} s on the production server (waitress, "
          f"{args.threads} threads), 127.0.0.1")  # fmt: skip
    print(f"requests answered {len(samples)}, errors {len(errors)}, "
          f"{len(samples) / wall:.0f} requests/s")  # fmt: skip
    print(f"{'route':<8} {'count':>6} {'p50 ms':>8} {'p95 ms':>8} {'p99 ms':>8} {'max ms':>8}")
    for kind in (*ROUTES, "upload", "all"):
        values = [t for k, t in samples if k == kind or kind == "all"]
        if values:
            print(
                f"{kind:<8} {len(values):>6} {1e3 * _percentile(values, 50):>8.1f} "
                f"{1e3 * _percentile(values, 95):>8.1f} {1e3 * _percentile(values, 99):>8.1f} "
                f"{1e3 * max(values):>8.1f}"
            )
    for line in errors[:10]:
        print("error:", line)
    print(json.dumps({"errors": len(errors), "p99_ms": round(1e3 * _percentile(
        [t for _k, t in samples], 99), 1)}))  # fmt: skip


if __name__ == "__main__":
    main()
