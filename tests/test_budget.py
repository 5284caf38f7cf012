"""GUM budget machinery against JCGM 100:2008 (the GUM) tables and worked examples."""

import math

import numpy as np
import pytest

from analysis import budget as b


@pytest.mark.parametrize(
    "nu, p, k",
    [
        # JCGM 100:2008 Table G.2 (values of t_p(nu)), from memory.
        (1, 0.95, 12.71), (2, 0.95, 4.30), (3, 0.95, 3.18), (4, 0.95, 2.78), (5, 0.95, 2.57),
        (10, 0.95, 2.23), (20, 0.95, 2.09), (50, 0.95, 2.01), (math.inf, 0.95, 1.96),
        (1, 0.99, 63.66), (10, 0.99, 3.17), (16, 0.99, 2.92), (math.inf, 0.99, 2.576),
        (1, 0.9545, 13.97), (math.inf, 0.9545, 2.00), (math.inf, 0.6827, 1.00),
    ],
)
def test_coverage_factor_matches_gum_table_g2(nu, p, k):
    assert b.coverage_factor(nu, p) == pytest.approx(k, abs=0.006 if k < 10 else 0.01)


def test_coverage_factor_truncates_fractional_degrees_of_freedom():
    # JCGM 100:2008 G.4.1: nu_eff is truncated to the next lower integer before Table G.2.
    assert b.coverage_factor(16.7, 0.99) == b.coverage_factor(16, 0.99)


def gum_h1_rows():
    # JCGM 100:2008 H.1 (end-gauge calibration), Table H.1 contributions u_i(l) in nm and their
    # degrees of freedom, from memory: calibration of the standard 25 nm (nu 18); measured
    # difference 9.7 nm (nu 25.6); thermal expansion difference 2.9 nm (nu 50); temperature
    # difference 16.6 nm (nu 2); the expansion coefficient and bed temperature rows have zero
    # sensitivity at first order.
    return [
        b.BudgetRow("l_s", 50.000623, 25e-6, "mm", "B", "t", 1.0, 18),
        b.BudgetRow("d", 215e-6, 9.7e-6, "mm", "A", "t", 1.0, 25.6),
        b.BudgetRow("alpha_s", 11.5e-6, 1.2e-6, "1/degC", "B", "rectangular", 0.0, 100),
        b.BudgetRow("theta", -0.1, 0.41, "degC", "B", "normal", 0.0, 100),
        b.BudgetRow("delta_alpha", 0.0, 0.58e-6, "1/degC", "B", "rectangular", 2.9e-6 / 0.58e-6, 50),
        b.BudgetRow("delta_theta", 0.0, 0.029, "degC", "B", "rectangular", 16.6e-6 / 0.029, 2),
    ]


def test_gum_h1_end_gauge_budget():
    rows = gum_h1_rows()
    bud = b.combine("l", "mm", 50.000838, rows, coverage_probability=0.99)
    # GUM H.1: u_c = 32 nm, nu_eff = 16.7 -> 16, k_99 = 2.92, U_99 = 2.92 x 32 nm = 93 nm (from memory).
    assert bud.combined_standard_uncertainty * 1e6 == pytest.approx(31.7, abs=0.05)
    assert bud.effective_degrees_of_freedom == pytest.approx(16.7, abs=0.1)
    assert bud.coverage_factor == pytest.approx(2.92, abs=0.005)
    value, u = b.round_for_report(bud.estimate, bud.combined_standard_uncertainty)
    assert (value, u) == ("50.000838", "0.000032")
    assert round(bud.coverage_factor * float(u) * 1e6) == 93
    # The measured difference row itself: Welch-Satterthwaite of its three components
    # (5.8 nm, nu 24; 3.9 nm, nu 5; 6.7 nm, nu 8) gives nu = 25.6 (GUM H.1, from memory). The GUM
    # puts the rounded 9.7 nm in the numerator; from the unrounded components it is 25.4.
    assert b.welch_satterthwaite([5.8, 3.9, 6.7], [24, 5, 8]) == pytest.approx(25.6, abs=0.2)


