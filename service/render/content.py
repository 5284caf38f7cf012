"""What a certificate says, as a list of blocks built from the record's data alone.

Every rendering starts here: the HTML template and the PDF layout walk the same blocks, so both
carry the same sections, values and warnings, and neither needs anything but the record and its
plots. The record is the signed document; an archived record renders from its own fields, so a
certificate keeps rendering as it was signed (sections an older record lacks are left out, never
invented).

Blocks are plain frozen dataclasses; formatting of numbers happens here (``service.render.numbers``),
markup happens in the templates (HTML) and in ``service.render.pdf`` (reportlab flowables).
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Any

from service.record.terms import CALIBRATION_TABLE_HEADER, CRITERION_NAMES
from service.render.numbers import as_millikelvin, g, g_or_dash, label, manifest_value, percent


@dataclass(frozen=True)
class Heading:
    text: str
    level: int = 2
    kind: str = "heading"


@dataclass(frozen=True)
class Text:
    """A paragraph. ``style``: body, small, warn, id, draft or notice (lifecycle banner)."""

    text: str
    style: str = "body"
    kind: str = "text"


@dataclass(frozen=True)
class Pairs:
    """A two-column table of names and values."""

    rows: tuple[tuple[str, str], ...]
    kind: str = "pairs"


@dataclass(frozen=True)
class Grid:
    """A table with a header row; ``numeric`` are the indexes of right-aligned columns and
    ``weights`` the relative column widths a paged layout uses."""

    header: tuple[str, ...]
    rows: tuple[tuple[str, ...], ...]
    numeric: frozenset[int] = frozenset()
    weights: tuple[float, ...] | None = None
    kind: str = "grid"


@dataclass(frozen=True)
class Bullets:
    items: tuple[str, ...]
    kind: str = "bullets"


@dataclass(frozen=True)
class Figure:
    """A plot (SVG made by ``service.render.plots``) with its caption."""

    svg: str
    caption: str
    kind: str = "figure"


Block = Heading | Text | Pairs | Grid | Bullets | Figure

EXPANDED_NOTE = (
    "The expanded uncertainty is the combined standard uncertainty multiplied by the coverage "
    "factor k from Student's t at the effective degrees of freedom (JCGM 100:2008)."
)


#: The order in which a section's fields are shown, the same for drafts and issued certificates
#: (the record's canonical JSON sorts keys, which would put an address before a name). Fields
#: not listed follow in alphabetical order. Documented in docs/service.md.
FIELD_ORDER: dict[str, tuple[str, ...]] = {
    "laboratory": ("name", "address", "accreditation", "contact"),
    "customer": ("name", "address", "contact", "reference"),
    "item": ("description", "identifier", "manufacturer", "model", "serial_number", "condition"),
    "dates": ("received", "measurement_began", "measured", "issued"),
}

#: How a date field is labelled on the certificate (ISO/IEC 17025:2017 7.8.2.1 h, i).
DATE_LABELS = {
    "received": "item received",
    "measurement_began": "measurement began",
    "measured": "date of measurement",
    "issued": "date of issue",
}


def _pairs(section: Mapping[str, Any] | None, order: tuple[str, ...] = (),
           labels: Mapping[str, str] | None = None, name=str) -> Pairs:
    """A section's scalar fields in ``order`` (then alphabetically), each shown under
    ``labels[key]`` or ``name(key)``."""
    fields = {k: v for k, v in (section or {}).items() if not isinstance(v, dict | list)}
    keys = [k for k in order if k in fields] + sorted(k for k in fields if k not in order)
    labels = labels or {}
    return Pairs(tuple(
        (labels.get(k) or name(str(k)), "" if fields[k] is None else str(fields[k])) for k in keys
    ))


def lifecycle_notices(record: Mapping[str, Any]) -> list[Text]:
    """Amendment, supersession and withdrawal notices for the top of the document.

    ISO/IEC 17025:2017 7.8.8.2: an amended report is identified as such and names the report it
    replaces; a reader of a superseded or withdrawn one must see that at once.
    """
    notices = []
    if record.get("replaces"):
        notices.append(
            f"This revision replaces certificate {record['replaces']}. Reason: "
            f"{record.get('amendment_reason') or 'not stated'}."
        )
    if record.get("state") == "superseded":
        notices.append(f"Superseded by certificate {record.get('superseded_by')}; do not use.")
    if record.get("state") == "withdrawn":
        notices.append(f"Withdrawn: {record.get('withdrawn_reason') or ''}; do not use.")
    return [Text(n, "notice") for n in notices]


def _heading_blocks(record: Mapping[str, Any]) -> list[Block]:
    cid = record.get("certificate_id", "unnumbered")
    state = record.get("state", "draft")
    blocks: list[Block] = [
        *lifecycle_notices(record),
        Heading(str(record.get("title", "Calibration certificate")), 1),
        Text(f"Certificate {cid} · revision {record.get('revision', 1)} · state: {state}", "id"),
    ]
    if state == "draft":
        blocks.append(Text("Draft — not valid until issued by an authorised approver.", "draft"))
    for heading, key in (("Laboratory", "laboratory"), ("Customer", "customer"), ("Item calibrated", "item")):
        blocks += [Heading(heading), _pairs(record.get(key), FIELD_ORDER[key])]
    dates = {k: v or "—" for k, v in (record.get("dates") or {}).items()}
    method = record.get("method") or {}
    blocks += [Heading("Dates"), _pairs(dates, FIELD_ORDER["dates"], DATE_LABELS), Heading("Method"),
               Text(str(method.get("description", method.get("name", ""))))]
    return blocks


def _results_blocks(results: list[Mapping[str, Any]]) -> list[Block]:
    rows = []
    for r in results:
        reported = r.get("reported") or {}
        unit = str(r.get("unit", ""))
        # Below 1 K a physicist reads millikelvin; the record keeps kelvin (SI).
        if unit == "K" and reported and isinstance(r.get("value"), int | float) and 0 < abs(r["value"]) < 1:
            reported, unit = as_millikelvin(reported), "mK"
        rows.append((
            str(r.get("name", "")),
            str(r.get("sweep", "")),
            str(reported.get("value", g(r.get("value")))),
            unit,
            str(reported.get("standard_uncertainty", g(r.get("standard_uncertainty"), 2))),
            str(reported.get("expanded_uncertainty", g(r.get("expanded_uncertainty"), 2))),
            g(r.get("coverage_factor"), 3),
            percent(r.get("coverage_probability", 0)),
        ))
    header = ("quantity", "source", "value", "unit", "standard uncertainty",
              "expanded uncertainty U", "k", "coverage")
    return [Heading("Results"),
            Grid(header, tuple(rows), frozenset({2, 4, 5, 6, 7}), (3, 3, 2, 1, 2, 2, 1, 1)),
            Text(EXPANDED_NOTE, "small")]


def budget_grid(budget: Mapping[str, Any]) -> Grid:
    """One result's GUM budget (JCGM 100:2008, 8): rows, then the combination."""
    unit = str(budget.get("unit", ""))
    rows = []
    for row in budget.get("rows", []):
        sens_unit = row.get("sensitivity_unit", "")
        rows.append((
            str(row.get("quantity", "")),
            g(row.get("estimate")),
            str(row.get("unit", "")),
            g(row.get("standard_uncertainty"), 3),
            str(row.get("type", "")),
            str(row.get("distribution", "")),
            f"{g(row.get('sensitivity_coefficient'), 4)} {sens_unit if sens_unit != '1' else ''}".strip(),
            f"{g(row.get('contribution'), 3)} {unit}",
            g(row.get("degrees_of_freedom"), 3),
            str(row.get("note", "")),
        ))
    rows.append((
        "combined standard uncertainty", "", "",
        f"{g(budget.get('combined_standard_uncertainty'), 3)} {unit}",
        "ν_eff", g(budget.get("effective_degrees_of_freedom"), 3),
        f"k ({percent(budget.get('coverage_probability', 0))})", g(budget.get("coverage_factor"), 3),
        f"U = {g(budget.get('expanded_uncertainty'), 3)} {unit}", "",
    ))
    header = ("quantity", "estimate", "unit", "standard uncertainty", "type", "distribution",
              "sensitivity", "contribution", "ν", "note")
    return Grid(header, tuple(rows), frozenset({1, 3, 6, 7, 8}), (3, 2, 1, 2, 1, 2, 2, 2, 1, 3))


