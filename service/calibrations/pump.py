"""The electron-pump verification job: plateau scans and on/off records to a certificate.

A run of kind ``pump_verification`` holds any number of

* precision records ``time_s,current_A,pump_on`` (the pump switched on and off), each giving a
  result (I − n e f)/(n e f) in ppm with a GUM budget and a JCGM 101 Monte Carlo check;
* plateau scans ``gate_V,current_A`` (optionally with a second gate column for a 2-D map in long
  format), each giving the step-model comparison, a, Δ_k, δ_k and the recommended working point;

plus optional ammeter-chain calibration data (``[ammeter]``) and error counts
(``[error_counting]``) in ``run.toml``. Formats: docs/pump_formats.md. This module checks the
pump-specific input (file, line and field named in every refusal), calls ``analysis.pump`` and
turns the results into certificate entries, sections and plots.
"""

from __future__ import annotations

import io
import math
from collections.abc import Callable

import numpy as np

from analysis.pump import counting
from analysis.pump import plateau as P
from analysis.pump import record as R
from analysis.pump import settling as S
from analysis.pump.quantized import nominal_current
from service.calibrations.outcome import CalibrationOutcome, CertificationRefused
from service.intake import (
    DataFile,
    IntakeError,
    Run,
    manifest_field,
    manifest_number,
)
from service.intake.pump_files import check_pump_files, is_record, is_scan, second_gate_column
from service.record.results import result_entry
from service.render.numbers import hertz

Progress = Callable[[float, str], None]

#: A record whose on−off current differs from n·e·f by more than this is not a pump on a plateau
#: (or the frequency / n in the file is wrong); it is refused rather than certified.
MAX_ABS_DEVIATION_PPM = 1.0e4
#: Second-gate values needed before a scan is treated as a 2-D map.
MIN_MAP_SLICES = 3



# --------------------------------------------------------------------------------------------
# Metadata and manifest


def _key_line(f: DataFile, key: str) -> int | None:
    if key in f.metadata_lines:
        return f.metadata_lines[key]
    for n, line in enumerate(f.raw.decode("utf-8-sig", "replace").splitlines(), start=1):
        body = line.lstrip("#").strip()
        if line.startswith("#") and body.split(":", 1)[0].strip() == key:
            return n
    return None


def file_value(f: DataFile, key: str) -> float | int | None:
    """A pump metadata value of a file, typed by intake (service.intake.table), or None."""
    return f.metadata.get(key)


def operating_point(f: DataFile, manifest: dict) -> tuple[float, int]:
    """(frequency, n) of a file: its own metadata, else run.toml [pump], else n = 1."""
    freq = file_value(f, "frequency_Hz")
    if freq is None:
        freq = manifest_number(manifest, "pump.frequency_Hz", None)
    if freq is None:
        raise IntakeError(
            "missing pump frequency: add '# frequency_Hz: 1.0e9' (for example) above the header, or "
            "frequency_Hz under [pump] in run.toml",
            file=f.name, line=f.header_line, field="frequency_Hz",
        )
    n = file_value(f, "electrons_per_cycle")
    if n is None:
        n = manifest_field(manifest, "pump.electrons_per_cycle", 1)
    return float(freq), int(n)


def ammeter_chain(manifest: dict) -> R.AmmeterChain:
    """The ammeter chain from run.toml [ammeter] (docs/pump_formats.md); ideal if absent."""
    body = manifest.get("ammeter", {})
    if not body:
        return R.AmmeterChain.ideal()
    kind = manifest_field(manifest, "ammeter.kind")
    if kind is None:
        raise IntakeError("expected 'transresistance' or 'reference_resistor'", file="run.toml",
                          field="ammeter.kind")

    def num(key: str, default: float = 0.0) -> float:
        return manifest_number(manifest, f"ammeter.{key}", default)

    gain_dof = num("gain_dof", math.inf)
    cal = body.get("calibration", "")
    description = str(body.get("description", ""))
    missing = [k for k in ("gain_u_ppm", "voltmeter_u_ppm", "frequency_u_ppm") if k not in body]
    if missing:
        description += f" (not stated, taken as zero: {', '.join(missing)})"
    return R.AmmeterChain(
        kind,
        gain_correction=R.ChainInput(num("gain_correction_ppm"),
                                     num("gain_u_ppm"), "normal", gain_dof,
                                     f"calibration {cal}".strip() if cal else ""),
        gain_drift=R.ChainInput(0.0, num("gain_drift_ppm") / math.sqrt(3.0),
                                "rectangular", math.inf, "rectangular allowance since calibration"),
        voltmeter_correction=R.ChainInput(num("voltmeter_correction_ppm"),
                                          num("voltmeter_u_ppm"), "normal"),
        frequency_correction=R.ChainInput(0.0, num("frequency_u_ppm"), "normal"),
        leakage_current=R.ChainInput(0.0, num("leakage_A") / math.sqrt(3.0),
                                     "rectangular", math.inf, "rectangular allowance"),
        description=description.strip(),
    )


