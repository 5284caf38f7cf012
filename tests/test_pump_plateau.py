"""Plateau models, fits, model comparison and working points (analysis.pump.plateau)."""

import math

import numpy as np
import pytest

from analysis.pump import plateau as P
from analysis.pump import simulate
from analysis.pump.quantized import nominal_current

EF = nominal_current(1.0e9)


# ----- the decay-cascade model against values derived from Kashcheyevs & Kaestner 2010 ---------


@pytest.mark.parametrize(
    "delta, x_expected, dev_expected",
    [
        # Derived from Kashcheyevs & Kaestner, PRL 104, 186805 (2010), computed independently
        # (docs/physics.md 4): inflection point x = aV and ⟨n⟩ − 1 there, with Δ₁ = 0, Δ₂ = δ.
        (10.0, 7.4792, -5.606e-4),
        (20.0, 16.8604, -4.751e-8),
        (25.0, 21.6569, -3.926e-10),
    ],
)
def test_cascade_inflection_point(delta, x_expected, dev_expected):
    params = np.array([1.0, 0.0, delta])  # a = 1/V, c = Δ/a
    x = P.minimum_slope_gate(P.DECAY_CASCADE, params, plateau=1)[0]
    assert x == pytest.approx(x_expected, abs=6e-5)
    dev = P.decay_cascade_deviation(np.array([x]), params, plateau=1)[0]
    assert dev == pytest.approx(dev_expected, rel=2e-4)


def test_cascade_inflection_scales_with_a():
    # Same model: only aV enters, so with a = 40/V the inflection gate is x/a (derived).
    params = np.array([40.0, -0.3, -0.3 + 20.0 / 40.0])
    v = P.minimum_slope_gate(P.DECAY_CASCADE, params, plateau=1)[0]
    assert 40.0 * (v + 0.3) == pytest.approx(16.8604, abs=6e-5)


def test_closed_form_inflection_approximates_exact_minimum():
    # (y − 1)e^{−y} = e^{−δ}, y = e^{δ−x} (derived from Kashcheyevs & Kaestner 2010) neglects
    # e^{−x} against 1; it agrees with the exact minimum slope to about e^{−x}.
    for delta in (10.0, 20.0):
        x_closed, dev_closed = P.cascade_inflection(delta)
        x_exact = P.minimum_slope_gate(P.DECAY_CASCADE, np.array([1.0, 0.0, delta]), 1)[0]
        assert abs(x_closed - x_exact) < 5 * math.exp(-x_exact) + 1e-9
        assert dev_closed == pytest.approx(-(delta + math.log(delta)) * math.exp(-delta), rel=0.05)


def test_half_height_at_loglog2():
    # Kashcheyevs & Kaestner 2010 model: a step is at half height where −aV + Δ = ln ln 2.
    a, c = 35.0, -0.42
    v = c - math.log(math.log(2.0)) / a
    assert P.decay_cascade_mean(np.array([v]), np.array([a, c]))[0] == pytest.approx(0.5, abs=1e-15)


def test_deviation_matches_mean_minus_n_without_cancellation():
    params = np.array([50.0, -0.6, -0.45, -0.35])
    g = np.linspace(-0.55, -0.5, 7)
    dev = P.decay_cascade_deviation(g, params, plateau=1)
    assert np.allclose(dev, P.decay_cascade_mean(g, params) - 1.0, atol=1e-15)
    assert np.all(dev < 0)
    # Far up a very flat plateau ⟨n⟩ − 1 is below double precision next to 1, the deviation is not:
    # exp(−e^{−x}) − 1 = expm1(−e^{−x}) (same model).
    flat = np.array([1.0, 0.0, 80.0])
    assert P.decay_cascade_deviation(np.array([40.0]), flat, 1)[0] == pytest.approx(
        math.expm1(-math.exp(-40.0)), rel=1e-12)


