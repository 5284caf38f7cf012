"""Recall intervals (analysis/intervals.py): ILAC-G24 / OIML D 10 methods 2 and 1.

ILAC-G24:2007 describes the methods without numerical worked examples (from memory), so the
interval is checked by hand computations of its defining equation and by independent seeded
Monte Carlo simulations of the drift, marked as such. The histories are invented.
"""

import math

import numpy as np
import pytest
from scipy import stats

from analysis import drift as d
from analysis import intervals as iv


def _history(t, y, u):
    return d.CalibrationHistory(np.asarray(t, float), np.asarray(y, float), np.asarray(u, float))


def _model(kind, coefficients, covariance, q=0.0):
    h = _history([0, 100, 200, 300], [0, 0, 0, 0], [1, 1, 1, 1])
    return d.DriftModel(
        kind,
        h,
        np.asarray(coefficients, float),
        np.asarray(covariance, float),
        q,
        0.0,
        0.0,
        2,
        0.0,
        False,
    )


def test_random_walk_interval_by_hand():
    # P(|N(0, q tau)| <= D) = R  =>  tau = (D / z)^2 / q, z = Phi^-1((1 + R)/2).
    # Hand: q = 1e-4 /d, D = 0.5, R = 0.95, z = 1.959964 -> tau = 650.80 d.
    m = _model("random_walk", [0.0], [[1e-4]], q=1e-4)
    r = iv.drift_interval(m, 0.5, reliability_target=0.95, maximum_interval_days=2000)
    assert r.interval_days == pytest.approx(650.80, abs=0.01)
    assert r.limited_by == "drift" and r.method == iv.DRIFT_METHOD
    # Independent: seeded Monte Carlo of the Wiener increment over the interval.
    rng = np.random.default_rng(1)
    change = rng.normal(0.0, math.sqrt(1e-4 * r.interval_days), 400_000)
    assert np.mean(np.abs(change) <= 0.5) == pytest.approx(0.95, abs=0.002)


def test_linear_drift_interval_by_hand():
    # Drift b = 0.01 /d known to u(b) = 0.001 /d, D = 1: P(|b tau| <= 1) = 0.95. The lower tail
    # is negligible, so (1/tau - 0.01)/0.001 = Phi^-1(0.95) = 1.644854 -> tau = 85.875 d (hand).
    m = _model("linear", [0.0, 0.01], [[1e-6, 0.0], [0.0, 1e-6]])
    r = iv.drift_interval(m, 1.0, reliability_target=0.95, maximum_interval_days=730)
    assert r.interval_days == pytest.approx(1.0 / (0.01 + 1.644854 * 0.001), rel=1e-6)
    assert r.interval_days == pytest.approx(85.875, abs=0.01)
    # Independent: seeded Monte Carlo over the drift rate's uncertainty.
    rng = np.random.default_rng(2)
    b = rng.normal(0.01, 0.001, 400_000)
    assert np.mean(np.abs(b * r.interval_days) <= 1.0) == pytest.approx(0.95, abs=0.002)


def test_unresolved_drift_bounds_the_interval_by_its_uncertainty():
    # b = 0 with u(b) = 2e-4 /d: tau = D / (z u(b)) with the two-sided z = 1.959964 (hand):
    # D = 0.1 -> 255.11 d.
    m = _model("linear", [0.0, 0.0], [[1e-6, 0.0], [0.0, 4e-8]])
    r = iv.drift_interval(m, 0.1, maximum_interval_days=3650)
    assert r.interval_days == pytest.approx(0.1 / (stats.norm.ppf(0.975) * 2e-4), rel=1e-7)
    assert r.interval_days == pytest.approx(255.11, abs=0.01)


def test_interval_from_a_fitted_history_against_a_monte_carlo():
    # Invented history with a known drift of 3e-4 per day; the interval must give P = R under the
    # fitted drift distribution (independent seeded Monte Carlo of b ~ N(b_hat, u(b)^2)).
    rng = np.random.default_rng(12)
    t = np.array([0.0, 120, 250, 365, 480, 610, 730])
    u = np.full(t.size, 0.01)
    h = _history(t, 1.0 + 3e-4 * t + rng.normal(0, u), u)
    analysis = d.analyse_drift(h)
    model = analysis.interval_model
    assert model.kind == "linear"
    r = iv.drift_interval(model, 0.05, reliability_target=0.9, maximum_interval_days=1000)
    assert 0 < r.interval_days < 1000 and r.limited_by == "drift"
    b = rng.normal(model.drift_per_day, model.drift_standard_uncertainty_per_day, 400_000)
    assert np.mean(np.abs(b * r.interval_days) <= 0.05) == pytest.approx(0.9, abs=0.002)


def test_laboratory_bounds_apply_and_say_so():
    slow = _model("random_walk", [0.0], [[1e-4]], q=1e-9)
    r = iv.drift_interval(slow, 0.5, maximum_interval_days=365)
    assert r.interval_days == 365 and r.limited_by == "maximum interval"
    assert r.unlimited_interval_days > 365
    fast = _model("random_walk", [0.0], [[1e-4]], q=1.0)
    r = iv.drift_interval(fast, 0.5, maximum_interval_days=365, minimum_interval_days=30)
    assert r.interval_days == 30 and r.limited_by == "minimum interval"
    assert "review the item" in r.note
    flat = _model("linear", [0.0, 0.0], [[1e-6, 0.0], [0.0, 1e-14]])
    r = iv.drift_interval(flat, 0.5, maximum_interval_days=365)
    assert r.interval_days == 365 and math.isinf(r.unlimited_interval_days)


def test_a_stable_model_is_refused_for_the_interval():
    with pytest.raises(d.HistoryError, match="interval_model"):
        iv.drift_interval(_model("stable", [0.0], [[1e-4]]), 0.5, maximum_interval_days=365)


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"max_permissible_change": 0.0}, "maximum permissible change"),
        ({"reliability_target": 1.0}, "reliability target"),
        ({"maximum_interval_days": -1.0}, "maximum interval"),
        ({"minimum_interval_days": 400.0}, "minimum interval"),
    ],
)
def test_bad_interval_settings_are_refused(kwargs, message):
    args = {"max_permissible_change": 0.5, "maximum_interval_days": 365.0} | kwargs
    m = _model("random_walk", [0.0], [[1e-4]], q=1e-4)
    with pytest.raises(d.HistoryError, match=message):
        iv.drift_interval(m, **args)


def test_staircase_by_hand():
    # ILAC-G24 method 1 with the laboratory's factors 1.5 (in tolerance) and 0.5 (out).
    kw = {"lengthen_factor": 1.5, "shorten_factor": 0.5, "maximum_interval_days": 730}
    assert iv.staircase_interval(365, True, **kw).interval_days == 547.5
    assert iv.staircase_interval(365, False, **kw).interval_days == 182.5
    capped = iv.staircase_interval(600, True, **kw)
    assert capped.interval_days == 730 and capped.limited_by == "maximum interval"
    assert capped.method == iv.STAIRCASE_METHOD
    with pytest.raises(d.HistoryError):
        iv.staircase_interval(
            365, True, lengthen_factor=0.9, shorten_factor=0.5, maximum_interval_days=730
        )
