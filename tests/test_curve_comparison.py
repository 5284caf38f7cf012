"""ΔT(R) between two calibrations of one sensor (analysis/curve_comparison.py).

The uncertainty of the difference, with the correlation that shared inputs bring, is checked
against a seeded Monte Carlo of the two curves (JCGM 101 propagation of distributions, done here
directly): the coefficient sets are drawn with their parts, a shared component with one draw for
both curves, and T(R) is evaluated exactly. The curves are invented.
"""

import math

import numpy as np
import pytest
from numpy.polynomial import chebyshev as cheb

from analysis import curve_comparison as cc
from analysis import sensors as s


def _psd(rng, n, scale):
    a = rng.normal(0, scale, (n, n))
    return a @ a.T / n


# Invented curves: a RuO2-like sensor calibrated twice, over different resistance ranges.
RNG = np.random.default_rng(2026)
A1 = np.array([4e-3, 6e-4, -3e-4, 1e-4, 0.0])  # shared component's effect on curve 1
A2 = np.array([3.5e-3, -5e-4, 2e-4, 0.0, 1e-4, -5e-5])  # ... and on curve 2
IND1 = _psd(RNG, 5, 5e-4)
IND2 = _psd(RNG, 6, 5e-4)
C1 = np.array([-2.7, -2.2, 0.39, -0.11, 0.036])
C2 = np.array([-2.62, -2.45, 0.45, -0.14, 0.05, -0.01])
LN1 = (math.log(2000.0), math.log(30000.0))
LN2 = (math.log(2500.0), math.log(40000.0))


def _curves(shared_name="CBT: bias-voltage scale factor"):
    first = s.CalibrationCurve(
        C1,
        *LN1,
        (
            s.CovariancePart("reference temperatures (independent)", IND1, "A"),
            s.CovariancePart(shared_name, np.outer(A1, A1), "B", correlated_across_points=True),
        ),
    )
    second = s.CalibrationCurve(
        C2,
        *LN2,
        (
            s.CovariancePart("reference temperatures (independent)", IND2, "A"),
            s.CovariancePart(shared_name, np.outer(A2, A2), "B", correlated_across_points=True),
        ),
    )
    return first, second


def _monte_carlo(first, second, r, rho, draws=40_000, seed=7):
    """ΔT(R) over draws of both coefficient sets; the shared input drawn once for both when
    rho = 1, independently when rho = 0 (for rho in between, a correlated pair)."""
    rng = np.random.default_rng(seed)
    z1 = rng.standard_normal(draws)
    z2 = rho * z1 + math.sqrt(1 - rho**2) * rng.standard_normal(draws)
    c1 = C1 + rng.multivariate_normal(np.zeros(5), IND1, draws) + np.outer(z1, A1)
    c2 = C2 + rng.multivariate_normal(np.zeros(6), IND2, draws) + np.outer(z2, A2)
    x1 = s.normalise_log_resistance(r, *LN1)
    x2 = s.normalise_log_resistance(r, *LN2)
    t1 = np.exp(cheb.chebval(x1, c1.T))
    t2 = np.exp(cheb.chebval(x2, c2.T))
    return (t2 - t1).std(axis=0, ddof=1), (t2 - t1).mean(axis=0)


@pytest.mark.parametrize("rho", [1.0, 0.0, 0.6])
def test_difference_uncertainty_matches_a_monte_carlo_of_the_two_curves(rho):
    first, second = _curves()
    r = cc.common_resistances(first, second, points=9)
    assert r[0] == pytest.approx(2500.0) and r[-1] == pytest.approx(30000.0)
    diff = cc.curve_difference(
        first, second, r, shared_components={"CBT: bias-voltage scale factor": rho}
    )
    sd, mean = _monte_carlo(first, second, r, rho)
    # 40 000 draws: the sample standard deviation scatters by ~0.4 %; linearisation adds < 0.1 %.
    assert diff.standard_uncertainty_K == pytest.approx(sd, rel=0.02)
    assert diff.difference_K == pytest.approx(mean, rel=1e-2, abs=1e-3 * np.abs(mean).max())


def test_the_shared_input_matters_and_ignoring_it_would_be_detected():
    first, second = _curves()
    r = cc.common_resistances(first, second, points=9)
    shared = cc.curve_difference(
        first, second, r, shared_components={"CBT: bias-voltage scale factor": 1.0}
    )
    alone = cc.curve_difference(first, second, r)
    assert np.allclose(alone.standard_uncertainty_K, alone.uncorrelated_standard_uncertainty_K)
    assert np.allclose(shared.uncorrelated_standard_uncertainty_K, alone.standard_uncertainty_K)
    # The common scale error mostly cancels in the difference.
    assert np.all(shared.standard_uncertainty_K < 0.8 * alone.standard_uncertainty_K)
    assert shared.shared_components == (("CBT: bias-voltage scale factor", 1.0),)


def test_factor_of_a_fitted_common_temperature_component_is_a_pure_offset():
    # A relative error common to every reference temperature shifts ln T by the same amount at
    # every point; the least-squares gain M reproduces a constant exactly (M X = I and T_0 = 1),
    # so the part's factor must be (u, 0, ..., 0) (derived from the GLS equations).
    sim = s.simulate_calibration(
        s.SimulatedSensor(), np.geomspace(0.01, 1.0, 16), seed=4, temperature_gain_uncertainty=0.003
    )
    fit = s.fit_calibration_curve(sim.data, degree=5)
    part = next(p for p in fit.curve.covariance_parts if p.name == "CBT bias-voltage gain")
    a = cc.single_component_factor(part)
    assert a[0] == pytest.approx(0.003, rel=1e-8)
    assert np.allclose(a[1:], 0.0, atol=1e-10)


def test_a_part_that_is_not_one_component_cannot_be_shared():
    first, second = _curves()
    with pytest.raises(cc.CurveComparisonError, match="rank is above one"):
        cc.curve_difference(
            first, second, shared_components={"reference temperatures (independent)": 1.0}
        )


def test_unknown_names_bad_rho_and_disjoint_ranges_are_refused():
    first, second = _curves()
    with pytest.raises(cc.CurveComparisonError, match="parts in both"):
        cc.curve_difference(first, second, shared_components={"bridge gain": 1.0})
    with pytest.raises(cc.CurveComparisonError, match=r"\[-1, 1\]"):
        cc.curve_difference(
            first, second, shared_components={"CBT: bias-voltage scale factor": 1.5}
        )
    far = s.CalibrationCurve(C1, math.log(50000.0), math.log(90000.0), ())
    with pytest.raises(cc.CurveComparisonError, match="do not overlap"):
        cc.common_resistances(first, far)
    with pytest.raises(s.OutOfRangeError):
        cc.curve_difference(first, second, np.array([2100.0]))  # below the second curve
