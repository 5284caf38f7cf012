"""The primary-thermometry job: every CBT sweep of a run to an electron temperature with budget.

This module glues intake to the science: it reads metadata and manifest entries, calls
``analysis.cbt`` for the fit and the budget, applies the certification rules (converged chain,
model used inside its validated range, residuals without structure) and returns result entries
for the certificate record.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, replace

from scipy import special

from analysis.cbt.choice import ModelChoice, fit_sweep_chosen
from analysis.cbt.fit import (
    FitSettings,
    ModelEdgeError,
    PointError,
    ResidualStructureError,
    SweepData,
    SweepError,
    SweepFit,
    estimate_asymptote,
    fit_sweep,
)
from analysis.cbt.global_fit import GlobalFit, fit_global
from analysis.cbt.models import (
    DipShape,
    HeatingModel,
    SweepSetup,
    correct_series_resistance,
    higher_order_shape,
)
from analysis.cbt.uncertainty import TypeBInputs, defaulted_inputs, temperature_budget
from service.calibrations.outcome import CalibrationOutcome, CertificationRefused
from service.calibrations.parallel import run_pieces
from service.intake import IntakeError, Run, check_cbt_sweep, is_cbt_sweep, manifest_number
from service.record.results import result_entry
from service.render.plots import sweep_fit_svg

Progress = Callable[[float, str], None]

#: Below this many bias half-widths on each side a warning goes into the diagnostics (the
#: asymptote is then fixed only to ~1e-4 of the depth; docs/physics.md §1.4).
WARN_RANGE_HALF_WIDTHS = 4.0
#: Relative electron heating at the half-depth bias above which a sweep is flagged.
HEATING_WARNING = 0.10


def heating_model(manifest: dict) -> tuple[HeatingModel | None, float]:
    """The electron-phonon heat balance from run.toml [device], if the lab describes it.

    Either ``coupling_W_per_K5`` (Σ Ω directly) or ``electron_phonon_constant_W_per_K5_m3`` (Σ)
    with ``island_volume_m3`` (Ω); ``coupling_relative_u`` (default 0.3: Σ is rarely known
    better, common practice, no source) and ``heat_leak_W`` (default 0).
    """
    coupling = manifest_number(manifest, "device.coupling_W_per_K5", None)
    sigma = manifest_number(manifest, "device.electron_phonon_constant_W_per_K5_m3", None)
    volume = manifest_number(manifest, "device.island_volume_m3", None)
    if coupling is None and sigma is not None and volume is not None:
        coupling = sigma * volume
    if coupling is None:
        if (sigma is None) != (volume is None):
            raise IntakeError("give both electron_phonon_constant_W_per_K5_m3 and island_volume_m3, or "
                              "coupling_W_per_K5", file="run.toml", field="device")
        return None, 0.0
    if coupling <= 0:
        raise IntakeError("expected a positive coupling", file="run.toml", field="device.coupling_W_per_K5")
    leak = manifest_number(manifest, "device.heat_leak_W", 0.0)
    rel = manifest_number(manifest, "device.coupling_relative_u", 0.3)
    return HeatingModel(coupling, 0.0, leak), rel


def type_b_inputs(manifest: dict, coverage_probability: float) -> TypeBInputs:
    """Type B inputs from run.toml's [instruments] and [device] sections (docs/formats.md)."""
    gain = manifest_number(manifest, "instruments.bias_scale_relative_u", None)
    exc = manifest_number(manifest, "instruments.excitation_relative_u", None)
    spread = manifest_number(manifest, "device.resistance_spread", None)
    rs_u = manifest_number(manifest, "device.series_resistance_u_ohm", None)
    return TypeBInputs(
        bias_scale_relative_u=1e-3 if gain is None else gain,
        bias_scale_stated=gain is not None,
        excitation_relative_u=0.05 if exc is None else exc,
        excitation_stated=exc is not None,
        resistance_spread=0.02 if spread is None else spread,
        resistance_spread_stated=spread is not None,
        series_resistance_u_ohm=rs_u or 0.0,
        series_resistance_stated=rs_u is not None,
        coverage_probability=coverage_probability,
    )


