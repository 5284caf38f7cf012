"""Drift models on a calibration history (analysis/drift.py).

The references are independent computations with general-purpose libraries (scipy.optimize
curve_fit, scipy.stats.linregress and multivariate_normal, a Kalman filter written out here),
and hand computations of the published formulas. The histories are invented.
"""

import math

import numpy as np
import pytest
from scipy import optimize, stats

from analysis import drift as d


def _history(t, y, u, **kw):
    return d.CalibrationHistory(
        np.asarray(t, float), np.asarray(y, float), np.asarray(u, float), **kw
    )


# Invented: a sensor reading drifting by +0.02 mK per 100 days, calibrated seven times.
T_DAYS = np.array([0.0, 95.0, 210.0, 330.0, 420.0, 560.0, 700.0])
U_MK = np.array([0.010, 0.012, 0.010, 0.015, 0.010, 0.012, 0.011])


def _drifting(seed=5, slope=2e-4, noise_scale=1.0):
    rng = np.random.default_rng(seed)
    y = 10.0 + slope * T_DAYS + rng.normal(0.0, U_MK * noise_scale)
    return _history(T_DAYS, y, U_MK, quantity="T at 12 kOhm", unit="mK")


# ------------------------------------------------------------------------------------------
# Linear drift against scipy (independent computations)


def _scipy_line(h, absolute_sigma):
    """Independent: scipy.optimize.curve_fit of a + b t weighted by sigma; absolute_sigma=False
    scales the covariance by chi2/nu."""
    return optimize.curve_fit(
        lambda t, a, b: a + b * t,
        h.time_days,
        h.values,
        sigma=h.standard_uncertainties,
        absolute_sigma=absolute_sigma,
    )


def test_linear_drift_matches_scipy_curve_fit_with_absolute_sigma():
    h = _drifting(noise_scale=0.5)  # scatter below the stated u: no Birge scaling
    m = d.fit_linear_drift(h)
    assert not m.scaled and m.birge_ratio < 1
    # Independent: scipy.optimize.curve_fit, weighted by sigma with absolute_sigma=True.
    popt, pcov = _scipy_line(h, absolute_sigma=True)
    assert np.allclose(m.coefficients, popt, rtol=1e-9)
    assert np.allclose(m.coefficient_covariance, pcov, rtol=1e-7)


def test_linear_drift_with_excess_scatter_matches_scaled_curve_fit():
    h = _drifting(noise_scale=3.0)  # scatter three times the stated u
    m = d.fit_linear_drift(h)
    assert m.scaled and m.birge_ratio > 1
    # Independent: curve_fit with absolute_sigma=False scales Cov by chi2/nu.
    popt, pcov = _scipy_line(h, absolute_sigma=False)
    assert np.allclose(m.coefficients, popt, rtol=1e-9)
    assert np.allclose(m.coefficient_covariance, pcov, rtol=1e-7)
    # Student's t with nu = n - 2 for the predictions (GUM G.3).
    assert m.coverage_factor == pytest.approx(stats.t.ppf(0.975, h.n - 2))


def test_equal_uncertainties_reduce_to_ordinary_regression():
    h = _drifting(noise_scale=3.0)
    equal = _history(h.time_days, h.values, np.full(h.n, 0.01))
    m = d.fit_linear_drift(equal)
    # Independent: scipy.stats.linregress (ordinary least squares, stderr from the residuals).
    ref = stats.linregress(h.time_days, h.values)
    assert m.drift_per_day == pytest.approx(ref.slope, rel=1e-9)
    assert (
        m.scaled
    )  # the scatter exceeds 0.01, so the covariance is residual-scaled like linregress
    assert m.drift_standard_uncertainty_per_day == pytest.approx(ref.stderr, rel=1e-7)


