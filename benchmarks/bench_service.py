"""Benchmarks for the calibration service. Prints figures; asserts nothing.

    .venv/bin/python benchmarks/bench_service.py [--quick] [--records N] [--uploads N]

1. Upload-to-draft latency for the bundled example run (five CBT sweeps) through a live server on
   127.0.0.1: from the start of the HTTP upload to the job reporting its draft certificate, with
   the full MCMC settings (``--quick``: the short ones).
2. Verification of an archive of N issued records (default 10 000; target ≤ 10 s): the whole
   signed hash chain (hash, canonical form, Ed25519 signature and link of every entry) plus every
   stored raw file named by the records; then the single-record check of the newest record, which
   walks the chain up to it.
3. 20 concurrent uploads (threads against the live server, one small real run each): errors,
   wall time, and time until every analysis has produced its draft.

All traffic stays on 127.0.0.1; every loop is bounded in count and time.
"""

from __future__ import annotations

import argparse
import json
import logging
import statistics
import sys
import tempfile
import threading
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from service.web.app import create_app  # noqa: E402
from service.web.auth import create_token, create_user  # noqa: E402
from tests.service_support import LiveServer  # noqa: E402

EXAMPLE = ROOT / "example_runs" / "cbt-hollowmere"
PASSWORD = "benchmark password"


def _lab(instance: Path, quick: bool, workers: int):
    app = create_app(
        {
            "INSTANCE_PATH": str(instance),
            "ANALYSIS_OPTIONS": {"fast": True} if quick else {},
            "WORKERS": workers,
        }
    )
    storage = app.extensions["coldcert"].storage
    tokens = {}
    for name, roles in (("operator", "operator"), ("approver", "approver"), ("auditor", "auditor")):
        create_user(storage, name, roles, password=PASSWORD)
        tokens[name] = create_token(storage, name)
    return app, tokens


def _wait_job(server: LiveServer, token: str, job_id: str, timeout: float) -> dict:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        _status, _h, body = server.request("GET", f"/api/jobs/{job_id}", token)
        job = json.loads(body)
        if job["status"] in ("done", "failed"):
            return job
        time.sleep(0.05)
    raise RuntimeError(f"job {job_id} not finished after {timeout} s")


def bench_upload_to_draft(root: Path, quick: bool) -> dict:
    app, tokens = _lab(root / "latency", quick, workers=1)
    services = app.extensions["coldcert"]
    services.start_workers(1)
    files = [(p.name, p.read_bytes()) for p in sorted(EXAMPLE.iterdir()) if p.is_file()]
    try:
        with LiveServer(app) as server:
            # Let the worker process finish importing numpy/scipy/emcee before the clock starts.
            time.sleep(8.0)
            start = time.perf_counter()
            status, _h, body = server.request("POST", "/api/runs", tokens["operator"], files=files)
            accepted = time.perf_counter() - start
            if status != 202:
                raise RuntimeError(f"upload refused: {body[:300]!r}")
            job = _wait_job(server, tokens["operator"], json.loads(body)["job_id"], 1800)
            total = time.perf_counter() - start
    finally:
        services.stop_workers()
    if job["status"] != "done":
        raise RuntimeError(f"analysis failed: {job['error']}")
    from datetime import datetime

    def stamp(text: str) -> float:
        return datetime.strptime(text, "%Y-%m-%dT%H:%M:%S.%fZ").timestamp()

    return {
        "files": len(files),
        "accepted_s": accepted,
        "draft_s": total,
        "queued_s": stamp(job["started_at"]) - stamp(job["created_at"]),
        "analysis_s": stamp(job["finished_at"]) - stamp(job["started_at"]),
        "certificate": job["certificate_id"],
    }


def bench_verify(root: Path, records: int, quick: bool) -> dict:
    from service.calibrations.certify import certify_run
    from service.intake import load_run

    app, tokens = _lab(root / "archive", quick=True, workers=1)
    services = app.extensions["coldcert"]
    storage, archive = services.storage, services.archive
    with storage.read() as conn:
        from sqlalchemy import select

        from service import storage as st

        people = {r.username: dict(r._mapping) for r in conn.execute(select(st.users))}
    # One real record (one sweep, short MCMC) stands for every archived certificate; each archive
    # entry still carries its own full copy, its file list and its own signature.
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        for name in ("run.toml", "sweep_03_60mK.csv"):
            (folder / name).write_bytes((EXAMPLE / name).read_bytes())
        certified = certify_run(load_run(folder), fast=True)
        files = [(name, (folder / name).read_bytes()) for name in ("run.toml", "sweep_03_60mK.csv")]
    start = time.perf_counter()
    for index in range(records):
        run_id = f"bench-{index:06d}"
        with storage.write() as conn:
            archive.record_run(
                conn,
                run_id=run_id,
                kind="cbt_thermometry",
                item="HLT-CBT-07",
                manifest={},
                files=files,
                seed=424242,
                submitter=people["operator"],
            )
            cert = archive.create_draft(
                conn,
                run_id=run_id,
                record=certified.record,
                seed=424242,
                software={"coldcert": "bench"},
                submitter=people["operator"],
                options={"fast": True},
                plots=certified.plots,
            )
        archive.issue(cert, people["approver"])
    build = time.perf_counter() - start
    entry_bytes = len(json.dumps(archive.signed_entry(cert)["entry"]))
    start = time.perf_counter()
    ok, problems = archive.verify_all()
    whole = time.perf_counter() - start
    start = time.perf_counter()
    report = archive.verify(cert)
    single = time.perf_counter() - start
    return {
        "records": records,
        "build_s": build,
        "entry_bytes": entry_bytes,
        "verify_all_s": whole,
        "valid": ok and report.valid,
        "problems": len(problems),
        "verify_newest_s": single,
    }


