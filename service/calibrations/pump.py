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

import difflib
import html
import io
import math
from collections.abc import Callable

import numpy as np

from analysis.budget import round_for_report
from analysis.pump import counting
from analysis.pump import plateau as P
from analysis.pump import record as R
from analysis.pump.quantized import MAX_ELECTRONS_PER_CYCLE, nominal_current
from service.calibrations.outcome import CalibrationOutcome, CertificationRefused
from service.intake import (
    DataFile,
    IntakeError,
    KeySpec,
    Run,
    integer_parser,
    manifest_number,
    real_parser,
    register_keys,
)

Progress = Callable[[float, str], None]

#: A record whose on−off current differs from n·e·f by more than this is not a pump on a plateau
#: (or the frequency / n in the file is wrong); it is refused rather than certified.
MAX_ABS_DEVIATION_PPM = 1.0e4
MIN_CYCLES = 3
MIN_SCAN_POINTS = 20
#: Second-gate values needed before a scan is treated as a 2-D map.
MIN_MAP_SLICES = 3


_positive = real_parser(0.0, lo_open=True)
_non_negative = real_parser(0.0)
_real = real_parser()
_electrons = integer_parser(1, MAX_ELECTRONS_PER_CYCLE)


PUMP_KEYS = {
    "frequency_Hz": KeySpec(_positive, "pump drive frequency f in hertz (required)"),
    "electrons_per_cycle": KeySpec(_electrons, "n, electrons per cycle (default 1)"),
    "settling_s": KeySpec(_non_negative, "readings dropped after each pump switch, seconds"),
    "operating_gate_V": KeySpec(_real, "gate voltage at which a record was taken"),
    "second_gate_V": KeySpec(_real, "second gate voltage at which a record or scan was taken"),
    "magnetic_field_T": KeySpec(_real, "applied magnetic field"),
}
register_keys(PUMP_KEYS)

AMMETER_KEYS = {
    "kind": "transresistance or reference_resistor",
    "description": "free text",
    "calibration": "free text: calibration certificate reference",
    "gain_correction_ppm": "calibrated gain relative to nominal, (A − A_nom)/A_nom in ppm",
    "gain_u_ppm": "standard uncertainty of the gain correction, ppm",
    "gain_dof": "degrees of freedom of the gain calibration (default infinite)",
    "gain_drift_ppm": "half-width of a rectangular allowance for drift since calibration, ppm",
    "voltmeter_correction_ppm": "voltmeter relative correction, ppm",
    "voltmeter_u_ppm": "its standard uncertainty, ppm",
    "frequency_u_ppm": "relative standard uncertainty of the frequency reference, ppm",
    "leakage_A": "half-width of a rectangular allowance for state-dependent leakage, A",
}
ERROR_COUNTING_KEYS = {"errors", "cycles", "confidence", "detector", "note"}
PUMP_SECTION_KEYS = {"frequency_Hz", "electrons_per_cycle", "settling_s", "operating_gate_V",
                     "second_gate_V", "magnetic_field_T", "temperature_K", "description", "note"}


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
    """A pump metadata value of a file, typed, or None. Works whether or not intake already knew
    the key (intake parses keys registered before it ran; others arrive as free text)."""
    if key in f.metadata:
        return f.metadata[key]
    if key in f.free_text:
        try:
            return PUMP_KEYS[key].parse(str(f.free_text[key]))
        except ValueError as exc:
            raise IntakeError(str(exc), file=f.name, line=_key_line(f, key), field=key) from None
    return None


def _section_keys(manifest: dict, section: str, known: set[str] | dict) -> dict:
    body = manifest.get(section, {})
    for key in body:
        if key not in known:
            close = difflib.get_close_matches(key, list(known), n=1, cutoff=0.7)
            hint = f"; did you mean {close[0]!r}?" if close else f"; known keys: {', '.join(sorted(known))}"
            raise IntakeError("unknown key" + hint, file="run.toml", field=f"{section}.{key}")
    return body


