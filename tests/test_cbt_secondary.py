"""Secondary mode: the inverted depth series and its propagation."""

import numpy as np
import pytest

from analysis.cbt.models import depth_series
from analysis.cbt.secondary import SecondaryCalibration, temperatures_from_zero_bias


def test_inversion_check_values():
    # docs/physics.md 1.5 (derived from the Farhangfar et al. 1997 series): d -> u; T = dE/u.
    cal = SecondaryCalibration(0.0072, 0.0, 1e-5, 0.0)
    d = np.array([0.01, 0.05, 0.0793651, 0.15])
    res = temperatures_from_zero_bias(1e-5 * (1 - d), cal)
    np.testing.assert_allclose(res.u, [0.0603623, 0.3092839, 0.5, 0.9885171], atol=3e-7)
    np.testing.assert_allclose(res.temperature, 0.0072 / res.u, rtol=1e-14)
    # First-order 6d would read T 5 % high at u = 0.5 (docs/physics.md 1.5).
    assert 0.0072 / (6 * 0.0793651) / res.temperature[2] == pytest.approx(1.05, abs=0.01)


def test_propagation_against_monte_carlo():
    # GUM 5.1.2 first-order propagation checked against direct sampling (JCGM 101 idea, common practice).
    cal = SecondaryCalibration(0.0072, 0.0072 * 0.01, 1.5e-5, 1.5e-5 * 2e-4)
    g0 = np.array([1.5e-5 * (1 - depth_series(0.4))])
    res = temperatures_from_zero_bias(g0, cal, conductance_u=1.5e-5 * 1e-4)
    rng = np.random.default_rng(1)
    n = 200_000
    E = rng.normal(0.0072, 0.0072 * 0.01, n)
    gt = rng.normal(1.5e-5, 1.5e-5 * 2e-4, n)
    g = rng.normal(g0[0], 1.5e-5 * 1e-4, n)
    from analysis.cbt.models import invert_depth_series

    T = E / invert_depth_series(1 - g / gt)
    assert res.standard_uncertainty[0] == pytest.approx(T.std(), rel=0.03)


def test_refuses_out_of_range_depth():
    cal = SecondaryCalibration(0.0072, 0.0, 1e-5, 0.0)
    with pytest.raises(ValueError, match="reading 2"):
        temperatures_from_zero_bias(np.array([0.95e-5, 1.01e-5]), cal)
    with pytest.raises(ValueError, match="validated"):
        temperatures_from_zero_bias(np.array([0.5e-5]), cal)
