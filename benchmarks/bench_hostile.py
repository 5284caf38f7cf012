"""Hostile input against a live service on 127.0.0.1: fuzzed uploads, zip bombs, fuzzed CLI input.

Prints, for the closing figures of the hostile-input work:

* fuzzed uploads sent to a live server (werkzeug, threaded, in a process of its own) and how many
  answered 5xx (target 0);
* the server's peak resident memory growth (VmHWM from /proc) while four zip bombs of 250 MB
  each are refused concurrently (target < 100 MB);
* fuzzed run folders given to ``coldcert check`` and how many ended in a traceback (target 0).

    .venv/bin/python benchmarks/bench_hostile.py                 # 10 000 uploads, 2 000 CLI runs
    .venv/bin/python benchmarks/bench_hostile.py --uploads 500 --cli 200   # a quick look

Runs are bounded; everything listens on loopback only. Linux only (reads /proc).
"""

from __future__ import annotations

import argparse
import collections
import contextlib
import io
import json
import os
import subprocess
import sys
import tempfile
import threading
import time
import warnings
import zipfile
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

SERVER = """
import sys
from werkzeug.serving import make_server
from tests.service_support import make_lab
from pathlib import Path
lab = make_lab(Path(sys.argv[1]))
server = make_server("127.0.0.1", 0, lab.app, threaded=True)
print(json.dumps({"port": server.server_port, "tokens": lab.tokens}), flush=True)
server.serve_forever()
"""


def start_server(folder: Path) -> tuple[subprocess.Popen, str, dict]:
    proc = subprocess.Popen(
        [sys.executable, "-c", "import json\n" + SERVER, str(folder)],
        cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True,
    )
    info = json.loads(proc.stdout.readline())
    return proc, f"http://127.0.0.1:{info['port']}", info["tokens"]


def peak_rss_mb(pid: int) -> float:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024
    raise RuntimeError("no VmHWM in /proc")


def post(url: str, token: str, files, fields=None) -> int:
    from tests.service_support import LiveServer

    fake = LiveServer.__new__(LiveServer)
    fake.url = url
    status, _, _ = fake.request("POST", "/api/runs", token=token, files=files, fields=fields)
    return status


def fuzz_uploads(url: str, token: str, count: int) -> collections.Counter:
    from hypothesis import HealthCheck, Phase, given, settings

    from tests.fuzz_strategies import SEEDS, UPLOADS

    statuses: collections.Counter = collections.Counter()
    examples: dict[int, object] = {}

    @settings(max_examples=count, deadline=None, database=None, phases=[Phase.generate],
              suppress_health_check=list(HealthCheck))
    @given(files=UPLOADS, seed=SEEDS)
    def send(files, seed):
        fields = {} if seed is None or "\x00" in seed else {"seed": seed}
        try:
            status = post(url, token, files, fields)
        except Exception as exc:  # a dropped connection counts as a server failure
            status = 599
            examples.setdefault(status, repr(exc))
        statuses[status] += 1
        if status >= 500:
            examples.setdefault(status, [(n, d[:60]) for n, d in files])

    send()
    for status, example in examples.items():
        print(f"  first {status}: {example}")
    return statuses


def bomb(size_mb: int) -> bytes:
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", compression=zipfile.ZIP_DEFLATED) as archive:
        with archive.open("sweep_bomb.csv", "w", force_zip64=True) as member:
            chunk = b"0" * (1 << 20)
            for _ in range(size_mb):
                member.write(chunk)
    return buffer.getvalue()


def zip_bombs(url: str, token: str, pid: int, count: int = 4, size_mb: int = 250) -> None:
    data = bomb(size_mb)
    before = peak_rss_mb(pid)
    results = []
    threads = [
        threading.Thread(target=lambda: results.append(post(url, token, [("bomb.zip", data)])))
        for _ in range(count)
    ]
    started = time.perf_counter()
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    after = peak_rss_mb(pid)
    print(f"zip bombs: {count} × {len(data) / 1e3:.0f} kB zips unpacking to {size_mb} MB each → "
          f"statuses {sorted(results)} in {time.perf_counter() - started:.1f} s; server peak "
          f"memory {before:.0f} MB → {after:.0f} MB (growth {after - before:.0f} MB)")


def fuzz_cli(count: int) -> None:
    from hypothesis import HealthCheck, Phase, given, settings

    from service.cli.main import main
    from tests.fuzz_strategies import plain_uploads

    outcome: collections.Counter = collections.Counter()

    @settings(max_examples=count, deadline=None, database=None, phases=[Phase.generate],
              suppress_health_check=list(HealthCheck))
    @given(files=plain_uploads())
    def check(files):
        with tempfile.TemporaryDirectory() as tmp:
            folder = Path(tmp) / "run"
            folder.mkdir()
            for name, data in files:
                with contextlib.suppress(OSError, ValueError):
                    (folder / Path(name).name).write_bytes(data)
            with contextlib.redirect_stderr(io.StringIO()), contextlib.redirect_stdout(io.StringIO()):
                try:
                    outcome[f"exit {main(['check', str(folder)])}"] += 1
                except SystemExit as exc:
                    outcome[f"exit {exc.code}"] += 1
                except Exception as exc:
                    outcome[f"traceback {type(exc).__name__}"] += 1

    check()
    tracebacks = sum(v for k, v in outcome.items() if k.startswith("traceback"))
    print(f"CLI: {count} fuzzed run folders through `coldcert check` → {dict(outcome)}; "
          f"tracebacks: {tracebacks}")


def main() -> None:
    warnings.simplefilter("ignore")  # zipfile warns about the duplicate names we send on purpose
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--uploads", type=int, default=10_000)
    parser.add_argument("--cli", type=int, default=2_000)
    parser.add_argument("--bomb-mb", type=int, default=250)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory(prefix="coldcert-bench-hostile-") as tmp:
        proc, url, tokens = start_server(Path(tmp))
        try:
            zip_bombs(url, tokens["olga"], proc.pid, size_mb=args.bomb_mb)
            started = time.perf_counter()
            statuses = fuzz_uploads(url, tokens["olga"], args.uploads)
            total = sum(statuses.values())
            failures = sum(v for k, v in statuses.items() if k >= 500)
            print(f"uploads: {total} fuzzed uploads in {time.perf_counter() - started:.0f} s → "
                  f"statuses {dict(sorted(statuses.items()))}; 5xx: {failures}")
        finally:
            proc.terminate()
            proc.wait(10)
    fuzz_cli(args.cli)


if __name__ == "__main__":
    main()
