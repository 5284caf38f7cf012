"""Resistance-thermometer calibration curves (analysis/sensors.py)."""

import json
import math
from pathlib import Path

import numpy as np
import pytest
from numpy.polynomial import Chebyshev
from scipy import optimize

from analysis import sensors as s

CASES = Path(__file__).parent / "cases"
SENSOR = s.SimulatedSensor()
TEMPERATURES = np.geomspace(0.01, 1.0, 20)


def _plain_data(resistance, temperature, u_t=0.01, u_r=0.0, components=()):
    n = len(resistance)
    return s.CalibrationData(
        resistance_ohm=resistance,
        temperature_K=temperature,
        u_ln_temperature=np.full(n, u_t),
        u_ln_resistance=np.full(n, u_r),
        components=components,
    )


# ------------------------------------------------------------------------------------------
# Chebyshev machinery against numpy.polynomial (reference library)


def test_normalisation_matches_numpy_domain_mapping():
    r = np.array([1500.0, 2200.0, 9000.0, 31000.0])
    lo, hi = math.log(r.min()), math.log(r.max())
    off, scl = Chebyshev([0, 1], domain=[lo, hi]).mapparms()
    assert np.allclose(s.normalise_log_resistance(r, lo, hi), off + scl * np.log(r))


def test_unweighted_fit_equals_numpy_chebyshev_fit():
    # numpy.polynomial.Chebyshev.fit is ordinary least squares in the mapped variable; with equal
    # independent uncertainties and none on R the generalised fit must coincide with it.
    rng = np.random.default_rng(11)
    r = np.geomspace(1800.0, 30000.0, 15)
    t = SENSOR.temperature(r) * np.exp(rng.normal(0, 0.01, r.size))
    fit = s.fit_calibration_curve(_plain_data(r, t), degree=4, residual_scaling="never")
    ref = Chebyshev.fit(np.log(r), np.log(t), 4, domain=[np.log(r).min(), np.log(r).max()])
    assert np.allclose(fit.curve.coefficients, ref.coef, rtol=1e-10, atol=1e-12)
    grid = np.geomspace(r.min(), r.max(), 33)
    assert np.allclose(fit.curve.ln_temperature(grid), ref(np.log(grid)), rtol=0, atol=1e-12)
    assert np.allclose(fit.curve.dlnT_dlnR(grid), ref.deriv()(np.log(grid)), rtol=1e-10)
    # OLS covariance for known sigma: sigma^2 (X^T X)^-1.
    x = s.normalise_log_resistance(r, np.log(r).min(), np.log(r).max())
    design = np.polynomial.chebyshev.chebvander(x, 4)
    assert np.allclose(fit.curve.covariance, 0.01**2 * np.linalg.inv(design.T @ design))


def test_generalised_least_squares_against_direct_formula():
    # Aitken estimator written out with explicit inverses (textbook form) as the reference.
    rng = np.random.default_rng(3)
    x = np.linspace(-1, 1, 9)
    design = np.polynomial.chebyshev.chebvander(x, 2)
    a = rng.normal(size=(9, 9))
    v = a @ a.T + 9 * np.eye(9)
    y = rng.normal(size=9)
    w = np.linalg.inv(v)
    cov = np.linalg.inv(design.T @ w @ design)
    beta = cov @ design.T @ w @ y
    ls = s.generalised_least_squares(design, y, v)
    assert np.allclose(ls.coefficients, beta)
    assert np.allclose(ls.covariance, cov)
    assert np.allclose(ls.gain @ y, beta)
    assert ls.chi_squared == pytest.approx((y - design @ beta) @ w @ (y - design @ beta))


# ------------------------------------------------------------------------------------------
# GUM H.3: calibration of a thermometer by least squares


