"""GUM budget of a CBT electron temperature.

The measurand is T, the electron temperature during the sweep. The posterior standard deviation
is the statistical (Type A) row; when the residuals are not white a second Type A row carries
what the noise model misses (the Newey–West inflation of u(T), analysis.cbt.robust). The Type B
rows are the instrument and device effects that the fit cannot see: the bias-voltage scale (a
gain error δ stretches the voltage axis, and T from the width scales with it: ∂T/∂δ = T), the
lock-in excitation amplitude (it broadens the dip; docs/physics.md 1.4), junction-resistance
non-uniformity (FWHM × (1 − 0.7343 σ_R²): T from the width reads low by 0.734 σ_R², docs/physics.md
1.4, after Pekola et al., arXiv:2112.13830 (2021) on the error scaling with the variance), series
resistance (T high by about R_s G_T when uncorrected), self-heating (a stated heating model's
coupling, or, without one, the shift the data's own heating signature implies), the model's
truncation error (``shape.relative_width_error``) and, where a model without C_0 stands in for a
stated stray capacitance, the measured error of that (``shape.stray_capacitance_error``).

Every one of these inputs has a row whether the lab stated it or not. An input the lab did not
state gets a documented default, is listed by :func:`defaulted_inputs` (the certificate's
deviations) and its row gets finite degrees of freedom ν = ½ (Δu/u)⁻² with the relative
uncertainty of the uncertainty Δu/u = :data:`DEFAULT_RELIABILITY` (GUM G.4.2), so a budget
dominated by guesses gets a larger coverage factor.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np

from analysis.budget import (
    Budget,
    BudgetRow,
    combine,
    degrees_of_freedom_from_reliability,
    standard_uncertainty_from_half_width,
)
from analysis.cbt.fit import SweepData, SweepFit, fwhm_volts, least_squares_fit
from analysis.cbt.models import (
    NON_UNIFORMITY_WIDTH_COEFFICIENT,
    DipShape,
    SweepSetup,
    lockin_nodes_for,
    lockin_quadrature_error,
    relative_width_from_conductance_error,
)
from analysis.cbt.robust import TEMPLATE_T_CARRY, TEMPLATE_T_LIMIT
from analysis.constants import BOLTZMANN, ELEMENTARY_CHARGE

#: Relative uncertainty of a defaulted Type B uncertainty (GUM G.4.2: 25 % gives ν = 8).
DEFAULT_RELIABILITY = 0.25
#: Defaults used when the lab states nothing (documented in docs/ and listed as deviations).
DEFAULT_BIAS_SCALE_RELATIVE_U = 1e-3
DEFAULT_EXCITATION_RELATIVE_U = 0.05
DEFAULT_RESISTANCE_SPREAD = 0.02
#: Excitation not stated: assume at most this rms amplitude as a fraction of V_1/2 (typical sweeps
#: keep a_pk ≲ 0.04 V_1/2; common practice, no source).
DEFAULT_EXCITATION_BOUND_FRACTION = 0.02
#: Series resistance not stated: a four-terminal measurement is assumed, residual R_s G_T ≤ 1e-4.
DEFAULT_SERIES_RESISTANCE_BOUND_RELATIVE = 1e-4


@dataclass(frozen=True)
class TypeBInputs:
    """What the lab states about its instruments and device (from the run manifest).

    Relative standard uncertainties are dimensionless. ``*_stated`` flags say whether the lab
    supplied the value or a documented default was used; the certificate lists defaults as
    deviations (:func:`defaulted_inputs`).
    """

    bias_scale_relative_u: float = DEFAULT_BIAS_SCALE_RELATIVE_U
    bias_scale_stated: bool = False
    excitation_relative_u: float = DEFAULT_EXCITATION_RELATIVE_U
    excitation_stated: bool = False
    resistance_spread: float = DEFAULT_RESISTANCE_SPREAD
    resistance_spread_stated: bool = False
    series_resistance_ohm: float = 0.0
    series_resistance_u_ohm: float = 0.0
    coupling_relative_u: float = 0.0  # of Σ Ω in the heating model
    coverage_probability: float = 0.95
    #: Whether the sweep states its lock-in excitation amplitude (0 for DC is a statement too).
    excitation_amplitude_stated: bool = False
    #: Whether the lab states its series (lead) resistance (0 for four-terminal is a statement).
    series_resistance_stated: bool = False


def _default_nu(stated: bool) -> float:
    return math.inf if stated else degrees_of_freedom_from_reliability(DEFAULT_RELIABILITY)


def _default_note(stated: bool, what: str) -> str:
    if stated:
        return f"{what} stated by the lab"
    return (f"{what} not stated; default assumed (ν = {_default_nu(False):.0f} for a "
            f"{100 * DEFAULT_RELIABILITY:.0f} % relative uncertainty of the uncertainty, GUM G.4.2)")


def defaulted_inputs(inputs: TypeBInputs, setup: SweepSetup, heating_model_given: bool) -> list[str]:
    """The certificate's deviations: every input that took a default, with the value assumed."""
    out = []
    rel = f"{100 * DEFAULT_RELIABILITY:.0f} %"
    if not inputs.bias_scale_stated:
        out.append(f"bias-voltage scale uncertainty not stated: {inputs.bias_scale_relative_u:.2g} relative "
                   f"(rectangular) assumed, itself uncertain by {rel}")
    if not inputs.excitation_amplitude_stated:
        out.append("lock-in excitation amplitude not stated: taken as 0 (DC), with an rms amplitude up to "
                   f"{DEFAULT_EXCITATION_BOUND_FRACTION:g} V_1/2 as a rectangular budget row")
    elif setup.excitation_rms_V > 0 and not inputs.excitation_stated:
        out.append(f"excitation amplitude uncertainty not stated: {100 * inputs.excitation_relative_u:.2g} % "
                   f"(rectangular) assumed, itself uncertain by {rel}")
    if not inputs.resistance_spread_stated:
        out.append(f"junction-resistance spread not stated: no non-uniformity correction applied; a spread "
                   f"up to {inputs.resistance_spread:g} assumed for its budget row")
    if not inputs.series_resistance_stated:
        out.append("series (lead) resistance not stated: four-terminal measurement assumed, residual "
                   f"R_s G_T up to {DEFAULT_SERIES_RESISTANCE_BOUND_RELATIVE:g} (rectangular)")
    if not heating_model_given:
        out.append("no electron-phonon coupling stated: no heating model fitted; the heating row is the "
                   "temperature shift implied by the residuals' own heating signature")
    return out


