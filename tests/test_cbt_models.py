"""Weak-blockade CBT models against their published formulas."""

import numpy as np
import pytest
from scipy import integrate, optimize

from analysis.cbt import models as m
from analysis.constants import BOLTZMANN, ELEMENTARY_CHARGE


def g_closed_form(x):
    # Pekola et al., PRL 73, 2903 (1994): g(x) = [x sinh x - 4 sinh^2(x/2)] / [8 sinh^4(x/2)],
    # evaluated naively (fine away from 0 and below overflow) as the independent reference.
    x = np.asarray(x, dtype=float)
    return (x * np.sinh(x) - 4 * np.sinh(x / 2) ** 2) / (8 * np.sinh(x / 2) ** 4)


def test_dip_function_matches_closed_form_away_from_zero():
    x = np.linspace(0.5, 30, 200)
    np.testing.assert_allclose(m.dip_function(x), g_closed_form(x), rtol=1e-12)
    np.testing.assert_allclose(m.dip_function(-x), g_closed_form(x), rtol=1e-12)


def test_dip_function_check_values():
    # docs/physics.md 1.1 check values (derived from Pekola et al. 1994's g).
    x = np.array([1.0, 2.0, 3.0, 5.0])
    expected = [0.150947578709, 0.113328424380, 0.0724759138, 0.0209523201]
    np.testing.assert_allclose(m.dip_function(x), expected, rtol=1e-9)


def test_dip_function_stable_at_zero_and_large_bias():
    # g(0) = 1/6 (Pekola et al. 1994: depth u/6); series and closed form meet smoothly.
    assert m.dip_function(np.array([0.0]))[0] == pytest.approx(1 / 6, rel=1e-15)
    x = np.array([1e-8, 1e-4, 0.299999, 0.300001])
    # Taylor series of g (derived from the Bernoulli series of x coth(x/2); first three terms in
    # docs/physics.md 1.1), to x^10.
    series = 1 / 6 - x**2 / 60 + x**4 / 1008 - x**6 / 21600 + x**8 / 532224 - 691 * x**10 / 9906624000
    np.testing.assert_allclose(m.dip_function(x), series, rtol=1e-13)
    big = m.dip_function(np.array([50.0, 700.0, 1e4]))
    assert np.all(np.isfinite(big)) and np.all(big >= 0) and big[-1] == 0.0
    assert big[0] == pytest.approx(g_closed_form(50.0), rel=1e-12)


def test_half_width_root():
    # Pekola et al. 1994: FWHM = 5.439 N k_B T / e; the root of g(x) = g(0)/2 is 2.7195849526
    # (docs/physics.md 1.1, derived).
    root = optimize.brentq(lambda x: m.dip_function(np.array([x]))[0] - 1 / 12, 1, 4, xtol=1e-14)
    assert root == pytest.approx(2.7195849526, abs=1e-9)
    assert 2 * root == pytest.approx(5.43917, abs=1e-5)
    assert m.HALF_WIDTH_FACTOR == pytest.approx(2 * root, abs=1e-8)


def test_half_width_voltage_check_value():
    # docs/physics.md 1.1 (derived): N = 100, T = 10 mK -> V_1/2 = 468.7114 uV.
    assert m.half_width_voltage(0.010, 100) * 1e6 == pytest.approx(468.7114, abs=1e-4)


def test_integral_and_sum_rule():
    # docs/physics.md 1.1 (derived): integral of g over [0, inf) is 1/2.
    val, _ = integrate.quad(lambda x: m.dip_function(np.array([x]))[0], 0, np.inf, limit=200)
    assert val == pytest.approx(0.5, rel=1e-10)


def test_depth_series_published_coefficients():
    # Farhangfar et al., JLTP 108, 191 (1997): depth = u/6 - u^2/60 + u^3/630; first term Pekola 1994.
    u = np.array([0.01, 0.5, 1.0, 2.0])
    np.testing.assert_allclose(m.depth_series(u), u / 6 - u**2 / 60 + u**3 / 630, rtol=1e-15)
    shape = m.higher_order_shape
    np.testing.assert_allclose(1 - shape(np.zeros(4), u), u / 6 - u**2 / 60 + u**3 / 630, rtol=1e-12)
    np.testing.assert_allclose(1 - m.first_order_shape(np.zeros(4), u), u / 6, rtol=1e-12)


def test_higher_order_width():
    # Farhangfar et al. 1997: V_1/2 = 5.439 N k_B T/e (1 + 0.3921 dG/G_T).
    x = np.linspace(0, 12, 240001)
    for u in (0.1, 0.5, 1.0):
        depth, fwhm = m.numerical_fwhm(x, m.higher_order_shape(x, u))
        d = u / 6 - u**2 / 60 + u**3 / 630
        assert depth == pytest.approx(d, rel=1e-12)
        assert fwhm == pytest.approx(m.HALF_WIDTH_FACTOR * (1 + 0.3921 * d), rel=2e-7)


