"""The certificate record: a deterministic canonical JSON document, and its HTML rendering.

The record is built only from the run's inputs (raw-file hashes, manifest), the analysis results,
the seed and the software version, so the same run gives the same bytes. It carries the content
ISO/IEC 17025:2017 7.8.2 and 7.8.4 ask of a calibration certificate. Issue date, approver and
signature are added by the archive when the certificate is issued; a record without them is a
draft.
"""

from __future__ import annotations

import hashlib
import html
import json
import math
import platform
import re
from importlib import metadata as importlib_metadata

SCHEMA = "coldcert/certificate/1"

CAUTIONS = (
    "Cryogenic work: dilution refrigerators and cryostats hold cryogenic liquids and pressurised "
    "gas (including ³He/⁴He mixture and, for melting-curve thermometry, ³He at several MPa); follow "
    "your laboratory's safety rules, local codes and the manufacturers' instructions.",
    "Electrical standards and low-noise measurement chains must be operated by trained staff "
    "under the laboratory's quality system; this document does not replace it.",
    "This certificate was produced by the coldcert software. It is not an accreditation: only the "
    "laboratory's own accreditation body can confer that status, and the issuing laboratory "
    "remains responsible for the validity of the results.",
)

RELATES_ONLY = "The results relate only to the item calibrated, as received and under the stated conditions."


def software_versions() -> dict:
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
        "statements": [RELATES_ONLY, *CAUTIONS],
        "inputs": {
            "files": [{"name": f.name, "sha256": f.sha256, "bytes": len(f.raw)} for f in run.files],
            "manifest_sha256": manifest_hash,
        },
        "reproducibility": {"seed": seed, "software": versions},
    }
    return _clean(record)


# --------------------------------------------------------------------------------------------
# HTML


_CSS = """
body{font-family:Georgia,serif;max-width:60em;margin:2em auto;color:#222;line-height:1.4}
h1{font-size:1.5em;margin-bottom:0}h2{font-size:1.15em;border-bottom:1px solid #999;margin-top:1.6em}
h3{font-size:1em}.id{font-family:monospace;color:#444}
table{border-collapse:collapse;margin:.5em 0;font-size:.9em}td,th{border:1px solid #bbb;padding:.2em .5em;text-align:left}
th{background:#eee}.num{text-align:right;font-family:monospace}.warn{color:#8a4b00}
.draft{color:#a00;font-weight:bold}.small{font-size:.85em;color:#444}
figure{margin:1em 0}figure svg{max-width:100%;height:auto}
"""


def _e(x) -> str:
    return html.escape("" if x is None else str(x))


def _g(x, digits: int = 6) -> str:
    if x is None:
        return "∞"
    if isinstance(x, float):
        return f"{x:.{digits}g}"
    return _e(x)


def _kv_table(d: dict) -> str:
    rows = "".join(f"<tr><th>{_e(k)}</th><td>{_e(v)}</td></tr>" for k, v in d.items() if not isinstance(v, dict | list))
    return f"<table>{rows}</table>"


def budget_table(b: dict) -> str:
    head = ("<tr><th>quantity</th><th>estimate</th><th>unit</th><th>standard uncertainty</th><th>type</th>"
            "<th>distribution</th><th>sensitivity</th><th>contribution</th><th>ν</th><th>note</th></tr>")
    body = "".join(
        f"<tr><td>{_e(r['quantity'])}</td><td class=num>{_g(r['estimate'])}</td><td>{_e(r['unit'])}</td>"
        f"<td class=num>{_g(r['standard_uncertainty'], 3)}</td><td>{_e(r['type'])}</td><td>{_e(r['distribution'])}</td>"
        f"<td class=num>{_g(r['sensitivity_coefficient'], 4)} {_e(r['sensitivity_unit'] if r['sensitivity_unit'] != '1' else '')}</td>"
        f"<td class=num>{_g(r['contribution'], 3)} {_e(b['unit'])}</td><td class=num>{_g(r['degrees_of_freedom'], 3)}</td>"
        f"<td class=small>{_e(r['note'])}</td></tr>"
        for r in b["rows"]
    )
    foot = (
        f"<tr><th colspan=3>combined standard uncertainty</th><td class=num>{_g(b['combined_standard_uncertainty'], 3)} {_e(b['unit'])}</td>"
        f"<th colspan=2>ν_eff</th><td class=num>{_g(b['effective_degrees_of_freedom'], 3)}</td>"
        f"<th>k ({b['coverage_probability'] * 100:g} %)</th><td class=num>{_g(b['coverage_factor'], 3)}</td>"
        f"<td>U = {_g(b['expanded_uncertainty'], 3)} {_e(b['unit'])}</td></tr>"
    )
    return f"<table>{head}{body}{foot}</table>"


