"""The budget's combination u_c² = cᵀ V c (analysis.budget.combine) against an independent
reference: the `uncertainties` package, which propagates correlated inputs to first order through
the model function itself (automatic derivatives), with no code shared with ours.

Worked example: GUM (JCGM 100:2008) Annex H.2, simultaneous measurement of resistance and
reactance: R = (V/I) cos φ, X = (V/I) sin φ, Z = V/I, with correlated V, I, φ. `uncertainties`
has no Type A/B split, degrees of freedom or coverage factors; those are checked elsewhere
(tests/test_budget.py) and docs/physics.md §5 says why.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import uncertainties as unc
from uncertainties import umath

from analysis.budget import BudgetRow, combine, sensitivity_coefficients

# GUM H.2, Table H.2 (from memory): means and standard uncertainties of the means, and the
# correlation coefficients between them.
V, U_V = 4.9990, 0.0032  # V
I, U_I = 19.6610e-3, 0.0095e-3  # A
PHI, U_PHI = 1.04446, 0.00075  # rad
CORRELATION = np.array([[1.0, -0.36, 0.86], [-0.36, 1.0, -0.65], [0.86, -0.65, 1.0]])


def resistance(v, i, phi, cos=math.cos):
    return v / i * cos(phi)


def reactance(v, i, phi, sin=math.sin):
    return v / i * sin(phi)


def impedance(v, i, phi):
    return v / i


def _reference(model, **functions):
    v, i, phi = unc.correlated_values_norm([(V, U_V), (I, U_I), (PHI, U_PHI)], CORRELATION)
    return model(v, i, phi, **functions), (v, i, phi)


def _our_budget(model, **functions):
    """Our rows, with sensitivities taken from the same model function (as the pump budget does)."""
    y, _ = _reference(model, **functions)

    def by_name(v, i, phi):
        return model(v, i, phi, **functions)

    estimate, c = sensitivity_coefficients(by_name, {"v": V, "i": I, "phi": PHI})
    rows = [
        BudgetRow(name, x, u, unit, "A", "normal", c[name], 4)
        for name, x, u, unit in [("v", V, U_V, "V"), ("i", I, U_I, "A"), ("phi", PHI, U_PHI, "rad")]
    ]
    return combine(model.__name__, "ohm", estimate, rows, CORRELATION), y


def test_sensitivities_are_the_hand_derived_partial_derivatives():
    # R = (V/I) cos φ: ∂R/∂V = cos φ / I, ∂R/∂I = −V cos φ / I², ∂R/∂φ = −(V/I) sin φ (derived;
    # GUM 5.1.3 defines c_i = ∂f/∂x_i at the estimates).
    def by_name(v, i, phi):
        return resistance(v, i, phi, cos=umath.cos)

    estimate, c = sensitivity_coefficients(by_name, {"v": V, "i": I, "phi": PHI})
    assert estimate == resistance(V, I, PHI)
    assert c["v"] == pytest.approx(math.cos(PHI) / I, rel=1e-13)
    assert c["i"] == pytest.approx(-V * math.cos(PHI) / I**2, rel=1e-13)
    assert c["phi"] == pytest.approx(-V / I * math.sin(PHI), rel=1e-13)
    # An input the model ignores has no sensitivity; a model constant in every input still works.
    _, c = sensitivity_coefficients(lambda v, i, phi: v / i, {"v": V, "i": I, "phi": PHI})
    assert c["phi"] == 0.0
    estimate, c = sensitivity_coefficients(lambda v: 2.0, {"v": V})
    assert (estimate, c) == (2.0, {"v": 0.0})


@pytest.mark.parametrize(
    ("model", "functions", "published_u"),
    [
        # GUM H.2, Table H.3 (from memory): u(R) = 0.071 Ω, u(X) = 0.295 Ω, u(Z) = 0.236 Ω.
        (resistance, {"cos": umath.cos}, 0.071),
        (reactance, {"sin": umath.sin}, 0.295),
        (impedance, {}, 0.236),
    ],
)
def test_correlated_combination_matches_uncertainties(model, functions, published_u):
    budget, reference = _our_budget(model, **functions)
    # The same first-order law, computed independently: agreement to rounding.
    assert budget.combined_standard_uncertainty == pytest.approx(reference.std_dev, rel=1e-12)
    # Both reproduce the GUM's published figure to within the rounding of the tabulated inputs:
    # Table H.2 gives the correlations to two digits and the GUM combined unrounded data; with
    # the rounded table the first-order law gives 0.0700, 0.2955 and 0.2365 Ω (derived).
    assert budget.combined_standard_uncertainty == pytest.approx(published_u, rel=0.02)


def test_ignoring_the_correlation_would_be_visibly_wrong():
    budget, reference = _our_budget(resistance, cos=umath.cos)
    independent = combine("R", "ohm", budget.estimate, budget.rows, None)
    assert abs(independent.combined_standard_uncertainty - reference.std_dev) > 0.1 * reference.std_dev


def test_estimates_match_the_gum_example():
    # GUM H.2, Table H.3 (from memory): R = 127.732 Ω, X = 219.847 Ω, Z = 254.260 Ω.
    assert resistance(V, I, PHI) == pytest.approx(127.732, abs=1e-3)
    assert reactance(V, I, PHI) == pytest.approx(219.847, abs=1e-3)
    assert impedance(V, I, PHI) == pytest.approx(254.260, abs=1e-3)