def _posterior_text(r: Mapping[str, Any], post: Mapping[str, Any]) -> Text:
    taus = ", ".join(f"{k} {v:.1f}" for k, v in post["autocorrelation_time_steps"].items())
    return Text(
        f"Model: {r.get('model', '')}. Posterior: {post['walkers']} walkers × {post['steps']} steps, "
        f"autocorrelation times {taus}; acceptance {post['acceptance_fraction']:.2f}; effective "
        f"sample size {post['effective_sample_size']:.0f}; converged: {post['converged']}; seed "
        f"{post['seed']}.",
        "small",
    )


def _budget_blocks(results: list[Mapping[str, Any]], plots: dict[str, str]) -> list[Block]:
    blocks: list[Block] = []
    for r in results:
        blocks.append(Heading(f"Budget: {r.get('name', '')} — {r.get('sweep', '')}", 3))
        if r.get("budget"):
            blocks.append(budget_grid(r["budget"]))
        diagnostics = r.get("diagnostics") or {}
        blocks += [Text(f"Warning: {w}", "warn") for w in diagnostics.get("warnings", [])]
        if diagnostics.get("posterior"):
            blocks.append(_posterior_text(r, diagnostics["posterior"]))
        key = f"fit-{r.get('sweep', '')}"
        if key in plots:
            blocks.append(Figure(plots.pop(key), f"Fit and residuals, {r.get('sweep')}"))
    return blocks