def check_typos(f: DataFile) -> None:
    """Refuse free-text keys that look like misspelt pump keys (intake only knows the keys
    registered before it ran, so this check is repeated here)."""
    for key in f.free_text:
        if key in PUMP_KEYS or key == "comments":
            continue
        close = difflib.get_close_matches(key, list(PUMP_KEYS), n=1, cutoff=0.8)
        if close:
            raise IntakeError(f"unknown key; did you mean {close[0]!r}?", file=f.name,
                              line=_key_line(f, key), field=key)


def operating_point(f: DataFile, manifest: dict) -> tuple[float, int]:
    """(frequency, n) of a file: its own metadata, else run.toml [pump], else n = 1."""
    _section_keys(manifest, "pump", PUMP_SECTION_KEYS)
    check_typos(f)
    freq = file_value(f, "frequency_Hz")
    if freq is None:
        freq = manifest_number(manifest, "pump.frequency_Hz", None, 0.0)
        if freq is not None and freq <= 0:
            raise IntakeError("must be positive", file="run.toml", field="pump.frequency_Hz")
    if freq is None:
        raise IntakeError(
            "missing pump frequency: add '# frequency_Hz: 1.0e9' (for example) above the header, or "
            "frequency_Hz under [pump] in run.toml",
            file=f.name, line=f.header_line, field="frequency_Hz",
        )
    n = file_value(f, "electrons_per_cycle")
    if n is None:
        raw = manifest.get("pump", {}).get("electrons_per_cycle", 1)
        try:
            n = _electrons(str(raw))
        except ValueError as exc:
            raise IntakeError(str(exc), file="run.toml", field="pump.electrons_per_cycle") from None
    return float(freq), int(n)


def ammeter_chain(manifest: dict) -> R.AmmeterChain:
    """The ammeter chain from run.toml [ammeter] (docs/pump_formats.md); ideal if absent."""
    body = _section_keys(manifest, "ammeter", AMMETER_KEYS)
    if not body:
        return R.AmmeterChain.ideal()
    kind = body.get("kind")
    if kind not in ("transresistance", "reference_resistor"):
        raise IntakeError("expected 'transresistance' or 'reference_resistor'", file="run.toml",
                          field="ammeter.kind")

    def num(key: str, default: float = 0.0, lo: float = -math.inf, hi: float = math.inf) -> float:
        return manifest_number(manifest, f"ammeter.{key}", default, lo, hi)

    gain_dof = num("gain_dof", math.inf, 1.0)
    cal = body.get("calibration", "")
    description = str(body.get("description", ""))
    missing = [k for k in ("gain_u_ppm", "voltmeter_u_ppm", "frequency_u_ppm") if k not in body]
    if missing:
        description += f" (not stated, taken as zero: {', '.join(missing)})"
    return R.AmmeterChain(
        kind,
        gain_correction=R.ChainInput(num("gain_correction_ppm", 0.0, -1e5, 1e5),
                                     num("gain_u_ppm", 0.0, 0.0, 1e5), "normal", gain_dof,
                                     f"calibration {cal}".strip() if cal else ""),
        gain_drift=R.ChainInput(0.0, num("gain_drift_ppm", 0.0, 0.0, 1e5) / math.sqrt(3.0),
                                "rectangular", math.inf, "rectangular allowance since calibration"),
        voltmeter_correction=R.ChainInput(num("voltmeter_correction_ppm", 0.0, -1e5, 1e5),
                                          num("voltmeter_u_ppm", 0.0, 0.0, 1e5), "normal"),
        frequency_correction=R.ChainInput(0.0, num("frequency_u_ppm", 0.0, 0.0, 1e5), "normal"),
        leakage_current=R.ChainInput(0.0, num("leakage_A", 0.0, 0.0, 1e-9) / math.sqrt(3.0),
                                     "rectangular", math.inf, "rectangular allowance"),
        description=description.strip(),
    )