def test_prediction_is_the_extrapolated_line_and_its_variance():
    h = _drifting(noise_scale=0.5)
    m = d.fit_linear_drift(h)
    t = 1000.0
    p = m.predict(t)
    popt, pcov = _scipy_line(h, absolute_sigma=True)
    g = np.array([1.0, t])
    assert p.value == pytest.approx(popt[0] + popt[1] * t, rel=1e-8)  # curve_fit's own tolerance
    assert p.standard_uncertainty == pytest.approx(math.sqrt(g @ pcov @ g), rel=1e-7)
    assert p.coverage_factor == pytest.approx(stats.norm.ppf(0.975))


def test_weighted_mean_by_hand():
    # Hand computation of the weighted mean: weights 100, 25, 100 -> (1000 + 257.5 + 980)/225.
    h = _history([0, 100, 200], [10.0, 10.3, 9.8], [0.1, 0.2, 0.1])
    m = d.fit_stable(h)
    mean = 2237.5 / 225.0
    assert m.coefficients[0] == pytest.approx(mean, rel=1e-12)
    chi2 = ((10 - mean) / 0.1) ** 2 + ((10.3 - mean) / 0.2) ** 2 + ((9.8 - mean) / 0.1) ** 2
    assert m.chi_squared == pytest.approx(chi2, rel=1e-10)
    # Birge ratio sqrt(chi2/2) > 1 here (chi2 = 5.56), so u^2 = (1/225) chi2/2.
    assert m.scaled and chi2 / 2 > 1
    assert m.coefficient_covariance[0, 0] == pytest.approx(chi2 / 2 / 225.0, rel=1e-10)
    # Within their uncertainties the values give u^2 = 1/225 unscaled.
    calm = d.fit_stable(_history([0, 100, 200], [10.0, 10.1, 9.95], [0.1, 0.2, 0.1]))
    assert not calm.scaled
    assert calm.coefficient_covariance[0, 0] == pytest.approx(1 / 225.0, rel=1e-12)


# ------------------------------------------------------------------------------------------
# Likelihood and AICc


def test_log_likelihood_matches_scipy_multivariate_normal():
    h = _drifting()
    for m in (d.fit_stable(h), d.fit_linear_drift(h), d.fit_random_walk(h)):
        x = np.column_stack([np.ones(h.n), h.time_days - h.time_days[0]])[:, : m.coefficients.size]
        t = h.time_days
        cov = np.diag(h.standard_uncertainties**2) + m.diffusion_per_day * (
            np.minimum.outer(t, t) - t[0]
        )
        # Independent: scipy.stats.multivariate_normal at the fitted mean.
        ref = stats.multivariate_normal(x @ m.coefficients, cov).logpdf(h.values)
        assert m.log_likelihood == pytest.approx(ref, rel=1e-10)
        k = m.parameters
        # AICc, Hurvich & Tsai (1989) (from memory): -2 lnL + 2k + 2k(k+1)/(n-k-1).
        assert m.aicc == pytest.approx(-2 * ref + 2 * k + 2 * k * (k + 1) / (h.n - k - 1))


def test_random_walk_diffusion_is_the_maximum_likelihood():
    rng = np.random.default_rng(21)
    t = np.array([0.0, 60, 150, 240, 365, 450, 600, 730, 800, 950])
    u = np.full(t.size, 0.02)
    walk = np.concatenate([[0.0], np.cumsum(rng.normal(0, np.sqrt(4e-4 * np.diff(t))))])
    h = _history(t, 5.0 + walk + rng.normal(0, u), u)
    m = d.fit_random_walk(h)
    assert m.diffusion_per_day > 0

    # Independent: maximise the full Gaussian likelihood over (a, ln q) with scipy.optimize.
    def nll(theta):
        a, log_q = theta
        cov = np.diag(u**2) + math.exp(log_q) * (np.minimum.outer(t, t) - t[0])
        return -stats.multivariate_normal(np.full(t.size, a), cov).logpdf(h.values)

    ref = optimize.minimize(
        nll,
        [h.values.mean(), math.log(1e-4)],
        method="Nelder-Mead",
        options={"xatol": 1e-9, "fatol": 1e-12, "maxiter": 4000},
    )
    assert m.log_likelihood == pytest.approx(-ref.fun, abs=1e-6)
    assert math.log(m.diffusion_per_day) == pytest.approx(ref.x[1], abs=2e-3)
    assert m.coefficients[0] == pytest.approx(ref.x[0], abs=1e-4)


