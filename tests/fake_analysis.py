"""An analysis that misbehaves on request, to test how the job machinery copes (not science).

The run's manifest chooses the behaviour with ``[run] test_behaviour``: "fail" raises inside the
fit, "crash_once" kills the worker process the first time (as a power cut or an OOM kill would)
and works on the retry, "output_file" adds an output file derived from the result and a job-specific HTML
section (as the sensor calibration adds its table and section), "unstable_output_file" one that differs on every run; anything else
runs the real analysis.
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
    result = certify_run(run, seed, progress, **options)
    if behaviour == "output_file":
        value = result.record["results"][0]["value"]
        result.extra_files["table.csv"] = f"temperature_K\n{value!r}\n".encode()
        result.html_sections = ['<section id="job-extra"><h2>What was verified</h2></section>']
    if behaviour == "unstable_output_file":
        result.extra_files["table.csv"] = f"made_at\n{time.time_ns()}\n".encode()
    return result