def test_correlated_inputs_use_the_full_covariance():
    # GUM 5.2.2 eq. (16): u_c^2 = sum c_i^2 u_i^2 + 2 sum c_i c_j u_i u_j r_ij. Fully correlated
    # equal inputs add linearly; anti-correlated ones cancel.
    rows = [b.BudgetRow("a", 1, 0.3, "V", "B", "normal", 1.0), b.BudgetRow("b", 1, 0.4, "V", "B", "normal", 1.0)]
    assert b.combine("s", "V", 2, rows).combined_standard_uncertainty == pytest.approx(0.5)
    assert b.combine("s", "V", 2, rows, [[1, 1], [1, 1]]).combined_standard_uncertainty == pytest.approx(0.7)
    assert b.combine("s", "V", 2, rows, [[1, -1], [-1, 1]]).combined_standard_uncertainty == pytest.approx(0.1)
    with pytest.raises(ValueError, match="symmetric"):
        b.combine("s", "V", 2, rows, [[1, 0.5], [0.2, 1]])


def test_type_b_divisors():
    # GUM 4.3.7 (rectangular a/sqrt3), 4.3.9 (triangular a/sqrt6); arcsine a/sqrt2 (JCGM 101 6.4.6).
    assert b.standard_uncertainty_from_half_width(3.0, "rectangular") == pytest.approx(3 / math.sqrt(3))
    assert b.standard_uncertainty_from_half_width(6.0, "triangular") == pytest.approx(6 / math.sqrt(6))
    assert b.standard_uncertainty_from_half_width(2.0, "arcsine") == pytest.approx(2 / math.sqrt(2))
    with pytest.raises(ValueError):
        b.standard_uncertainty_from_half_width(1.0, "gaussian")


def test_gum_7_2_6_rounding_examples():
    # JCGM 100:2008 7.2.6 (from memory): y = 10.057 62 ohm with u_c = 27 mohm is reported as
    # 10.058 ohm; u_c = 10.47 mohm may be rounded up to 11 mohm; 28.05 kHz rounds to 28 kHz.
    assert b.round_for_report(10.05762, 0.027) == ("10.058", "0.027")
    assert b.round_for_report(1.0, 0.01047, up=True)[1] == "0.011"
    assert b.round_for_report(1000.0, 28.05)[1] == "28"
    # Rounding that carries into a new digit keeps two significant digits (common practice, no source).
    assert b.round_for_report(1.23456, 0.0996) == ("1.23", "0.10")


def test_welch_satterthwaite_limits():
    # GUM G.4.1: a single component keeps its own nu; infinite nu rows do not count.
    assert b.welch_satterthwaite([2.0], [7]) == pytest.approx(7)
    assert b.welch_satterthwaite([1.0, 1.0], [math.inf, math.inf]) == math.inf
    assert b.welch_satterthwaite([1.0, 1.0], [10, math.inf]) == pytest.approx(40)


def test_coverage_intervals_of_a_normal_sample():
    # JCGM 101 7.7: for a symmetric distribution both intervals approach mu +- 1.96 sigma.
    y = np.random.default_rng(3).standard_normal(400_000)
    sym, short = b.coverage_intervals(y, 0.95)
    assert sym[0] == pytest.approx(-1.96, abs=0.02) and sym[1] == pytest.approx(1.96, abs=0.02)
    assert short[1] - short[0] == pytest.approx(3.92, abs=0.03)


def test_budget_row_validation():
    with pytest.raises(ValueError, match="type"):
        b.BudgetRow("x", 1, 1, "V", "C", "normal", 1.0)
    with pytest.raises(ValueError, match="distribution"):
        b.BudgetRow("x", 1, 1, "V", "A", "lognormal", 1.0)
    with pytest.raises(ValueError, match="finite"):
        b.BudgetRow("x", 1, math.nan, "V", "A", "normal", 1.0)