def temperature_budget(
    fit: SweepFit, shape: DipShape, setup: SweepSetup, inputs: TypeBInputs, posterior_note: str | None = None,
    data: SweepData | None = None,
) -> tuple[Budget, float]:
    """Budget rows for T and the corrected temperature.

    With a heating model the measurand is the electron temperature at zero bias, T_e(0) =
    (T_p⁵ + P₀/ΣΩ)^(1/5): the data fix this combination whatever the heat leak P₀, so P₀ needs no
    row; the coupling ΣΩ does (it sets the bias dependence), with a sensitivity from two
    least-squares refits of ``data`` at ΣΩ (1 ± 1 %). Without a heating model the row is the
    shift of T that adding the first-order heating term to the fit would cause
    (analysis.cbt.robust, template "self-heating") when the data show it (|t| ≥ 4), else zero with
    the detection limit in the note.

    Returns the Budget (whose estimate is the corrected temperature) and the applied
    non-uniformity correction factor. The correction for a *stated* resistance spread σ_R is
    1 + 0.7343 σ_R² on T; its standard uncertainty is taken as the whole correction divided by √3
    (rectangular on [0, 2 × correction]), because σ_R is itself an estimate. With no stated
    spread no correction is applied and the row covers ±0.7343 σ_default² (rectangular).

    The rows, in the order the certificate lists them, come from one helper each below.
    """
    T, c_post = _measurand(fit, setup)
    rows = _posterior_rows(fit, c_post, posterior_note)
    rows.append(_bias_scale_row(inputs, T))
    rows.append(_excitation_row(fit, shape, setup, inputs, T))
    non_uniformity, correction = _non_uniformity_row(inputs, T)
    rows.append(non_uniformity)
    rows.append(_series_resistance_row(fit, inputs, T))
    heating = _heating_row(fit, shape, setup, inputs, data)
    if heating is not None:
        rows.append(heating)
    rows.append(_truncation_row(fit, shape, setup, T))
    stray = _stray_capacitance_row(fit, shape, T)
    if stray is not None:
        rows.append(stray)
    corrected = T * (1.0 + correction)
    budget = combine(
        "electron temperature", "K", corrected, rows,
        coverage_probability=inputs.coverage_probability,
    )
    return budget, 1.0 + correction


