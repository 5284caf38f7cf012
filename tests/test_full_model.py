"""Checks of the fast long-array full-tunnelling shape (analysis.cbt.full_model) against the exact
master equation, the published weak-blockade series and the orthodox Monte Carlo."""

from importlib import resources

import numpy as np
import pytest
from scipy.integrate import quad

from analysis.cbt.full_model import (
    MAX_C0_RATIO,
    MAX_U,
    FullModelRangeError,
    FullTunnellingShape,
    extrapolation_weights,
    first_order_depth_factor,
)
from analysis.cbt.models import chebyshev_u_nodes, lockin_nodes_for, lockin_quadrature_error
from analysis.cbt.orthodox_mc import simulate_current
from analysis.cbt.tunnelling import ArrayDescription, solve_master_equation


def _table(name):
    ref = resources.files("analysis.cbt.tables").joinpath(name)
    with resources.as_file(ref) as path, np.load(path) as data:
        return {key: np.array(data[key]) for key in data.files}


@pytest.fixture(scope="module")
def validation():
    return _table("validation.npz")


def test_is_a_broadcasting_dip_shape():
    shape = FullTunnellingShape(20)
    x = np.linspace(-30, 30, 301)
    u = np.array([[0.0], [0.4], [1.7]])
    g = shape(x, u)
    assert g.shape == (3, 301)
    assert np.array_equal(g[0], np.ones(301))  # u = 0: no charging, G = G_T
    assert np.allclose(g, g[:, ::-1], atol=0)  # even in bias
    assert np.all(np.abs(g[:, [0, -1]] - 1) < 1e-6)  # G -> G_T far from the dip
    assert shape(0.0, 1.0).shape == ()
    # The exponential continuation beyond the table end (x = 40) joins the table smoothly.
    far = FullTunnellingShape(6)(np.array([39.99, 40.0, 40.01, 80.0]), 5.0)
    assert np.all(np.abs(far - 1) < 1e-4)  # u = 5: the tail at x = 40 is ~1e-5
    assert abs(far[0] - far[2]) < 1e-7 and far[-1] > far[2]  # tail slope ~3e-6 per unit x


# Derived by an independent exact master-equation solution (docs/physics.md §1.3): depths for
# N = 2, 3, 4 at u = 0.5–3 (the N <= 4 model is the exact table, interpolated).
@pytest.mark.parametrize(
    ("n", "u", "depth"),
    [(2, 0.5, 0.07935369), (2, 3.0, 0.39069861), (3, 0.5, 0.07935524), (3, 2.0, 0.27726067),
     (4, 1.0, 0.15144608), (4, 2.0, 0.27732639), (4, 3.0, 0.38477041)],
)
def test_short_arrays_reproduce_exact_table(n, u, depth):
    # derived by an independent exact master-equation solution (docs/physics.md §1.3)
    assert 1 - FullTunnellingShape(n)(0.0, u) == pytest.approx(depth, abs=6e-9)


# Depths of longer chains, derived, independent energy-bounded solver (docs/physics.md §1.3; its
# N = 6, u = 3 entry carries ±4e-7 from that solver's window; see tests/test_tunnelling.py for
# N = 6, u = 2, where our converged solve is 3.5e-6 lower than the quoted value).
@pytest.mark.parametrize(("n", "u", "depth", "tolerance"), [
    (5, 2.0, 0.2773707, 1e-7), (5, 3.0, 0.3847246, 4e-7), (6, 3.0, 0.3847834, 4e-7),
    (6, 2.0, 0.2774036, 4e-6),
])
def test_five_and_six_junction_tables_reproduce_independent_depths(n, u, depth, tolerance):
    # derived, independent energy-bounded solver (docs/physics.md §1.3)
    assert 1 - FullTunnellingShape(n)(0.0, u) == pytest.approx(depth, abs=tolerance)


@pytest.mark.parametrize("name", ["bound_points.npz", "held_out.npz"])
def test_exact_five_and_six_junction_points_within_model_error(name):
    # Exact off-grid solutions of the master equation (docs/physics.md §1.3) from make_tables.py:
    # "bound" points set MEASURED_ERROR["exact_long"]; "held_out" points are used by nothing but
    # this test, so it checks the stated error out of sample.
    data = _table(name)
    assert len(data["n"]) >= 10
    for n, u, x, g, edge in zip(data["n"], data["u"], data["x"], data["conductance"],
                                data["edge_probability"], strict=True):
        shape = FullTunnellingShape(int(n))
        assert abs(float(shape(x, u)) - g) <= shape.model_error(u), (n, u, x)
        assert edge < 1e-2  # the solve's own window indicator