def _global_fit_blocks(gf: Mapping[str, Any]) -> list[Block]:
    rows = tuple(
        (str(name),
         f"{g(gf['independent_charging_energy_K'][name] * 1e3, 5)} ± "
         f"{g(gf['independent_charging_energy_std_K'][name] * 1e3, 2)}",
         g(gf["tightening_factor"][name], 3))
        for name in gf["tightening_factor"]
    )
    return [
        Heading("Global fit (shared charging energy)"),
        Text(
            f"ΔE/k_B = {g(gf['charging_energy_K'] * 1e3, 6)} mK ± "
            f"{g(gf['charging_energy_std_K'] * 1e3, 2)} mK from all sweeps together; consistency "
            f"χ² = {g(gf['consistency_chi2'], 3)} for {gf['consistency_degrees_of_freedom']} degrees "
            "of freedom. The temperatures above come from this joint posterior; their correlations "
            "through ΔE are in the record."
        ),
        Grid(("sweep", "independent ΔE/k_B (mK)", "σ(T) independent / global"), rows,
             frozenset({1, 2})),
    ]


def _authorisation_blocks(record: Mapping[str, Any], seal: Mapping[str, Any] | None) -> list[Block]:
    """Who authorised the certificate and how an auditor checks the electronic signature.

    ISO/IEC 17025:2017 7.8.2.1 o): identification of the person(s) authorising the report. The
    signature details (chain entry, its SHA-256, the key) come from the archive (``seal``); the
    record inside the signed entry cannot carry the digest of that entry itself.
    """
    people = record.get("people") or {}
    operator = people.get("operator") or "—"
    if not people.get("approver"):
        return [Heading("Authorisation"),
                Text(f"Operator: {operator}. Not yet issued: no approver has authorised it.")]
    blocks: list[Block] = [
        Heading("Authorisation"),
        Text(f"Operator: {operator}. Approved and issued by {people['approver']} (approver, "
             f"the laboratory's authorised signatory) on {(record.get('dates') or {}).get('issued')}."),
    ]
    if seal:
        cid = record.get("certificate_id", "")
        blocks += [
            Text("This certificate is signed electronically, without a handwritten signature: its "
                 "record is entry {sequence} of the laboratory's hash chain, signed with the "
                 "laboratory's Ed25519 key {key_id}.".format(**seal)),
            Pairs((("chain entry", str(seal["sequence"])), ("entry SHA-256", str(seal["sha256"])),
                   ("signing key id", str(seal["key_id"])))),
            Text(f"To verify: in the laboratory's archive, coldcert verify {cid}; anywhere, "
                 f"coldcert verify {cid}-signed.json --public-key KEY with the signed entry "
                 "(download 'signed') and the laboratory's public key, published at "
                 f"{seal.get('public_key_url', 'the laboratory’s /api/public-key')}.", "small"),
        ]
    return blocks


