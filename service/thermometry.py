"""The primary-thermometry job: every CBT sweep of a run to an electron temperature with budget.

This module glues intake to the science: it reads metadata and manifest entries, calls
``analysis.cbt`` for the fit and the budget, applies the certification rules (converged chain,
model used inside its validated range, residuals without structure) and returns result entries
for the certificate record.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field

from analysis.budget import round_for_report
from analysis.cbt.fit import FitSettings, SweepData, SweepError, SweepFit, fit_sweep
from analysis.cbt.models import SweepSetup, correct_series_resistance, higher_order_shape
from analysis.cbt.uncertainty import TypeBInputs, temperature_budget
from service.intake import IntakeError, Run, check_cbt_sweep, is_cbt_sweep, manifest_number
from service.plots import sweep_fit_svg

Progress = Callable[[float, str], None]

#: Below this many bias half-widths on each side a warning goes into the diagnostics (the
#: asymptote is then fixed only to ~1e-4 of the depth; PHYSICS.md 1.4).
WARN_RANGE_HALF_WIDTHS = 4.0
#: Lag-1 autocorrelation of residuals above which the fit is flagged as structured.
RESIDUAL_CORRELATION_LIMIT = 0.3


class CertificationRefused(Exception):
    """The analysis ran but its result must not go on a certificate; message says why."""


@dataclass
class JobOutcome:
    """What a job hands to the certificate builder."""

    results: list[dict]
    sections: dict = field(default_factory=dict)
    plots: dict[str, str] = field(default_factory=dict)
    diagnostics: dict = field(default_factory=dict)
    deviations: list[str] = field(default_factory=list)
    method: dict = field(default_factory=dict)
    conditions: dict = field(default_factory=dict)
    extra_files: dict[str, bytes] = field(default_factory=dict)


def type_b_inputs(manifest: dict, coverage_probability: float) -> TypeBInputs:
    """Type B inputs from run.toml's [instruments] and [device] sections (docs/formats.md)."""
    gain = manifest_number(manifest, "instruments.bias_scale_relative_u", None, 0.0, 0.5)
    exc = manifest_number(manifest, "instruments.excitation_relative_u", None, 0.0, 1.0)
    spread = manifest_number(manifest, "device.resistance_spread", None, 0.0, 0.5)
    rs_u = manifest_number(manifest, "device.series_resistance_u_ohm", 0.0)
    return TypeBInputs(
        bias_scale_relative_u=1e-3 if gain is None else gain,
        bias_scale_stated=gain is not None,
        excitation_relative_u=0.05 if exc is None else exc,
        excitation_stated=exc is not None,
        resistance_spread=0.02 if spread is None else spread,
        resistance_spread_stated=spread is not None,
        series_resistance_u_ohm=rs_u or 0.0,
        coverage_probability=coverage_probability,
    )


def fit_settings(manifest: dict, fast: bool) -> FitSettings:
    if fast:
        # For tests and quick looks: shorter convergence rule. Still seeded and still checked.
        return FitSettings(walkers=12, block=100, max_steps=4000, min_tau_multiple=20.0, tau_tolerance=0.1)
    return FitSettings()