def test_long_array_law_against_exact_seven_and_eight_junctions():
    # Exact N = 7, 8 solutions of the master equation (docs/physics.md §1.3; make_tables.py
    # --long-check), independent of every table: inside the long-array range the continuation
    # of the N = 5, 6 tables must meet them within the stated model error; beyond it (u >= 3)
    # they show why it is refused there: the law misses by far more than that error.
    data = _table("long_array_check.npz")
    inside = 0
    for n, u, x, g in zip(data["exact_n"], data["exact_u"], data["exact_x"],
                          data["exact_conductance"], strict=True):
        shape = FullTunnellingShape(int(n))
        if u <= shape.max_u:
            inside += 1
            assert abs(float(shape(x, u)) - g) <= shape.model_error(u), (n, u, x)
        elif u >= 3.0 and x == 0.0:
            continued = 1.0 - u * float(shape._reference_reduced(0.0, u))  # beyond max_u
            assert abs(continued - g) > 4e-5, (n, u)
    assert inside >= 4


def test_long_arrays_against_stored_monte_carlo():
    # Orthodox kinetic Monte Carlo (Gillespie, J. Phys. Chem. 81, 2340 (1977)) of N = 10–30
    # chains (make_tables.py --long-check): the current J(x) = ∫0^x G/G_T dx' of the model must lie
    # within 3 standard errors plus the model's own bound integrated over the bias.
    data = _table("long_array_check.npz")
    checked = 0
    for n, u, x, j, se in zip(data["mc_n"], data["mc_u"], data["mc_x"], data["mc_current"],
                              data["mc_standard_error"], strict=True):
        shape = FullTunnellingShape(int(n))
        if u > shape.max_u:
            continue
        checked += 1
        model = quad(lambda t, s=shape, uu=u: float(s(t, uu)), 0.0, x, epsabs=1e-12)[0]
        assert abs(j - model) < 3 * se + shape.model_error(u) * x, (n, u, x)
        assert se < 3e-4  # the check has teeth: 1e-4-level resolution
    assert checked == 3


def test_interpolation_error_against_exact_solver():
    # Off-grid points in x and u: the interpolation error of the exact tables must stay inside
    # the stated interpolation part of the model error (measured 1e-9 for N = 2, 3).
    rng = np.random.default_rng(5)
    for n in (2, 3, 4):
        shape = FullTunnellingShape(n)
        xs = rng.uniform(0.0, 11.0, 4)
        us = rng.uniform(0.6, 5.0, 4)
        for x, u in zip(xs, us, strict=True):
            exact = solve_master_equation(ArrayDescription(n), float(x), float(u)).conductance
            assert abs(shape(x, u) - exact) <= shape.model_error(u)
            if n < 4:
                assert abs(shape(x, u) - exact) < 1e-8


@pytest.mark.parametrize(("x", "u"), [(0.0, 2.0), (0.0, 3.0), (2.8, 2.0), (1.5, 2.5)])
def test_extrapolation_to_five_junctions(x, u):
    # N = 5 is not in the tables: the 1/N² continuation is tested out of sample against the exact
    # master equation (docs/physics.md §1.3), within the model's stated error.
    shape = FullTunnellingShape(5)
    exact = solve_master_equation(ArrayDescription(5), x, u, sigmas=6.5).conductance
    assert abs(shape(x, u) - exact) <= shape.model_error(u)


def test_stated_error_covers_fresh_exact_points():
    # The stated bound was made from the residuals at the stored validation points (validation.npz),
    # so checking it there cannot fail. Here it meets exact master-equation solutions (docs/physics.md
    # 1.3) at random points used by neither the tables nor the bound: N = 5 (out of the tables'
    # sample) at u in [2, 3], where the continuation in 1/N² carries the largest error, and N = 4.
    rng = np.random.default_rng(20261202)
    points = [(5, rng.uniform(2.0, 3.0), rng.uniform(0.0, 3.0)) for _ in range(3)]
    points += [(4, rng.uniform(0.8, 3.0), rng.uniform(0.0, 6.0)) for _ in range(3)]
    for n, u, x in points:
        exact = solve_master_equation(ArrayDescription(n), float(x), float(u)).conductance
        shape = FullTunnellingShape(n)
        assert abs(shape(x, u) - exact) <= shape.model_error(u), (n, u, x)