def _closing_blocks(record: Mapping[str, Any], seal: Mapping[str, Any] | None = None) -> list[Block]:
    conditions = record.get("conditions") or {}
    deviations = record.get("deviations") or []
    blocks: list[Block] = [
        Heading("Conditions of measurement"),
        _pairs({k: v for k, v in conditions.items() if k != "sweeps"}, name=label),
        *[_pairs(sweep) for sweep in conditions.get("sweeps", []) or []],
        Heading("Deviations and assumptions"),
        Bullets(tuple(str(d) for d in deviations)) if deviations else Text("None."),
        Heading("Traceability"),
        Text(str(record.get("traceability", "not stated"))),
        Heading("Statements and cautions"),
        Bullets(tuple(str(s) for s in record.get("statements") or [])),
        *_authorisation_blocks(record, seal),
    ]
    inputs = record.get("inputs") or {}
    hashes = [(f["name"], f["sha256"]) for f in inputs.get("files") or []]
    if inputs.get("manifest_sha256"):
        hashes.append(("run.toml (manifest)", inputs["manifest_sha256"]))
    blocks += [Heading("Records"),
               Grid(("input file", "SHA-256"), tuple(hashes), frozenset({1}), (1, 3))]
    rep = record.get("reproducibility") or {}
    if rep:
        software = ", ".join(f"{k} {v}" for k, v in (rep.get("software") or {}).items())
        blocks.append(Text(f"Seed {rep.get('seed')}; software {software}.", "small"))
    blocks.append(Text(f"Certificate {record.get('certificate_id', 'unnumbered')} — end of certificate", "id"))
    return blocks


def certificate_blocks(record: Mapping[str, Any], plots: Mapping[str, str] | None = None,
                       seal: Mapping[str, Any] | None = None) -> list[Block]:
    """The whole certificate, in reading order, from the record and its plots (SVG by name).

    ``seal`` (issued certificates): the chain entry's ``sequence``, ``sha256``, ``key_id`` and the
    ``public_key_url``, for the authorisation section.
    """
    remaining = dict(plots or {})
    results = list(record.get("results") or [])
    sections = record.get("sections") or {}
    blocks = _heading_blocks(record) + _results_blocks(results)
    blocks += kind_blocks(record)
    blocks += _budget_blocks(results, remaining)
    blocks += [Figure(svg, key) for key, svg in remaining.items() if not key.startswith("fit-")]
    if sections.get("global_fit"):
        blocks += _global_fit_blocks(sections["global_fit"])
    return blocks + _closing_blocks(record, seal)


def kind_blocks(record: Mapping[str, Any]) -> list[Block]:
    """The sections particular to a calibration kind (sensor curve, pump verification)."""
    sections = record.get("sections") or {}
    if sections.get("sensor_calibration"):
        return sensor_blocks(sections["sensor_calibration"])
    if record.get("job") == "pump_verification" and "statement" in sections:
        return pump_blocks(sections, record.get("results") or [])
    return []


# --------------------------------------------------------------------------------------------
# Sensor calibration (docs/sensor_calibration.md)