def error_counts(manifest: dict) -> counting.ErrorRate | None:
    if not manifest.get("error_counting"):
        return None
    errors = manifest_field(manifest, "error_counting.errors")
    cycles = manifest_field(manifest, "error_counting.cycles")
    for key, value in (("errors", errors), ("cycles", cycles)):
        if value is None:
            raise IntakeError("expected a whole number", file="run.toml", field=f"error_counting.{key}")
    conf = manifest_number(manifest, "error_counting.confidence", 0.95)
    try:
        return counting.error_rate(errors, cycles, conf)
    except ValueError as exc:
        raise IntakeError(str(exc), file="run.toml", field="error_counting") from None


# --------------------------------------------------------------------------------------------
# Plots (SVG via matplotlib's Agg backend)


def _svg(fig) -> str:
    from service.render.plots import to_svg

    return to_svg(fig)


def _plt():
    # service.render.plots selects the Agg backend and stable SVG ids before pyplot is used.
    from service.render.plots import plt

    return plt


def plateau_svg(gate: np.ndarray, y: np.ndarray, res: P.PlateauAnalysis, title: str) -> str:
    plt = _plt()
    order = np.argsort(gate)
    g, yy = gate[order], y[order]
    fig, (ax, axr, axd) = plt.subplots(3, 1, figsize=(6.4, 6.4), sharex=True,
                                       gridspec_kw={"height_ratios": [3, 1, 1.6]})
    ax.plot(g, yy, ".", ms=2.5, color="0.35", label="measured I/(e·f)")
    grid = np.linspace(g[0], g[-1], 800)
    colours = {P.DECAY_CASCADE: "tab:blue", P.THERMAL: "tab:orange"}
    for name, fit in res.fits.items():
        ax.plot(grid, fit.predict(grid), "-", lw=1.1, color=colours[name],
                label=f"{name.replace('_', ' ')} (BIC {fit.bic:.0f})")
        axr.plot(g, yy - fit.predict(g), ".", ms=2, color=colours[name])
    wp = res.working_point
    for a in (ax, axr, axd):
        a.axvline(wp.gate_V, color="tab:green", lw=0.8, ls="--")
    ax.set_ylabel("⟨n⟩ = I/(e·f)")
    ax.set_title(title, fontsize=9)
    ax.legend(fontsize=7, frameon=False, loc="upper left")
    axr.axhline(0, color="0.5", lw=0.8)
    axr.set_ylabel("residual")
    n = res.electrons_per_cycle
    for name, post in res.posteriors.items():
        p = post.parameter_samples.mean(axis=0)
        dev = np.abs(P.MODEL[name].deviation(grid, p, n, res.shape.baseline)) / n
        axd.semilogy(grid, np.clip(dev, 1e-16, None), "-", lw=1.0, color=colours[name])
    axd.set_ylabel(f"|⟨n⟩ − {n}|/{n}")
    axd.set_ylim(1e-12, 1)
    axd.set_xlabel("gate voltage (V)")
    fig.align_ylabels()
    return _svg(fig)


