"""JCGM 101:2008 (propagation of distributions by Monte Carlo) checks of analysis.budget.monte_carlo."""

import numpy as np
import pytest

from analysis import budget


def test_four_standard_normal_inputs_summed():
    # JCGM 101:2008 §9.2.2 (additive model, four N(0, 1) inputs): u(y) = 2 and the 95 %
    # coverage interval is ±3.92 (from memory; 1.96 × 2 is exact for the Gaussian output).
    samplers = {f"x{i}": (lambda rng, n: rng.standard_normal(n)) for i in range(4)}
    mc = budget.monte_carlo(lambda **x: sum(x.values()), samplers, seed=2008, draws=1_000_000)
    assert mc.standard_uncertainty == pytest.approx(2.0, abs=0.01)
    lo, hi = mc.symmetric_interval
    assert lo == pytest.approx(-3.92, abs=0.02)
    assert hi == pytest.approx(3.92, abs=0.02)
    slo, shi = mc.shortest_interval
    assert shi - slo == pytest.approx(7.84, abs=0.03)


def _mass_model(m_rc, dm_rc, rho_a, rho_w, rho_r):
    # JCGM 101:2008 §9.3 model: δm = (m_R,c + δm_R,c)[1 + (ρ_a − ρ_a0)(1/ρ_W − 1/ρ_R)] − m_nom,
    # ρ_a0 = 1.2 kg/m³, m_nom = 100 g (in mg).
    return (m_rc + dm_rc) * (1.0 + (rho_a - 1.2) * (1.0 / rho_w - 1.0 / rho_r)) - 100_000.0


_MASS_SAMPLERS = {
    # JCGM 101:2008 §9.3, Table 9 (from memory): masses in mg, densities in kg/m³.
    "m_rc": lambda rng, n: 100_000.0 + 0.050 * rng.standard_normal(n),
    "dm_rc": lambda rng, n: 1.234 + 0.020 * rng.standard_normal(n),
    "rho_a": lambda rng, n: rng.uniform(1.10, 1.30, n),
    "rho_w": lambda rng, n: rng.uniform(7000.0, 9000.0, n),
    "rho_r": lambda rng, n: rng.uniform(7950.0, 8050.0, n),
}


def test_mass_calibration_example():
    # JCGM 101:2008 §9.3 results (from memory): Monte Carlo u = 0.0754 mg, shortest 95 % interval
    # [1.0834, 1.3825] mg, against u = 0.0539 mg from the first-order GUM framework.
    mc = budget.monte_carlo(_mass_model, _MASS_SAMPLERS, seed=101, draws=1_000_000)
    assert mc.estimate == pytest.approx(1.2340, abs=2e-4)
    assert mc.standard_uncertainty == pytest.approx(0.0754, abs=3e-4)
    lo, hi = mc.shortest_interval
    assert lo == pytest.approx(1.0834, abs=1.5e-3)
    assert hi == pytest.approx(1.3825, abs=1.5e-3)


def test_mass_calibration_gum_framework_understates():
    # Same example, first-order GUM framework (JCGM 101 §9.3, from memory): u = 0.0539 mg; only
    # the two mass inputs have first-order sensitivity at the estimates.
    rows = [
        budget.BudgetRow("m_R,c", 100_000.0, 0.050, "mg", "B", "normal", 1.0),
        budget.BudgetRow("δm_R,c", 1.234, 0.020, "mg", "B", "normal", 1.0),
    ]
    b = budget.combine("δm", "mg", 1.234, rows)
    assert b.combined_standard_uncertainty == pytest.approx(0.0539, abs=1e-4)


def test_adaptive_procedure_reaches_two_digit_tolerance():
    # JCGM 101 7.9: adaptive stopping at the default tolerance (half a unit in the second digit
    # of u) reproduces the §9.3 standard uncertainty to that tolerance (from memory).
    mc = budget.monte_carlo(_mass_model, _MASS_SAMPLERS, seed=7)
    assert mc.converged
    assert mc.standard_uncertainty == pytest.approx(0.0754, abs=1e-3)


def test_coverage_interval_uses_q_plus_one_order_statistics():
    # JCGM 101:2008 7.7.1 (from memory): with q = pM the interval is [y_(r), y_(r+q)]; for
    # M = 20 values 1..20 and p = 0.9, q = 18 and the symmetric choice r = 1 gives [1, 19].
    values = np.arange(20, 0, -1, dtype=float)
    sym, short = budget.coverage_intervals(values, 0.9)
    assert sym == (1.0, 19.0)
    assert short[1] - short[0] == 18.0