def test_gum_h3_thermometer_calibration():
    # JCGM 100:2008 (GUM) Annex H.3; data and results from memory
    # (tests/cases/gum_h3_thermometer.json).
    case = json.loads((CASES / "gum_h3_thermometer.json").read_text())
    t = np.array(case["thermometer_reading_degC"])
    b = np.array(case["correction_degC"])
    res = case["results"]
    design = np.column_stack([np.ones_like(t), t - case["reference_temperature_degC"]])
    # GUM H.3 estimates the variance of the corrections from the residuals (s^2, nu = n - 2).
    ls = s.generalised_least_squares(design, b, np.eye(t.size), scale_by_residuals="always")
    u = np.sqrt(np.diag(ls.covariance))
    assert ls.coefficients[0] == pytest.approx(res["y1_degC"], abs=0.00005)
    assert ls.coefficients[1] == pytest.approx(res["y2"], abs=0.000005)
    assert u[0] == pytest.approx(res["u_y1_degC"], abs=0.00005)
    assert u[1] == pytest.approx(res["u_y2"], abs=0.000005)
    r = ls.covariance[0, 1] / (u[0] * u[1])
    assert r == pytest.approx(res["correlation"], abs=0.0005)
    assert ls.birge_ratio == pytest.approx(res["residual_standard_deviation_degC"], abs=0.00005)
    assert ls.degrees_of_freedom == 9
    g = np.array([1.0, 30.0 - case["reference_temperature_degC"]])
    assert g @ ls.coefficients == pytest.approx(res["prediction_at_30_degC"], abs=0.00005)
    assert math.sqrt(g @ ls.covariance @ g) == pytest.approx(
        res["u_prediction_at_30_degC"], abs=0.00005
    )


# ------------------------------------------------------------------------------------------
# Errors in both variables


def test_effective_variance_agrees_with_full_orthogonal_distance_fit():
    # Reference: the full errors-in-variables least squares (coefficients and true ln R of every
    # point as unknowns) solved by scipy.optimize.least_squares; the effective-variance method
    # is its first-order equivalent, so the curves must agree well inside their uncertainty.
    rng = np.random.default_rng(5)
    t_true = np.geomspace(0.012, 0.9, 16)
    r = SENSOR.resistance(t_true) * np.exp(rng.normal(0, 0.003, t_true.size))
    t = t_true * np.exp(rng.normal(0, 0.004, t_true.size))
    data = _plain_data(r, t, u_t=0.004, u_r=0.003)
    fit = s.fit_calibration_curve(data, degree=4, residual_scaling="never", hopping_check=False)
    lo, hi = np.log(r).min(), np.log(r).max()
    ln_r, ln_t = np.log(r), np.log(t)

    def resid(theta):
        c, xi = theta[:5], theta[5:]
        x = (2 * xi - (lo + hi)) / (hi - lo)
        return np.concatenate(
            [(ln_t - np.polynomial.chebyshev.chebval(x, c)) / 0.004, (ln_r - xi) / 0.003]
        )

    sol = optimize.least_squares(resid, np.concatenate([fit.curve.coefficients, ln_r]), xtol=1e-14)
    grid = np.geomspace(r.min(), r.max(), 25)
    x = s.normalise_log_resistance(grid, lo, hi)
    odr_curve = np.polynomial.chebyshev.chebval(x, sol.x[:5])
    _, u_t = fit.curve.temperature(grid)
    u_ln = u_t / np.exp(fit.curve.ln_temperature(grid))
    assert np.max(np.abs(fit.curve.ln_temperature(grid) - odr_curve) / u_ln) < 0.1


def test_resistance_uncertainty_enlarges_curve_uncertainty_through_slope():
    r = np.geomspace(1800.0, 30000.0, 14)
    t = SENSOR.temperature(r)
    small = s.fit_calibration_curve(
        _plain_data(r, t, 0.004, 0.0), degree=3, residual_scaling="never"
    )
    large = s.fit_calibration_curve(
        _plain_data(r, t, 0.004, 0.004), degree=3, residual_scaling="never"
    )
    _, u_small = small.curve.temperature(5000.0)
    _, u_large = large.curve.temperature(5000.0)
    slope = float(np.abs(small.curve.dlnT_dlnR(5000.0))[0])
    assert slope > 1  # a RuO2-like sensor: |d ln T / d ln R| > 1
    # Each point's effective u(ln T) grows from 0.004 to about 0.004 sqrt(1 + slope^2).
    assert u_large[0] / u_small[0] == pytest.approx(math.sqrt(1 + slope**2), rel=0.25)


# ------------------------------------------------------------------------------------------
# Recovery of a known curve (simulated sensor: invented, for recovery only)


def test_recovery_table_within_expanded_uncertainty():
    sim = s.simulate_calibration(SENSOR, TEMPERATURES, seed=2024)
    fit = s.fit_calibration_curve(sim.data)
    table = fit.curve.table(points=60)
    truth = SENSOR.temperature(table.resistance_ohm)
    inside = np.abs(table.temperature_K - truth) <= table.expanded_uncertainty_K
    assert inside.mean() >= 0.95
    assert 2 <= fit.degree <= s.maximum_degree(20)
    assert np.all(np.abs(fit.normalised_residuals) < 4)


