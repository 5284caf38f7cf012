"""Fits of simulated sweeps recover the temperature within their stated uncertainty."""

import numpy as np
import pytest

from analysis.cbt.choice import fit_sweep_chosen, full_model_for
from analysis.cbt.fit import FitSettings, SweepData, SweepError, fit_sweep
from analysis.cbt.models import first_order_shape, half_width_voltage, higher_order_shape
from analysis.cbt.simulate import exact_sweep, simulate_sweep
from analysis.cbt.uncertainty import TypeBInputs, temperature_budget
from analysis.sampling import sample_posterior


@pytest.mark.slow
@pytest.mark.parametrize("T, u", [(0.02, 0.6), (0.1, 1.5), (1.5, 2.5)])
def test_recovers_temperature(T, u):
    # Data from the exact master equation of a 3-junction array (analysis.cbt.simulate.exact_sweep,
    # docs/physics.md 1.3), not from the tables the fit interpolates; the fit chooses its model as
    # `coldcert certify` does.
    bias, g, setup = exact_sweep(3, T, u, 3e-6, bias_offset=0.05 * half_width_voltage(T, 3))
    g = g + 3e-4 * 3e-6 * np.random.default_rng(11).standard_normal(g.size)
    fit, choice = fit_sweep_chosen(SweepData(bias, g, setup), seed=5)
    assert fit.posterior.converged
    assert abs(fit.temperature - T) < 3 * fit.temperature_std
    assert fit.u == pytest.approx(u, rel=0.02)
    assert fit.asymptotic_conductance == pytest.approx(3e-6, rel=1e-3)
    # The posterior is reported with its diagnostics (issue contract).
    d = fit.posterior.diagnostics()
    assert d["effective_sample_size"] > 300 and 0.1 < d["acceptance_fraction"] < 0.95
    assert fit.posterior.steps >= 50 * max(fit.posterior.autocorrelation_time)


def test_same_seed_same_posterior():
    bias, g, setup = simulate_sweep(20, 0.05, 0.01, 3e-6, seed=3)
    s = FitSettings(walkers=12, block=100, max_steps=3000, min_tau_multiple=20, tau_tolerance=0.2)
    a = fit_sweep(SweepData(bias, g, setup), seed=9, settings=s)
    b = fit_sweep(SweepData(bias, g, setup), seed=9, settings=s)
    assert np.array_equal(a.posterior.samples, b.posterior.samples)
    c = fit_sweep(SweepData(bias, g, setup), seed=10, settings=s)
    assert not np.array_equal(a.posterior.samples, c.posterior.samples)


def test_first_order_model_is_biased_where_published():
    # Exact N = 3 data at u = 0.5 (master equation, docs/physics.md 1.3): the full model recovers T
    # within its uncertainty, while the first-order formula (Pekola et al. 1994) reads T high by
    # more than the width correction 0.3921 ΔG/G_T it lacks (Farhangfar et al. 1997: 3.1 % here).
    T, u = 0.05, 0.5
    bias, g, setup = exact_sweep(3, T, u, 3e-6)
    g = g + 2e-5 * 3e-6 * np.random.default_rng(4).standard_normal(g.size)
    s = FitSettings(walkers=12, block=100, max_steps=3000, min_tau_multiple=20, tau_tolerance=0.2)
    full = fit_sweep(SweepData(bias, g, setup), seed=1, shape=full_model_for(3), settings=s)
    lo = fit_sweep(SweepData(bias, g, setup), seed=1, shape=first_order_shape, settings=s, robust=False)
    assert abs(full.temperature - T) < 3 * full.temperature_std
    assert lo.temperature / T - 1 > 0.3921 * (u / 6 - u**2 / 60 + u**3 / 630)


def test_narrow_range_is_refused():
    bias, g, setup = simulate_sweep(33, 0.05, 0.01, 3e-6, seed=2, range_half_widths=2.0)
    with pytest.raises(SweepError) as exc:
        fit_sweep(SweepData(bias, g, setup), seed=1)
    assert exc.value.field == "bias_V" and "V_1/2" in str(exc.value)


def test_budget_rows_and_correction():
    bias, g, setup = simulate_sweep(33, 0.05, 0.01, 3e-6, seed=2, excitation_rms_V=5e-6)
    s = FitSettings(walkers=12, block=100, max_steps=3000, min_tau_multiple=20, tau_tolerance=0.2)
    fit = fit_sweep(SweepData(bias, g, setup), seed=1, settings=s)
    inputs = TypeBInputs(bias_scale_relative_u=1e-3, bias_scale_stated=True, resistance_spread=0.05,
                         resistance_spread_stated=True, excitation_amplitude_stated=True)
    budget, factor = temperature_budget(fit, higher_order_shape, setup, inputs)
    names = [r.quantity for r in budget.rows]
    for needed in ("posterior", "bias-voltage scale", "excitation", "non-uniformity", "model truncation"):
        assert any(needed in n for n in names), needed
    # Non-uniformity: FWHM x (1 - 0.7343 sigma^2) (docs/physics.md 1.4, derived) -> T corrected upward.
    assert factor == pytest.approx(1 + 0.7343 * 0.05**2)
    assert budget.estimate == pytest.approx(fit.temperature * factor)
    # Bias-scale row: T scales with the voltage axis, so its contribution is T x u_rel.
    row = next(r for r in budget.rows if "bias-voltage" in r.quantity)
    assert row.contribution == pytest.approx(fit.temperature * 1e-3)
    # Excitation broadens the dip, so a larger assumed amplitude means a lower fitted T.
    row = next(r for r in budget.rows if "excitation" in r.quantity)
    assert row.sensitivity < 0
    # The model row also carries the measured error of the few-node lock-in quadrature
    # (analysis.cbt.models.lockin_quadrature_error) on top of the model's own bound.
    full = full_model_for(33)
    budget, _ = temperature_budget(fit, full, setup, inputs)
    row = next(r for r in budget.rows if r.quantity == "model truncation")
    assert "lock-in quadrature" in row.note
    assert row.contribution >= full.relative_width_error(fit.u) * fit.temperature / np.sqrt(3) * (1 - 1e-12)


def test_sampler_needs_a_seed_and_reports_nonconvergence():
    # A 2-D Gaussian: the convergence rule must report failure when the step cap is too small.
    def lp(x):
        return -0.5 * np.sum(np.atleast_2d(x) ** 2, axis=1)

    with pytest.raises(ValueError, match="seed"):
        sample_posterior(lp, np.zeros(2), None)
    short = sample_posterior(lp, np.zeros(2), 1, scale=np.ones(2), block=20, max_steps=40)
    assert not short.converged
    ok = sample_posterior(lp, np.zeros(2), 1, scale=np.ones(2), block=200, max_steps=20000)
    assert ok.converged
    assert ok.std() == pytest.approx([1, 1], rel=0.1)


def test_linear_background_is_fitted_when_asked():
    # A sloped background (common in two-wire set-ups; common practice, no source) biases a fit that
    # ignores it; the optional linear background term of the model removes the bias.
    T = 0.05
    bias, g, setup = simulate_sweep(33, T, 0.01, 3e-6, seed=21, background_slope=20.0, relative_noise=1e-4,
                                    shape=higher_order_shape)
    s = FitSettings(walkers=12, block=100, max_steps=3000, min_tau_multiple=20, tau_tolerance=0.2)
    with_bg = fit_sweep(SweepData(bias, g, setup, background=True), seed=1, settings=s)
    assert abs(with_bg.temperature - T) < 3 * with_bg.temperature_std
    assert with_bg.background_slope == pytest.approx(20.0, rel=0.05)
