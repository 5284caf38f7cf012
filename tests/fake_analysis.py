"""An analysis that misbehaves on request, to test how the job machinery copes (not science).

The run's manifest chooses the behaviour with ``[run] test_behaviour``: "fail" raises inside the
fit, "crash_once" kills the worker process the first time (as a power cut or an OOM kill would)
and works on the retry, "output_file" adds an output file derived from the result and a job-specific HTML
section (as the sensor calibration adds its table and section), "unstable_output_file" one that differs on every run,
"crash_always" kills its worker on every attempt, "cpu_bound" spends a fixed amount of CPU work
(``[run] test_work`` rounds of a 200 x 200 eigenvalue problem; the queue benchmark's job) on a
stand-in record, "instant" returns a stand-in record at once (for
tests of the job queue, not of the science), "slow" reports progress for about ten seconds and
then does the same (time to kill its worker mid-fit), "hang" never finishes, "stubborn" never
finishes and ignores being asked to stop (as a fit stuck inside a C library would); anything else runs
the real analysis.
"""

from __future__ import annotations

import os
import time
from pathlib import Path

from service.calibrations.certify import certify_run


def misbehaving_certify(run, seed, progress=None, **options):
    behaviour = run.manifest.get("run", {}).get("test_behaviour")
    if behaviour == "fail":
        if progress:
            progress(0.3, "fitting the first sweep")
        raise RuntimeError("the fit did not converge (simulated failure)")
    if behaviour == "crash_once":
        marker = Path(os.environ["COLDCERT_TEST_CRASH_MARKER"])
        if not marker.exists():
            marker.write_text("crashed once")
            if progress:
                progress(0.5, "halfway when the worker died")
            os._exit(17)
    if behaviour == "crash_always":
        os._exit(17)
    if behaviour == "hang":
        while True:
            time.sleep(0.1)
    if behaviour == "stubborn":
        while True:
            try:
                time.sleep(0.1)
            except BaseException:  # noqa: S110 - the point: the soft time limit is swallowed
                pass
    if behaviour == "slow":
        for step in range(40):
            if progress:
                progress(step / 40, f"slow step {step} of 40")
            time.sleep(0.25)
    if behaviour == "cpu_bound":
        import numpy as np

        rng = np.random.default_rng(seed)
        total = 0.0
        for _ in range(int(run.manifest["run"].get("test_work", 20))):
            matrix = rng.standard_normal((200, 200))
            total += float(np.linalg.eigvalsh(matrix + matrix.T).max())
        if progress:
            progress(1.0, "stand-in work done")
        return {
            "kind": run.kind,
            "note": "stand-in record of the queue benchmark; no analysis was run",
            "results": [{"quantity": "stand-in", "value": total, "unit": "1"}],
        }
    if behaviour in ("slow", "instant"):
        return {
            "kind": run.kind,
            "note": "stand-in record of the job-queue tests; no analysis was run",
            "results": [{"quantity": "stand-in", "value": (seed % 1000) * 1e-3, "unit": "K"}],
        }
    result = certify_run(run, seed, progress, **options)
    if behaviour == "output_file":
        value = result.record["results"][0]["value"]
        result.extra_files["table.csv"] = f"temperature_K\n{value!r}\n".encode()
    if behaviour == "unstable_output_file":
        result.extra_files["table.csv"] = f"made_at\n{time.time_ns()}\n".encode()
    return result
