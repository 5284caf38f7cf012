"""Model choice: the fit picks the fidelity the data need and records why."""

import numpy as np
import pytest

from analysis.cbt import tunnelling
from analysis.cbt.fit import FitSettings
from analysis.cbt.models import higher_order_shape
from analysis.constants import BOLTZMANN, ELEMENTARY_CHARGE
from service.intake import parse_csv
from service.thermometry import choose_model, fit_file


def exact_sweep_file(n, T, u, points=161, noise=1e-4, seed=3):
    # Data from the exact orthodox master equation (PHYSICS.md 1.3), an independent solver.
    x = np.linspace(-30, 30, points)
    g = tunnelling.conductance(x, u, tunnelling.ArrayDescription(n))
    gt = 2e-6
    rng = np.random.default_rng(seed)
    bias = x * n * BOLTZMANN * T / ELEMENTARY_CHARGE
    cond = gt * g + noise * gt * rng.standard_normal(points)
    text = f"# junctions_in_series: {n}\nbias_V,conductance_S\n" + "".join(
        f"{float(v)!r},{float(c)!r}\n" for v, c in zip(bias, cond, strict=True))
    return parse_csv("exact.csv", text.encode())


def test_choice_rule():
    small = choose_model(0.05, 33, 0.0, higher_order_shape)
    assert small["model"] is higher_order_shape and "weak-blockade" in small["reason"]
    big = choose_model(1.5, 33, 0.0, higher_order_shape)
    assert big["model"] is not higher_order_shape and "full tunnelling" in big["reason"]
    # No full-model tables with stray capacitance: the series is kept and says so.
    stray = choose_model(0.6, 33, 0.5, higher_order_shape)
    assert stray["model"] is higher_order_shape and "no full model" in stray["reason"]


@pytest.mark.slow
def test_cold_sweep_switches_to_the_full_model_and_recovers_T():
    T, u = 0.02, 1.5
    f = exact_sweep_file(3, T, u)
    quick = FitSettings(walkers=12, max_steps=6000, min_tau_multiple=30, tau_tolerance=0.1)
    work = fit_file(f, 1, quick, higher_order_shape)
    assert work.shape is not higher_order_shape
    assert "full tunnelling" in work.model_reason
    assert abs(work.fit.temperature - T) < 3 * work.fit.temperature_std
    assert work.fit.u == pytest.approx(u, rel=0.02)