def _measurand(fit: SweepFit, setup: SweepSetup) -> tuple[float, float]:
    """The temperature the budget is for, and the sensitivity of it to the fitted T.

    Without a heating model that is the fitted T itself (sensitivity 1). With one it is
    T_e(0) = (T_p⁵ + P₀/ΣΩ)^(1/5) (Wellstood, Urbina & Clarke, Phys. Rev. B 49, 5942 (1994),
    from memory; docs/physics.md 1.4), whose derivative with respect to T_p is (T_p/T_e(0))⁴.
    """
    if setup.heating is not None and fit.electron_temperature_zero_bias is not None:
        T = fit.electron_temperature_zero_bias
        return T, (fit.temperature / T) ** 4
    return fit.temperature, 1.0


def _posterior_rows(fit: SweepFit, c_post: float, posterior_note: str | None) -> list[BudgetRow]:
    """Type A: the posterior standard deviation of T, and the Newey–West inflation of it when the
    residuals are not white (Newey & West, Econometrica 55, 703 (1987); analysis.cbt.robust).

    Both rows take ν = n − 4 for a sweep of n points (common practice, no source).
    """
    n_post = fit.posterior.effective_sample_size
    nu_fit = max(1.0, fit.corrected_bias.size - 4.0)
    diagnosis = fit.diagnosis
    noise_words = ""
    if diagnosis is not None and diagnosis.noise_model != "white":
        noise_words = f"; noise model {diagnosis.noise_model}"
    rows = [
        BudgetRow(
            "temperature from the fit (posterior)", fit.temperature, fit.temperature_std, "K", "A", "posterior",
            c_post, degrees_of_freedom=nu_fit, sensitivity_unit="1",
            note=posterior_note or f"posterior standard deviation, {fit.posterior.walkers} walkers, "
            f"effective sample size {n_post:.0f}{noise_words}",
        )
    ]
    if diagnosis is not None and not diagnosis.noise_is_white:
        f = diagnosis.structure_inflation
        rows.append(
            BudgetRow(
                "residual structure beyond the noise model", 0.0,
                fit.temperature_std * math.sqrt(max(f * f - 1.0, 0.0)), "K", "A", "normal", c_post,
                degrees_of_freedom=nu_fit, sensitivity_unit="1",
                note=f"Newey–West (Bartlett, lag {diagnosis.hac_lag}) inflation {f:.2f} of u(T); lag-1 "
                f"correlation {diagnosis.lag1_before_whitening:.2f} before and "
                f"{diagnosis.lag1_after_whitening:.2f} after the noise model",
            )
        )
    return rows


def _bias_scale_row(inputs: TypeBInputs, T: float) -> BudgetRow:
    """A gain error δ of the bias voltage stretches the voltage axis and T from the width with it:
    ∂T/∂δ = T (V_1/2 ∝ T; Pekola et al., Phys. Rev. Lett. 73, 2903 (1994), from memory)."""
    return BudgetRow(
        "bias-voltage scale factor", 1.0, inputs.bias_scale_relative_u, "1", "B",
        "normal" if inputs.bias_scale_stated else "rectangular", T, sensitivity_unit="K",
        degrees_of_freedom=_default_nu(inputs.bias_scale_stated),
        note=_default_note(inputs.bias_scale_stated, "uncertainty"),
    )