def test_validation_file_is_consistent_with_the_model(validation):
    # A regression guard only (the bound was built from these very points): the stored exact
    # values still agree with the model within its stated error.
    for n, u, x, g in zip(validation["n"], validation["u"], validation["x"],
                          validation["conductance"], strict=True):
        shape = FullTunnellingShape(int(n))
        assert abs(shape(x, u) - g) <= shape.model_error(u), (n, u, x)


@pytest.mark.parametrize("u", [0.1, 0.3])
def test_small_u_depth_series_long_array(u):
    # Farhangfar et al., J. Low Temp. Phys. 108, 191 (1997): ΔG/G_T = u/6 − u²/60 + u³/630 for
    # any N, with its own error ~1.5e-4 u^4 (docs/physics.md §1.2, derived).
    series = u / 6 - u**2 / 60 + u**3 / 630
    for n in (10, 100):
        shape = FullTunnellingShape(n)
        assert abs(1 - shape(0.0, u) - series) < 2e-4 * u**4 + shape.model_error(u)


def test_long_array_against_monte_carlo():
    # Orthodox kinetic Monte Carlo of a 20-junction chain (analysis.cbt.orthodox_mc) against the
    # current implied by the model, J(x) = ∫0^x G/G_T dx'; the Monte Carlo resolves ~1e-4, enough
    # to reject the uncorrected N = 2 table here (checked below), so the test has teeth.
    n, u, x = 20, 2.0, 3.0
    mc = simulate_current(ArrayDescription(n), x, u, seed=424242, n_replicas=400,
                          events_per_replica=2500, burn_in_events=500)
    model = FullTunnellingShape(n)
    current = quad(lambda t: float(model(t, u)), 0.0, x, epsabs=1e-12)[0]
    allowed = 4 * mc.standard_error + model.model_error(u) * x
    assert abs(mc.current - current) < allowed
    short = quad(lambda t: float(FullTunnellingShape(2)(t, u)), 0.0, x, epsabs=1e-12)[0]
    assert abs(mc.current - short) > allowed


def test_model_error_is_stated_and_grows_with_extrapolation():
    e4 = FullTunnellingShape(4).model_error(2.0)
    e10 = FullTunnellingShape(10).model_error(2.0)
    e100 = FullTunnellingShape(100).model_error(2.0)
    assert 0 < e4 < e10 < e100 < 1e-3
    assert FullTunnellingShape(30).model_error(0.5) < 1.5e-5
    width = FullTunnellingShape(30).relative_width_error(1.0)
    assert 0 < width < 1e-3
    assert sum(extrapolation_weights(50)) == pytest.approx(1.0)


def test_refuses_outside_validated_range():
    shape = FullTunnellingShape(30)
    with pytest.raises(FullModelRangeError, match="validated range"):
        shape(np.zeros(3), np.array([[1.0], [MAX_U + 0.1]]))
    with pytest.raises(FullModelRangeError, match="validated range"):
        shape(0.0, -0.1)
    with pytest.raises(FullModelRangeError, match="validated range"):
        shape(0.0, np.nan)
    assert MAX_U == FullTunnellingShape(6).max_u == 5.0  # exact tables up to N = 6
    assert shape.max_u == 2.0  # longer chains: the validated continuation (docs/models.md)
    with pytest.raises(FullModelRangeError, match="validated range"):
        shape(0.0, 2.1)
    # Stray capacitance: tables for N = 2-4 up to C_0/C = 0.2 only; elsewhere refused.
    for n, c0 in ((30, 0.1), (5, 0.05), (3, MAX_C0_RATIO + 0.01), (3, -0.1), (3, float("nan"))):
        with pytest.raises(FullModelRangeError, match="stray-capacitance tables"):
            FullTunnellingShape(n, c0_ratio=c0)
    with pytest.raises(ValueError, match="n_junctions"):
        FullTunnellingShape(1)


def test_tables_are_small():
    for name in ("short_arrays.npz", "validation.npz", "long_arrays.npz", "bound_points.npz",
                 "held_out.npz", "long_array_check.npz", "stray_capacitance.npz",
                 "stray_bound_points.npz", "stray_held_out.npz"):
        ref = resources.files("analysis.cbt.tables").joinpath(name)
        with resources.as_file(ref) as path:
            assert path.stat().st_size < 1_000_000


# ---------------------------------------------------------------------------------------------
# Stray capacitance C_0 > 0 (tables for N = 2, 3, 4 up to C_0/C = 0.2)


