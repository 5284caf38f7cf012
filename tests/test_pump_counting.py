"""Error counting with charge detectors (analysis.pump.counting)."""

import math

import pytest
from scipy import stats

from analysis.pump.counting import error_rate


def test_no_error_seen_gives_the_poisson_upper_limit():
    # docs/physics.md 4 / Garwood, Biometrika 28, 437 (1936): with k = 0 the 95 % bound is
    # χ²₀.₉₅(2)/(2N) = ln(20)/N exactly, since P(0 | λ) = e^{−λ} = 0.05 (derived).
    r = error_rate(0, 1_000_000)
    assert r.probability == 0.0 and r.standard_uncertainty == 0.0
    assert r.upper_bound == pytest.approx(math.log(20.0) / 1e6, rel=1e-12)
    # "Rule of three": p < 3/N at 95 % (Hanley & Lippman-Hand, JAMA 249, 1743 (1983), from memory).
    assert r.upper_bound == pytest.approx(3.0 / 1e6, rel=0.002)


@pytest.mark.parametrize("k", [1, 4, 25])
def test_upper_bound_is_the_poisson_limit(k):
    # Garwood 1936: the upper limit λ_u solves P(X ≤ k | λ_u) = 1 − P; checked with scipy.stats.
    n = 10_000_000
    r = error_rate(k, n, confidence=0.95)
    assert stats.poisson.cdf(k, r.upper_bound * n) == pytest.approx(0.05, rel=1e-9)
    # For rare errors it agrees with the exact binomial (Clopper–Pearson) bound, scipy.stats.beta.
    assert r.upper_bound == pytest.approx(stats.beta.ppf(0.95, k + 1, n - k), rel=1e-4)


def test_estimate_and_binomial_uncertainty():
    # p̂ = k/N, u = √(p̂(1 − p̂)/N) (binomial; docs/physics.md 4).
    r = error_rate(12, 3_000_000)
    assert r.probability == pytest.approx(4e-6)
    assert r.standard_uncertainty == pytest.approx(math.sqrt(4e-6 * (1 - 4e-6) / 3e6))


@pytest.mark.parametrize("k, n", [(-1, 10), (1.5, 10), (11, 10), (0, 0), (True, 10)])
def test_impossible_counts_are_refused(k, n):
    with pytest.raises(ValueError):
        error_rate(k, n)