def error_counts(manifest: dict) -> counting.ErrorRate | None:
    body = _section_keys(manifest, "error_counting", ERROR_COUNTING_KEYS)
    if not body:
        return None
    for key in ("errors", "cycles"):
        v = body.get(key)
        if isinstance(v, bool) or not isinstance(v, int):
            raise IntakeError("expected a whole number", file="run.toml", field=f"error_counting.{key}")
    conf = manifest_number(manifest, "error_counting.confidence", 0.95, 0.5, 0.9999)
    try:
        return counting.error_rate(body["errors"], body["cycles"], conf)
    except ValueError as exc:
        raise IntakeError(str(exc), file="run.toml", field="error_counting") from None


# --------------------------------------------------------------------------------------------
# File checks


def is_record(f: DataFile) -> bool:
    return {"time_s", "current_A", "pump_on"} <= set(f.columns)


def is_scan(f: DataFile) -> bool:
    return "gate_V" in f.columns and "current_A" in f.columns and "time_s" not in f.columns


def second_gate_column(f: DataFile) -> str | None:
    extra = [c for c in f.columns if c.endswith("_V") and c != "gate_V"]
    if len(extra) > 1:
        raise IntakeError(
            f"a plateau map has one second gate column; found {', '.join(extra)}",
            file=f.name, line=f.header_line, field=extra[1],
        )
    unknown = [c for c in f.columns if c not in ("gate_V", "current_A") and not c.endswith("_V")]
    if unknown:
        raise IntakeError("unexpected column in a plateau scan (expected gate_V,current_A and "
                          "optionally a second gate column ending in _V)", file=f.name,
                          line=f.header_line, field=unknown[0])
    return extra[0] if extra else None


def check_record(f: DataFile, settling: R.SettlingRule) -> None:
    """Refuse records the analysis cannot use, pointing at the offending line."""
    t = f.columns["time_s"]
    on = f.columns["pump_on"]
    bad = np.flatnonzero((on != 0) & (on != 1))
    if bad.size:
        i = int(bad[0])
        raise IntakeError(f"expected 1 (pump on) or 0 (pump off), got {on[i]:g}", file=f.name,
                          line=f.line_of_row(i), field="pump_on")
    step = np.diff(t)
    back = np.flatnonzero(step <= 0)
    if back.size:
        i = int(back[0]) + 1
        what = "repeats the previous time" if step[i - 1] == 0 else "is earlier than the previous time"
        raise IntakeError(f"time {t[i]:g} s {what}; readings must be in time order",
                          file=f.name, line=f.line_of_row(i), field="time_s")
    if not np.any(on == 0):
        raise IntakeError("the record has no pump-off readings, so the ammeter offset cannot be "
                          "removed; switch the pump off between on segments", file=f.name,
                          field="pump_on")
    if not np.any(on == 1):
        raise IntakeError("the record has no pump-on readings", file=f.name, field="pump_on")
    state = on.astype(np.int8)
    change = np.flatnonzero(np.diff(state)) + 1
    states = state[np.concatenate(([0], change))]
    cycles = int(np.sum((states[1:-1] == 1) & (states[:-2] == 0) & (states[2:] == 0)))
    if cycles < MIN_CYCLES:
        raise IntakeError(
            f"the record holds {cycles} complete off–on–off cycle(s); at least {MIN_CYCLES} are "
            "needed (better 30 or more) for a Type A evaluation", file=f.name, field="pump_on")


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
    from matplotlib.ticker import NullFormatter

    ax.xaxis.set_minor_formatter(NullFormatter())
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


# --------------------------------------------------------------------------------------------
# Analysis of one file


def _reported(value: float, u: float, U: float) -> dict:
    v_s, u_s = round_for_report(value, u)
    _, U_s = round_for_report(value, U)
    return {"value": v_s, "standard_uncertainty": u_s, "expanded_uncertainty": U_s}