def _kalman_local_level(t, y, u, q, t_star, diffuse=1e8):
    """Local-level Kalman filter (Durbin & Koopman 2012, ch. 2, from memory), written out here as
    an independent reference: a near-diffuse prior on the level, then predict/update per point."""
    level, var = 0.0, diffuse
    last = t[0]
    for ti, yi, ui in zip(t, y, u, strict=True):
        var += q * (ti - last)
        gain = var / (var + ui**2)
        level += gain * (yi - level)
        var *= 1 - gain
        last = ti
    return level, var + q * (t_star - last)


def test_random_walk_prediction_matches_a_kalman_filter():
    rng = np.random.default_rng(3)
    t = np.array([0.0, 80, 200, 310, 420, 500, 640])
    u = np.array([0.02, 0.03, 0.02, 0.025, 0.02, 0.02, 0.03])
    y = 1.0 + np.concatenate([[0], np.cumsum(rng.normal(0, 0.05, t.size - 1))]) + rng.normal(0, u)
    h = _history(t, y, u)
    m = d.fit_random_walk(h)
    assert m.diffusion_per_day > 0
    for t_star in (640.0, 700.0, 1000.0):
        p = m.predict(t_star)
        level, var = _kalman_local_level(t, y, u, m.diffusion_per_day, t_star)
        assert p.value == pytest.approx(level, abs=1e-6)
        assert p.standard_uncertainty**2 == pytest.approx(var, rel=1e-5)
    mean, sd = m.change_after(365.0)
    assert mean == 0 and sd == pytest.approx(math.sqrt(365.0 * m.diffusion_per_day))


# ------------------------------------------------------------------------------------------
# Model choice (invented histories with a known behaviour)


def test_strong_linear_drift_is_chosen_and_recovered():
    h = _drifting(slope=5e-4)
    a = d.analyse_drift(h)
    assert a.chosen.kind == "linear" and a.criterion == "AICc"
    assert a.chosen.drift_per_day == pytest.approx(
        5e-4, abs=3 * a.chosen.drift_standard_uncertainty_per_day
    )
    assert a.stable_p_value < 1e-6
    assert a.interval_model is a.chosen


def test_stable_item_is_chosen_when_nothing_moves():
    h = _drifting(slope=0.0)
    a = d.analyse_drift(h)
    assert a.chosen.kind == "stable"
    assert a.stable_p_value > 0.05
    # The interval is still bounded by the drift that cannot be excluded.
    assert a.interval_model.kind == "linear"


def test_random_walk_is_chosen_for_a_wandering_item():
    rng = np.random.default_rng(8)
    t = np.arange(14) * 90.0
    u = np.full(t.size, 0.01)
    steps = np.array([0.3, -0.25, 0.2, 0.25, -0.3, -0.2, 0.3, -0.25, -0.2, 0.3, 0.2, -0.3, 0.25])
    y = 2.0 + np.concatenate([[0], np.cumsum(steps)]) + rng.normal(0, u)
    a = d.analyse_drift(_history(t, y, u))
    assert a.chosen.kind == "random_walk"
    assert a.chosen.diffusion_per_day > 0


def test_short_histories_say_what_cannot_be_judged():
    one = d.analyse_drift(_history([0], [1.0], [0.1]))
    assert one.chosen.kind == "stable" and one.interval_model is None
    assert "fewer than three" in one.notes[0]
    three = d.analyse_drift(_history([0, 100, 200], [1.0, 1.1, 1.2], [0.01, 0.01, 0.01]))
    assert three.chosen.kind == "stable"  # the only model with a finite AICc at n = 3
    assert any("too few to judge" in n for n in three.notes)
    assert three.interval_model.kind == "linear"
    # ... and the stable hypothesis is rejected outright, which the page shows.
    assert three.stable_p_value < 1e-10


