"""Secondary-mode CBT thermometry: zero-bias conductance readings to temperatures.

Once a primary fit has fixed the charging energy ΔE and the asymptotic conductance G_T, the dip
depth d = 1 − G(0)/G_T alone gives u = ΔE/(k_B T) by inverting the depth series
d = u/6 − u²/60 + u³/630 (Farhangfar et al., J. Low Temp. Phys. 108, 191 (1997); docs/physics.md 1.5),
and T = ΔE/(k_B u). This is fast (one reading per point, no sweep) but no longer primary: it
leans on ΔE, which can drift by ~10 % below 100 mK in some devices, so ΔE should be refitted
regularly (docs/physics.md 1.4).

Uncertainty: first-order propagation (GUM 5.1.2) of u(ΔE), u(G_T), their covariance and u(G(0)),
plus the depth series' own truncation error (about 1.5e-4 in depth at u = 1, docs/physics.md 1.2),
carried as a rectangular term.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from analysis.cbt.models import depth_series, invert_depth_series

#: Largest u for which the inverted series is used (its depth error is 1.5e-4 at u = 1).
MAX_SECONDARY_U = 1.0


@dataclass(frozen=True)
class SecondaryCalibration:
    """What the primary fit hands to secondary mode."""

    charging_energy: float  # ΔE/k_B, K
    charging_energy_u: float
    asymptotic_conductance: float  # G_T, S
    asymptotic_conductance_u: float
    correlation: float = 0.0  # between ΔE and G_T


@dataclass(frozen=True)
class SecondaryResult:
    temperature: np.ndarray
    standard_uncertainty: np.ndarray
    u: np.ndarray
    depth: np.ndarray


def _depth_series_error(u: np.ndarray) -> np.ndarray:
    # docs/physics.md 1.2 (derived): error of the three-term depth series vs exact, 1e-5 at u = 0.5,
    # 1.5e-4 at u = 1; bounded here by 1.5e-4 u^4 (the first omitted order).
    return 1.5e-4 * u**4


def temperatures_from_zero_bias(
    conductance: np.ndarray, calibration: SecondaryCalibration, conductance_u: np.ndarray | float = 0.0
) -> SecondaryResult:
    """T from zero-bias conductance readings (docs/physics.md 1.5). Refuses depths outside the series' range."""
    g0 = np.asarray(conductance, dtype=float)
    gt = calibration.asymptotic_conductance
    d = 1.0 - g0 / gt
    d_max = float(depth_series(MAX_SECONDARY_U))
    bad = np.nonzero((d <= 0) | (d > d_max))[0]
    if bad.size:
        i = int(bad[0])
        raise ValueError(
            f"reading {i + 1}: depth 1 − G(0)/G_T = {d[i]:.4g} lies outside (0, {d_max:.4f}], the range where "
            f"the inverted depth series is validated (u ≤ {MAX_SECONDARY_U:g})"
        )
    u = invert_depth_series(d)
    E = calibration.charging_energy
    T = E / u
    # Sensitivities: dd/du = 1/6 − u/30 + u²/210; T = E/u(d), d = 1 − G0/G_T.
    dd_du = 1.0 / 6.0 - u / 30.0 + u**2 / 210.0
    dT_dd = -E / u**2 / dd_du
    c_E = 1.0 / u
    c_gt = dT_dd * g0 / gt**2
    c_g0 = dT_dd * (-1.0 / gt)
    var = (
        (c_E * calibration.charging_energy_u) ** 2
        + (c_gt * calibration.asymptotic_conductance_u) ** 2
        + 2 * c_E * c_gt * calibration.correlation * calibration.charging_energy_u * calibration.asymptotic_conductance_u
        + (c_g0 * np.asarray(conductance_u, dtype=float)) ** 2
        + (dT_dd * _depth_series_error(u) / np.sqrt(3.0)) ** 2
    )
    return SecondaryResult(T, np.sqrt(var), u, d)