@pytest.mark.parametrize(
    "alpha, fwhm_ratio, depth_ratio",
    [
        # docs/physics.md 1.4 (derived, first-order model): lock-in broadening table.
        (0.1, 1.000281647, 0.99975007),
        (0.5, 1.007037411, 0.99379617),
        (1.0, 1.028101125, 0.97572295),
        (2.0, 1.111545115, 0.91065786),
    ],
)
def test_lockin_average_broadening_table(alpha, fwhm_ratio, depth_ratio):
    N, T = 20, 0.05
    vt = N * BOLTZMANN * T / ELEMENTARY_CHARGE
    setup = m.SweepSetup(N, excitation_rms_V=alpha * vt / np.sqrt(2))
    v = np.linspace(0, 14 * vt, 140001)
    u = 1e-3
    plain = m.forward_conductance(m.first_order_shape, v, m.SweepSetup(N), T, u * T, 1.0, 0.0)
    avg = m.forward_conductance(m.first_order_shape, v, setup, T, u * T, 1.0, 0.0)
    d0, w0 = m.numerical_fwhm(v, plain)
    d1, w1 = m.numerical_fwhm(v, avg)
    assert w1 / w0 == pytest.approx(fwhm_ratio, abs=2e-8)
    assert d1 / d0 == pytest.approx(depth_ratio, abs=2e-8)


def test_lockin_quadrature_against_adaptive_integration():
    # The semicircle-weighted average (2/pi) int_0^pi G(V0 + a cos t) sin^2 t dt (docs/physics.md 1.4)
    # against scipy.integrate.quad for a range of excitations.
    shape = m.higher_order_shape
    for alpha in (0.05, 0.29, 0.9, 2.4, 4.0):
        for x0 in (0.0, 1.3, 4.0):
            t, w = m.chebyshev_u_nodes(m.lockin_nodes_for(alpha))
            approx = shape(x0 + alpha * t, 0.7) @ w
            ref, _ = integrate.quad(
                lambda th, x0=x0, alpha=alpha: shape(np.array([x0 + alpha * np.cos(th)]), 0.7)[0] * np.sin(th) ** 2,
                0, np.pi,
                epsabs=1e-14,
            )
            assert approx == pytest.approx(2 / np.pi * ref, abs=1e-9)


def test_lockin_small_amplitude_limit():
    # Lowest order: G_meas = G + (a^2/8) G'' (docs/physics.md 1.4, derived).
    x0, a = 0.7, 0.02
    h = 1e-3
    g = lambda x: m.first_order_shape(np.asarray(x), 0.3)  # noqa: E731
    g2 = (g(x0 + h) - 2 * g(x0) + g(x0 - h)) / h**2
    avg = m.lockin_average(g, np.array([x0]), a, nodes=8)[0]
    assert avg == pytest.approx(g(x0) + a**2 / 8 * g2, abs=1e-10)


def test_forward_model_vectorised_over_batch_and_points():
    bias = np.linspace(-1e-3, 1e-3, 51)
    setup = m.SweepSetup(33, 2e-6)
    T = np.array([0.02, 0.05, 0.1])
    out = m.forward_conductance(m.higher_order_shape, bias, setup, T, 0.3 * T, 3e-6, np.zeros(3), 0.0)
    assert out.shape == (3, 51)
    for i in range(3):
        single = m.forward_conductance(m.higher_order_shape, bias, setup, T[i], 0.3 * T[i], 3e-6, 0.0)
        np.testing.assert_allclose(out[i], single, rtol=1e-14)


def test_series_resistance_correction_inverts_the_circuit():
    # Circuit theory (docs/physics.md 1.4): the array sees V - I R_s, G_m = G/(1 + R_s G).
    N, T, rs = 20, 0.05, 300.0
    va = np.linspace(-3e-3, 3e-3, 4001)
    g = m.forward_conductance(m.first_order_shape, va, m.SweepSetup(N), T, 0.2 * T, 2e-5, 0.0)
    current = integrate.cumulative_trapezoid(g, va, initial=0.0)
    current -= np.interp(0.0, va, current)
    v_meas = va + current * rs
    g_meas = g / (1 + rs * g)
    v_back, g_back = m.correct_series_resistance(v_meas, g_meas, rs)
    np.testing.assert_allclose(g_back, g, rtol=1e-12)
    np.testing.assert_allclose(v_back, va, atol=1e-9)


def test_invert_depth_series_secondary_mode_values():
    # docs/physics.md 1.5 (derived from the Farhangfar 1997 series): d -> u.
    d = np.array([0.01, 0.05, 0.0793651, 0.15])
    np.testing.assert_allclose(m.invert_depth_series(d), [0.0603623, 0.3092839, 0.5, 0.9885171], atol=2e-7)