def sweep_inputs(inputs: TypeBInputs, metadata: dict) -> TypeBInputs:
    """The run's Type B inputs with what one sweep's metadata states (excitation, series resistance)."""
    return replace(
        inputs,
        excitation_amplitude_stated="excitation_rms_V" in metadata,
        series_resistance_stated=inputs.series_resistance_stated or "series_resistance_ohm" in metadata,
    )


def fit_settings(manifest: dict, fast: bool) -> FitSettings:
    if fast:
        # For tests and quick looks: shorter convergence rule. Still seeded and still checked.
        return FitSettings(walkers=12, block=100, max_steps=4000, min_tau_multiple=20.0, tau_tolerance=0.1)
    return FitSettings()


@dataclass
class SweepWork:
    """One sweep on its way to a result: the accepted file, its data and its fit."""

    file: object
    data: SweepData
    rs: float
    fit: SweepFit
    warnings: list[str]
    shape: DipShape = higher_order_shape
    model_reason: str = ""


def fit_file(f, seed: int, settings: FitSettings, shape: DipShape | None = None,
             progress: Progress | None = None, heating: HeatingModel | None = None,
             background: bool = False) -> SweepWork:
    """Fit one accepted sweep file independently; applies the certification rules.

    With ``shape`` None the model is chosen for the data (analysis.cbt.choice)."""
    bias, g = check_cbt_sweep(f)
    md = f.metadata
    setup = SweepSetup(md["junctions_in_series"], md.get("excitation_rms_V", 0.0))
    rs = md.get("series_resistance_ohm", 0.0)
    if rs:
        bias, g = correct_series_resistance(bias, g, rs)
    sigma = f.columns.get("conductance_uncertainty_S")
    data = SweepData(bias, g, setup, conductance_uncertainty=sigma, background=background)
    if heating is not None:
        # R_T of one junction from the asymptote: G_T = M/(N R_T).
        r_t = md.get("parallel_rows", 1) / (setup.junctions_in_series * estimate_asymptote(data))
        setup = replace(setup, heating=replace(heating, junction_resistance_ohm=r_t))
        data = replace(data, setup=setup)
    try:
        if shape is None:
            fit, choice = fit_sweep_chosen(data, seed, md.get("ground_capacitance_ratio", 0.0), settings, progress)
        else:
            fit = fit_sweep(data, seed=seed, shape=shape, settings=settings, progress=progress)
            choice = ModelChoice(shape, "model fixed by the caller")
        shape = choice.shape
    except (ModelEdgeError, ResidualStructureError) as exc:
        raise CertificationRefused(f"{f.name}: {exc}") from None
    except PointError as exc:
        lines = ", ".join(str(f.line_of_row(i)) for i in exc.points[:20])
        raise IntakeError(f"{exc} (line {lines})", file=f.name, line=f.line_of_row(exc.points[0]),
                          field=exc.field) from None
    except SweepError as exc:
        raise IntakeError(str(exc), file=f.name, field=exc.field) from None
    warnings: list[str] = []
    reach = fit.diagnostics["bias_reach_half_widths"]
    if reach < WARN_RANGE_HALF_WIDTHS:
        warnings.append(
            f"bias range reaches only ±{reach:.1f} V_1/2; ±{WARN_RANGE_HALF_WIDTHS:g} or more fixes G_T better"
        )
    if fit.diagnosis is not None:
        # What the residual checks found, each naming its likely cause (analysis.cbt.robust).
        warnings.extend(fit.diagnosis.findings)
        if fit.diagnosis.outliers:
            warnings.append("outliers left out of the fit: line "
                            + ", ".join(str(f.line_of_row(i)) for i in fit.diagnosis.outliers))
    if fit.heating_at_half_width > HEATING_WARNING:
        warnings.append(
            f"self-heating dominates: electrons are {100 * fit.heating_at_half_width:.0f} % above the bath at the "
            "half-depth bias; the result rests on the heating model and its coupling constant"
        )
    if not fit.posterior.converged:
        raise CertificationRefused(
            f"{f.name}: the posterior did not converge within {fit.posterior.steps} steps "
            f"(autocorrelation times {', '.join(f'{t:.0f}' for t in fit.posterior.autocorrelation_time)}); "
            "no temperature is certified from an unconverged chain"
        )
    if fit.u > shape.max_u:
        raise CertificationRefused(
            f"{f.name}: u = ΔE/k_BT = {fit.u:.2f} lies beyond the validated range of the "
            f"{shape.name} model (u ≤ {shape.max_u:g}); a full tunnelling model is needed"
        )
    return SweepWork(f, data, rs, fit, warnings, shape, choice.reason)