def _excitation_row(fit: SweepFit, shape: DipShape, setup: SweepSetup, inputs: TypeBInputs, T: float) -> BudgetRow:
    """The lock-in excitation broadens the dip (docs/physics.md 1.4).

    A stated amplitude a is in the model; its uncertainty enters with c = −(∂w/∂a)/(∂w/∂T), both
    width derivatives by central differences of the model's FWHM (implicit-function rule, GUM
    5.1.3). A DC sweep, or an amplitude nobody stated, gets a rectangular row bounding the shift
    of T that an rms amplitude up to :data:`DEFAULT_EXCITATION_BOUND_FRACTION` V_1/2 would cause.
    """
    dT = 1e-4 * T
    dw_dT = (fwhm_volts(shape, setup, T + dT, fit.u) - fwhm_volts(shape, setup, T - dT, fit.u)) / (2 * dT)
    if setup.excitation_rms_V > 0:
        a = setup.excitation_rms_V
        da = 1e-3 * a
        up = SweepSetup(setup.junctions_in_series, a + da)
        dn = SweepSetup(setup.junctions_in_series, a - da)
        dw_da = (fwhm_volts(shape, up, T, fit.u) - fwhm_volts(shape, dn, T, fit.u)) / (2 * da)
        c = -dw_da / dw_dT
        return BudgetRow(
            "lock-in excitation amplitude (rms)", a, inputs.excitation_relative_u * a, "V", "B",
            "normal" if inputs.excitation_stated else "rectangular", c, sensitivity_unit="K/V",
            degrees_of_freedom=_default_nu(inputs.excitation_stated),
            note="excitation averaging is in the model; this row is its amplitude's uncertainty"
            + ("" if inputs.excitation_stated else "; " + _default_note(False, "its uncertainty")),
        )
    # DC, or an excitation nobody stated: an unknown excitation would broaden the dip, so the
    # row bounds the T shift an rms amplitude up to the default bound would cause.
    w0 = fwhm_volts(shape, setup, T, fit.u)
    a_max = 0.0 if inputs.excitation_amplitude_stated else DEFAULT_EXCITATION_BOUND_FRACTION * w0
    shift = 0.0
    if a_max > 0:
        shift = (fwhm_volts(shape, SweepSetup(setup.junctions_in_series, a_max), T, fit.u) - w0) / dw_dT
    return BudgetRow(
        "lock-in excitation amplitude (rms)", 0.0, standard_uncertainty_from_half_width(abs(shift), "rectangular"),
        "K", "B", "rectangular", 1.0, sensitivity_unit="1",
        degrees_of_freedom=_default_nu(inputs.excitation_amplitude_stated),
        note="DC sweep (no excitation), stated" if inputs.excitation_amplitude_stated else
        f"excitation not stated, taken as 0; an rms amplitude up to {a_max:.3g} V would read T "
        f"{shift:.2g} K higher; " + _default_note(False, "amplitude"),
    )


def _non_uniformity_row(inputs: TypeBInputs, T: float) -> tuple[BudgetRow, float]:
    """Junction-resistance spread σ_R narrows the dip, FWHM × (1 − 0.7343 σ_R²) (docs/physics.md
    1.4, after Pekola et al., arXiv:2112.13830 (2021)); the row and the relative correction of T
    (1 + 0.7343 σ_R² applied for a stated spread, none for a default one)."""
    sigma = inputs.resistance_spread
    full = NON_UNIFORMITY_WIDTH_COEFFICIENT * sigma**2
    correction = full if inputs.resistance_spread_stated else 0.0
    row = BudgetRow(
        "junction-resistance non-uniformity correction", correction,
        standard_uncertainty_from_half_width(full, "rectangular"), "1", "B", "rectangular", T,
        sensitivity_unit="K", degrees_of_freedom=_default_nu(inputs.resistance_spread_stated),
        note=f"relative spread {sigma:g} (stated); correction applied" if inputs.resistance_spread_stated
        else f"spread not stated: no correction applied, ±{full:.2g} relative for a spread up to {sigma:g}; "
        + _default_note(False, "spread"),
    )
    return row, correction