def render_html(record: dict, plots: dict[str, str] | None = None, extra_sections: list[str] | None = None) -> str:
    """A self-contained HTML page of the record (plots inline as SVG)."""
    plots = plots or {}
    cid = _e(record["certificate_id"])
    state = record.get("state", "draft")
    parts = [
        "<!doctype html><html lang=en><head><meta charset=utf-8>",
        f"<title>{_e(record['title'])} {cid}</title><style>{_CSS}</style></head><body>",
        f"<h1>{_e(record['title'])}</h1><p class=id>Certificate {cid} · revision {_e(record.get('revision', 1))} · state: "
        + (f"<span class=draft>{_e(state)} — not valid until issued</span>" if state == "draft" else _e(state))
        + "</p>",
        "<h2>Laboratory</h2>", _kv_table(record["laboratory"]),
        "<h2>Customer</h2>", _kv_table(record["customer"]),
        "<h2>Item calibrated</h2>", _kv_table(record["item"]),
        "<h2>Dates</h2>", _kv_table({k: v or "—" for k, v in record["dates"].items()}),
        "<h2>Method</h2>", f"<p>{_e(record['method'].get('description', ''))}</p>",
        "<h2>Results</h2>",
    ]
    res_rows = "".join(
        f"<tr><td>{_e(r['name'])}</td><td>{_e(r.get('sweep', ''))}</td>"
        f"<td class=num>{_e(r.get('reported', {}).get('value', _g(r['value'])))}</td><td>{_e(r['unit'])}</td>"
        f"<td class=num>{_e(r.get('reported', {}).get('standard_uncertainty', _g(r['standard_uncertainty'], 2)))}</td>"
        f"<td class=num>{_e(r.get('reported', {}).get('expanded_uncertainty', _g(r['expanded_uncertainty'], 2)))}</td>"
        f"<td class=num>{_g(r['coverage_factor'], 3)}</td><td class=num>{r['coverage_probability'] * 100:g} %</td></tr>"
        for r in record["results"]
    )
    parts.append(
        "<table><tr><th>quantity</th><th>source</th><th>value</th><th>unit</th><th>standard uncertainty</th>"
        f"<th>expanded uncertainty U</th><th>k</th><th>coverage</th></tr>{res_rows}</table>"
        "<p class=small>The expanded uncertainty is the combined standard uncertainty multiplied by the "
        "coverage factor k from Student's t at the effective degrees of freedom (JCGM 100:2008).</p>"
    )
    for section in extra_sections or []:
        parts.append(section)
    for r in record["results"]:
        parts.append(f"<h3>Budget: {_e(r['name'])} — {_e(r.get('sweep', ''))}</h3>")
        if "budget" in r:
            parts.append(budget_table(r["budget"]))
        diag = r.get("diagnostics", {})
        for w in diag.get("warnings", []):
            parts.append(f"<p class=warn>Warning: {_e(w)}</p>")
        post = diag.get("posterior")
        if post:
            taus = ", ".join(f"{k} {v:.1f}" for k, v in post["autocorrelation_time_steps"].items())
            parts.append(
                f"<p class=small>Model: {_e(r.get('model', ''))}. Posterior: {post['walkers']} walkers × {post['steps']} steps, "
                f"autocorrelation times {taus}; acceptance {post['acceptance_fraction']:.2f}; effective sample size "
                f"{post['effective_sample_size']:.0f}; converged: {post['converged']}; seed {post['seed']}.</p>"
            )
        key = f"fit-{r.get('sweep', '')}"
        if key in plots:
            parts.append(f"<figure>{plots[key]}<figcaption class=small>Fit and residuals, {_e(r.get('sweep'))}</figcaption></figure>")
    for key, svg in plots.items():
        if not key.startswith("fit-"):
            parts.append(f"<figure>{svg}<figcaption class=small>{_e(key)}</figcaption></figure>")
    gf = record.get("sections", {}).get("global_fit")
    if gf:
        rows = "".join(
            f"<tr><td>{_e(name)}</td><td class=num>{_g(gf['independent_charging_energy_K'][name] * 1e3, 5)} ± "
            f"{_g(gf['independent_charging_energy_std_K'][name] * 1e3, 2)}</td>"
            f"<td class=num>{_g(gf['tightening_factor'][name], 3)}</td></tr>"
            for name in gf["tightening_factor"]
        )
        parts.append(
            "<h2>Global fit (shared charging energy)</h2>"
            f"<p>ΔE/k_B = {_g(gf['charging_energy_K'] * 1e3, 6)} mK ± {_g(gf['charging_energy_std_K'] * 1e3, 2)} mK "
            f"from all sweeps together; consistency χ² = {_g(gf['consistency_chi2'], 3)} for "
            f"{gf['consistency_degrees_of_freedom']} degrees of freedom. The temperatures above come from this "
            "joint posterior; their correlations through ΔE are in the record.</p>"
            "<table><tr><th>sweep</th><th>independent ΔE/k_B (mK)</th><th>σ(T) independent / global</th></tr>"
            f"{rows}</table>"
        )

    parts.append("<h2>Conditions of measurement</h2>")
    parts.append(_kv_table({k: v for k, v in record["conditions"].items() if k != "sweeps"}))
    for sw in record["conditions"].get("sweeps", []):
        parts.append(_kv_table(sw))
    parts.append("<h2>Deviations and assumptions</h2><ul>" + "".join(f"<li>{_e(d)}</li>" for d in record["deviations"]) + "</ul>"
                 if record["deviations"] else "<h2>Deviations and assumptions</h2><p>None.</p>")
    parts.append(f"<h2>Traceability</h2><p>{_e(record['traceability'])}</p>")
    parts.append("<h2>Statements and cautions</h2><ul>" + "".join(f"<li>{_e(s)}</li>" for s in record["statements"]) + "</ul>")
    people = record["people"]
    parts.append(
        f"<h2>Authorisation</h2><p>Operator: {_e(people.get('operator') or '—')}. Approved and issued by: "
        f"{_e(people.get('approver') or 'not yet issued')}.</p>"
    )
    files = "".join(f"<tr><td>{_e(f['name'])}</td><td class=num>{_e(f['sha256'])}</td></tr>" for f in record["inputs"]["files"])
    rep = record["reproducibility"]
    parts.append(
        f"<h2>Records</h2><table><tr><th>input file</th><th>SHA-256</th></tr>{files}</table>"
        f"<p class=small>Seed {rep['seed']}; software {_e(', '.join(f'{k} {v}' for k, v in rep['software'].items()))}.</p>"
        f"<p class=id>Certificate {cid} — end of document</p></body></html>"
    )
    return "\n".join(parts)