def test_recovery_coverage_over_many_realisations():
    # Pooled over 30 simulated calibrations the 95 % table intervals should hold the truth about
    # 95 % of the time; a gross under-statement (e.g. a dropped correlated component) fails here.
    covered = []
    for seed in range(30):
        sim = s.simulate_calibration(SENSOR, TEMPERATURES, seed=seed)
        fit = s.fit_calibration_curve(sim.data, hopping_check=False)
        table = fit.curve.table(points=15)
        truth = SENSOR.temperature(table.resistance_ohm)
        covered.append(np.abs(table.temperature_K - truth) <= table.expanded_uncertainty_K)
    assert np.mean(covered) >= 0.88


# ------------------------------------------------------------------------------------------
# Correlated components


def test_common_temperature_component_moves_all_points_together():
    sim = s.simulate_calibration(SENSOR, TEMPERATURES, seed=7)
    fit = s.fit_calibration_curve(sim.data, degree=5)
    shifted_data = s.CalibrationData(
        resistance_ohm=sim.data.resistance_ohm,
        temperature_K=sim.data.temperature_K * 1.003,  # a bias-gain error of +0.3 %
        u_ln_temperature=sim.data.u_ln_temperature,
        u_ln_resistance=sim.data.u_ln_resistance,
        components=sim.data.components,
    )
    shifted = s.fit_calibration_curve(shifted_data, degree=5)
    grid = np.geomspace(*fit.curve.resistance_range_ohm, 30)[1:-1]
    delta = shifted.curve.ln_temperature(grid) - fit.curve.ln_temperature(grid)
    assert np.allclose(delta, math.log(1.003), rtol=0, atol=1e-9)
    # ... and its budget row is the same 0.3 % at every point of the table.
    gain = next(p for p in fit.curve.covariance_parts if p.name == "CBT bias-voltage gain")
    assert gain.correlated_across_points
    g = np.polynomial.chebyshev.chebvander(
        s.normalise_log_resistance(grid, fit.curve.ln_resistance_min, fit.curve.ln_resistance_max),
        5,
    )
    u_gain = np.sqrt(np.einsum("ij,jk,ik->i", g, gain.covariance, g))
    assert np.allclose(u_gain, 0.003, rtol=1e-9)


def test_table_points_are_correlated_through_common_components():
    sim = s.simulate_calibration(
        SENSOR, TEMPERATURES, seed=8, u_ln_temperature=0.001, temperature_gain_uncertainty=0.01
    )
    fit = s.fit_calibration_curve(sim.data, degree=5)
    lo, hi = fit.curve.resistance_range_ohm
    cov = fit.curve.ln_temperature_covariance(np.array([lo * 1.05, hi / 1.05]))
    corr = cov[0, 1] / math.sqrt(cov[0, 0] * cov[1, 1])
    assert corr > 0.9


def test_treating_common_component_as_independent_understates_uncertainty():
    # A CBT gain error (1 %) dominating a small posterior spread (0.1 %): averaging over 20 points
    # cannot reduce it, yet a fit that took it as independent would claim it does.
    sim = s.simulate_calibration(
        SENSOR, TEMPERATURES, seed=9, u_ln_temperature=0.001, temperature_gain_uncertainty=0.01
    )
    fit = s.fit_calibration_curve(sim.data, degree=5)
    d = sim.data
    wrong = s.CalibrationData(
        resistance_ohm=d.resistance_ohm,
        temperature_K=d.temperature_K,
        u_ln_temperature=np.hypot(d.u_ln_temperature, 0.01),
        u_ln_resistance=np.hypot(d.u_ln_resistance, 1e-4),
    )
    naive = s.fit_calibration_curve(wrong, degree=5)
    r = math.sqrt(np.prod(fit.curve.resistance_range_ohm))
    t, u = fit.curve.temperature(r)
    assert u[0] / t[0] == pytest.approx(0.01, rel=0.05)
    assert u[0] > 1.5 * naive.curve.temperature(r)[1][0]


def test_budget_rows_and_table_agree():
    sim = s.simulate_calibration(SENSOR, TEMPERATURES, seed=10)
    fit = s.fit_calibration_curve(sim.data)
    r = 4000.0
    b = fit.curve.budget(r)
    table = fit.curve.table(np.array([r]))
    t, u = fit.curve.temperature(r)
    assert b.estimate == pytest.approx(t[0])
    assert b.combined_standard_uncertainty == pytest.approx(u[0], rel=1e-12)
    assert b.expanded_uncertainty == pytest.approx(table.expanded_uncertainty_K[0], rel=1e-12)
    names = {row.quantity for row in b.rows}
    assert {"CBT bias-voltage gain", "bridge calibration (gain)"} <= names