def test_stray_capacitance_held_out_points_within_model_error():
    # Exact master-equation solutions with C_0 > 0 (docs/physics.md §1.3, derived) at points off
    # the tables in x, u and C_0/C, solved with a window one σ wider than the tables'
    # (make_tables.py --stray-held-out); nothing is built from them, so this checks the stated
    # model error out of sample, including the interpolation in C_0 between the tables.
    data = _table("stray_held_out.npz")
    assert len(data["n"]) >= 50
    assert {0.025, 0.075, 0.175} <= {round(float(c), 3) for c in data["c0_ratio"]}
    assert float(data["window_sigmas"]) > float(_table("stray_capacitance.npz")["window_sigmas"])
    worst = 0.0
    for n, c0, u, x, g in zip(data["n"], data["c0_ratio"], data["u"], data["x"],
                              data["conductance"], strict=True):
        shape = FullTunnellingShape(int(n), float(c0))
        residual = abs(float(shape(x, u)) - g)
        assert residual <= shape.model_error(u), (n, c0, u, x, residual)
        worst = max(worst, residual)
    # The check has teeth: ignoring C_0 (the C_0 = 0 model) misses these points by far more.
    assert worst < 1e-4
    n, c0, u, x, g = 4, 0.175, 3.0, 0.0, None
    for row in zip(data["n"], data["c0_ratio"], data["u"], data["x"], data["conductance"],
                   strict=True):
        if (int(row[0]), round(float(row[1]), 3), float(row[2]), float(row[3])) == (n, c0, u, x):
            g = row[4]
    assert g is not None
    assert abs(float(FullTunnellingShape(n)(x, u)) - g) > 100 * FullTunnellingShape(n, c0).model_error(u)


def test_stray_capacitance_bound_points_within_model_error():
    # Regression guard only: these exact off-grid points set MEASURED_ERROR["stray_capacitance"].
    data = _table("stray_bound_points.npz")
    for n, c0, u, x, g in zip(data["n"], data["c0_ratio"], data["u"], data["x"],
                              data["conductance"], strict=True):
        shape = FullTunnellingShape(int(n), float(c0))
        assert abs(float(shape(x, u)) - g) <= shape.model_error(u), (n, c0, u, x)


@pytest.mark.parametrize("c0", [0.07, 0.2])
def test_two_junction_stray_capacitance_is_a_rescaled_charging_energy(c0):
    # One island: C_0 only adds to its total capacitance 2C + C_0, and the symmetric bias leaves
    # the island's potential unchanged, so ΔF of docs/physics.md §1.3 is that of a C_0 = 0 chain
    # with e²/C scaled by r = 2C/(2C + C_0): G(x, u; C_0) = G(x, r u; 0) exactly (derived).
    r = 2.0 / (2.0 + c0)
    assert first_order_depth_factor(2, c0) == pytest.approx(r, rel=1e-14)
    shape = FullTunnellingShape(2, c0)
    for x, u in ((0.0, 4.6), (2.3, 1.3), (6.1, 3.3)):
        exact = solve_master_equation(ArrayDescription(2, c0_ratio=c0), x, u).conductance
        rescaled = solve_master_equation(ArrayDescription(2), x, r * u).conductance
        assert exact == pytest.approx(rescaled, abs=1e-12)
        assert abs(float(shape(x, u)) - exact) <= shape.model_error(u)


def test_stray_capacitance_depth_check_value():
    # docs/physics.md §1.4 (derived): N = 3, e²/(C k_B T) = 0.125, C_0 = C gives depth 0.0086362.
    # The first-order depth factor is the junction mean of (K_aa + K_bb − 2K_ab)/2: for N = 3,
    # C_0 = C, K = (1/8)[[3, 1], [1, 3]] gives (3 + 4 + 3)/48 over 1/3, r = 0.625 (derived).
    # The depth of the C_0 = 0 chain at r u must then be the check value up to the O(u²) shape
    # difference that the stray tables carry (here 1e-6 of a 0.0086 depth).
    assert first_order_depth_factor(3, 1.0) == pytest.approx(0.625, rel=1e-14)
    u = 0.125 * 2.0 / 3.0
    rescaled_depth = 1.0 - float(FullTunnellingShape(3)(0.0, 0.625 * u))
    assert rescaled_depth == pytest.approx(0.0086362, abs=1.5e-6)


def test_stray_capacitance_small_u_against_exact_solver():
    # Below the first tabulated u (0.25) the difference from the rescaled C_0 = 0 dip is
    # interpolated towards 0 at u = 0: checked against the exact master equation
    # (docs/physics.md §1.3) there, where solves of N = 3 are cheap.
    for c0 in (0.12, 0.2):
        shape = FullTunnellingShape(3, c0)
        for x, u in ((0.0, 0.1), (3.0, 0.15), (1.0, 0.05)):
            exact = solve_master_equation(ArrayDescription(3, c0_ratio=c0), x, u).conductance
            assert abs(float(shape(x, u)) - exact) <= shape.model_error(u), (c0, x, u)


