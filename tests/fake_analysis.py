"""An analysis that misbehaves on request, to test how the job machinery copes (not science).

The run's manifest chooses the behaviour with ``[run] test_behaviour``: "fail" raises inside the
fit, "crash_once" kills the worker process the first time (as a power cut or an OOM kill would)
and works on the retry; anything else runs the real analysis.
"""

from __future__ import annotations

import os
from pathlib import Path

from service.certify import certify_run


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
    return certify_run(run, seed, progress, **options)