# ------------------------------------------------------------------------------------------
# Degree selection, residuals, scatter


def test_degree_floor_two_points_per_coefficient():
    sim = s.simulate_calibration(SENSOR, np.geomspace(0.01, 1.0, 12), seed=1)
    fit = s.fit_calibration_curve(sim.data)
    assert max(sc.degree for sc in fit.scores) == 5
    with pytest.raises(s.CalibrationFitError, match="two per coefficient"):
        s.fit_calibration_curve(sim.data, degree=6)


def test_aicc_and_leave_one_out_both_reject_a_straight_line():
    sim = s.simulate_calibration(SENSOR, TEMPERATURES, seed=4)
    aicc = s.fit_calibration_curve(sim.data, criterion="aicc")
    loo = s.fit_calibration_curve(sim.data, criterion="loo")
    assert aicc.degree >= 3 and loo.degree >= 3
    by_degree = {sc.degree: sc for sc in loo.scores}
    assert by_degree[1].loo > 10 * by_degree[loo.degree].loo
    # AICc = chi2 + 2p + 2p(p+1)/(n-p-1) (Hurvich & Tsai 1989, from memory).
    sc = aicc.scores[2]
    p = sc.degree + 1
    assert sc.aicc == pytest.approx(sc.chi_squared + 2 * p + 2 * p * (p + 1) / (20 - p - 1))


def test_excess_scatter_enlarges_uncertainty_with_finite_degrees_of_freedom():
    # Points scattered three times more than declared: Birge ratio ~3, a Type A part appears.
    sim = s.simulate_calibration(SENSOR, TEMPERATURES, seed=12, u_ln_temperature=0.012)
    d = sim.data
    understated = s.CalibrationData(
        resistance_ohm=d.resistance_ohm,
        temperature_K=d.temperature_K,
        u_ln_temperature=np.full(20, 0.004),
        u_ln_resistance=d.u_ln_resistance,
        components=d.components,
    )
    fit = s.fit_calibration_curve(understated)
    assert fit.birge_ratio > 2
    assert any("Birge" in w for w in fit.warnings)
    excess = [p for p in fit.curve.covariance_parts if p.name.startswith("excess scatter")]
    assert excess and excess[0].degrees_of_freedom == fit.degrees_of_freedom
    assert fit.curve.table(points=5).coverage_factor[2] > 1.96


def test_normalised_residuals_have_unit_scale_when_uncertainties_are_right():
    values = []
    for seed in range(10):
        sim = s.simulate_calibration(SENSOR, TEMPERATURES, seed=100 + seed)
        values.append(s.fit_calibration_curve(sim.data, hopping_check=False).normalised_residuals)
    assert np.std(np.concatenate(values)) == pytest.approx(1.0, abs=0.15)


# ------------------------------------------------------------------------------------------
# Hopping-form sanity check


def test_hopping_check_recovers_pure_hopping_sensor():
    pure = s.SimulatedSensor(ripple=0.0, exponent=0.25)
    sim = s.simulate_calibration(pure, TEMPERATURES, seed=3, u_ln_temperature=0.002)
    fit = s.fit_calibration_curve(sim.data)
    hop = fit.hopping
    assert hop.exponent == pytest.approx(0.25, abs=0.02)
    assert hop.max_normalised_difference < 3
    rippled = s.fit_calibration_curve(s.simulate_calibration(SENSOR, TEMPERATURES, seed=3).data)
    assert rippled.hopping.max_normalised_difference > 3  # the departure from hopping is seen


# ------------------------------------------------------------------------------------------
# Range, refusals, secondary use


def test_out_of_range_refused_with_clear_error():
    sim = s.simulate_calibration(SENSOR, TEMPERATURES, seed=1)
    curve = s.fit_calibration_curve(sim.data).curve
    lo, hi = curve.resistance_range_ohm
    assert curve.temperature(lo)[0].size == 1 and curve.temperature(hi)[0].size == 1
    with pytest.raises(s.OutOfRangeError, match="calibrated range"):
        curve.temperature(hi * 1.01)
    with pytest.raises(s.OutOfRangeError, match="index 1: "):
        s.convert_resistance_log(curve, np.array([lo * 1.1, lo * 0.5, hi]))
    with pytest.raises(s.OutOfRangeError):
        curve.table(np.array([-5.0]))


