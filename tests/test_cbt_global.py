"""Global fit of several sweeps of one device with a shared charging energy."""

import numpy as np
import pytest

from analysis.cbt.fit import SweepData, fit_sweep
from analysis.cbt.global_fit import fit_global
from analysis.cbt.models import higher_order_shape
from analysis.cbt.simulate import simulate_sweep


@pytest.fixture(scope="module")
def six_sweeps():
    ec = 0.0072
    temps = [0.012, 0.02, 0.04, 0.08, 0.16, 0.3]
    datas, fits = [], []
    for k, T in enumerate(temps):
        # The global-fit machinery is checked on data of the model it fits (weak-blockade series).
        b, g, s = simulate_sweep(33, T, ec, 1.5e-5, seed=50 + k, relative_noise=3e-4, shape=higher_order_shape)
        d = SweepData(b, g, s)
        datas.append(d)
        fits.append(fit_sweep(d, seed=k))
    return ec, np.array(temps), datas, fits


@pytest.mark.slow
def test_recovers_every_temperature_and_the_shared_energy(six_sweeps):
    # Issue check: on simulated sweeps of one device at 6 temperatures every temperature is
    # recovered within its stated uncertainty, and the shared charging energy within its own.
    ec, temps, datas, fits = six_sweeps
    g = fit_global(datas, fits, higher_order_shape)
    assert np.all(np.abs(g.temperatures - temps) < 3 * g.temperature_std)
    assert np.all((g.temperature_intervals95[:, 0] < temps) | (np.abs(g.temperatures - temps) < 3 * g.temperature_std))
    assert abs(g.charging_energy - ec) < 3 * g.charging_energy_std
    # Sharing one charging energy can only add information.
    assert np.all(g.tightening >= 0.999)
    assert g.tightening.max() > 1.1
    # The shared parameter correlates the temperatures (positively: both follow dE through the width).
    corr = g.correlation
    assert np.allclose(corr, corr.T) and np.allclose(np.diag(corr), 1)
    assert np.all(np.linalg.eigvalsh(g.covariance) > 0)
    assert corr[0, -1] > 0.1


@pytest.mark.slow
def test_global_of_identical_independent_information_matches_gaussian_combination(six_sweeps):
    # For near-Gaussian posteriors the shared-dE posterior must agree with the precision-weighted
    # combination of the independent estimates (Gaussian product rule; common practice, no source).
    _, _, datas, fits = six_sweeps
    g = fit_global(datas, fits, higher_order_shape)
    w = 1 / g.independent_charging_energy_std**2
    combined = np.sum(w * g.independent_charging_energy) / w.sum()
    assert g.charging_energy == pytest.approx(combined, abs=0.3 * g.charging_energy_std)
    assert g.charging_energy_std == pytest.approx(w.sum() ** -0.5, rel=0.15)


def test_needs_two_sweeps():
    with pytest.raises(ValueError, match="two sweeps"):
        fit_global([], [], higher_order_shape)


@pytest.mark.slow
def test_least_squares_summaries_give_the_same_global_posterior(six_sweeps):
    # The global posterior is integrated numerically; the independent results only centre the grids,
    # so Laplace (least-squares) summaries and MCMC summaries must give the same answer.
    from analysis.cbt.fit import initial_guess, least_squares_fit
    from analysis.cbt.global_fit import SweepSummary

    _, _, datas, fits = six_sweeps
    a = fit_global(datas, fits, higher_order_shape)
    summaries = []
    for d in datas:
        ls = least_squares_fit(higher_order_shape, d, initial_guess(d))
        summaries.append(SweepSummary.from_least_squares(ls["theta"], ls["covariance"]))
    b = fit_global(datas, summaries, higher_order_shape)
    assert np.all(np.abs(b.temperatures - a.temperatures) < 0.02 * a.temperature_std)
    assert b.charging_energy == pytest.approx(a.charging_energy, abs=0.02 * a.charging_energy_std)
