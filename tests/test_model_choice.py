"""Model choice: the fit picks the fidelity the data need and records why."""

import numpy as np
import pytest

from analysis.cbt import tunnelling
from analysis.cbt.choice import (
    STRAY_FALLBACK_ERROR_PER_U,
    StrayCapacitanceFallback,
    StrayCapacitanceRangeError,
    choose_shape,
)
from analysis.cbt.fit import FitSettings
from analysis.cbt.full_model import FullTunnellingShape, first_order_depth_factor
from analysis.cbt.models import higher_order_shape
from analysis.constants import BOLTZMANN, ELEMENTARY_CHARGE
from service.calibrations.cbt import fit_file
from service.calibrations.outcome import CertificationRefused
from service.intake import parse_csv


def exact_sweep_file(n, T, u, points=161, noise=1e-4, seed=3, c0_ratio=0.0):
    # Data from the exact orthodox master equation (docs/physics.md 1.3), an independent solver.
    x = np.linspace(-30, 30, points)
    g = tunnelling.conductance(x, u, tunnelling.ArrayDescription(n, c0_ratio=c0_ratio))
    gt = 2e-6
    rng = np.random.default_rng(seed)
    bias = x * n * BOLTZMANN * T / ELEMENTARY_CHARGE
    cond = gt * g + noise * gt * rng.standard_normal(points)
    stray = f"# ground_capacitance_ratio: {c0_ratio!r}\n" if c0_ratio else ""
    text = f"# junctions_in_series: {n}\n{stray}bias_V,conductance_S\n" + "".join(
        f"{float(v)!r},{float(c)!r}\n" for v, c in zip(bias, cond, strict=True))
    return parse_csv("exact.csv", text.encode())


def test_choice_rule():
    tiny = choose_shape(0.001, 33)
    assert tiny.shape is higher_order_shape and "weak-blockade" in tiny.reason
    big = choose_shape(0.05, 33)
    assert big.shape is not higher_order_shape and "full tunnelling" in big.reason
    # Short chains with C_0/C <= 0.2 have validated tables: the full model takes the ratio.
    short = choose_shape(2.0, 3, 0.15)
    assert short.shape.c0_ratio == 0.15 and "full tunnelling" in short.reason
    # A stated C_0 never goes to the series, which has none, however small u is.
    assert choose_shape(0.001, 3, 0.05).shape.c0_ratio == 0.05


def test_stray_capacitance_domain_edges():
    # N = 4 is the longest chain with exact stray tables, N = 5 the first without: there the
    # C_0 = 0 full model stands in, u scaled by the first-order depth factor, with a budget row.
    inside = choose_shape(1.0, 4, 0.1)
    assert isinstance(inside.shape, FullTunnellingShape) and inside.shape.c0_ratio == 0.1
    assert getattr(inside.shape, "stray_capacitance_error", None) is None
    outside = choose_shape(1.0, 5, 0.1)
    assert isinstance(outside.shape, StrayCapacitanceFallback)
    assert "no stray-capacitance table for N = 5" in outside.reason
    assert outside.shape.depth_factor == pytest.approx(first_order_depth_factor(5, 0.1))
    assert outside.shape.stray_capacitance_error(1.0) == pytest.approx(0.5 * STRAY_FALLBACK_ERROR_PER_U)
    # Its effective u stops where the C_0 = 0 long-array model and the measurement stop.
    assert outside.shape.max_u * outside.shape.depth_factor == pytest.approx(2.0)
    # C_0/C = 0.2 is the last validated ratio; 0.25 is refused, naming the ratio and the range.
    assert choose_shape(1.0, 33, 0.2).shape.c0_ratio == 0.2
    assert choose_shape(1.0, 4, 0.2).shape.c0_ratio == 0.2
    for n in (4, 33):
        with pytest.raises(StrayCapacitanceRangeError, match=r"ground_capacitance_ratio = 0\.25 .*C_0/C <= 0\.2"):
            choose_shape(1.0, n, 0.25)
    # No stated C_0 (the default 0) is never refused.
    assert choose_shape(1.0, 33, 0.0).shape.c0_ratio == 0.0


def test_fallback_is_the_rescaled_zero_c0_model():
    # G/G_T(x, u) = G_0/G_T(x, r u): the rescaling only; the budget row carries the rest.
    fallback = choose_shape(1.0, 10, 0.2).shape
    x = np.linspace(0.0, 20.0, 41)
    r = first_order_depth_factor(10, 0.2)
    np.testing.assert_allclose(fallback(x, 1.5), FullTunnellingShape(10)(x, r * 1.5), rtol=0, atol=1e-15)


def test_over_range_stray_capacitance_refuses_the_sweep_by_file():
    # The file states C_0/C = 0.25 (simulated by the exact master equation, docs/physics.md 1.3):
    # certification is refused with a message naming the file, the ratio and the validated range.
    f = exact_sweep_file(3, 0.02, 1.0, points=41, c0_ratio=0.25)
    quick = FitSettings(walkers=12, max_steps=2000, min_tau_multiple=20, tau_tolerance=0.1)
    with pytest.raises(CertificationRefused, match=r"exact\.csv: ground_capacitance_ratio = 0\.25.*C_0/C <= 0\.2"):
        fit_file(f, 1, quick)