def analyse_sweep(f, seed: int, settings: FitSettings, inputs: TypeBInputs,
                  progress: Progress | None = None) -> tuple[SweepFit, dict, str, list[str]]:
    """Fit one accepted sweep file; returns the fit, the result entry, the plot and warnings."""
    bias, g = check_cbt_sweep(f)
    md = f.metadata
    setup = SweepSetup(md["junctions_in_series"], md.get("excitation_rms_V", 0.0))
    rs = md.get("series_resistance_ohm", 0.0)
    if rs:
        bias, g = correct_series_resistance(bias, g, rs)
        inputs = TypeBInputs(**{**inputs.__dict__, "series_resistance_ohm": rs})
    sigma = f.columns.get("conductance_uncertainty_S")
    data = SweepData(bias, g, setup, conductance_uncertainty=sigma)
    shape = higher_order_shape
    try:
        fit = fit_sweep(data, seed=seed, shape=shape, settings=settings, progress=progress)
    except SweepError as exc:
        raise IntakeError(str(exc), file=f.name, field=exc.field) from None
    warnings: list[str] = []
    reach = fit.diagnostics["bias_reach_half_widths"]
    if reach < WARN_RANGE_HALF_WIDTHS:
        warnings.append(f"bias range reaches only ±{reach:.1f} V_1/2; ±{WARN_RANGE_HALF_WIDTHS:g} or more fixes G_T better")
    if abs(fit.lag1_residual_correlation) > RESIDUAL_CORRELATION_LIMIT:
        warnings.append(
            f"residuals are correlated (lag-1 {fit.lag1_residual_correlation:.2f}): the model or the "
            "noise description may be incomplete"
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
    budget, _ = temperature_budget(fit, shape, setup, inputs)
    value_s, u_s = round_for_report(budget.estimate, budget.combined_standard_uncertainty)
    _, U_s = round_for_report(budget.estimate, budget.expanded_uncertainty)
    entry = {
        "name": "electron temperature",
        "sweep": f.name,
        "quantity": "T_e",
        "value": budget.estimate,
        "unit": "K",
        "standard_uncertainty": budget.combined_standard_uncertainty,
        "expanded_uncertainty": budget.expanded_uncertainty,
        "coverage_factor": budget.coverage_factor,
        "coverage_probability": budget.coverage_probability,
        "effective_degrees_of_freedom": None
        if math.isinf(budget.effective_degrees_of_freedom) else budget.effective_degrees_of_freedom,
        "reported": {"value": value_s, "standard_uncertainty": u_s, "expanded_uncertainty": U_s, "unit": "K"},
        "budget": budget.as_dict(),
        "model": shape.name,
        "fit": {
            "junctions_in_series": setup.junctions_in_series,
            "parallel_rows": md.get("parallel_rows", 1),
            "excitation_rms_V": setup.excitation_rms_V,
            "series_resistance_ohm": rs,
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
            "points": int(bias.size),
        },
        "diagnostics": {
            "posterior": fit.posterior.diagnostics(),
            "bias_reach_half_widths": reach,
            "lag1_residual_correlation": fit.lag1_residual_correlation,
            "model_validated_up_to_u": shape.max_u,
            "warnings": warnings,
        },
    }
    title = f"{f.name}: T = {value_s} K, u = {fit.u:.3f}"
    svg = sweep_fit_svg(bias, g, fit.model_curve, title)
    return fit, entry, svg, warnings


def analyse(run: Run, seed: int, progress: Progress | None = None, fast: bool = False) -> JobOutcome:
    """Analyse every sweep of a thermometry run independently (each with its own derived seed)."""
    manifest = run.manifest
    p = manifest_number(manifest, "run.coverage_probability", 0.95, 0.5, 0.9999)
    inputs = type_b_inputs(manifest, p)
    settings = fit_settings(manifest, fast)
    sweeps = [f for f in run.files if is_cbt_sweep(f)]
    outcome = JobOutcome(results=[])
    for k, f in enumerate(sweeps):
        def sub(frac: float, step: str, k=k, name=f.name) -> None:
            if progress:
                progress((k + frac) / len(sweeps), f"{name}: {step}")

        fit, entry, svg, warnings = analyse_sweep(f, seed + k, settings, inputs, sub)
        outcome.results.append(entry)
        outcome.plots[f"fit-{f.name}"] = svg
    outcome.diagnostics["convergence_rule"] = {
        "min_autocorrelation_times": settings.min_tau_multiple,
        "tau_tolerance": settings.tau_tolerance,
        "walkers": settings.walkers,
        "max_steps": settings.max_steps,
    }
    if fast:
        outcome.deviations.append(
            "quick-look convergence rule (chain ≥ 20 autocorrelation times) used; not for issue"
        )
    if not inputs.bias_scale_stated:
        outcome.deviations.append("bias-voltage scale uncertainty not stated by the lab: 0.1 % (rectangular) assumed")
    if not inputs.resistance_spread_stated:
        outcome.deviations.append("junction-resistance spread not stated: 2 % assumed for the non-uniformity row")
    if any(f.metadata.get("excitation_rms_V") for f in sweeps) and not inputs.excitation_stated:
        outcome.deviations.append("excitation amplitude uncertainty not stated: 5 % (rectangular) assumed")
    if any("current_A" in f.columns and "conductance_S" not in f.columns for f in sweeps):
        outcome.deviations.append("conductance obtained by numerical differentiation of a DC I–V")
    outcome.method = {
        "name": "Coulomb-blockade primary thermometry",
        "description": (
            "Each conductance-versus-bias sweep is fitted with the weak-blockade dip of Pekola et al., "
            "PRL 73, 2903 (1994) with the higher-order corrections of Farhangfar et al., J. Low Temp. "
            "Phys. 108, 191 (1997), averaged over the lock-in excitation. The temperature follows from "
            "the dip's width; its posterior is sampled by MCMC (emcee) and combined with Type B inputs "
            "in a GUM budget (JCGM 100:2008)."
        ),
        "models": sorted({r["model"] for r in outcome.results}),
    }
    outcome.conditions = {
        "sweeps": [
            {"file": f.name, **{k: v for k, v in f.metadata.items()}} for f in sweeps
        ]
    }
    return outcome