@pytest.mark.parametrize("model, params", [
    (P.DECAY_CASCADE, np.array([45.0, -0.6, -0.4, -0.3])),
    (P.THERMAL, np.array([-0.6, -0.4, 0.01, 0.015])),
])
def test_slope_is_derivative_of_mean(model, params):
    # Analytic derivative against a central difference (common practice, no source).
    m = P.MODEL[model]
    g = np.linspace(-0.7, -0.25, 31)
    h = 1e-6
    numeric = (m.mean(g + h, params) - m.mean(g - h, params)) / (2 * h)
    assert np.allclose(m.slope(g, params), numeric, rtol=1e-6, atol=1e-6)


def test_working_point_is_polished_to_the_exact_minimum():
    # Two logistic steps of equal width (Fricke et al. 2013 model) are mirror images about the
    # midpoint of their centres, so the slope is smallest exactly there (derived); the grid alone
    # would only find it to within a node (the centres are 0.3 V apart, 64 intervals).
    params = np.array([[-0.7, -0.4, 0.02, 0.02], [-0.65, -0.4 + 1e-3, 0.015, 0.015]])
    v = P.minimum_slope_gate(P.THERMAL, params, plateau=1)
    assert v == pytest.approx([-0.55, -0.5245], abs=1e-12)
    # Decay cascade: at the returned gate the slope's derivative (derived in closed form from
    # Kashcheyevs & Kaestner 2010) vanishes to rounding, and a central difference of the slope
    # agrees with that derivative (common practice, no source).
    cascade = np.array([[50.0, -0.70, -0.42, -0.36], [35.0, -0.66, -0.40, -0.31]])
    v = P.minimum_slope_gate(P.DECAY_CASCADE, cascade, plateau=1)
    first, second = P._slope_derivatives(P.DECAY_CASCADE, v[:, None], cascade)
    assert np.all(np.abs(first[:, 0]) <= 1e-9 * np.abs(second[:, 0]) * 0.3)
    h = 1e-6
    g = np.array([[-0.55], [-0.5]])
    for model, p in ((P.DECAY_CASCADE, cascade), (P.THERMAL, params)):
        slope = P.MODEL[model].slope
        numeric = (slope(g + h, p) - slope(g - h, p)) / (2 * h)
        assert np.allclose(P._slope_derivatives(model, g, p)[0], numeric, rtol=1e-6)


def test_thermal_step_half_height_and_slope_at_centre():
    # Logistic step (Fricke et al. 2013): ⟨n⟩ = 1/2 at V_k and slope 1/(4w) there (derived).
    params = np.array([0.1, 0.02])
    assert P.thermal_mean(np.array([0.1]), params)[0] == pytest.approx(0.5)
    assert P.thermal_slope(np.array([0.1]), params)[0] == pytest.approx(1 / 0.08)


def test_model_functions_broadcast_over_parameter_batches():
    g = np.linspace(-0.8, -0.3, 11)
    batch = np.array([[40.0, -0.6, -0.4], [60.0, -0.65, -0.45]])
    out = P.decay_cascade_mean(g, batch)
    assert out.shape == (2, 11)
    assert np.allclose(out[1], P.decay_cascade_mean(g, batch[1]))


# ----- fits and model comparison on simulated scans (recovery checks) --------------------------


def _scan(model, params, seed, noise=0.3e-12, points=241, lo=-0.8, hi=-0.35):
    g = np.linspace(lo, hi, points)
    i = simulate.plateau_scan(g, 1.0e9, model, params, seed, noise_a=noise)
    return g, i / EF


def test_least_squares_recovers_cascade_parameters():
    truth = np.array([55.0, -0.70, -0.50, -0.40])
    g, y = _scan(P.DECAY_CASCADE, truth, seed=11)
    fit = P.fit_plateau(g, y, P.DECAY_CASCADE)
    assert fit.success
    assert fit.parameters.size == 4
    z = (fit.parameters - truth) / fit.standard_errors()[:4]
    assert np.all(np.abs(z) < 4.5)
    assert fit.noise == pytest.approx(0.3e-12 / EF, rel=0.15)


