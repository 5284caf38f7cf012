"""The certificate record: a deterministic canonical JSON document.

The record is built only from the run's inputs (raw-file hashes, manifest), the analysis results,
the seed and the software version, so the same run gives the same bytes. It carries the content
ISO/IEC 17025:2017 7.8.2 and 7.8.4 ask of a calibration certificate. Issue date, approver and
signature are added by the archive when the certificate is issued; a record without them is a
draft.
"""

from __future__ import annotations

import hashlib
import json
import math
import platform
import re
from importlib import metadata as importlib_metadata

SCHEMA = "coldcert/certificate/1"

CAUTIONS = (
    "Cryogenic liquids and gases: dilution refrigerators and cryostats hold liquid helium or "
    "nitrogen and pressurised gas (including ³He/⁴He mixture); they can cause cold burns, "
    "asphyxiation in a poorly ventilated room and overpressure when they warm up. Follow your "
    "laboratory's safety rules, local codes and the manufacturers' instructions.",
    "High-pressure ³He: melting-curve thermometry keeps ³He at several MPa in its cell and "
    "capillary; the gas-handling system must meet the local rules for pressure equipment and be "
    "operated by trained staff.",
    "Mains-powered instruments (bridges, lock-in amplifiers, current sources and ammeters) wired "
    "to a cryostat must be earthed and isolated as their manufacturers require; work on them "
    "follows local electrical-safety rules.",
    "Electrical standards and low-noise measurement chains must be operated by trained staff "
    "under the laboratory's quality system; this document does not replace it.",
    "This certificate was produced by the coldcert software. It is not an accreditation: only the "
    "laboratory's own accreditation body can confer that status, and the issuing laboratory "
    "remains responsible for the validity of the results.",
)

#: Added when the run's manifest mentions an applied magnetic field.
MAGNET_CAUTION = (
    "Magnetic fields: the conditions of this measurement include an applied magnetic field. "
    "Superconducting magnets store large energies and can quench; keep ferromagnetic objects, "
    "wearers of pacemakers or implants and magnetic media out of the stray field, and follow "
    "the local rules for magnet areas."
)

_FIELD_WORDS = re.compile(
    r"\bmagnet|\bmagnetic field|\b\d+(\.\d+)?\s*(m?T|tesla|gauss)\b|\bB\s*=\s*\d", re.IGNORECASE
)
_NO_FIELD = re.compile(r"\b(no|zero|without)\s+(applied\s+|magnetic\s+|external\s+)*field", re.IGNORECASE)


def mentions_magnetic_field(manifest: dict) -> bool:
    """Whether any text or field of the manifest speaks of an applied magnetic field.

    A key ending in ``_T`` (e.g. ``magnetic_field_T``) with a non-zero value counts, and so does a
    text naming a magnet, a magnetic field or a value in tesla, unless it says "no applied field".
    """
    def walk(node, key=""):
        if isinstance(node, dict):
            for k, v in node.items():
                yield from walk(v, str(k))
        elif isinstance(node, list):
            for v in node:
                yield from walk(v, key)
        else:
            yield key, node

    for key, value in walk(manifest):
        if key.endswith("_T") and "field" in key and isinstance(value, int | float) and value != 0:
            return True
        if isinstance(value, str) and _FIELD_WORDS.search(value) and not _NO_FIELD.search(value):
            return True
    return False


def statements_for(manifest: dict) -> list[str]:
    """The certificate's statements: results relate to the item, then the cautions that apply."""
    cautions = list(CAUTIONS)
    if mentions_magnetic_field(manifest):
        cautions.insert(-2, MAGNET_CAUTION)
    return [RELATES_ONLY, *cautions]


RELATES_ONLY = "The results relate only to the item calibrated, as received and under the stated conditions."


def software_versions() -> dict:
    """Versions of everything that decides the numbers of an analysis (recorded in every
    certificate and with every archived draft, so a reproduction can say what differs)."""

    def v(name: str) -> str:
        try:
            return importlib_metadata.version(name)
        except importlib_metadata.PackageNotFoundError:
            return "unknown"

    return {
        "coldcert": v("coldcert"),
        "python": platform.python_version(),
        "numpy": v("numpy"),
        "scipy": v("scipy"),
        "emcee": v("emcee"),
        "uncertainties": v("uncertainties"),
    }