def sensor_blocks(section: Mapping[str, Any]) -> list[Block]:
    """Valid range, curve and coefficients, points, hopping check, PLTS-2000 comparison, table."""
    rng = section["valid_range"]
    fit = section["fit"]
    criterion = CRITERION_NAMES.get(fit["degree_criterion"], fit["degree_criterion"])
    blocks: list[Block] = [
        Heading("Sensor calibration"),
        Text("Sensor: " + ", ".join(f"{k}: {v}" for k, v in section["sensor"].items())),
        Text(
            f"Valid range: {g_or_dash(rng['resistance_ohm'][0])}–{g_or_dash(rng['resistance_ohm'][1])} Ω, "
            f"i.e. {g_or_dash(rng['temperature_K'][0] * 1e3, 4)}–{g_or_dash(rng['temperature_K'][1] * 1e3, 4)} mK. "
            f"{rng['statement']}."
        ),
        Text(
            f"Curve: {section['curve']['form']}; degree {fit['degree']} chosen by {criterion}; "
            f"χ² = {g_or_dash(fit['chi_squared'], 4)} for {fit['degrees_of_freedom']} degrees of "
            f"freedom (Birge ratio {g_or_dash(fit['birge_ratio'], 3)}). Coefficients: "
            + ", ".join(g_or_dash(c, 10) for c in section["curve"]["coefficients"]) + "."
        ),
        Heading("Calibration points", 3),
        Grid(("sweep", "R (Ω)", "T (K)", "u(T)/T independent", "residual ln T", "normalised residual"),
             tuple((str(p["sweep"]), g_or_dash(p["resistance_ohm"], 7), g_or_dash(p["temperature_K"], 6),
                    g_or_dash(p["temperature_relative_u_independent"], 2), g_or_dash(p["residual_ln_T"], 3),
                    g_or_dash(p["normalised_residual"], 3)) for p in section["points"]),
             frozenset({1, 2, 3, 4, 5})),
        Text("Components common to all points (carried as correlated): "
             + "; ".join(c["name"] for c in section["correlated_components"]) + ".", "small"),
    ]
    hop = section.get("hopping_check")
    if hop:
        blocks.append(Text(
            f"Sanity check: the hopping form R = R0 exp[(T0/T)^p] fits with p = {hop['exponent_p']:.3f}; "
            f"it differs from the calibration curve by at most {hop['max_relative_difference'] * 100:.2g} % "
            f"({hop['max_normalised_difference']:.2g} standard uncertainties of the curve). It is not "
            "used for the results.", "small"))
    if section.get("plts2000_cross_check"):
        blocks += _plts_blocks(section["plts2000_cross_check"])
    table = section["table"]
    blocks += [
        Heading("Calibration table", 3),
        Text(f"Also written as calibration_table.csv ({CALIBRATION_TABLE_HEADER}); coverage "
             f"probability {table['coverage_probability']:g}.", "small"),
        Grid(("R (Ω)", "T (K)", "u (K)", "U (K)", "k", "d ln R / d ln T"),
             tuple((g_or_dash(r["resistance_ohm"], 7), g_or_dash(r["temperature_K"]),
                    g_or_dash(r["standard_uncertainty_K"], 2), g_or_dash(r["expanded_uncertainty_K"], 2),
                    g_or_dash(r["coverage_factor"], 3), g_or_dash(r["sensitivity_dlnR_dlnT"], 3))
                   for r in table["rows"]),
             frozenset(range(6))),
    ]
    return blocks


def _plts_blocks(cross: Iterable[Mapping[str, Any]]) -> list[Block]:
    """The ³He melting-curve comparison (PLTS-2000, Rusby et al., J. Low Temp. Phys. 126, 633 (2002))."""
    rows = []
    for c in cross:
        if c["status"] != "compared":
            rows.append((str(c["sweep"]), g_or_dash(c["pressure_Pa"], 9), str(c["status"]), "", "", "", "", ""))
            continue
        rows.append((
            str(c["sweep"]), g_or_dash(c["pressure_Pa"], 9), g_or_dash(c["plts2000_temperature_K"]),
            g_or_dash(c["cbt_temperature_K"]), f"{c['relative_difference'] * 100:.3g} %",
            g_or_dash(c["normalised_difference_zeta"], 3), g_or_dash(c["E_n"], 3), "; ".join(c["warnings"]),
        ))
    return [
        Heading("Cross-check against PLTS-2000 (³He melting curve)", 3),
        Grid(("sweep", "p (Pa)", "T PLTS-2000 (K)", "T CBT (K)", "difference", "ζ", "E_n", "note"),
             tuple(rows), frozenset({1, 2, 3, 4, 5, 6}), (2, 2, 2, 2, 1, 1, 1, 3)),
    ]


# --------------------------------------------------------------------------------------------
# Pump verification (docs/pump_formats.md)