@pytest.mark.slow
def test_cold_sweep_switches_to_the_full_model_and_recovers_T():
    T, u = 0.02, 1.5
    f = exact_sweep_file(3, T, u)
    quick = FitSettings(walkers=12, max_steps=6000, min_tau_multiple=30, tau_tolerance=0.1)
    work = fit_file(f, 1, quick)
    assert work.shape is not higher_order_shape
    assert "full tunnelling" in work.model_reason
    assert abs(work.fit.temperature - T) < 3 * work.fit.temperature_std
    assert work.fit.u == pytest.approx(u, rel=0.02)


@pytest.mark.slow
def test_stray_capacitance_from_the_sweep_metadata_reaches_the_full_model():
    # An exact N = 3 sweep with C_0/C = 0.2 (master equation, docs/physics.md 1.3) whose file
    # states ground_capacitance_ratio: the certification path fits the full model with that C_0,
    # recovers T and the nominal u = ΔE/k_BT, ΔE = ((N − 1)/N) e²/C. The C_0 = 0 model on the
    # same data fits an effective u, lower by about the first-order depth factor r (0.86 here;
    # docs/physics.md 1.4: fit an effective ΔE), so u tells whether the ratio reached the model.
    from analysis.cbt.fit import fit_sweep  # noqa: PLC0415
    from analysis.cbt.full_model import FullTunnellingShape, first_order_depth_factor  # noqa: PLC0415

    T, u = 0.02, 3.0
    f = exact_sweep_file(3, T, u, c0_ratio=0.2, noise=2e-5)
    quick = FitSettings(walkers=12, max_steps=6000, min_tau_multiple=30, tau_tolerance=0.1)
    work = fit_file(f, 1, quick)
    assert work.shape.c0_ratio == 0.2 and "C_0/C = 0.2" in work.shape.name
    assert abs(work.fit.temperature - T) < 3 * work.fit.temperature_std
    assert work.fit.temperature_std < 2e-3 * T
    assert work.fit.u == pytest.approx(u, rel=2e-3)
    effective = fit_sweep(work.data, seed=1, shape=FullTunnellingShape(3), settings=quick)
    r = first_order_depth_factor(3, 0.2)
    assert r < 0.9 and effective.u == pytest.approx(r * u, rel=0.03)


@pytest.mark.parametrize("u", [0.2, 0.5])
def test_first_order_formula_bias_on_exact_data(u):
    # Exact N = 2 data from the master equation (docs/physics.md 1.3). docs/physics.md 1.2 quotes +1.8 % and
    # +4.5 % for this bias but not the swept range it was derived over, and the bias grows with the
    # range, so those figures cannot serve as a reference at their quoted digits. Two independent
    # checks instead: the first-order fit must read T high by more than the width correction
    # 0.3921 ΔG/G_T that it lacks (Farhangfar et al., J. Low Temp. Phys. 108, 191 (1997)), and the
    # bound the budget states for it (FirstOrderShape.relative_width_error, measured on N = 3 and
    # N = 33 against the full model) must cover the bias on this N = 2 exact sweep.
    from analysis.cbt.fit import SweepData, initial_guess, least_squares_fit
    from analysis.cbt.models import SweepSetup, depth_series, first_order_shape

    n, T = 2, 0.02
    x = np.linspace(-28, 28, 281)
    g = tunnelling.conductance(x, u, tunnelling.ArrayDescription(n))
    data = SweepData(x * n * BOLTZMANN * T / ELEMENTARY_CHARGE, 2e-6 * g, SweepSetup(n))
    t_fit = least_squares_fit(first_order_shape, data, initial_guess(data))["theta"][0]
    bias = t_fit / T - 1
    assert bias > 0.3921 * float(depth_series(u))
    assert bias < first_order_shape.relative_width_error(u)


def exact_stray_table_sweep(n, u, c0_ratio, T=0.02, noise=0.0, seed=11):
    # Exact orthodox master-equation values (docs/physics.md 1.3; Melsen et al., PRB 55, 10638
    # (1997) for arrays) at the solved nodes of the stray-capacitance tables, mirrored to x < 0:
    # the solver's own output, not the spline the fit models are built from.
    from analysis.cbt.fit import SweepData  # noqa: PLC0415
    from analysis.cbt.full_model import _load_stray_tables  # noqa: PLC0415
    from analysis.cbt.models import SweepSetup  # noqa: PLC0415

    tables = _load_stray_tables()
    k = [round(float(c), 3) for c in tables["c0_ratios"]].index(c0_ratio)
    j = [round(float(v), 3) for v in tables["u_nodes"]].index(u)
    g = tables[f"conductance_{n}"][k][:, j]
    solved = np.isfinite(g)
    x = tables["x_nodes"][solved]
    x, g = np.concatenate((-x[:0:-1], x)), np.concatenate((g[solved][:0:-1], g[solved]))
    g = g + noise * np.random.default_rng(seed).standard_normal(g.size)
    return SweepData(x * n * BOLTZMANN * T / ELEMENTARY_CHARGE, 2e-6 * g, SweepSetup(n))