def _clean(obj):
    """Make a record JSON-safe: numpy scalars to Python, non-finite floats to None."""
    if isinstance(obj, dict):
        return {str(k): _clean(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [_clean(v) for v in obj]
    if hasattr(obj, "item") and callable(obj.item) and not isinstance(obj, str | bytes):
        obj = obj.item()
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    return obj


def pretty_bytes(record: dict) -> bytes:
    """The record indented for people; parses back to the identical record. The archive signs the
    canonical form of the same data (service.archive.canonical_json)."""
    return (json.dumps(_clean(record), sort_keys=True, indent=2, ensure_ascii=False, allow_nan=False)
            + "\n").encode("utf-8")


def certificate_id(input_hashes: list[str], seed: int, version: str) -> str:
    """Deterministic identifier from the inputs, the seed and the software version."""
    h = hashlib.sha256(("|".join(sorted(input_hashes)) + f"|{seed}|{version}").encode()).hexdigest()
    return "CC-" + h[:12].upper()


def _section(manifest: dict, name: str) -> dict:
    body = manifest.get(name, {})
    return {k: v for k, v in body.items() if isinstance(v, str | int | float | bool)}


def measurement_dates(stated: dict, files) -> dict:
    """``measured`` (and ``measurement_began``) as the manifest states them, else from the files.

    Without ``[dates] measured`` in run.toml the date of measurement (ISO/IEC 17025 7.8.2.1 i)
    is the day the last sweep started (``# sweep_started:``), and ``measurement_began`` the day the
    first did when that differs. Values that are not ISO 8601 dates are ignored here.
    """
    if stated.get("measured"):
        return {"measured": stated["measured"]}
    days = sorted(
        str(f.metadata["sweep_started"])[:10]
        for f in files
        if re.match(r"^\d{4}-\d{2}-\d{2}", str(f.metadata.get("sweep_started", "")))
    )
    if not days:
        return {"measured": None}
    if days[0] == days[-1]:
        return {"measured": days[-1]}
    return {"measured": days[-1], "measurement_began": days[0]}


def build_record(run, outcome, seed: int, job: str) -> dict:
    """Assemble the draft record from a validated run and a job's outcome."""
    versions = software_versions()
    hashes = [f.sha256 for f in run.files]
    manifest_hash = hashlib.sha256(run.manifest_raw).hexdigest() if run.manifest_raw else None
    if manifest_hash:
        hashes.append(manifest_hash)
    cid = certificate_id(hashes, seed, versions["coldcert"])
    m = run.manifest
    lab = _section(m, "laboratory") or {"name": "not stated in the run manifest"}
    record = {
        "schema": SCHEMA,
        "certificate_id": cid,
        "revision": 1,
        "state": "draft",
        "title": "Calibration certificate",
        "job": job,
        "laboratory": lab,
        "customer": _section(m, "customer") or {"name": "not stated"},
        "item": _section(m, "item") or {"description": "not stated"},
        "dates": {
            "received": m.get("dates", {}).get("received"),
            **measurement_dates(m.get("dates", {}), run.files),
            "issued": None,
        },
        "people": {"operator": m.get("people", {}).get("operator"), "approver": None},
        "method": outcome.method,
        "conditions": {**_section(m, "conditions"), **outcome.conditions},
        "results": outcome.results,
        "sections": outcome.sections,
        "diagnostics": outcome.diagnostics,
        "deviations": outcome.deviations,
        "traceability": m.get("run", {}).get("traceability") or (
            "Temperatures are primary: they follow from the Coulomb-blockade dip width through "
            "k_B and e, exact in the SI since 2019, and the number of junctions. The bias-voltage "
            "scale is traceable through the laboratory's voltage calibration stated in the budget."
            if job in ("cbt_thermometry", "sensor_calibration") else
            "The elementary charge is exact in the SI; the current measurement is traceable "
            "through the ammeter-chain calibrations stated in the budget."
        ),
        "statements": statements_for(m),
        "inputs": {
            "files": [{"name": f.name, "sha256": f.sha256, "bytes": len(f.raw)} for f in run.files],
            "manifest_sha256": manifest_hash,
        },
        "reproducibility": {"seed": seed, "software": versions},
    }
    return _clean(record)
