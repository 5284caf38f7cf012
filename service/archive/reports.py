"""What verify and reproduce hand back: each check with its reason, each differing number."""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from typing import Any


@dataclass(frozen=True)
class Check:
    """One verification step: what was checked, whether it passed, and why not."""

    what: str
    ok: bool
    detail: str


@dataclass(frozen=True)
class VerifyReport:
    certificate_id: str
    state: str
    sequence: int | None
    valid: bool
    checks: tuple[Check, ...]

    def as_dict(self) -> dict[str, Any]:
        return {
            "certificate_id": self.certificate_id,
            "state": self.state,
            "sequence": self.sequence,
            "valid": self.valid,
            "checks": [asdict(c) for c in self.checks],
            "problems": [c.detail for c in self.checks if not c.ok],
        }


@dataclass(frozen=True)
class Mismatch:
    path: str
    archived: Any
    reproduced: Any


@dataclass(frozen=True)
class ReproduceReport:
    certificate_id: str
    seed: int
    identical: bool
    numbers_compared: int
    mismatches: tuple[Mismatch, ...]
    software_recorded: dict[str, str]
    software_now: dict[str, str]
    skipped_paths: tuple[str, ...] = field(default_factory=tuple)
    files_compared: int = 0

    @property
    def same_software(self) -> bool:
        return self.software_recorded == self.software_now

    def as_dict(self) -> dict[str, Any]:
        return {
            "certificate_id": self.certificate_id,
            "seed": self.seed,
            "identical": self.identical,
            "numbers_compared": self.numbers_compared,
            "files_compared": self.files_compared,
            "mismatches": [asdict(m) for m in self.mismatches],
            "software_recorded": self.software_recorded,
            "software_now": self.software_now,
            "same_software": self.same_software,
            "skipped_paths": list(self.skipped_paths),
        }