def map_svg(res: P.MapAnalysis, second: str, title: str) -> str:
    plt = _plt()
    v2 = np.array([s.gate2_V for s in res.slices])
    dev = np.array([abs(s.predicted_relative_deviation) for s in res.slices])
    lo = np.array([min(abs(s.deviation_interval[0]), abs(s.deviation_interval[1])) for s in res.slices])
    hi = np.array([max(abs(s.deviation_interval[0]), abs(s.deviation_interval[1])) for s in res.slices])
    fig, (ax, ax2) = plt.subplots(2, 1, figsize=(6.4, 4.8), sharex=True)
    ax.semilogy(v2, np.clip(dev, 1e-300, None), "o-", ms=3, color="tab:blue")
    ax.fill_between(v2, np.clip(lo, 1e-300, None), np.clip(hi, 1e-300, None), color="tab:blue",
                    alpha=0.2, lw=0)
    ax.axhline(res.tolerance, color="0.4", lw=0.8, ls=":")
    ax.axvline(res.best.gate2_V, color="tab:green", lw=0.8, ls="--")
    ax.set_ylabel("|predicted deviation|")
    ax.set_title(title, fontsize=9)
    ax2.plot(v2, [s.working_gate_V for s in res.slices], "o-", ms=3, color="tab:purple")
    ax2.set_ylabel("working gate (V)")
    ax2.set_xlabel(f"{second} (V)")
    return _svg(fig)


def allan_svg(res: R.RecordAnalysis, i0: float, title: str) -> str:
    plt = _plt()
    ad = res.allan
    fig, ax = plt.subplots(figsize=(6.4, 3.6))
    ax.loglog(ad.tau_s, ad.deviation / i0 * 1e6, "o-", ms=3, color="tab:blue",
              label=f"cycle differences (slope {ad.slope:.2f})")
    ref = ad.deviation[0] / i0 * 1e6 * (ad.m / ad.m[0]) ** -0.5
    ax.loglog(ad.tau_s, ref, "--", lw=0.8, color="0.4", label="white noise, τ^−1/2")
    from matplotlib.ticker import LogLocator, NullFormatter, ScalarFormatter

    # Label 1-2-5 in every decade, so a record spanning less than a decade still has numbers on
    # both axes (a log axis labels only powers of ten by default).
    for axis in (ax.xaxis, ax.yaxis):
        axis.set_major_locator(LogLocator(base=10, subs=(1.0, 2.0, 5.0)))
        axis.set_major_formatter(ScalarFormatter())
        axis.set_minor_formatter(NullFormatter())
    ax.set_xlabel("averaging time τ (s)")
    ax.set_ylabel("Allan deviation (ppm of n·e·f)")
    ax.set_title(title, fontsize=9)
    ax.legend(fontsize=7, frameon=False)
    return _svg(fig)