def bench_concurrent_uploads(root: Path, uploads: int, quick: bool) -> dict:
    app, tokens = _lab(root / "concurrent", quick, workers=2)
    services = app.extensions["coldcert"]
    services.start_workers(2)
    files = [(name, (EXAMPLE / name).read_bytes()) for name in ("run.toml", "sweep_03_60mK.csv")]
    latencies: list[float] = []
    errors: list[str] = []
    lock = threading.Lock()
    try:
        with LiveServer(app) as server:

            def one(index: int):
                start = time.perf_counter()
                status, _h, body = server.request(
                    "POST",
                    "/api/runs",
                    tokens["operator"],
                    files=files,
                    fields={"seed": str(1000 + index)},
                )
                elapsed = time.perf_counter() - start
                with lock:
                    latencies.append(elapsed)
                    if status != 202:
                        errors.append(f"{status}: {body[:200]!r}")
                return json.loads(body).get("job_id") if status == 202 else None

            start = time.perf_counter()
            with ThreadPoolExecutor(max_workers=uploads) as pool:
                job_ids = [j for j in pool.map(one, range(uploads)) if j]
            accepted = time.perf_counter() - start
            results = [_wait_job(server, tokens["operator"], j, 3600) for j in job_ids]
            drafted = time.perf_counter() - start
    finally:
        services.stop_workers()
    failed = [r["error"] for r in results if r["status"] != "done"]
    return {
        "uploads": uploads,
        "errors": len(errors) + len(failed),
        "error_messages": (errors + failed)[:3],
        "accept_wall_s": accepted,
        "accept_median_s": statistics.median(latencies),
        "accept_max_s": max(latencies),
        "all_drafted_s": drafted,
    }


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="short MCMC settings for the fits")
    parser.add_argument("--records", type=int, default=10_000)
    parser.add_argument("--uploads", type=int, default=20)
    parser.add_argument("--skip", default="", help="comma list: latency,verify,concurrent")
    args = parser.parse_args()
    logging.getLogger("werkzeug").setLevel(logging.WARNING)  # no line per request
    skip = set(filter(None, args.skip.split(",")))
    with tempfile.TemporaryDirectory(prefix="coldcert-bench-") as tmp:
        root = Path(tmp)
        if "latency" not in skip:
            r = bench_upload_to_draft(root, args.quick)
            print(
                f"upload-to-draft, example run ({r['files']} files, "
                f"{'short' if args.quick else 'full'} MCMC): upload accepted in "
                f"{r['accepted_s'] * 1000:.0f} ms, draft {r['certificate']} ready after "
                f"{r['draft_s']:.1f} s (waiting for a worker {r['queued_s']:.1f} s, analysis "
                f"and drafting in the worker {r['analysis_s']:.1f} s)"
            )
        if "verify" not in skip:
            r = bench_verify(root, args.records, args.quick)
            print(
                f"archive of {r['records']} issued records (~{r['entry_bytes'] / 1024:.0f} KiB "
                f"each) built in {r['build_s']:.1f} s"
            )
            print(
                f"verify whole archive: {r['verify_all_s']:.2f} s (target <= 10 s), valid: "
                f"{r['valid']}, problems: {r['problems']}; newest record alone (chain up to "
                f"it): {r['verify_newest_s']:.2f} s"
            )
        if "concurrent" not in skip:
            r = bench_concurrent_uploads(root, args.uploads, args.quick)
            print(
                f"{r['uploads']} concurrent uploads: {r['errors']} errors "
                f"{r['error_messages'] or ''}; all accepted in {r['accept_wall_s']:.2f} s "
                f"(median {r['accept_median_s'] * 1000:.0f} ms, max "
                f"{r['accept_max_s'] * 1000:.0f} ms); all {r['uploads']} drafts ready after "
                f"{r['all_drafted_s']:.1f} s (2 worker processes)"
            )
    return 0


if __name__ == "__main__":
    sys.exit(main())
