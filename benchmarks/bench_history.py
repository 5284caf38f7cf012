"""Benchmarks for item histories, the due list and the public check. Prints figures; asserts
nothing.

    .venv/bin/python benchmarks/bench_history.py [--items N] [--sensors N] [--quick]

An archive is filled with invented issued certificates (tests/history_records.py): N pump items
with five calibrations each and a number of resistance-thermometer items with six curves each.
Then it times

1. the history of one sensor item (drift models for three reference resistances, ΔT(R) between
   five pairs of curves), its page with plots, and its PDF report;
2. the due list over every item (a history per item);
3. the public check: the archive query alone, and a request through the app (throttle raised).

Targets (the service's own, not a standard): a history page under 2 s, the due list of 200 items
under 30 s on the shared 2-core machine, a public check under 50 ms.
"""

from __future__ import annotations

import argparse
import hashlib
import logging
import statistics
import sys
import tempfile
import time
from datetime import date, timedelta
from pathlib import Path
from types import SimpleNamespace

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from service.archive.items import item_history, public_check, recall_overview  # noqa: E402
from service.render.history_pdf import render_history_pdf  # noqa: E402
from service.render.history_plots import history_plots  # noqa: E402
from service.web.app import create_app  # noqa: E402
from service.web.auth import create_token, create_user  # noqa: E402
from tests import history_records as hr  # noqa: E402

POLICY = {
    "max_permissible_change": {
        "temperature": {"max_change": 0.01, "relative": True},
        "deviation": {"max_change": 1.0},
    }
}


def _timed(fn, repeats: int) -> tuple[float, object]:
    times, out = [], None
    for _ in range(repeats):
        start = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - start)
    return statistics.median(times), out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--items", type=int, default=200, help="pump items (5 certificates each)")
    parser.add_argument("--sensors", type=int, default=5, help="sensor items (6 curves each)")
    parser.add_argument("--quick", action="store_true", help="20 pump items, 2 sensor items")
    args = parser.parse_args()
    if args.quick:
        args.items, args.sensors = 20, 2
    logging.disable(logging.WARNING)
    today = date.today()
    with tempfile.TemporaryDirectory(prefix="coldcert-bench-history-") as tmp:
        app = create_app(
            {"INSTANCE_PATH": tmp, "RECALL_POLICY": POLICY, "PUBLIC_CHECK_LIMIT": "100000/minute"}
        )
        services = app.extensions["coldcert"]
        for name, roles in (("olga", "operator"), ("arno", "approver")):
            create_user(services.storage, name, roles, password="benchmark password")
        token = create_token(services.storage, "olga", "bench")
        lab = SimpleNamespace(services=services)

        start = time.perf_counter()
        for s in range(args.sensors):
            for k in range(6):
                day = (today - timedelta(days=120 * (6 - k))).isoformat()
                hr.archive_certificate(
                    lab, hr.sensor_record(f"RX-{s:03d}", day, creep=0.004 * k, seed=100 * s + k)
                )
        ids = []
        for i in range(args.items):
            for k in range(5):
                day = (today - timedelta(days=90 * (5 - k) + i % 60)).isoformat()
                record = hr.pump_record(f"P-{i:04d}", day, deviation_ppm=-1 + 0.1 * k, gate_V=-0.39)
                ids.append(hr.archive_certificate(lab, record))
        filled = time.perf_counter() - start
        n_certs = 6 * args.sensors + 5 * args.items
        print(f"archive filled: {n_certs} issued certificates in {filled:.1f} s")

        archive = services.archive
        t_hist, history = _timed(lambda: item_history(archive, "RX-000", POLICY, today), 3)
        print(f"history of a sensor item (6 curves):        {t_hist * 1e3:8.1f} ms")
        t_plots, plots = _timed(lambda: history_plots(history), 3)
        print(f"its plots ({len(plots)} SVG):                       {t_plots * 1e3:8.1f} ms")
        t_pdf, pdf = _timed(lambda: render_history_pdf(history, plots), 2)
        print(f"its PDF report ({len(pdf) / 1024:.0f} KiB):                {t_pdf * 1e3:8.1f} ms")
        client = app.test_client()
        headers = {"Authorization": f"Bearer {token}"}
        t_cold, reply = _timed(lambda: client.get("/items/RX-000", headers=headers), 1)
        t_warm, _ = _timed(lambda: client.get("/items/RX-000", headers=headers), 3)
        print(
            f"history page through the app: first {t_cold * 1e3:8.1f} ms, then "
            f"{t_warm * 1e3:.1f} ms with its plots cached (status {reply.status_code})"
        )
        t_due, rows = _timed(lambda: recall_overview(archive, POLICY, today), 1)
        overdue = sum(r["status"] == "overdue" for r in rows)
        print(
            f"due list over {len(rows)} items:                 {t_due:8.2f} s ({overdue} overdue)"
        )

        pdf_bytes = client.get(f"/api/certificates/{ids[-1]}/pdf", headers=headers).data
        digest = hashlib.sha256(pdf_bytes).hexdigest()
        t_q, answer = _timed(lambda: public_check(archive, ids[-1], digest), 200)
        print(
            f"public check, archive query:                {t_q * 1e3:8.2f} ms"
            f" (authentic: {answer['authentic']})"
        )
        url = f"/api/public/check?id={ids[-1]}&sha256={digest}"
        t_r, reply = _timed(lambda: client.get(url), 200)
        print(
            f"public check, request through the app:      {t_r * 1e3:8.2f} ms"
            f" (status {reply.status_code})"
        )
        services.storage.dispose()


if __name__ == "__main__":
    main()
