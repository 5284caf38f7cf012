"""From a validated run to a draft certificate: dispatch to its calibration kind, then build the record."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

from service.calibrations.registry import calibration_for
from service.intake import Run
from service.record.certificate import build_record, pretty_bytes
from service.render.html import render_html

DEFAULT_SEED = 20261201


@dataclass
class Certified:
    """A draft certificate: the record and the files that render it."""

    record: dict
    html: str
    plots: dict[str, str] = field(default_factory=dict)
    extra_files: dict[str, bytes] = field(default_factory=dict)

    def files(self) -> dict[str, bytes]:
        """All output files by name; certificate.json last so its presence means complete."""
        out = dict(self.extra_files)
        out["certificate.html"] = self.html.encode("utf-8")
        out["certificate.json"] = pretty_bytes(self.record)
        return out


def run_seed(run: Run, seed: int | None) -> int:
    if seed is not None:
        return int(seed)
    return int(run.manifest.get("run", {}).get("seed", DEFAULT_SEED))


def certify_run(run: Run, seed: int | None = None, progress: Callable[[float, str], None] | None = None,
                fast: bool = False) -> Certified:
    """Analyse a run and return its draft certificate. Raises IntakeError or CertificationRefused."""
    seed = run_seed(run, seed)
    outcome = calibration_for(run.kind).analyse(run, seed, progress=progress, fast=fast)
    record = build_record(run, outcome, seed, run.kind)
    html = render_html(record, outcome.plots)
    return Certified(record=record, html=html, plots=outcome.plots, extra_files=outcome.extra_files)