def _series_resistance_row(fit: SweepFit, inputs: TypeBInputs, T: float) -> BudgetRow:
    """A series (lead) resistance R_s left in the data reads T high by about R_s G_T, so
    ∂T/∂R_s = T G_T (circuit theory, derived; docs/physics.md 1.4). Not stated: a four-terminal measurement is assumed,
    with a rectangular bound R_s G_T ≤ :data:`DEFAULT_SERIES_RESISTANCE_BOUND_RELATIVE`."""
    if inputs.series_resistance_stated or inputs.series_resistance_ohm > 0 or inputs.series_resistance_u_ohm > 0:
        return BudgetRow(
            "series (lead) resistance", inputs.series_resistance_ohm,
            inputs.series_resistance_u_ohm, "ohm", "B", "normal",
            T * fit.asymptotic_conductance, sensitivity_unit="K/ohm",
            note="corrected in the data; T shifts by about R_s G_T when R_s is wrong"
            if inputs.series_resistance_ohm > 0 else "stated by the lab (four-terminal or negligible leads)",
        )
    bound = DEFAULT_SERIES_RESISTANCE_BOUND_RELATIVE / fit.asymptotic_conductance
    return BudgetRow(
        "series (lead) resistance", 0.0, standard_uncertainty_from_half_width(bound, "rectangular"),
        "ohm", "B", "rectangular", T * fit.asymptotic_conductance, sensitivity_unit="K/ohm",
        degrees_of_freedom=_default_nu(False),
        note=f"not stated: four-terminal assumed, R_s up to {bound:.3g} ohm; " + _default_note(False, "bound"),
    )


def _heating_row(
    fit: SweepFit, shape: DipShape, setup: SweepSetup, inputs: TypeBInputs, data: SweepData | None
) -> BudgetRow | None:
    """Self-heating: the coupling ΣΩ's row with a heating model, the data's own heating
    signature without one, or no row (a heating model whose coupling has no stated uncertainty,
    or no data to refit)."""
    if setup.heating is not None and data is not None and inputs.coupling_relative_u > 0:
        return _coupling_row(fit, shape, setup, inputs, data)
    if setup.heating is None:
        return _heating_signature_row(fit)
    return None


def _coupling_row(fit: SweepFit, shape: DipShape, setup: SweepSetup, inputs: TypeBInputs, data: SweepData) -> BudgetRow:
    """Sensitivity of T_e(0) to the relative coupling ΣΩ from two least-squares refits at
    ΣΩ (1 ± 1 %), each giving T_p and from it T_e(0) by the heat balance of Wellstood, Urbina &
    Clarke, Phys. Rev. B 49, 5942 (1994) (from memory; docs/physics.md 1.4)."""
    hm = setup.heating
    start = np.array([fit.temperature, fit.u, fit.bias_offset])
    fitted = fit.fitted_data if fit.fitted_data is not None else data
    te = []
    for f in (1.01, 0.99):
        h2 = replace(hm, coupling_W_per_K5=hm.coupling_W_per_K5 * f)
        d2 = replace(fitted, setup=replace(fitted.setup, heating=h2))
        tp = least_squares_fit(shape, d2, start)["theta"][0]
        te.append(float(h2.electron_temperature(0.0, tp, setup.junctions_in_series)))
    c = (te[0] - te[1]) / 0.02
    return BudgetRow(
        "electron-phonon coupling ΣΩ (relative)", 1.0, inputs.coupling_relative_u, "1", "B", "normal", c,
        sensitivity_unit="K",
        note=f"heating model: T_e rises {100 * fit.heating_at_half_width:.2g} % at the half-depth bias",
    )