def pump_blocks(sections: Mapping[str, Any], results: Iterable[Mapping[str, Any]]) -> list[Block]:
    """What was verified, the operating point, plateau scans and maps, records, error counting."""
    blocks: list[Block] = [
        Heading("What was verified"),
        Text(str(sections["statement"])),
        Heading("Pump and operating point"),
        Pairs(tuple((label(str(k)), manifest_value(v)) for k, v in (sections.get("pump") or {}).items())),
    ]
    for scan in sections.get("plateau_scans") or []:
        blocks += _scan_blocks(scan) if scan["kind"] == "plateau scan" else _map_blocks(scan)
    for r in results:
        if "record" in r and "monte_carlo" in r:
            blocks += _record_blocks(r)
    rate = sections.get("error_counting")
    if rate:
        blocks += [
            Heading("Error counting", 3),
            Text(f"{rate['errors']} errors in {rate['cycles']} cycles: p = {rate['error_probability']:.3g} ± "
                 f"{rate['standard_uncertainty']:.2g}; upper bound {rate['upper_bound']:.3g} at "
                 f"{rate['confidence'] * 100:g} % (χ²(2k + 2)/(2N))."),
        ]
    return blocks


def _scan_blocks(s: Mapping[str, Any]) -> list[Block]:
    cmp = s["model_comparison"]
    pars = tuple(
        (str(p["name"]), f"{p['mean']:.6g}", f"{p['standard_uncertainty']:.2g}",
         f"{p['interval_95'][0]:.6g} … {p['interval_95'][1]:.6g}")
        for p in s["decay_cascade"]
    )
    points = tuple(
        (str(k), f"{w['gate_V']:.6g} ± {w['gate_standard_uncertainty_V']:.2g}",
         f"{w['predicted_relative_deviation']:.3g} ± "
         f"{w['predicted_relative_deviation_standard_uncertainty']:.2g}",
         f"{w['predicted_relative_deviation_interval_95'][0]:.3g} … "
         f"{w['predicted_relative_deviation_interval_95'][1]:.3g}")
        for k, w in s["working_points_by_model"].items()
    )
    bic = ", ".join(f"{k} {v:.1f}" for k, v in cmp["bic"].items())
    return [
        Heading(f"Plateau scan {s['file']}", 3),
        Text(f"{cmp['statement']} BIC: {bic}."),
        Grid(("decay-cascade quantity", "posterior mean", "standard uncertainty", "95 % interval"),
             pars, frozenset({1, 2, 3})),
        Grid(("model", "working point (V)", "predicted (⟨n⟩ − n)/n", "95 % interval"),
             points, frozenset({1, 2, 3})),
        Text("a in 1/V; Δ_k = a·c_k refer to 0 V on the gate; δ_k = Δ_k − Δ_{k−1} is the figure of "
             "merit of plateau k − 1 (Kashcheyevs & Kaestner, PRL 104, 186805 (2010)).", "small"),
    ]


def _map_blocks(s: Mapping[str, Any]) -> list[Block]:
    rows = tuple(
        (f"{sl['gate2_V']:.6g}", f"{sl['working_gate_V']:.6g}", f"{sl['delta_next']:.3g}",
         f"{sl['predicted_relative_deviation']:.3g}")
        for sl in s["slices"]
    )
    return [
        Heading(f"Plateau map {s['file']}", 3),
        Text(str(s["statement"])),
        Grid((str(s["second_gate"]), "working gate (V)", "δ", "predicted (⟨n⟩ − n)/n"), rows,
             frozenset({0, 1, 2, 3})),
    ]


