"""Self-heating: the electron-phonon heat balance in the forward model (docs/physics.md 1.4)."""

import numpy as np
import pytest

from analysis.cbt.fit import FitSettings, SweepData, fit_sweep
from analysis.cbt.models import (
    HeatingModel,
    SweepSetup,
    forward_conductance,
    half_width_voltage,
    higher_order_shape,
)
from service.calibrations.cbt import fit_file
from service.calibrations.outcome import CertificationRefused
from service.intake import parse_csv

N, M, R_T = 33, 10, 20e3
G_T = M / (N * R_T)
# Sigma_Cu ~ 2e9 W K^-5 m^-3 (Wellstood, Urbina & Clarke 1994; from memory) x 1000 um^3 islands.
COUPLING = 2e9 * 1000e-18
LEAK = 5e-17  # 50 aW: "heat leaks of tens of aW" (Meschke et al. 2011; from memory)


def heated_sweep(T=0.01, seed=1):
    hm = HeatingModel(COUPLING, R_T, LEAK)
    setup = SweepSetup(N, 0.0, hm)
    vh = half_width_voltage(T, N, higher_order_shape, 0.0072)
    bias = np.linspace(-6 * vh, 6 * vh, 401)
    g = forward_conductance(higher_order_shape, bias, setup, T, 0.0072, G_T, 0.0)
    g = g + 2e-4 * G_T * np.random.default_rng(seed).standard_normal(bias.size)
    return bias, g, setup


def test_electron_temperature_formula():
    # T_e = [T_p^5 + (P_0 + V^2/(N^2 R_T))/(Sigma Omega)]^(1/5) (Wellstood et al. 1994; docs/physics.md 1.4).
    hm = HeatingModel(COUPLING, R_T, LEAK)
    v = 1e-3
    expect = (0.01**5 + (LEAK + v**2 / (N**2 * R_T)) / COUPLING) ** 0.2
    assert hm.electron_temperature(v, 0.01, N) == pytest.approx(expect, rel=1e-14)
    # Size at the half-width point: dT/T ~ 1.1e-8/(R_T Sigma Omega T^3) (docs/physics.md 1.4, derived):
    # R_T = 20 kohm, 1000 um^3 Cu -> 27 % at 10 mK, 0.22 % at 50 mK.
    for T, frac in ((0.01, 0.27), (0.05, 0.0022)):
        vh = half_width_voltage(T, N)
        rise = HeatingModel(COUPLING, R_T).electron_temperature(vh / 2, T, N) / T - 1
        assert rise == pytest.approx(frac, rel=0.35)


@pytest.mark.slow
def test_bath_temperature_recovered_and_unmodelled_fit_flagged():
    # Issue check: with a known heat leak the fitted bath temperature is within its uncertainty,
    # and a weak-blockade fit of the same data without heating is flagged.
    T = 0.01
    bias, g, setup = heated_sweep(T)
    fit = fit_sweep(SweepData(bias, g, setup), seed=3)
    assert abs(fit.temperature - T) < 3 * fit.temperature_std
    te0 = (T**5 + LEAK / COUPLING) ** 0.2
    assert fit.electron_temperature_zero_bias == pytest.approx(te0, rel=5 * fit.temperature_std / T)
    assert fit.heating_at_half_width > 0.1

    text = "# junctions_in_series: 33\n# parallel_rows: 10\nbias_V,conductance_S\n" + "".join(
        f"{float(v)!r},{float(c)!r}\n" for v, c in zip(bias, g, strict=True))
    f = parse_csv("cold.csv", text.encode())
    quick = FitSettings(walkers=12, max_steps=4000, min_tau_multiple=20, tau_tolerance=0.2)
    # Without a heating model the residuals are smooth structure, not noise: refused, naming
    # self-heating as the likely cause (a noise model must not absorb a model mismatch).
    with pytest.raises(CertificationRefused, match="self-heating"):
        fit_file(f, 1, quick, higher_order_shape)
    heated = fit_file(f, 1, quick, higher_order_shape, heating=HeatingModel(COUPLING, 0.0, LEAK))
    assert any("self-heating dominates" in w for w in heated.warnings)
    assert heated.data.setup.heating.junction_resistance_ohm == pytest.approx(R_T, rel=0.02)