def test_stray_capacitance_shape_is_a_dip_shape():
    shape = FullTunnellingShape(4, 0.15)
    assert "C_0/C = 0.15" in shape.name and shape.max_u == MAX_U
    x = np.linspace(-40, 40, 161)
    g = shape(x, np.array([[0.0], [2.5]]))
    assert np.array_equal(g[0], np.ones(161)) and np.allclose(g, g[:, ::-1], atol=0)
    assert shape.model_error(4.9) < 1e-4 and 0 < shape.relative_width_error(3.0) < 1e-4
    # C_0 screens the charging energy: a shallower dip than without it, at the same u.
    assert shape(0.0, 2.5) > FullTunnellingShape(4)(0.0, 2.5)


def _semicircle_average(shape, x0, alpha, u):
    """(2/π) ∫₀^π S(x0 + α cos θ) sin²θ dθ by scipy.integrate.quad, split where the argument
    crosses x = 0: the lock-in's first-harmonic reading (docs/physics.md 1.4)."""
    crossing = [float(np.arccos(-x0 / alpha))] if abs(x0) < alpha else None
    value = quad(lambda th: float(shape(np.array([x0 + alpha * np.cos(th)]), u)[0]) * np.sin(th) ** 2,
                 0.0, np.pi, points=crossing, epsabs=1e-14, epsrel=1e-13, limit=400)[0]
    return 2.0 / np.pi * value


@pytest.mark.parametrize("n", [2, 3, 4, 6, 33])
def test_dip_has_no_slope_at_zero_bias(n):
    # G(V) = G(−V) for a uniform chain (common practice, no source: the orthodox rates are
    # symmetric under reversing the bias), so ∂G/∂x = 0 at x = 0. Before the splines were
    # mirrored the one-sided slope was 1e-5 (N = 2) to 1.1e-3 (N = 6, u = 5): a kink.
    shape = FullTunnellingShape(n)
    u = np.linspace(0.25, shape.max_u, 12)
    h = 1e-3  # one-sided second-order difference; its own error here is < 1e-10
    slope = (4 * shape(np.full(u.size, h), u) - shape(np.full(u.size, 2 * h), u)
             - 3 * shape(np.zeros(u.size), u)) / (2 * h)
    assert np.max(np.abs(slope)) < 1e-8


@pytest.mark.parametrize("n", [2, 3, 4])
def test_small_excitation_lockin_average_of_the_full_model_against_quad(n):
    # At α = 0.1 (3 nodes) the few-node average of the full model meets an adaptive quad of the
    # same function to 1e-9 of G_T (before the x = 0 kink was removed: 7e-8 at N = 3, u = 3).
    shape = FullTunnellingShape(n)
    t, w = chebyshev_u_nodes(lockin_nodes_for(0.1))
    for u in (1.0, 3.0):
        for x0 in (0.0, 0.04, 0.3, 2.0):
            fast = shape(x0 + 0.1 * t, u) @ w
            assert fast == pytest.approx(_semicircle_average(shape, x0, 0.1, u), abs=1e-9), (u, x0)


@pytest.mark.parametrize(("n", "u", "alpha"), [(6, 5.0, 0.29), (6, 5.0, 2.4), (4, 4.5, 0.9),
                                               (33, 2.0, 1.5)])
def test_measured_lockin_quadrature_error_bounds_the_true_one(n, u, alpha):
    # The few-node average is not 1e-9-accurate everywhere (the table spline is only C⁴, and
    # sharp at large u); the error lockin_quadrature_error measures, and the budget carries,
    # must bound the difference from scipy's adaptive quad of the same average.
    shape = FullTunnellingShape(n)
    stated = lockin_quadrature_error(shape, alpha, u)
    t, w = chebyshev_u_nodes(lockin_nodes_for(alpha))
    worst = 0.0
    for x0 in (0.0, 0.013, 0.5 * alpha, alpha, 1.7, 4.0):
        fast = shape(x0 + alpha * t, u) @ w
        worst = max(worst, abs(fast - _semicircle_average(shape, x0, alpha, u)))
    assert worst <= stated * (1 + 1e-6) + 1e-13
    assert stated <= 2 * worst + 1e-10  # and it is a measurement, not a padded guess
