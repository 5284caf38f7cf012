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

from analysis.budget import BudgetRow, combine

unc = pytest.importorskip("uncertainties")
umath = pytest.importorskip("uncertainties.umath")

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
    # Sensitivities ∂f/∂x_i: automatic derivatives of the model at independent inputs.
    inputs = [unc.ufloat(V, U_V), unc.ufloat(I, U_I), unc.ufloat(PHI, U_PHI)]
    derivatives = model(*inputs, **functions).derivatives
    rows = [
        BudgetRow(name, x, u, unit, "A", "normal", derivatives.get(var, 0.0), 4)
        for (name, x, u, unit), var in zip(
            [("V", V, U_V, "V"), ("I", I, U_I, "A"), ("phi", PHI, U_PHI, "rad")], inputs, strict=True
        )
    ]
    return combine(model.__name__, "ohm", y.nominal_value, rows, CORRELATION), y


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