# ------------------------------------------------------------------------------------------
# E_n (ISO 13528)


def test_en_number_by_hand():
    # ISO 13528:2015 E_n = |x - X| / sqrt(U_x^2 + U_X^2): |10.5 - 10.0| / sqrt(0.3^2 + 0.4^2) = 1.
    assert d.en_number(10.5, 0.3, 10.0, 0.4) == pytest.approx(1.0)
    assert d.en_number(9.0, 0.6, 10.0, 0.8) == pytest.approx(1.0)
    with pytest.raises(d.HistoryError):
        d.en_number(1.0, 0.0, 1.0, 0.0)


def test_a_departing_calibration_is_flagged_and_a_conforming_one_is_not():
    h = _drifting(slope=2e-4, noise_scale=0.5)
    m = d.analyse_drift(h).chosen
    p = m.predict(850.0)
    ok = d.check_new_calibration(m, 850.0, p.value + 0.01, 0.02)
    bad = d.check_new_calibration(m, 850.0, p.value + 0.2, 0.02)
    assert not ok.departs and bad.departs
    assert bad.en == pytest.approx(0.2 / math.hypot(0.02, p.expanded_uncertainty))


def test_sequential_checks_find_the_jump():
    t = np.array([0.0, 100, 200, 300, 400, 500])
    y = np.array([1.000, 1.002, 0.999, 1.001, 1.000, 1.060])
    h = _history(t, y, np.full(6, 0.005))
    checks = d.sequential_checks(h)
    assert [c.label for c in checks] == list(h.labels[2:])
    assert [c.departs for c in checks] == [False, False, False, True]
    en = d.successive_en(h)
    assert en[-1] == pytest.approx(0.060 / math.hypot(0.01, 0.01))


# ------------------------------------------------------------------------------------------
# Bad input


@pytest.mark.parametrize(
    ("t", "y", "u", "message"),
    [
        ([0, 200, 100], [1, 1, 1], [0.1, 0.1, 0.1], "calibration 3: dated 100 d, before"),
        ([0, 100], [1, float("nan")], [0.1, 0.1], "calibration 2: the value is not a finite"),
        ([0, 100], [1, 1], [0.1, 0.0], "calibration 2: the standard uncertainty must be"),
        ([0, 100], [1, 1], [0.1], "standard_uncertainties has 1 values, expected 2"),
    ],
)
def test_bad_histories_are_refused_with_the_calibration_named(t, y, u, message):
    with pytest.raises(d.HistoryError, match=message):
        _history(t, y, u)


def test_one_date_cannot_give_a_drift():
    h = _history([5, 5], [1.0, 1.1], [0.1, 0.1])
    with pytest.raises(d.HistoryError, match="two different dates"):
        d.fit_linear_drift(h)
    assert "share one date" in d.analyse_drift(h).notes[0]


def test_trend_verdict_for_a_device_parameter():
    # Invented charging energies (mK) of one CBT over four certificates; the last one jumped.
    t = [0.0, 200, 400, 600]
    steady = d.judge_trend(_history(t, [7.000, 7.002, 6.999, 7.001], [0.002] * 4))
    assert not steady.changed and steady.reasons == ()
    moved = d.judge_trend(_history(t, [7.000, 7.002, 6.999, 7.060], [0.002] * 4))
    assert moved.changed
    assert moved.reasons[0].startswith("calibration 4 differs from calibration 3 by E_n = ")
    assert "not consistent with one constant value" in moved.reasons[-1]
    single = d.judge_trend(_history([0.0], [7.0], [0.002]))
    assert not single.changed and single.successive_en.size == 0
