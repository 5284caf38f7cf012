"""Model choice: the fit picks the fidelity the data need and records why."""

import numpy as np
import pytest

from analysis.cbt import tunnelling
from analysis.cbt.choice import choose_shape
from analysis.cbt.fit import FitSettings
from analysis.cbt.models import higher_order_shape
from analysis.constants import BOLTZMANN, ELEMENTARY_CHARGE
from service.calibrations.cbt import fit_file
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
    # No full-model tables with this stray capacitance: the series is kept and says so.
    stray = choose_shape(0.6, 33, 0.5)
    assert stray.shape is higher_order_shape and "no full-model table" in stray.reason
    assert choose_shape(0.6, 33, 0.1).shape is higher_order_shape  # N > 4: none with C_0 > 0
    # Short chains with C_0/C <= 0.2 have validated tables: the full model takes the ratio.
    short = choose_shape(2.0, 3, 0.15)
    assert short.shape.c0_ratio == 0.15 and "full tunnelling" in short.reason


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