def analyse_record_file(f: DataFile, manifest: dict, chain: R.AmmeterChain, seed: int,
                        fast: bool) -> tuple[dict, dict[str, str], dict, R.RecordAnalysis]:
    freq, n = operating_point(f, manifest)
    settle = file_value(f, "settling_s")
    if settle is None:
        settle = manifest_number(manifest, "pump.settling_s", None, 0.0)
    settling = R.SettlingRule(seconds=settle) if settle is not None else R.SettlingRule()
    check_record(f, settling)
    t, cur, on = f.columns["time_s"], f.columns["current_A"], f.columns["pump_on"]
    p = manifest_number(manifest, "run.coverage_probability", 0.95, 0.5, 0.9999)
    try:
        res = R.analyse_record(t, cur, on, freq, n, seed, chain, settling, p,
                               monte_carlo_draws=20_000 if fast else None)
    except R.RecordError as exc:
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
    warnings = list(res.notes[1:])
    if not prec.validation.validated:
        warnings.append(
            "the JCGM 101 Monte Carlo interval differs from the GUM interval by more than the "
            "numerical tolerance (JCGM 101 clause 8): the Monte Carlo interval is the better "
            "description of this result")
    if res.allan.slope > -0.35:
        warnings.append(f"the Allan deviation of the cycle differences falls as τ^{res.allan.slope:.2f}, "
                        "slower than white noise (τ^−0.5)")
    nu = b.effective_degrees_of_freedom
    entry = {
        "name": "relative deviation of the pump current from n·e·f",
        "sweep": f.name,
        "quantity": "(I − n·e·f)/(n·e·f)",
        "value": b.estimate,
        "unit": "ppm",
        "standard_uncertainty": b.combined_standard_uncertainty,
        "expanded_uncertainty": b.expanded_uncertainty,
        "coverage_factor": b.coverage_factor,
        "coverage_probability": b.coverage_probability,
        "effective_degrees_of_freedom": None if math.isinf(nu) else nu,
        "reported": {**_reported(b.estimate, b.combined_standard_uncertainty,
                                 b.expanded_uncertainty), "unit": "ppm"},
        "budget": b.as_dict(),
        "model": "on/off cycle differences through the ammeter-chain measurement equation",
        "measured_current_A": prec.current_a,
        "nominal_current_A": i0,
        "frequency_Hz": freq,
        "electrons_per_cycle": n,
        "ammeter_chain": {"kind": chain.kind, "description": chain.description,
                          "ideal": chain.is_ideal},
        "monte_carlo": prec.validation.as_dict(),
        "record": {
            "readings": int(t.size),
            "readings_used": res.cycles.readings_used,
            "readings_dropped_for_settling": res.cycles.readings_dropped,
            "settling_rule": settling.describe(),
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
        "diagnostics": {"warnings": warnings},
    }
    plots = {
        f"Precision record {f.name}: on/off trace and cycle differences":
            trace_svg(t, cur, on, res, i0, f"{f.name}: indicated current"),
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
    if f.rows < MIN_SCAN_POINTS:
        raise IntakeError(f"only {f.rows} rows; a plateau scan needs at least {MIN_SCAN_POINTS}",
                          file=f.name, line=f.header_line)
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
# HTML sections and statement


def _e(x) -> str:
    return html.escape("" if x is None else str(x))


def hertz(f: float) -> str:
    """A frequency as people write it: 1 GHz, 545 MHz, 12.5 kHz."""
    for scale, unit in ((1e9, "GHz"), (1e6, "MHz"), (1e3, "kHz")):
        if f >= scale:
            return f"{f / scale:.10g} {unit}"
    return f"{f:.10g} Hz"


def _value(v) -> str:
    if isinstance(v, float):
        return hertz(v) if v >= 1e3 and v.is_integer() else f"{v:.10g}"
    return str(v)


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


def html_sections(stmt: str, pump: dict, scans: list[dict], records: list[dict],
                  rate: counting.ErrorRate | None) -> list[str]:
    out = [f"<h2>What was verified</h2><p>{_e(stmt)}</p>"]
    rows = "".join(f"<tr><th>{_e(k)}</th><td>{_e(_value(v))}</td></tr>" for k, v in pump.items())
    out.append(f"<h2>Pump and operating point</h2><table>{rows}</table>")
    for s in scans:
        if s["kind"] == "plateau scan":
            cmp = s["model_comparison"]
            pars = "".join(
                f"<tr><td>{_e(p['name'])}</td><td class=num>{p['mean']:.6g}</td>"
                f"<td class=num>{p['standard_uncertainty']:.2g}</td>"
                f"<td class=num>{p['interval_95'][0]:.6g} … {p['interval_95'][1]:.6g}</td></tr>"
                for p in s["decay_cascade"])
            wps = "".join(
                f"<tr><td>{_e(k)}</td><td class=num>{w['gate_V']:.6g} ± {w['gate_standard_uncertainty_V']:.2g}</td>"
                f"<td class=num>{w['predicted_relative_deviation']:.3g} ± "
                f"{w['predicted_relative_deviation_standard_uncertainty']:.2g}</td>"
                f"<td class=num>{w['predicted_relative_deviation_interval_95'][0]:.3g} … "
                f"{w['predicted_relative_deviation_interval_95'][1]:.3g}</td></tr>"
                for k, w in s["working_points_by_model"].items())
            out.append(
                f"<h3>Plateau scan {_e(s['file'])}</h3><p>{_e(cmp['statement'])} BIC: "
                + ", ".join(f"{_e(k)} {v:.1f}" for k, v in cmp["bic"].items()) + ".</p>"
                "<table><tr><th>decay-cascade quantity</th><th>posterior mean</th><th>standard "
                f"uncertainty</th><th>95 % interval</th></tr>{pars}</table>"
                "<table><tr><th>model</th><th>working point (V)</th><th>predicted (⟨n⟩ − n)/n</th>"
                f"<th>95 % interval</th></tr>{wps}</table>"
                "<p class=small>a in 1/V; Δ_k = a·c_k refer to 0 V on the gate; δ_k = Δ_k − Δ_{k−1} "
                "is the figure of merit of plateau k − 1 (Kashcheyevs &amp; Kaestner, PRL 104, "
                "186805 (2010)).</p>")
        else:
            rows = "".join(
                f"<tr><td class=num>{sl['gate2_V']:.6g}</td><td class=num>{sl['working_gate_V']:.6g}</td>"
                f"<td class=num>{sl['delta_next']:.3g}</td><td class=num>{sl['predicted_relative_deviation']:.3g}</td></tr>"
                for sl in s["slices"])
            out.append(
                f"<h3>Plateau map {_e(s['file'])}</h3><p>{_e(s['statement'])}</p>"
                f"<table><tr><th>{_e(s['second_gate'])}</th><th>working gate (V)</th><th>δ</th>"
                f"<th>predicted (⟨n⟩ − n)/n</th></tr>{rows}</table>")
    for r in records:
        ta = r["record"]["type_a"]
        mc = r["monte_carlo"]
        out.append(
            f"<h3>Precision record {_e(r['sweep'])}</h3><p>{_e(r['record']['settling_rule'])}; "
            f"{r['record']['readings_used']} of {r['record']['readings']} readings used in "
            f"{r['record']['cycles']} cycles of {r['record']['cycle_period_s']:.4g} s. Mean pump "
            f"current {r['measured_current_A'] * 1e12:.10g} pA against n·e·f = "
            f"{r['nominal_current_A'] * 1e12:.10g} pA. Type A: {ta['n']} cycle differences, "
            f"effective number {ta['effective_n']:.1f} (Zhang, Metrologia 43, S276 (2006)); "
            + ("noise consistent with white noise" if ta["white_noise"] else "noise NOT white")
            + f" (Ljung–Box p = {ta['correlation_test_p_value']:.2g}); Allan-deviation slope "
            f"{r['record']['allan_deviation']['slope']:.2f}.</p>"
            f"<p>JCGM 101 Monte Carlo ({mc['draws']} draws, seed {mc['seed']}): u = "
            f"{mc['standard_uncertainty']:.3g} ppm, probabilistically symmetric 95 % interval "
            f"[{mc['probabilistically_symmetric_interval'][0]:.4g}, "
            f"{mc['probabilistically_symmetric_interval'][1]:.4g}] ppm; the GUM interval is "
            + ("validated" if mc["gum_framework_validated"] else "NOT validated")
            + f" at tolerance {mc['tolerance']:.2g} ppm (JCGM 101 clause 8).</p>")
    if rate is not None:
        out.append(
            f"<h3>Error counting</h3><p>{rate.errors} errors in {rate.cycles} cycles: p = "
            f"{rate.probability:.3g} ± {rate.standard_uncertainty:.2g}; upper bound "
            f"{rate.upper_bound:.3g} at {rate.confidence * 100:g} % (χ²(2k + 2)/(2N)).</p>")
    return out


# --------------------------------------------------------------------------------------------
# The job


def analyse(run: Run, seed: int, progress: Progress | None = None, fast: bool = False) -> CalibrationOutcome:
    """Analyse every record and scan of a pump run (each with its own derived seed)."""
    manifest = run.manifest
    records = [f for f in run.files if is_record(f)]
    scans = [f for f in run.files if is_scan(f)]
    for f in run.files:
        if not (is_record(f) or is_scan(f)):
            raise IntakeError(
                "not a pump file: expected the columns time_s,current_A,pump_on (precision record) "
                f"or gate_V,current_A (plateau scan); found {','.join(f.columns)}",
                file=f.name, line=f.header_line)
    if not records:
        raise IntakeError("a pump verification needs at least one precision record with columns "
                          "time_s,current_A,pump_on; plateau scans alone give a model prediction only")
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
        buf = io.StringIO()
        buf.write("# cycle differences of " + f.name + "; times are the mean times of the on readings\n")
        buf.write("cycle,time_s,delta_current_A,off_weight\n")
        for j, (tj, dj, wj) in enumerate(zip(res.cycles.times, res.cycles.differences,
                                             res.cycles.weights, strict=True), start=1):
            buf.write(f"{j},{tj!r},{dj!r},{wj!r}\n")
        outcome.extra_files[f"cycles_{f.name}"] = buf.getvalue().encode("utf-8")
    if progress:
        progress(1.0, "done")

    item = manifest.get("item", {}).get("identifier") or manifest.get("item", {}).get("description") or "(not named)"
    pump_info = {"item": item}
    pump_info.update({k: v for k, v in manifest.get("pump", {}).items()
                      if isinstance(v, str | int | float)})
    if conditions:
        first = conditions[0]
        pump_info.setdefault("frequency_Hz", first["frequency_Hz"])
        pump_info.setdefault("electrons_per_cycle", first["electrons_per_cycle"])
    pump_info["ammeter chain"] = (chain.description or chain.kind) if not chain.is_ideal else \
        "ideal ammeter assumed (no [ammeter] calibration data in run.toml)"
    stmt = statement(str(item), outcome.results, scan_sections, rate, chain.is_ideal, conditions)
    outcome.sections = {"statement": stmt, "pump": pump_info, "plateau_scans": scan_sections,
                        "error_counting": None if rate is None else rate.as_dict()}
    outcome.html_sections = html_sections(stmt, pump_info, scan_sections, outcome.results, rate)
    scan_conditions = [{"file": s["file"], "kind": s["kind"], "frequency_Hz": s["frequency_Hz"],
                        "electrons_per_cycle": s["electrons_per_cycle"]} for s in scan_sections]
    # "sweeps" is the list the certificate renders under conditions of measurement.
    outcome.conditions = {"pump": pump_info, "records": conditions,
                          "sweeps": conditions + scan_conditions}
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
    outcome.method = {
        "name": "Electron-pump verification",
        "description": (
            "Precision records: the pump is switched on and off; readings within the settling time "
            "after each switch are dropped and each on segment is compared with the off segments "
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
        "models": [P.DECAY_CASCADE, P.THERMAL] if scans else [],
    }
    return outcome