def _heating_signature_row(fit: SweepFit) -> BudgetRow:
    """No heating model: the shift of T that the residual template "self-heating"
    (analysis.cbt.robust) implies, carried from |t| ≥ 2 (named as heating from |t| ≥ 4), else zero
    with the detection limit in the note."""
    diagnosis = fit.diagnosis
    test = diagnosis.template("self-heating") if diagnosis is not None else None
    if test is None:
        return BudgetRow(
            "self-heating (no heating model)", 0.0, 0.0, "K", "B", "normal", 1.0, sensitivity_unit="1",
            note="not evaluated: the fit ran without residual diagnostics",
        )
    # A significant heating signature (|t| ≥ 4): its shift of T is carried in full and the cause is
    # named. A weak one (2 ≤ |t| < 4) is carried too, unnamed: the template is so correlated with T
    # that a heating seen only at t = 3 can move T by several u(T). Below |t| = 2 the row is zero
    # and says how large a shift would have been seen (counting a shift that is noise would only
    # pad U on clean sweeps).
    limit = 4.0 * test.temperature_shift_std
    carried = abs(test.t_statistic) >= TEMPLATE_T_CARRY
    if test.significant:
        note = (f"residuals show self-heating (t = {test.t_statistic:.1f}): fitting a first-order heating "
                f"term would shift T by {test.temperature_shift:.2g} K, carried here; give the coupling "
                "to model it")
    elif carried:
        note = (f"weak sign of self-heating (t = {test.t_statistic:.1f}, named from t = "
                f"{TEMPLATE_T_LIMIT:g}): fitting a first-order heating term would shift T by "
                f"{test.temperature_shift:.2g} K, carried here")
    else:
        note = (f"tested, not seen: heating signature t = {test.t_statistic:.1f}; a heating shift of T "
                f"larger than about {limit:.2g} K would have been detected")
    return BudgetRow(
        "self-heating (no heating model)", 0.0, abs(test.temperature_shift) if carried else 0.0,
        "K", "B", "normal", 1.0, sensitivity_unit="1", note=note,
    )


def _truncation_row(fit: SweepFit, shape: DipShape, setup: SweepSetup, T: float) -> BudgetRow:
    """The dip model's own width error at the fitted u (``shape.relative_width_error``), plus
    that of the few-node lock-in quadrature the fit evaluates it with (measured at the fitted α
    and u, analysis.cbt.models.lockin_quadrature_error), as a rectangular bound on T."""
    bound = shape.relative_width_error(fit.u)
    note = f"{shape.name}: width error bound {bound:.2e} relative at u = {fit.u:.3f}"
    if setup.excitation_peak_V > 0:
        alpha = ELEMENTARY_CHARGE * setup.excitation_peak_V / (setup.junctions_in_series * BOLTZMANN * T)
        quadrature = lockin_quadrature_error(shape, alpha, fit.u)
        quadrature_width = relative_width_from_conductance_error(shape, fit.u, quadrature)
        bound += quadrature_width
        note += (f", including {quadrature_width:.1e} from the {lockin_nodes_for(alpha)}-node lock-in "
                 f"quadrature (measured {quadrature:.1e} of G_T at α = {alpha:.3g})")
    return BudgetRow(
        "model truncation", 0.0, standard_uncertainty_from_half_width(bound * T, "rectangular"),
        "K", "B", "rectangular", 1.0, sensitivity_unit="1", note=note,
    )


def _stray_capacitance_row(fit: SweepFit, shape: DipShape, T: float) -> BudgetRow | None:
    """A stated stray capacitance that the model only takes as a rescaling of u
    (analysis.cbt.choice.StrayCapacitanceFallback): the measured bound on the shift of T from
    the line shape C_0 adds beyond it, as a rectangular row. None for models that take C_0."""
    error = getattr(shape, "stray_capacitance_error", None)
    if error is None:
        return None
    bound = error(fit.u)
    return BudgetRow(
        "stray capacitance beyond the model", 0.0, standard_uncertainty_from_half_width(bound * T, "rectangular"),
        "K", "B", "rectangular", 1.0, sensitivity_unit="1",
        note=f"C_0/C = {shape.c0_ratio:g} stated, taken as the first-order rescaling of u only; the rest "
        f"of its effect bounded by {bound:.2e} relative at u = {fit.u:.3f} (measured on exact chains at "
        "C_0/C = 0.2: T read low by up to 2.1e-4 u (N = 3) and 3.7e-4 u (N = 4), growing with N; "
        "bound 1.5e-3 u, linear in C_0/C; docs/models.md)",
    )
