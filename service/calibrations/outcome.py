"""What every calibration kind returns: one outcome type, and one refusal."""

from __future__ import annotations

from dataclasses import dataclass, field


class CertificationRefused(Exception):
    """The analysis ran but its result must not go on a certificate; message says why."""


@dataclass
class CalibrationOutcome:
    """What a calibration kind hands to the record builder."""

    results: list[dict]
    sections: dict = field(default_factory=dict)
    plots: dict[str, str] = field(default_factory=dict)
    diagnostics: dict = field(default_factory=dict)
    deviations: list[str] = field(default_factory=list)
    method: dict = field(default_factory=dict)
    conditions: dict = field(default_factory=dict)
    extra_files: dict[str, bytes] = field(default_factory=dict)