def sweep_result(work: SweepWork, inputs: TypeBInputs,
                 global_note: str | None = None) -> tuple[dict, str]:
    """The certificate's result entry and fit plot for one sweep (independent or global)."""
    f, fit, data = work.file, work.fit, work.data
    md = f.metadata
    setup = data.setup
    if work.rs:
        inputs = replace(inputs, series_resistance_ohm=work.rs)
    inputs = sweep_inputs(inputs, md)
    shape = work.shape
    budget, _ = temperature_budget(fit, shape, setup, inputs, posterior_note=global_note, data=data)
    entry = result_entry(
        name="electron temperature",
        sweep=f.name,
        quantity="T_e",
        unit="K",
        budget=budget,
        model=shape.name,
        fit={
            "junctions_in_series": setup.junctions_in_series,
            "parallel_rows": md.get("parallel_rows", 1),
            "excitation_rms_V": setup.excitation_rms_V,
            "series_resistance_ohm": work.rs,
            "posterior_mean_temperature_K": fit.temperature,
            "posterior_std_temperature_K": fit.temperature_std,
            "credible_interval_95_K": list(fit.temperature_interval95),
            "charging_energy_K": fit.charging_energy,
            "charging_energy_std_K": fit.charging_energy_std,
            "u": fit.u,
            "depth": fit.depth,
            "asymptotic_conductance_S": fit.asymptotic_conductance,
            "asymptotic_conductance_std_S": fit.asymptotic_conductance_std,
            "bias_offset_V": fit.bias_offset,
            "half_width_voltage_V": fit.half_width_voltage,
            "noise_std_S": fit.noise_std,
            "least_squares": fit.least_squares,
            "points": int(data.bias.size),
            "heating_model": None if setup.heating is None else {
                "coupling_W_per_K5": setup.heating.coupling_W_per_K5,
                "junction_resistance_ohm": setup.heating.junction_resistance_ohm,
                "heat_leak_W": setup.heating.heat_leak_W,
                "phonon_temperature_K": fit.temperature,
                "electron_temperature_zero_bias_K": fit.electron_temperature_zero_bias,
                "relative_heating_at_half_depth_bias": fit.heating_at_half_width,
            },
        },
        diagnostics={
            "posterior": fit.posterior.diagnostics(),
            "bias_reach_half_widths": fit.diagnostics["bias_reach_half_widths"],
            "lag1_residual_correlation": fit.lag1_residual_correlation,
            "residual_checks": None if fit.diagnosis is None else {
                **fit.diagnosis.as_dict(),
                "outlier_lines": [f.line_of_row(i) for i in fit.diagnosis.outliers],
            },
            "model_validated_up_to_u": shape.max_u,
            "model_choice": work.model_reason,
            "warnings": work.warnings,
        },
    )
    title = f"{f.name}: T = {entry['reported']['value']} K, u = {fit.u:.3f}"
    svg = sweep_fit_svg(data.bias, data.conductance, fit.model_curve, title)
    return entry, svg


def one_device(works: list[SweepWork]) -> bool:
    """Sweeps belong to one device when N agrees and any stated device identifiers agree."""
    ns = {w.data.setup.junctions_in_series for w in works}
    ids = {w.file.metadata.get("device") for w in works}
    return len(works) >= 2 and len(ns) == 1 and (len(ids) == 1)