def trace_svg(t: np.ndarray, current: np.ndarray, on: np.ndarray, res: R.RecordAnalysis,
              i0: float, title: str, max_points: int = 4000) -> str:
    plt = _plt()
    step = max(1, t.size // max_points)
    fig, (ax, axd) = plt.subplots(2, 1, figsize=(6.4, 4.8))
    ax.plot(t[::step], current[::step] * 1e12, ".", ms=1.5, color="0.35", rasterized=t.size > 20000)
    ax.set_xlabel("time (s)")
    ax.set_ylabel("indicated current (pA)")
    ax.set_title(title + (f" (every {step}th reading)" if step > 1 else ""), fontsize=9)
    cyc = res.cycles
    d = (cyc.differences / i0 - 1.0) * 1e6
    axd.plot(cyc.times, d, ".", ms=3, color="tab:blue", label="ΔI_j per cycle")
    b = res.precision.budget
    axd.axhline(b.estimate, color="tab:red", lw=1.0, label="result")
    axd.axhspan(b.estimate - b.expanded_uncertainty, b.estimate + b.expanded_uncertainty,
                color="tab:red", alpha=0.15, lw=0, label="± U")
    axd.set_xlabel("time (s)")
    axd.set_ylabel("(ΔI − n·e·f)/(n·e·f) (ppm)")
    axd.legend(fontsize=7, frameon=False)
    fig.tight_layout()
    return _svg(fig)


def settling_svg(st: S.SettlingAnalysis, title: str) -> str:
    """Stacked mean of every segment after switch-on and after switch-off, relative to the mean
    of the kept readings, with each fit over its window (faint: not resolved)."""
    plt = _plt()
    fig, ax = plt.subplots(figsize=(6.4, 3.8))
    colours = {1: "tab:blue", 0: "tab:orange"}
    names = {1: "after switch-on", 0: "after switch-off"}
    d = st.discard_s
    for direction, since in st.profile_since_s.items():
        prof = st.profile_values_a[direction]
        kept = since >= d
        level = float(prof[kept].mean()) if kept.any() else 0.0
        ax.plot(since, (prof - level) * 1e15, ".", ms=3, color=colours[direction],
                label=f"stacked mean {names[direction]}")
        for c in st.components:
            f = c.fit
            grid = since[since >= f.window_start_s]
            ref = float(f.shape(since[kept], direction).mean()) if kept.any() else 0.0
            ax.plot(grid, (f.shape(grid, direction) - ref) * 1e15, "-", lw=1.0,
                    color=colours[direction], alpha=0.9 if c.resolved else 0.35)
    ax.axvline(d, color="0.3", lw=0.8, ls="--")
    ax.set_yscale("symlog", linthresh=max(3 * st.profile_noise_a * 1e15, 1e-3))
    ax.set_xlabel("time since the switch (s)")
    ax.set_ylabel("reading − kept level (fA)")
    ax.set_title(title, fontsize=9)
    ax.legend(fontsize=7, frameon=False)
    fig.tight_layout()
    return _svg(fig)


# --------------------------------------------------------------------------------------------
# Analysis of one file


def analyse_record_file(f: DataFile, manifest: dict, chain: R.AmmeterChain, seed: int,
                        fast: bool) -> tuple[dict, dict[str, str], dict, R.RecordAnalysis]:
    freq, n = operating_point(f, manifest)
    settle = file_value(f, "settling_s")
    if settle is None:
        settle = manifest_number(manifest, "pump.settling_s", None)
    # A stated settling time is the floor of the discard; the transient measured in the record
    # decides the rest (analysis.pump.settling).
    settling = R.SettlingRule(seconds=settle) if settle is not None else None
    t, cur, on = f.columns["time_s"], f.columns["current_A"], f.columns["pump_on"]
    p = manifest_number(manifest, "run.coverage_probability", 0.95)
    try:
        res = R.analyse_record(t, cur, on, freq, n, seed, chain, settling, p,
                               monte_carlo_draws=20_000 if fast else None)
    except R.RecordError as exc:
        if isinstance(exc.__cause__, S.SettlingError):
            # Readable data whose transient the record cannot pin down: no certificate.
            raise CertificationRefused(f"{f.name}: {exc}") from None
        field = "settling_s" if "settling" in str(exc) else "pump_on"
        raise IntakeError(str(exc), file=f.name, field=field) from None
    prec = res.precision
    b = prec.budget
    i0 = prec.nominal_current_a
    if abs(b.estimate) > MAX_ABS_DEVIATION_PPM:
        raise IntakeError(
            f"the mean on−off current {res.type_a.mean * 1e12:.6g} pA differs from n·e·f = "
            f"{i0 * 1e12:.10g} pA by {b.estimate / 1e4:+.3g} %: check frequency_Hz and "
            "electrons_per_cycle, or the pump is not on a plateau",
            file=f.name, line=_key_line(f, "frequency_Hz") or f.header_line, field="frequency_Hz")
    warnings = res.warnings()
    entry = result_entry(
        name="relative deviation of the pump current from n·e·f",
        sweep=f.name,
        quantity="(I − n·e·f)/(n·e·f)",
        unit="ppm",
        budget=b,
        model="on/off cycle differences through the ammeter-chain measurement equation",
        measured_current_A=prec.current_a,
        nominal_current_A=i0,
        frequency_Hz=freq,
        electrons_per_cycle=n,
        ammeter_chain={"kind": chain.kind, "description": chain.description,
                       "ideal": chain.is_ideal},
        monte_carlo=prec.validation.as_dict(),
        record={
            "readings": int(t.size),
            "readings_used": res.cycles.readings_used,
            "readings_dropped_for_settling": res.cycles.readings_dropped,
            "settling_rule": res.notes[0],
            "settling_transient": None if res.settling is None else res.settling.as_dict(),
            "segments": res.cycles.segments,
            "cycles": int(res.cycles.differences.size),
            "cycle_period_s": res.cycles.cycle_period_s,
            "type_a": res.type_a.as_dict(),
            "allan_deviation": {
                "tau_s": res.allan.tau_s.tolist(),
                "deviation_A": res.allan.deviation.tolist(),
                "slope": res.allan.slope,
            },
        },
        diagnostics={"warnings": warnings},
    )
    plots = {
        f"Precision record {f.name}: on/off trace and cycle differences":
            trace_svg(t, cur, on, res, i0, f"{f.name}: indicated current"),
        **({f"Precision record {f.name}: settling transient, stacked on the switch, with the fits "
            "(dashed: discard)": settling_svg(res.settling, f"{f.name}: settling after each switch")}
           if res.settling is not None else {}),
        f"Precision record {f.name}: Allan deviation of the cycle differences":
            allan_svg(res, i0, f"{f.name}: Allan deviation"),
    }
    cond = {"file": f.name, "frequency_Hz": freq, "electrons_per_cycle": n,
            **{k: v for k, v in f.metadata.items() if k not in ("frequency_Hz", "electrons_per_cycle")}}
    for key in ("operating_gate_V", "second_gate_V", "magnetic_field_T"):
        v = file_value(f, key)
        if v is not None:
            cond[key] = v
    return entry, plots, cond, res


def _sampler_options(fast: bool) -> dict:
    if fast:
        return {"min_tau_multiple": 20.0, "tau_tolerance": 0.1, "max_steps": 4000}
    return {}


def analyse_scan_file(f: DataFile, manifest: dict, seed: int, fast: bool,
                      progress: Progress | None) -> tuple[dict, dict[str, str]]:
    freq, n = operating_point(f, manifest)
    second = second_gate_column(f)
    gate = f.columns["gate_V"]
    y = f.columns["current_A"] / nominal_current(freq, 1)
    if second is not None and np.unique(f.columns[second]).size >= MIN_MAP_SLICES:
        try:
            res = P.analyse_plateau_map(gate, f.columns[second], y, n, seed,
                                        draws=500 if fast else 2000)
        except P.PlateauScanError as exc:
            raise IntakeError(str(exc), file=f.name, field="current_A") from None
        section = {
            "file": f.name, "kind": "two-gate map", "second_gate": second,
            "frequency_Hz": freq, "electrons_per_cycle": n,
            "best": res.best.as_dict(), "tolerance": res.tolerance,
            "robust_window_V": None if res.robust_window_V is None else list(res.robust_window_V),
            "working_gate_shift_per_V": res.working_gate_shift_per_V,
            "slices": [s.as_dict() for s in res.slices], "skipped": list(res.skipped),
            "statement": res.statement.replace("gate2", second),
            "method": "decay-cascade least-squares fit per slice; uncertainty from 2000 draws of "
                      "the Gaussian (Laplace) approximation of each slice's posterior",
        }
        return section, {f"Plateau map {f.name}: predicted deviation and working gate versus "
                         f"{second}": map_svg(res, second, f"{f.name}: plateau {n} flatness")}
    if second is not None:
        raise IntakeError(f"a two-gate map needs at least {MIN_MAP_SLICES} values of {second}",
                          file=f.name, field=second)
    try:
        res = P.analyse_plateau_scan(gate, y, n, seed, progress=progress, **_sampler_options(fast))
    except P.PlateauScanError as exc:
        raise IntakeError(str(exc), file=f.name, field="current_A") from None
    if not res.converged:
        raise CertificationRefused(
            f"{f.name}: the plateau-model posterior did not converge; no working point is stated "
            "from an unconverged chain")
    wp = res.working_point
    section = {
        "file": f.name, "kind": "plateau scan", "frequency_Hz": freq, "electrons_per_cycle": n,
        "points": int(gate.size), "plateaus_seen": list(res.shape.plateaus),
        "steps_fitted": int(res.fits[P.DECAY_CASCADE].parameters.size - 1),
        "model_comparison": {
            "preferred": res.comparison.preferred, "bic": res.comparison.bic,
            "aic": res.comparison.aic, "delta_bic": res.comparison.delta_bic,
            "strength": res.comparison.strength, "statement": res.comparison.statement,
        },
        "decay_cascade": [s.as_dict() for s in res.cascade],
        "working_point": wp.as_dict(),
        "working_points_by_model": {k: v.as_dict() for k, v in res.working_points.items()},
        "posteriors": {k: {"parameters": [s.as_dict() for s in v.summaries()],
                           **v.result.diagnostics()} for k, v in res.posteriors.items()},
        "least_squares": {k: {"parameters": dict(zip(v.names, map(float, np.append(v.parameters, v.offset)), strict=True)),
                              "noise_ef": v.noise, "log_likelihood": v.log_likelihood}
                          for k, v in res.fits.items()},
        "notes": list(res.notes),
    }
    title = f"{f.name}: f = {hertz(freq)}, working point {wp.gate_V:.5g} V"
    return section, {f"Plateau scan {f.name} with both step models; dashed: working point":
                     plateau_svg(gate, y, res, title)}


# --------------------------------------------------------------------------------------------
# The statement of what was verified


def statement(item: str, records: list[dict], scans: list[dict], rate: counting.ErrorRate | None,
              ideal: bool, record_conditions: list[dict] | None = None) -> str:
    parts = []
    for r in records:
        rep = r["reported"]
        agrees = abs(r["value"]) <= r["expanded_uncertainty"]
        parts.append(
            f"With the pump {item} driven at f = {hertz(r['frequency_Hz'])} and set to transfer "
            f"n = {r['electrons_per_cycle']} electron(s) per cycle, the on/off record "
            f"{r['sweep']} ({r['record']['cycles']} cycles) gives a pump current that differs from "
            f"n·e·f = {r['nominal_current_A'] * 1e12:.10g} pA by {rep['value']} ppm, with an expanded "
            f"uncertainty of {rep['expanded_uncertainty']} ppm (k = {r['coverage_factor']:.2f}, "
            f"{r['coverage_probability'] * 100:g} % coverage). The current "
            + ("agrees with n·e·f within this uncertainty." if agrees else
               "does not agree with n·e·f within this uncertainty.")
        )
    if ideal and records:
        parts.append("No calibration data for the ammeter chain were supplied: an ideal ammeter was "
                     "assumed, so the uncertainty covers the scatter of the record only and is a "
                     "lower bound for the uncertainty of the current itself.")
    for s in scans:
        if s["kind"] == "plateau scan":
            wp = s["working_point"]
            lo, hi = wp["predicted_relative_deviation_interval_95"]
            parts.append(
                f"The plateau scan {s['file']} shows plateau {s['electrons_per_cycle']}. "
                + s["model_comparison"]["statement"]
                + f" Its flattest point (the recommended working point) is at {wp['gate_V']:.6g} V, "
                f"where the {wp['model'].replace('_', '-')} model predicts a relative deviation of "
                f"{wp['predicted_relative_deviation']:.2g} (95 % credible interval {lo:.2g} to "
                f"{hi:.2g}); this is a model extrapolation, not a measurement."
            )
            for c in record_conditions or []:
                if "operating_gate_V" in c:
                    gap = c["operating_gate_V"] - wp["gate_V"]
                    parts.append(
                        f"The record {c['file']} was taken at {c['operating_gate_V']:.6g} V on the "
                        f"gate, {gap * 1e3:+.3g} mV from this working point (assuming the scan's "
                        "gate is the record's).")
        else:
            st = s["statement"]
            parts.append(f"In the plateau map {s['file']}, {st[0].lower()}{st[1:]}")
    if rate is not None:
        parts.append(
            f"Error counting: {rate.errors} error(s) in {rate.cycles} cycles, error probability "
            f"{rate.probability:.3g} ± {rate.standard_uncertainty:.2g} per cycle, below "
            f"{rate.upper_bound:.3g} at {rate.confidence * 100:g} % confidence.")
    return " ".join(parts)


# --------------------------------------------------------------------------------------------
# The job


def analyse(run: Run, seed: int, progress: Progress | None = None, fast: bool = False) -> CalibrationOutcome:
    """Analyse every record and scan of a pump run (each with its own derived seed)."""
    manifest = run.manifest
    records = [f for f in run.files if is_record(f)]
    scans = [f for f in run.files if is_scan(f)]
    check_pump_files(run.files)
    chain = ammeter_chain(manifest)
    rate = error_counts(manifest)
    outcome = CalibrationOutcome(results=[])
    total = len(records) + len(scans)
    scan_sections: list[dict] = []
    conditions: list[dict] = []
    for k, f in enumerate(scans):
        def sub(frac: float, step: str, k=k, name=f.name) -> None:
            if progress:
                progress((k + frac) / total, f"{name}: {step}")

        section, plots = analyse_scan_file(f, manifest, seed + 100 + k, fast, sub)
        scan_sections.append(section)
        outcome.plots.update(plots)
    for k, f in enumerate(records):
        if progress:
            progress((len(scans) + k) / total, f"{f.name}: on/off record")
        entry, plots, cond, res = analyse_record_file(f, manifest, chain, seed + k, fast)
        outcome.results.append(entry)
        outcome.plots.update(plots)
        conditions.append(cond)
        outcome.extra_files[f"cycles_{f.name}"] = cycles_csv(f.name, res.cycles)
    if progress:
        progress(1.0, "done")
    item = manifest.get("item", {}).get("identifier") or manifest.get("item", {}).get("description") or "(not named)"
    pump_info = _pump_information(item, manifest, chain, conditions)
    stmt = statement(str(item), outcome.results, scan_sections, rate, chain.is_ideal, conditions)
    outcome.sections = {"statement": stmt, "pump": pump_info, "plateau_scans": scan_sections,
                        "error_counting": None if rate is None else rate.as_dict()}
    scan_conditions = [{"file": s["file"], "kind": s["kind"], "frequency_Hz": s["frequency_Hz"],
                        "electrons_per_cycle": s["electrons_per_cycle"]} for s in scan_sections]
    # "sweeps" is the list the certificate renders under conditions of measurement.
    outcome.conditions = {"pump": pump_info, "records": conditions,
                          "sweeps": conditions + scan_conditions}
    _state_deviations(outcome, chain, fast)
    outcome.method = {**METHOD, "models": [P.DECAY_CASCADE, P.THERMAL] if scans else []}
    return outcome


METHOD = {
    "name": "Electron-pump verification",
    "description": (
        "Precision records: the pump is switched on and off; the settling transient after each "
        "switch is fitted to the segments stacked on their switch, readings within the discard "
        "it calls for are dropped, the transient left in the kept readings is corrected for with "
        "its own uncertainty, and each on segment is compared with the off segments "
        "on either side, which cancels a linear offset drift (Giblin et al., Nat. Commun. 3, 930 "
        "(2012)). The mean cycle difference, with a Type A uncertainty that allows for "
        "autocorrelation (Zhang, Metrologia 43, S276 (2006)), passes through the ammeter chain's "
        "measurement equation; the relative deviation from n·e·f (e exact in the SI) is "
        "budgeted by the GUM (JCGM 100:2008) and validated by a Monte Carlo propagation "
        "(JCGM 101:2008). Plateau scans are fitted with the decay-cascade model (Kashcheyevs & "
        "Kaestner, PRL 104, 186805 (2010)) and a thermal step model (Fricke et al., PRL 110, "
        "126803 (2013)), compared by the Bayesian information criterion, sampled by MCMC "
        "(emcee), and the flattest point of the plateau is reported as the working point."
    ),
}


def cycles_csv(name: str, cycles) -> bytes:
    """The per-cycle differences of one record, as the certificate's extra file keeps them."""
    buf = io.StringIO()
    buf.write("# cycle differences of " + name + "; times are the mean times of the on readings\n")
    buf.write("cycle,time_s,delta_current_A,off_weight\n")
    for j, (tj, dj, wj) in enumerate(zip(cycles.times, cycles.differences,
                                         cycles.weights, strict=True), start=1):
        buf.write(f"{j},{float(tj)!r},{float(dj)!r},{float(wj)!r}\n")
    return buf.getvalue().encode("utf-8")


def _pump_information(
    item: str, manifest: dict, chain: R.AmmeterChain, conditions: list[dict]
) -> dict:
    """The pump section: item, the manifest's [pump] values, operating point, ammeter chain."""
    pump_info = {"item": item}
    pump_info.update({k: v for k, v in manifest.get("pump", {}).items()
                      if isinstance(v, str | int | float)})
    if conditions:
        first = conditions[0]
        pump_info.setdefault("frequency_Hz", first["frequency_Hz"])
        pump_info.setdefault("electrons_per_cycle", first["electrons_per_cycle"])
    pump_info["ammeter chain"] = (chain.description or chain.kind) if not chain.is_ideal else \
        "ideal ammeter assumed (no [ammeter] calibration data in run.toml)"
    return pump_info


def _state_deviations(outcome: CalibrationOutcome, chain: R.AmmeterChain, fast: bool) -> None:
    """An ideal ammeter, quick-look settings and every record's warnings, as deviations."""
    if chain.is_ideal:
        outcome.deviations.append(
            "ideal ammeter assumed: run.toml has no [ammeter] calibration data, so the budget "
            "contains the Type A component only")
    if fast:
        outcome.deviations.append(
            "quick-look settings (plateau chain ≥ 20 autocorrelation times, 20 000 Monte Carlo "
            "draws); not for issue")
    for r in outcome.results:
        for w in r["diagnostics"]["warnings"]:
            outcome.deviations.append(f"{r['sweep']}: {w}")