def _record_blocks(r: Mapping[str, Any]) -> list[Block]:
    rec = r["record"]
    ta = rec["type_a"]
    mc = r["monte_carlo"]
    lo, hi = mc["probabilistically_symmetric_interval"]
    return [
        Heading(f"Precision record {r['sweep']}", 3),
        Text(
            f"{rec['settling_rule']}; {rec['readings_used']} of {rec['readings']} readings used in "
            f"{rec['cycles']} cycles of {rec['cycle_period_s']:.4g} s. Mean pump current "
            f"{r['measured_current_A'] * 1e12:.10g} pA against n·e·f = {r['nominal_current_A'] * 1e12:.10g} pA. "
            f"Type A: {ta['n']} cycle differences, effective number {ta['effective_n']:.1f} (Zhang, "
            "Metrologia 43, S276 (2006)); "
            + ("noise consistent with white noise" if ta["white_noise"] else "noise NOT white")
            + f" (Ljung–Box p = {ta['correlation_test_p_value']:.2g}); Allan-deviation slope "
            f"{rec['allan_deviation']['slope']:.2f}."
        ),
        Text(
            f"JCGM 101 Monte Carlo ({mc['draws']} draws, seed {mc['seed']}): u = "
            f"{mc['standard_uncertainty']:.3g} ppm, probabilistically symmetric 95 % interval "
            f"[{lo:.4g}, {hi:.4g}] ppm; the GUM interval is "
            + _VALIDATION_WORDS[mc["gum_framework_validated"]]
            + f" at tolerance {mc['tolerance']:.2g} ppm (JCGM 101 clause 8"
            + (f"; numerical standard deviation of an interval end "
               f"{mc['interval_end_numerical_u']:.2g} ppm)." if "interval_end_numerical_u" in mc
               else ").")
        ),
    ] + (_settling_blocks(rec["settling_transient"], r["nominal_current_A"])
         if rec.get("settling_transient") else [])


_VALIDATION_WORDS = {True: "validated", False: "NOT validated",
                     None: "neither validated nor rejected (the two intervals differ by more than "
                           "the tolerance but by less than the Monte Carlo's own resolution)"}


def _settling_blocks(st: Mapping[str, Any], i0: float) -> list[Block]:
    """The settling transient measured from the record: fits, discard, correction
    (analysis.pump.settling)."""
    comps = st["components"]

    def amp(c: Mapping[str, Any], key: str) -> str:
        # Each amplitude in a unit that fits it: a fit that follows the whole step (the ammeter's
        # own response just after a switch) reads in pA and as a share of n·e·f, not as 1e4 fA.
        a, u = c[key], c[key.replace("_A", "_u_A")]
        if abs(a) < 1e-12:
            return f"{a * 1e15:.3g} ± {u * 1e15:.2g} fA"
        return f"{a * 1e12:.3g} ± {u * 1e12:.2g} pA ({100 * a / i0:+.3g} % of n·e·f)"

    def row(c: Mapping[str, Any]) -> tuple[str, ...]:
        w = f"{c['fit_window_start_s']:g}"
        if c.get("time_constant_below_reading_resolution"):
            # τ at the bottom of the search: only the first reading's step is seen, no shape.
            floor_s = c.get("time_constant_search_floor_s", 0.0)
            return (w, "no resolvable transient", "(over within one reading)",
                    f"< {floor_s:.2g}" if floor_s else "—", "no: faster than the readings")
        return (w, amp(c, "amplitude_after_switch_on_A"), amp(c, "amplitude_after_switch_off_A"),
                f"{c['time_constant_s']:.3g} ± {c['time_constant_u_s']:.2g}",
                "yes" if c["resolved"] else "no")

    rows = tuple(row(c) for c in comps)
    b, ub = st["residual_bias_A"], st["residual_bias_u_A"]
    floor = (f" (at least the stated {st['minimum_discard_s']:g} s)"
             if st["minimum_discard_s"] > 0 else "")
    return [
        Heading("Settling transient, measured from the record", 4),
        Text(f"Readings within {st['discard_s']:g} s after each switch were dropped{floor}. The "
             f"transient left in the kept readings, {b * 1e15:+.3g} ± {ub * 1e15:.2g} fA "
             f"({b / i0 * 1e6:+.3g} ± {ub / i0 * 1e6:.2g} ppm of n·e·f), is corrected for and its "
             "uncertainty is a row of the budget (the correction comes from the resolved fits; a fit "
             "that is not resolved corrects nothing and widens that uncertainty to its "
             "allowance). Each fit is A·exp(−(t − w)/τ) after switch-on and after "
             "switch-off with a shared τ, fitted to the segments stacked on their switch from w "
             f"on; uncertainties by jackknife over {st['jackknife_blocks']} blocks of segments."),
        Grid(("fitted from w (s)", "A after switch-on at w", "A after switch-off at w",
              "τ (s)", "resolved"), rows, frozenset({0, 1, 2, 3})),
    ]