def apply_global(works: list[SweepWork]) -> tuple[GlobalFit, list[str]]:
    """Replace each independent fit's temperature by the shared-ΔE posterior's."""
    g = fit_global([w.data for w in works], [w.fit for w in works], [w.shape for w in works])
    notes = []
    for k, w in enumerate(works):
        T = float(g.temperatures[k])
        w.fit = replace(
            w.fit,
            temperature=T,
            temperature_std=float(g.temperature_std[k]),
            temperature_interval95=(float(g.temperature_intervals95[k, 0]), float(g.temperature_intervals95[k, 1])),
            charging_energy=g.charging_energy,
            charging_energy_std=g.charging_energy_std,
            u=g.charging_energy / T,
            electron_temperature_zero_bias=None if w.data.setup.heating is None else float(
                w.data.setup.heating.electron_temperature(0.0, T, w.data.setup.junctions_in_series)),
        )
        notes.append(
            f"global fit of {len(works)} sweeps with a shared charging energy; independent-fit "
            f"standard deviation {g.independent_temperature_std[k]:.3g} K (tightened {g.tightening[k]:.2f}×)"
        )
    return g, notes


def global_section(g: GlobalFit, works: list[SweepWork]) -> dict:
    names = [w.file.name for w in works]
    return {
        "description": "all sweeps fitted together with one charging energy (numerical integration "
        "of the joint posterior; analysis.cbt.global_fit)",
        "charging_energy_K": g.charging_energy,
        "charging_energy_std_K": g.charging_energy_std,
        "independent_charging_energy_K": dict(zip(names, map(float, g.independent_charging_energy), strict=True)),
        "independent_charging_energy_std_K": dict(
            zip(names, map(float, g.independent_charging_energy_std), strict=True)
        ),
        "consistency_chi2": g.consistency_chi2,
        "consistency_degrees_of_freedom": g.consistency_dof,
        "tightening_factor": dict(zip(names, map(float, g.tightening), strict=True)),
        "correlation_order": [*names, "charging_energy"],
        "temperature_correlation": [[float(x) for x in row] for row in g.correlation],
        "covariance_K2": [[float(x) for x in row] for row in g.covariance],
    }


def _fit_piece(piece, report: Progress) -> SweepWork:
    f, seed, settings, heating, background = piece
    return fit_file(f, seed, settings, None, report, heating, background)


def analyse(run: Run, seed: int, progress: Progress | None = None, fast: bool = False) -> CalibrationOutcome:
    """Analyse every sweep of a thermometry run independently (each with its own derived seed),
    then, for sweeps of one device, fit them together with a shared charging energy."""
    manifest = run.manifest
    p = manifest_number(manifest, "run.coverage_probability", 0.95)
    inputs = type_b_inputs(manifest, p)
    heating, coupling_u = heating_model(manifest)
    background = manifest.get("run", {}).get("linear_background", False)
    if not isinstance(background, bool):
        raise IntakeError("expected true or false", file="run.toml", field="run.linear_background")
    inputs = replace(inputs, coupling_relative_u=coupling_u)
    settings = fit_settings(manifest, fast)
    sweeps = [f for f in run.files if is_cbt_sweep(f)]
    outcome = CalibrationOutcome(results=[])
    works = _fit_sweeps(sweeps, seed, settings, heating, background, progress)
    notes = _global_fit(works, outcome, progress)
    for w, note in zip(works, notes, strict=True):
        if w.fit.u > w.shape.max_u:
            raise CertificationRefused(
                f"{w.file.name}: u = {w.fit.u:.2f} after the global fit lies beyond the validated range of "
                f"the {w.shape.name} model (u ≤ {w.shape.max_u:g})"
            )
        entry, svg = sweep_result(w, inputs, note)
        outcome.results.append(entry)
        outcome.plots[f"fit-{w.file.name}"] = svg
    outcome.diagnostics["convergence_rule"] = {
        "min_autocorrelation_times": settings.min_tau_multiple,
        "tau_tolerance": settings.tau_tolerance,
        "walkers": settings.walkers,
        "max_steps": settings.max_steps,
    }
    _state_deviations(outcome, sweeps, inputs, heating, fast)
    outcome.method = {**METHOD, "models": sorted({r["model"] for r in outcome.results})}
    outcome.conditions = {
        "sweeps": [
            {"file": f.name, **{k: v for k, v in f.metadata.items()}} for f in sweeps
        ]
    }
    return outcome