def test_convert_log_marks_out_of_range_when_asked():
    sim = s.simulate_calibration(SENSOR, TEMPERATURES, seed=1)
    curve = s.fit_calibration_curve(sim.data).curve
    lo, hi = curve.resistance_range_ohm
    out = s.convert_resistance_log(curve, np.array([lo * 1.1, hi * 2, hi]), out_of_range="mark")
    assert out.in_range.tolist() == [True, False, True]
    assert np.isnan(out.temperature_K[1]) and np.isfinite(out.temperature_K[[0, 2]]).all()
    t, _ = curve.temperature(np.array([lo * 1.1, hi]))
    assert np.allclose(out.temperature_K[[0, 2]], t)


def test_sensitivity_is_inverse_slope():
    sim = s.simulate_calibration(SENSOR, TEMPERATURES, seed=1)
    curve = s.fit_calibration_curve(sim.data).curve
    r = np.array([3000.0, 12000.0])
    h = 1e-6
    num = (np.log(r * (1 + h)) - np.log(r * (1 - h))) / (
        curve.ln_temperature(r * (1 + h)) - curve.ln_temperature(r * (1 - h))
    )
    assert np.allclose(curve.sensitivity(r), num, rtol=1e-6)
    assert np.all(curve.sensitivity(r) < 0)


def test_bad_points_refused_naming_the_point():
    with pytest.raises(ValueError, match="point 2: resistance"):
        _plain_data([100.0, -1.0, 300.0, 400.0], [1.0, 0.5, 0.2, 0.1])
    with pytest.raises(ValueError, match="temperature_K has 3 values"):
        _plain_data([100.0, 200.0, 300.0, 400.0], [1.0, 0.5, 0.2])
    with pytest.raises(s.CalibrationFitError, match="only 2 distinct"):
        s.fit_calibration_curve(
            _plain_data([100.0, 200.0, 200.0, 100.0, 200.0], [1.0, 0.5, 0.4, 0.9, 0.45])
        )
    # A repeated point is fine when enough distinct resistances remain.
    rep = s.fit_calibration_curve(_plain_data([100.0, 200.0, 200.0, 400.0], [1.0, 0.5, 0.4, 0.1]))
    assert rep.degree == 1
    with pytest.raises(s.CalibrationFitError, match="at least 4"):
        s.fit_calibration_curve(_plain_data([100.0, 200.0, 300.0], [1.0, 0.5, 0.2]))
    with pytest.raises(s.CalibrationFitError, match="positive definite"):
        s.fit_calibration_curve(
            _plain_data([100.0, 200.0, 300.0, 400.0, 500.0], [1.0, 0.5, 0.3, 0.2, 0.1], u_t=0.0)
        )


def test_simulation_is_reproducible_from_seed():
    a = s.simulate_calibration(SENSOR, TEMPERATURES, seed=42)
    b = s.simulate_calibration(SENSOR, TEMPERATURES, seed=42)
    assert np.array_equal(a.data.temperature_K, b.data.temperature_K)
    assert np.array_equal(a.data.resistance_ohm, b.data.resistance_ohm)
    back = SENSOR.temperature(SENSOR.resistance(TEMPERATURES))
    assert np.allclose(back, TEMPERATURES, rtol=1e-12)


def test_correlated_reference_posteriors_enter_the_fit():
    # References from a global fit are correlated; the fit must use their full covariance (the
    # Aitken estimator with that covariance, written out directly, is the reference).
    rng = np.random.default_rng(21)
    t = np.geomspace(0.01, 1.0, 12)
    r = SENSOR.resistance(t)
    u = np.full(12, 0.004)
    rho = 0.6 + 0.4 * np.eye(12)
    cov = rho * np.outer(u, u)
    t_obs = t * np.exp(rng.multivariate_normal(np.zeros(12), cov))
    data = s.CalibrationData(
        resistance_ohm=r,
        temperature_K=t_obs,
        u_ln_temperature=u,
        u_ln_resistance=np.zeros(12),
        ln_temperature_covariance=cov,
    )
    fit = s.fit_calibration_curve(data, degree=4, residual_scaling="never", hopping_check=False)
    x = s.normalise_log_resistance(r, np.log(r).min(), np.log(r).max())
    design = np.polynomial.chebyshev.chebvander(x, 4)
    w = np.linalg.inv(cov)
    c = np.linalg.inv(design.T @ w @ design)
    assert np.allclose(fit.curve.coefficients, c @ design.T @ w @ np.log(t_obs), atol=1e-10)
    assert np.allclose(fit.curve.covariance, c, rtol=1e-8, atol=1e-14)
    posterior = fit.curve.covariance_parts[0]
    assert posterior.name == "reference temperatures (posterior)"
    assert posterior.correlated_across_points
