"""Reproduce: re-run the archived analysis on the archived raw data and compare every number
bit for bit, and every output file byte for byte."""

from __future__ import annotations

from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from service.archive.lifecycle import SERVICE_FIELDS
from service.archive.reports import Mismatch, ReproduceReport
from service.archive.stored import Blobs
from service.record.certificate import software_versions
from service.storage import sha256_hex


@dataclass(frozen=True)
class AnalysisOutput:
    record: dict[str, Any]
    plots: dict[str, str]
    extra_files: dict[str, bytes]


def analysis_output(result: Any) -> AnalysisOutput:
    """What an analysis returned: a record dict, or an object with ``record`` and optionally
    ``plots`` and ``extra_files``."""
    if isinstance(result, Mapping):
        return AnalysisOutput(dict(result), {}, {})
    return AnalysisOutput(
        dict(result.record),
        dict(getattr(result, "plots", None) or {}),
        dict(getattr(result, "extra_files", None) or {}),
    )


def numeric_leaves(obj: Any, path: str = "") -> dict[str, Any]:
    """Every number (and null where a number may stand) in a JSON value, keyed by its path."""
    out: dict[str, Any] = {}
    if isinstance(obj, bool) or isinstance(obj, str):
        return out
    if obj is None or isinstance(obj, int | float):
        out[path or "$"] = obj
    elif isinstance(obj, Mapping):
        for key, value in obj.items():
            out.update(numeric_leaves(value, f"{path}.{key}" if path else str(key)))
    elif isinstance(obj, list | tuple):
        for index, value in enumerate(obj):
            out.update(numeric_leaves(value, f"{path}[{index}]"))
    return out


def _same_number(a: Any, b: Any) -> bool:
    if a is None or b is None:
        return a is None and b is None
    # Bit for bit: the IEEE-754 binary64 values must be identical (float.hex is exact).
    return float(a).hex() == float(b).hex()


def compare_numbers(
    archived: Mapping[str, Any], reproduced: Mapping[str, Any], skip: Iterable[str] = ()
) -> tuple[int, tuple[Mismatch, ...]]:
    """Compare every number of two records; return (count compared, mismatches)."""
    skip = tuple(skip)

    def skipped(path: str) -> bool:
        return any(path == s or path.startswith(s + ".") or path.startswith(s + "[") for s in skip)

    left = {p: v for p, v in numeric_leaves(archived).items() if not skipped(p)}
    right = {p: v for p, v in numeric_leaves(reproduced).items() if not skipped(p)}
    mismatches = []
    for path in sorted(set(left) | set(right)):
        if path not in right:
            mismatches.append(Mismatch(path, left[path], "absent"))
        elif path not in left:
            mismatches.append(Mismatch(path, "absent", right[path]))
        elif not _same_number(left[path], right[path]):
            mismatches.append(Mismatch(path, left[path], right[path]))
    return len(set(left) | set(right)), tuple(mismatches)


def reproduce(
    certificate_id: str,
    info: Mapping[str, Any],
    blobs: Blobs,
    certify: Callable[..., Any],
    load_run: Callable[[Path], Any],
    progress: Callable[[float, str], None] | None = None,
) -> ReproduceReport:
    """Re-run the analysis of the certificate ``info`` (as the archive reads it) on its
    archived raw files and compare every number and output file."""
    record = info["record"]
    with blobs.storage.blobs.scratch("reproduce") as tmp:
        folder = blobs.materialise_run(info["files"], Path(tmp) / "run")
        run = load_run(folder)
        output = analysis_output(certify(run, info["seed"], progress, **info["options"]))
        fresh, fresh_files = output.record, output.extra_files
    skip = list(SERVICE_FIELDS) + ["dates.issued", "people.approver"]
    skip += list(record.get("corrected_fields") or [])
    count, mismatches = compare_numbers(record, fresh, skip)
    # Output files (calibration tables, cycle lists) must come back byte for byte as well.
    archived_files = {k: v["sha256"] for k, v in info["extra_files"].items()}
    fresh_digests = {k: sha256_hex(v) for k, v in fresh_files.items()}
    file_mismatches = tuple(
        Mismatch(
            f"file {name}",
            archived_files.get(name, "absent"),
            fresh_digests.get(name, "absent"),
        )
        for name in sorted(set(archived_files) | set(fresh_digests))
        if archived_files.get(name) != fresh_digests.get(name)
    )
    mismatches = mismatches + file_mismatches
    return ReproduceReport(
        certificate_id=certificate_id,
        seed=info["seed"],
        identical=not mismatches,
        numbers_compared=count,
        mismatches=mismatches,
        files_compared=len(set(archived_files) | set(fresh_digests)),
        software_recorded=info["software"],
        software_now=software_versions(),
        skipped_paths=tuple(skip),
    )
