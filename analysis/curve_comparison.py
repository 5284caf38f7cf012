"""Two calibrations of one resistance thermometer compared at common resistances: ΔT(R).

A sensor recalibrated after a thermal cycle, a rewiring or a year on the fridge has two curves,
T₁(R) and T₂(R) (:class:`analysis.sensors.CalibrationCurve`). Where their resistance ranges
overlap, ΔT(R) = T₂(R) − T₁(R) shows how the sensor (or its wiring) changed. Its variance by the
law of propagation of uncertainty (GUM 5.2.2, eq. 13) is

    u²(ΔT) = T₁² g₁ᵀC₁g₁ + T₂² g₂ᵀC₂g₂ − 2 T₁T₂ g₁ᵀC₁₂g₂,

where g_i is the Chebyshev basis of curve i at R (each curve has its own normalisation of ln R),
C_i its coefficient covariance and C₁₂ the cross-covariance of the two coefficient sets.

C₁₂ comes from the inputs the two calibrations share: the same CBT bias-voltage calibration, the
same bridge, the same model truncation. Each certificate keeps such a component as its own
covariance part, which is of rank one, C_p = a aᵀ with a = M v (M the least-squares gain, v the
component's effect on the points, :func:`analysis.sensors.fit_calibration_curve`). A component
shared with correlation ρ between the calibrations contributes C₁₂ = ρ a₁ a₂ᵀ. The factor a is
recovered from C_p up to its sign, which is fixed so that the component raises ln T on average
over the calibrated range: for two sensors of one kind a given error of a shared input moves both
curves the same way, so ρ = +1 is the physical "same input"; ρ = −1 would say it moved them
oppositely. Components of independent inputs (the reference posteriors of each run, the
independent bridge readings) do not correlate.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
from numpy.polynomial import chebyshev as cheb

from analysis import budget as gum
from analysis.sensors import (
    CalibrationCurve,
    CovariancePart,
    chebyshev_design,
    normalise_log_resistance,
)

#: Relative size of the second eigenvalue above which a covariance part is not a single
#: fully correlated component (round-off in a rank-one matrix stays near 1e-16).
_RANK_ONE_TOLERANCE = 1e-8


class CurveComparisonError(ValueError):
    """Two curves that cannot be compared as asked."""


def single_component_factor(part: CovariancePart) -> np.ndarray:
    """The vector a with C_p = a aᵀ, signed so that the mean of ln T's shift over the range is > 0.

    Raises CurveComparisonError when the part is not of rank one (then it is not one input
    common to all points, and it cannot be shared between calibrations by a single ρ).
    """
    c = np.asarray(part.covariance, dtype=float)
    w, v = np.linalg.eigh(0.5 * (c + c.T))
    top = w[-1]
    if top <= 0:
        return np.zeros(c.shape[0])
    if w.size > 1 and max(abs(w[0]), abs(w[-2])) > _RANK_ONE_TOLERANCE * top:
        raise CurveComparisonError(
            f"covariance part {part.name!r} is not a single component common to all points "
            "(its rank is above one); only such components can be shared between calibrations"
        )
    a = v[:, -1] * math.sqrt(top)
    # Mean over x ∈ [−1, 1] of the shift Σ a_j T_j(x), from the integral of the series.
    integral = cheb.chebint(a)
    if cheb.chebval(1.0, integral) - cheb.chebval(-1.0, integral) < 0:
        a = -a
    return a


def overlap_range(first: CalibrationCurve, second: CalibrationCurve) -> tuple[float, float]:
    """Common resistance range (Ω) of two curves; CurveComparisonError if they do not overlap."""
    lo = max(first.ln_resistance_min, second.ln_resistance_min)
    hi = min(first.ln_resistance_max, second.ln_resistance_max)
    if not hi > lo:
        a, b = first.resistance_range_ohm, second.resistance_range_ohm
        raise CurveComparisonError(
            f"the calibrated ranges do not overlap ({a[0]:.6g}–{a[1]:.6g} Ω and "
            f"{b[0]:.6g}–{b[1]:.6g} Ω): there is no common resistance to compare at"
        )
    return math.exp(lo), math.exp(hi)


def common_resistances(
    first: CalibrationCurve, second: CalibrationCurve, points: int = 25
) -> np.ndarray:
    """``points`` log-spaced resistances spanning the overlap of the two ranges (ends included)."""
    if points < 2:
        raise CurveComparisonError("a comparison grid needs at least two points")
    lo, hi = overlap_range(first, second)
    r = np.geomspace(lo, hi, points)
    r[0], r[-1] = lo, hi
    return r


@dataclass(frozen=True)
class CurveDifference:
    """ΔT(R) = T₂(R) − T₁(R) with its uncertainty, at each resistance of the grid."""

    resistance_ohm: np.ndarray
    first_temperature_K: np.ndarray
    second_temperature_K: np.ndarray
    difference_K: np.ndarray
    standard_uncertainty_K: np.ndarray
    #: u(ΔT) as if the two calibrations shared nothing (to show what the correlation does)
    uncorrelated_standard_uncertainty_K: np.ndarray
    coverage_factor: np.ndarray
    expanded_uncertainty_K: np.ndarray
    effective_degrees_of_freedom: np.ndarray
    coverage_probability: float
    shared_components: tuple[tuple[str, float], ...]  #: (name, ρ) pairs that were applied

    @property
    def normalised_difference(self) -> np.ndarray:
        """|ΔT| / U(ΔT): above one, the curves differ by more than their uncertainty allows."""
        return np.abs(self.difference_K) / self.expanded_uncertainty_K

    @property
    def relative_difference(self) -> np.ndarray:
        return self.difference_K / self.first_temperature_K


def _parts_by_name(curve: CalibrationCurve, which: str) -> dict[str, CovariancePart]:
    out: dict[str, CovariancePart] = {}
    for p in curve.covariance_parts:
        if p.name in out:
            raise CurveComparisonError(
                f"the {which} curve has two covariance parts named {p.name!r}"
            )
        out[p.name] = p
    return out


def curve_difference(
    first: CalibrationCurve,
    second: CalibrationCurve,
    resistance_ohm: np.ndarray | None = None,
    *,
    shared_components: Mapping[str, float] | None = None,
    coverage_probability: float = 0.95,
) -> CurveDifference:
    """ΔT(R) and u(ΔT) by GUM 5.2.2 with the cross-covariance of shared components (module doc).

    ``shared_components`` maps the name of a covariance part present in both curves to its
    correlation coefficient ρ ∈ [−1, 1] between the calibrations. The coverage factor is
    Student's t at the Welch–Satterthwaite ν_eff (GUM G.4.1) of the contributions: each
    unshared part of each curve, and each shared part as one combined contribution.
    Resistances outside either curve's range are refused (neither curve extrapolates).
    """
    shared = dict(shared_components or {})
    parts1 = _parts_by_name(first, "first")
    parts2 = _parts_by_name(second, "second")
    _check_shared(shared, parts1, parts2)
    r = (
        common_resistances(first, second)
        if resistance_ohm is None
        else np.atleast_1d(np.asarray(resistance_ohm, dtype=float))
    )
    # The curves refuse resistances outside their ranges with a message naming them.
    t1 = np.exp(first.ln_temperature(r))
    t2 = np.exp(second.ln_temperature(r))
    g1 = _temperature_gradient(first, r, t1)
    g2 = _temperature_gradient(second, r, t2)
    contributions, dofs = _contributions(shared, parts1, parts2, g1, g2)
    stacked = np.vstack(contributions) if contributions else np.zeros((1, r.size))
    dofs = dofs or [math.inf]
    u = np.sqrt(np.sum(stacked**2, axis=0))
    u_uncorrelated = np.sqrt(_quadratic_form(g1, first.covariance) + _quadratic_form(g2, second.covariance))
    nu = np.array([gum.welch_satterthwaite(stacked[:, i], dofs) for i in range(r.size)])
    k = np.array([gum.coverage_factor(v, coverage_probability) for v in nu])
    return CurveDifference(
        resistance_ohm=r,
        first_temperature_K=t1,
        second_temperature_K=t2,
        difference_K=t2 - t1,
        standard_uncertainty_K=u,
        uncorrelated_standard_uncertainty_K=u_uncorrelated,
        coverage_factor=k,
        expanded_uncertainty_K=k * u,
        effective_degrees_of_freedom=nu,
        coverage_probability=coverage_probability,
        shared_components=tuple(sorted(shared.items())),
    )


def _check_shared(
    shared: Mapping[str, float],
    parts1: Mapping[str, CovariancePart],
    parts2: Mapping[str, CovariancePart],
) -> None:
    """Every shared component names a part of both curves and has a correlation in [−1, 1]."""
    for name, rho in shared.items():
        if name not in parts1 or name not in parts2:
            where = "first" if name not in parts1 else "second"
            known = sorted(set(parts1) & set(parts2))
            raise CurveComparisonError(
                f"shared component {name!r} is not a covariance part of the {where} curve; "
                f"parts in both: {known}"
            )
        if not (math.isfinite(rho) and -1.0 <= rho <= 1.0):
            raise CurveComparisonError(f"correlation of {name!r} must lie in [-1, 1], got {rho}")


def _temperature_gradient(curve: CalibrationCurve, r: np.ndarray, t: np.ndarray) -> np.ndarray:
    """∂T/∂c_j = T(R) T_j(x(R)) at each resistance: the sensitivities of T to the curve's
    Chebyshev coefficients, since T = exp(Σ c_j T_j(x)) (GUM 5.1.3)."""
    x = np.clip(
        normalise_log_resistance(r, curve.ln_resistance_min, curve.ln_resistance_max), -1.0, 1.0
    )
    return chebyshev_design(x, curve.degree) * t[:, None]


def _quadratic_form(g: np.ndarray, c: np.ndarray) -> np.ndarray:
    """gᵀ C g at each resistance (a row of g), clipped at zero against round-off (GUM 5.1.2)."""
    return np.maximum(np.einsum("ij,jk,ik->i", g, c, g), 0.0)


def _contributions(
    shared: Mapping[str, float],
    parts1: Mapping[str, CovariancePart],
    parts2: Mapping[str, CovariancePart],
    g1: np.ndarray,
    g2: np.ndarray,
) -> tuple[list[np.ndarray], list[float]]:
    """Standard-uncertainty contributions to ΔT at each resistance, with their degrees of freedom.

    Each unshared part of either curve counts alone; a part shared with correlation ρ counts
    once, as √(a₁² + a₂² − 2ρ a₁a₂) with a_i its rank-one factor carried to T (GUM 5.2.2, eq. 13,
    for two correlated inputs), and the smaller of its two ν.
    """
    contributions: list[np.ndarray] = []
    dofs: list[float] = []
    for parts, g in ((parts1, g1), (parts2, g2)):
        for name, p in parts.items():
            if name in shared:
                continue
            contributions.append(np.sqrt(_quadratic_form(g, p.covariance)))
            dofs.append(p.degrees_of_freedom)
    for name, rho in shared.items():
        a1 = g1 @ single_component_factor(parts1[name])
        a2 = g2 @ single_component_factor(parts2[name])
        var = a1**2 + a2**2 - 2.0 * rho * a1 * a2
        contributions.append(np.sqrt(np.maximum(var, 0.0)))
        dofs.append(min(parts1[name].degrees_of_freedom, parts2[name].degrees_of_freedom))
    return contributions, dofs