def test_decreasing_scan_is_fitted_with_negative_slope():
    truth = np.array([-55.0, -0.40, -0.60, -0.70])
    g, y = _scan(P.DECAY_CASCADE, truth, seed=12)
    fit = P.fit_plateau(g, y, P.DECAY_CASCADE)
    assert fit.direction == -1
    assert fit.parameters == pytest.approx(truth, rel=2e-2)


def test_information_criterion_picks_the_generating_model():
    g, y = _scan(P.DECAY_CASCADE, np.array([45.0, -0.70, -0.48, -0.40]), seed=3)
    fits = {m: P.fit_plateau(g, y, m) for m in P.MODELS}
    assert P.compare_models(fits).preferred == P.DECAY_CASCADE
    g, y = _scan(P.THERMAL, np.array([-0.68, -0.48, -0.40, 0.012, 0.012, 0.012]), seed=4)
    fits = {m: P.fit_plateau(g, y, m) for m in P.MODELS}
    cmp = P.compare_models(fits)
    assert cmp.preferred == P.THERMAL
    assert cmp.delta_bic > 10 and "thermal" in cmp.statement


def test_scan_without_plateau_is_refused():
    g = np.linspace(-1, 1, 200)
    y = 2.5 * (g + 1)  # a ramp through every level, dwelling on none
    with pytest.raises(P.PlateauScanError, match="never reaches a current plateau"):
        P.inspect_scan(g, y)


def test_scan_ending_on_the_working_plateau_is_refused():
    g, y = _scan(P.DECAY_CASCADE, np.array([55.0, -0.70, -0.20]), seed=5, hi=-0.45)
    with pytest.raises(P.PlateauScanError, match="onset of step 2"):
        P.analyse_plateau_scan(g, y, 1, seed=1, models=(P.DECAY_CASCADE,))


def test_wrong_electron_number_is_refused():
    g, y = _scan(P.DECAY_CASCADE, np.array([55.0, -0.70, -0.50]), seed=6, hi=-0.30)
    with pytest.raises(P.PlateauScanError, match="plateau n = 3"):
        P.analyse_plateau_scan(g, y, 3, seed=1)


# ----- posterior and working point ------------------------------------------------------------


@pytest.mark.slow
def test_posterior_working_point_covers_truth():
    truth = np.array([50.0, -0.70, -0.42, -0.36])  # δ₂ = 14
    g, y = _scan(P.DECAY_CASCADE, truth, seed=21, points=161, lo=-0.78, hi=-0.33)
    res = P.analyse_plateau_scan(g, y, 1, seed=5, max_steps=6000)
    assert res.converged
    assert res.comparison.preferred == P.DECAY_CASCADE
    wp = res.working_point
    true_wp = P.working_point(P.DECAY_CASCADE, truth, 1)
    lo, hi = wp.relative_deviation_interval
    assert lo <= true_wp.relative_deviation <= hi
    assert abs(wp.gate_V - true_wp.gate_V) < 5 * wp.gate_standard_uncertainty_V + 1e-4
    delta2 = next(s for s in res.cascade if s.name == "delta_2")
    assert abs(delta2.mean - 14.0) < 4 * delta2.standard_uncertainty
    # Reproducible bit for bit from the seed.
    again = P.analyse_plateau_scan(g, y, 1, seed=5, max_steps=6000)
    assert again.working_point.relative_deviation == wp.relative_deviation


def test_two_gate_map_finds_flattest_slice():
    g1 = np.linspace(-0.9, -0.2, 121)
    g2 = np.linspace(-0.35, -0.15, 9)
    a, b, i = simulate.plateau_map(g1, g2, 1.0e9, seed=8, gate2_optimum_v=-0.25)
    res = P.analyse_plateau_map(a, b, i / EF, 1, seed=2, draws=500)
    assert res.best.gate2_V == pytest.approx(-0.25, abs=0.026)
    assert len(res.slices) == 9
    assert res.robust_window_V is None or res.robust_window_V[0] <= res.best.gate2_V
    assert np.isfinite(res.working_gate_shift_per_V)
