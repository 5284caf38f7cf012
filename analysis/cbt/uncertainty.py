"""GUM budget of a CBT electron temperature.

The measurand is T, the electron temperature during the sweep. The posterior standard deviation
is the statistical (Type A) row; the Type B rows are the instrument and device effects that the
fit cannot see: the bias-voltage scale (a gain error δ stretches the voltage axis, and T from the
width scales with it: ∂T/∂δ = T), the lock-in excitation amplitude (it broadens the dip; PHYSICS.md
1.4), junction-resistance non-uniformity (FWHM × (1 − 0.7343 σ_R²): T from the width reads low by
0.734 σ_R², PHYSICS.md 1.4, after Pekola et al., arXiv:2112.13830 (2021) on the error scaling with
the variance), series resistance (T high by about R_s G_T when uncorrected) and the model's own
truncation error (HigherOrderShape.relative_width_error).
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from analysis.budget import Budget, BudgetRow, combine, standard_uncertainty_from_half_width
from analysis.cbt.fit import SweepData, SweepFit, fwhm_volts, least_squares_fit
from analysis.cbt.models import NON_UNIFORMITY_WIDTH_COEFFICIENT, DipShape, SweepSetup


@dataclass(frozen=True)
class TypeBInputs:
    """What the lab states about its instruments and device (from the run manifest).

    Relative standard uncertainties are dimensionless. ``*_stated`` flags say whether the lab
    supplied the value or a documented default was used; the certificate lists defaults as
    deviations.
    """

    bias_scale_relative_u: float = 1e-3
    bias_scale_stated: bool = False
    excitation_relative_u: float = 0.05
    excitation_stated: bool = False
    resistance_spread: float = 0.02
    resistance_spread_stated: bool = False
    series_resistance_ohm: float = 0.0
    series_resistance_u_ohm: float = 0.0
    coupling_relative_u: float = 0.0  # of Σ Ω in the heating model
    coverage_probability: float = 0.95


def temperature_budget(
    fit: SweepFit, shape: DipShape, setup: SweepSetup, inputs: TypeBInputs, posterior_note: str | None = None,
    data: SweepData | None = None,
) -> tuple[Budget, float]:
    """Budget rows for T and the corrected temperature.

    With a heating model the measurand is the electron temperature at zero bias, T_e(0) =
    (T_p⁵ + P₀/ΣΩ)^(1/5): the data fix this combination whatever the heat leak P₀, so P₀ needs no
    row; the coupling ΣΩ does (it sets the bias dependence), with a sensitivity from two
    least-squares refits of ``data`` at ΣΩ (1 ± 1 %).

    Returns the Budget (whose estimate is the corrected temperature) and the applied
    non-uniformity correction factor. The correction for a stated resistance spread σ_R is
    1 + 0.7343 σ_R² on T; its standard uncertainty is taken as the whole correction divided by √3
    (rectangular on [0, 2 × correction]), because σ_R is itself an estimate.
    """
    T = fit.temperature
    c_post = 1.0
    if setup.heating is not None and fit.electron_temperature_zero_bias is not None:
        T = fit.electron_temperature_zero_bias
        c_post = (fit.temperature / T) ** 4  # dT_e(0)/dT_p
    rows: list[BudgetRow] = []
    n_post = fit.posterior.effective_sample_size
    rows.append(
        BudgetRow(
            "temperature from the fit (posterior)", fit.temperature, fit.temperature_std, "K", "A", "posterior",
            c_post, degrees_of_freedom=max(1.0, fit.corrected_bias.size - 4.0), sensitivity_unit="1",
            note=posterior_note or f"posterior standard deviation, {fit.posterior.walkers} walkers, "
            f"effective sample size {n_post:.0f}",
        )
    )
    rows.append(
        BudgetRow(
            "bias-voltage scale factor", 1.0, inputs.bias_scale_relative_u, "1", "B",
            "normal" if inputs.bias_scale_stated else "rectangular", T, sensitivity_unit="K",
            note="stated by the lab" if inputs.bias_scale_stated else "not stated; default assumed",
        )
    )
    if setup.excitation_rms_V > 0:
        a = setup.excitation_rms_V
        da = 1e-3 * a
        up = SweepSetup(setup.junctions_in_series, a + da)
        dn = SweepSetup(setup.junctions_in_series, a - da)
        dw_da = (fwhm_volts(shape, up, T, fit.u) - fwhm_volts(shape, dn, T, fit.u)) / (2 * da)
        dT = 1e-4 * T
        dw_dT = (fwhm_volts(shape, setup, T + dT, fit.u) - fwhm_volts(shape, setup, T - dT, fit.u)) / (2 * dT)
        c = -dw_da / dw_dT
        rows.append(
            BudgetRow(
                "lock-in excitation amplitude (rms)", a, inputs.excitation_relative_u * a, "V", "B",
                "normal" if inputs.excitation_stated else "rectangular", c, sensitivity_unit="K/V",
                note="excitation averaging is in the model; this row is its amplitude's uncertainty",
            )
        )
    sigma = inputs.resistance_spread
    corr = NON_UNIFORMITY_WIDTH_COEFFICIENT * sigma**2
    rows.append(
        BudgetRow(
            "junction-resistance non-uniformity correction", corr,
            standard_uncertainty_from_half_width(corr, "rectangular"), "1", "B", "rectangular", T,
            sensitivity_unit="K",
            note=f"relative spread {sigma:g} "
            + ("(stated)" if inputs.resistance_spread_stated else "(not stated; default assumed)"),
        )
    )
    if inputs.series_resistance_ohm > 0 or inputs.series_resistance_u_ohm > 0:
        rows.append(
            BudgetRow(
                "series (lead) resistance", inputs.series_resistance_ohm,
                inputs.series_resistance_u_ohm, "ohm", "B", "normal",
                T * fit.asymptotic_conductance, sensitivity_unit="K/ohm",
                note="corrected in the data; T shifts by about R_s G_T when R_s is wrong",
            )
        )
    if setup.heating is not None and data is not None and inputs.coupling_relative_u > 0:
        hm = setup.heating
        start = np.array([fit.temperature, fit.u, fit.bias_offset])
        te = []
        for f in (1.01, 0.99):
            h2 = replace(hm, coupling_W_per_K5=hm.coupling_W_per_K5 * f)
            d2 = replace(data, setup=replace(setup, heating=h2))
            tp = least_squares_fit(shape, d2, start)["theta"][0]
            te.append(float(h2.electron_temperature(0.0, tp, setup.junctions_in_series)))
        c = (te[0] - te[1]) / 0.02
        rows.append(
            BudgetRow(
                "electron-phonon coupling ΣΩ (relative)", 1.0, inputs.coupling_relative_u, "1", "B", "normal", c,
                sensitivity_unit="K",
                note=f"heating model: T_e rises {100 * fit.heating_at_half_width:.2g} % at the half-depth bias",
            )
        )
    bound = shape.relative_width_error(fit.u)
    rows.append(
        BudgetRow(
            "model truncation", 0.0, standard_uncertainty_from_half_width(bound * T, "rectangular"),
            "K", "B", "rectangular", 1.0, sensitivity_unit="1",
            note=f"{shape.name}: width error bound {bound:.2e} relative at u = {fit.u:.3f}",
        )
    )
    corrected = T * (1.0 + corr)
    budget = combine(
        "electron temperature", "K", corrected, rows,
        coverage_probability=inputs.coverage_probability,
    )
    return budget, 1.0 + corr