@pytest.mark.parametrize("u", [1.0, 2.0])
def test_stray_row_bounds_the_fallback_error_on_exact_data(u):
    # The stand-in for N > 4 (the C_0 = 0 model, u rescaled by r_N) built at N = 4, the longest
    # chain with exact C_0/C = 0.2 solutions: its T error must lie inside the budget row's bound,
    # be well above the C_0 = 0 model's own error (so the row is needed), and not be padded away
    # (within a factor 8 of the bound, which allows about 2.8x growth from N = 4 to long chains;
    # docs/models.md).
    from analysis.cbt.fit import initial_guess, least_squares_fit  # noqa: PLC0415

    T = 0.02
    fallback = StrayCapacitanceFallback(FullTunnellingShape(4), 4, 0.2)
    data = exact_stray_table_sweep(4, u, 0.2, T)
    theta = least_squares_fit(fallback, data, initial_guess(data))["theta"]
    error = theta[0] / T - 1.0
    bound = fallback.stray_capacitance_error(theta[1])
    assert theta[1] == pytest.approx(u, rel=0.01)  # nominal u, through the rescaling
    assert error < 0 and abs(error) <= bound
    assert abs(error) > 5 * fallback.relative_width_error(theta[1])
    assert abs(error) > bound / 8


@pytest.mark.slow
def test_certified_interval_covers_T_on_an_exact_stray_sweep():
    # End to end at the fallback: posterior, budget with the stray row, U covering the true T of
    # exact master-equation data (source as above), instruments stated tight so that the fit and
    # model rows, not the defaults, make U.
    from analysis.cbt.fit import fit_sweep  # noqa: PLC0415
    from analysis.cbt.uncertainty import TypeBInputs, temperature_budget  # noqa: PLC0415

    T = 0.02
    fallback = StrayCapacitanceFallback(FullTunnellingShape(4), 4, 0.2)
    data = exact_stray_table_sweep(4, 2.0, 0.2, T, noise=2e-5, seed=11)
    quick = FitSettings(walkers=12, max_steps=6000, min_tau_multiple=30, tau_tolerance=0.1)
    fit = fit_sweep(data, seed=3, shape=fallback, settings=quick)
    tight = TypeBInputs(bias_scale_relative_u=1e-6, bias_scale_stated=True, resistance_spread=0.0,
                        resistance_spread_stated=True, excitation_amplitude_stated=True,
                        series_resistance_stated=True)
    budget, _ = temperature_budget(fit, fallback, data.setup, tight, data=data)
    rows = {r.quantity: r for r in budget.rows}
    stray = rows["stray capacitance beyond the model"]
    assert "C_0/C = 0.2" in stray.note and stray.standard_uncertainty > 0
    assert abs(budget.estimate - T) <= budget.expanded_uncertainty


def test_long_chain_stating_c0_gets_the_row_in_its_certificate_entry():
    # Plumbing through the certification path (no science reference here: the dip is the
    # tabulated exact N = 5 chain, docs/physics.md 1.3, which has no C_0): a file stating
    # C_0/C = 0.1 on N = 5 is fitted with the rescaled stand-in, and its result entry names the
    # model and carries the stray-capacitance row with its measured note.
    from analysis.cbt.uncertainty import TypeBInputs  # noqa: PLC0415
    from service.calibrations.cbt import sweep_result  # noqa: PLC0415

    n, T, u = 5, 0.02, 1.0
    x = np.linspace(-30, 30, 121)
    g = FullTunnellingShape(n)(x, u) + 1e-4 * np.random.default_rng(2).standard_normal(x.size)
    bias = x * n * BOLTZMANN * T / ELEMENTARY_CHARGE
    text = f"# junctions_in_series: {n}\n# ground_capacitance_ratio: 0.1\nbias_V,conductance_S\n" + "".join(
        f"{float(b)!r},{float(2e-6 * c)!r}\n" for b, c in zip(bias, g, strict=True))
    quick = FitSettings(walkers=12, block=100, max_steps=4000, min_tau_multiple=20.0, tau_tolerance=0.1)
    work = fit_file(parse_csv("long.csv", text.encode()), 1, quick)
    entry, _ = sweep_result(work, TypeBInputs())
    assert "u scaled by r = " in entry["model"] and "C_0/C = 0.1" in entry["model"]
    assert "no stray-capacitance table for N = 5" in entry["diagnostics"]["model_choice"]
    rows = {r["quantity"]: r for r in entry["budget"]["rows"]}
    stray = rows["stray capacitance beyond the model"]
    bound = STRAY_FALLBACK_ERROR_PER_U * 0.5 * entry["fit"]["u"]
    assert stray["standard_uncertainty"] == pytest.approx(bound * entry["fit"]["posterior_mean_temperature_K"] / np.sqrt(3), rel=1e-6)
