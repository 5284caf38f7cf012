"""PLTS-2000 melting-curve equation and its inversion."""

import math

import numpy as np
import pytest

from analysis import scales
from analysis.scales import (
    ScaleRangeError,
    melting_pressure,
    melting_pressure_slope,
    melting_temperature,
)

# Fixed points of PLTS-2000: Rusby et al., J. Low Temp. Phys. 126, 633 (2002) (from memory).
FIXED_POINTS = [
    ("minimum", 315.24e-3, 2.93113e6),
    ("superfluid A", 2.444e-3, 3.43407e6),
    ("A-B", 1.896e-3, 3.43609e6),
    ("Neel", 0.902e-3, 3.43934e6),
]


@pytest.mark.parametrize(("name", "t", "p"), FIXED_POINTS)
def test_fixed_points_within_2_pa(name, t, p):
    # Rusby et al. (2002): the polynomial reproduces the fixed points (from memory), within 2 Pa.
    assert abs(melting_pressure(t) - p) <= 2.0, name


def test_minimum_location_and_pressure():
    # Rusby et al. (2002): minimum 2.93113 MPa at 315.24 mK (from memory); the polynomial's own
    # minimum must agree to the stated digits.
    assert scales.T_MINIMUM == pytest.approx(315.24e-3, abs=0.005e-3)
    assert scales.P_MINIMUM == pytest.approx(2.93113e6, abs=2.0)
    assert abs(melting_pressure_slope(scales.T_MINIMUM)) < 1.0  # Pa/K


def test_slope_matches_finite_difference():
    t = np.array([1e-3, 0.01, 0.1, 0.5, 0.9])
    h = t * 1e-6
    numeric = (melting_pressure(t + h) - melting_pressure(t - h)) / (2 * h)
    assert np.allclose(melting_pressure_slope(t), numeric, rtol=1e-6)


def test_branches_are_monotonic():
    # The inversion's bracketing relies on a single extremum in the scale's range.
    low = np.geomspace(scales.T_LOWEST, scales.T_MINIMUM, 4000)
    high = np.linspace(scales.T_MINIMUM, scales.T_HIGHEST, 4000)
    assert np.all(melting_pressure_slope(low[:-1]) < 0)
    assert np.all(melting_pressure_slope(high[1:]) > 0)


@pytest.mark.parametrize("t", [0.95e-3, 1.896e-3, 5e-3, 0.03, 0.1, 0.25, 0.4, 0.7, 0.999])
def test_round_trip(t):
    branch = "low" if t < scales.T_MINIMUM else "high"
    r = melting_temperature(melting_pressure(t), branch)
    assert r.temperature_K == pytest.approx(t, rel=1e-9)
    assert r.branch == branch
    assert r.dT_dp_K_per_Pa == pytest.approx(1 / melting_pressure_slope(t), rel=1e-9)


def test_branch_from_hint_and_both_branches():
    p = melting_pressure(0.1)
    low = melting_temperature(p, temperature_hint=0.09)
    assert low.branch == "low" and low.temperature_K == pytest.approx(0.1, rel=1e-9)
    high = melting_temperature(p, temperature_hint=0.6)
    assert high.branch == "high"
    assert high.temperature_K > scales.T_MINIMUM
    assert melting_pressure(high.temperature_K) == pytest.approx(p, abs=1e-6)


def test_branch_required_and_contradiction_refused():
    p = melting_pressure(0.1)
    with pytest.raises(ValueError, match="branch"):
        melting_temperature(p)
    with pytest.raises(ValueError, match="contradicts"):
        melting_temperature(p, "high", temperature_hint=0.05)


@pytest.mark.parametrize("t", [0.5e-3, 0.9e-3, 1.001, 2.0, -0.1, math.nan])
def test_temperatures_outside_scale_refused(t):
    with pytest.raises(ScaleRangeError):
        melting_pressure(t)


@pytest.mark.parametrize(
    ("p", "branch"),
    [
        (2.93e6, "low"),  # below the minimum: no solution on either branch
        (2.93e6, "high"),
        (3.4394e6, "low"),  # above the Neel point
        (4.0e6, "high"),  # above p(1 K) = 3.9991 MPa
        (math.inf, "low"),
    ],
)
def test_pressures_outside_scale_refused(p, branch):
    with pytest.raises(ScaleRangeError):
        melting_temperature(p, branch)


def test_warning_near_minimum_not_far_from_it():
    near = melting_temperature(melting_pressure(0.31), "low")
    assert near.warnings and "minimum" in near.warnings[0]
    far = melting_temperature(melting_pressure(0.05), "low")
    assert far.warnings == ()


def test_warning_when_pressure_uncertainty_large_against_height_above_minimum():
    r = melting_temperature(scales.P_MINIMUM + 50.0, "high", pressure_uncertainty_Pa=20.0)
    assert any("unreliable" in w for w in r.warnings)


def test_uncertainty_propagation():
    r = melting_temperature(melting_pressure(0.02), "low")
    assert r.standard_uncertainty(100.0) == pytest.approx(100.0 / abs(melting_pressure_slope(0.02)))
