"""Measurement planning against the published line-shape facts and a simulated measurement."""

import math

import pytest

from analysis.cbt.fit import SweepData, fit_sweep
from analysis.cbt.planning import Device, excitation_width_ratio, plan_sweep
from analysis.cbt.simulate import simulate_sweep
from analysis.constants import BOLTZMANN, ELEMENTARY_CHARGE


def test_excitation_width_ratio_table():
    # docs/physics.md 1.4 (derived, first-order model): FWHM ratio 1.028101125 at alpha = 1, 1.007037411 at 0.5.
    assert excitation_width_ratio(1.0) == pytest.approx(1.028101125, abs=2e-6)
    assert excitation_width_ratio(0.5) == pytest.approx(1.007037411, abs=2e-6)


def test_charging_energy_of_a_uniform_chain():
    # Pekola et al. 1994: dE = ((N - 1)/N) e^2/C for C_0 = 0.
    d = Device(33, 10, 20e3, 0.25e-12)
    assert d.charging_energy_K == pytest.approx(32 / 33 * ELEMENTARY_CHARGE**2 / (0.25e-12 * BOLTZMANN), rel=1e-12)
    # Infinite-array stray capacitance: e^2/C_eff = (e^2/C)[1 - sqrt(C0/(C0 + 4C))] (docs/physics.md 1.4, derived).
    d0 = Device(33, 10, 20e3, 0.25e-12, ground_capacitance_F=0.25e-12)
    assert d0.charging_energy_K / d.charging_energy_K == pytest.approx(1 - math.sqrt(1 / 5), rel=1e-12)


@pytest.mark.slow
def test_plan_predicts_the_achieved_uncertainty():
    d = Device(33, 10, 20e3, 0.25e-12, island_volume_m3=1000e-18)
    plan = plan_sweep(d, 0.03, relative_noise=2e-4, width_error=1e-3)
    assert excitation_width_ratio(plan.max_excitation_rms_V * math.sqrt(2) * ELEMENTARY_CHARGE
                                  / (33 * BOLTZMANN * 0.03)) == pytest.approx(1.001, abs=2e-6)
    assert plan.bias_range_V == pytest.approx(5 * plan.half_width_voltage_V)
    assert plan.heating_at_half_width is not None and 0 < plan.heating_at_half_width < 0.1
    bias, g, setup = simulate_sweep(33, 0.03, d.charging_energy_K, d.asymptotic_conductance_S, seed=8,
                                    relative_noise=2e-4, excitation_rms_V=plan.max_excitation_rms_V)
    fit = fit_sweep(SweepData(bias, g, setup), seed=2)
    # The Cramer-Rao bound is what a well-behaved posterior attains (benchmark: ratio ~1).
    assert fit.temperature_std / 0.03 == pytest.approx(plan.predicted_relative_uncertainty, rel=0.2)
    hot = plan_sweep(d, 0.005)
    assert any("u =" in n for n in hot.notes) and any("self-heating" in n for n in hot.notes)