METHOD = {
    "name": "Coulomb-blockade primary thermometry",
    "description": (
        "Each conductance-versus-bias sweep is fitted with the weak-blockade dip of Pekola et al., "
        "PRL 73, 2903 (1994) with the higher-order corrections of Farhangfar et al., J. Low Temp. "
        "Phys. 108, 191 (1997) or, where the charging energy is too large for that series, with the "
        "full orthodox sequential-tunnelling model (master equation), averaged over the lock-in "
        "excitation. The temperature follows from the dip's width; its posterior is sampled by MCMC "
        "(emcee) and combined with Type B inputs "
        "in a GUM budget (JCGM 100:2008)."
    ),
}


def _fit_sweeps(sweeps, seed: int, settings, heating, background: bool, progress: Progress | None):
    """Each sweep fitted on its own, with seed + k for the k-th sweep.

    Sweeps are independent: fitted side by side on worker processes, with identical results
    whatever their number (service/calibrations/parallel.py)."""
    done = [0.0] * len(sweeps)

    def sub(k: int, frac: float, step: str) -> None:
        done[k] = frac
        if progress:
            progress(0.95 * sum(done) / len(sweeps), f"{sweeps[k].name}: {step}")

    pieces = [(f, seed + k, settings, heating, background) for k, f in enumerate(sweeps)]
    return run_pieces(_fit_piece, pieces, sub)


def _global_fit(works, outcome: CalibrationOutcome, progress: Progress | None) -> list[str | None]:
    """For sweeps of one device, the fit with a shared charging energy (its section and any
    deviation go into ``outcome``); returns each sweep's note on it (None: not applied)."""
    notes: list[str | None] = [None] * len(works)
    if not one_device(works):
        return notes
    if progress:
        progress(0.96, "global fit with a shared charging energy")
    try:
        g, notes = apply_global(works)
    except ValueError as exc:
        outcome.deviations.append(f"global fit not applied ({exc}); temperatures are from independent fits")
        return [None] * len(works)
    outcome.sections["global_fit"] = global_section(g, works)
    p_val = float(special.chdtrc(g.consistency_dof, g.consistency_chi2))
    if p_val < 1e-3:
        outcome.deviations.append(
            f"the independent charging energies disagree (chi2 = {g.consistency_chi2:.1f} for "
            f"{g.consistency_dof} degrees of freedom, p = {p_val:.1e}); ΔE may have drifted between sweeps"
        )
    return notes


def _state_deviations(outcome: CalibrationOutcome, sweeps, inputs, heating, fast: bool) -> None:
    """What the certificate must say was not the standard procedure: a quick-look convergence
    rule, every defaulted budget input with the value assumed, a differentiated DC I–V."""
    if fast:
        outcome.deviations.append(
            "quick-look convergence rule (chain ≥ 20 autocorrelation times) used; not for issue"
        )
    for f in sweeps:  # every defaulted budget input, with the value assumed (analysis.cbt.uncertainty)
        setup = SweepSetup(f.metadata["junctions_in_series"], f.metadata.get("excitation_rms_V", 0.0))
        for text in defaulted_inputs(sweep_inputs(inputs, f.metadata), setup, heating is not None):
            if text not in outcome.deviations:
                outcome.deviations.append(text)
    if any("current_A" in f.columns and "conductance_S" not in f.columns for f in sweeps):
        outcome.deviations.append("conductance obtained by numerical differentiation of a DC I–V")
