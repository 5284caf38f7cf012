"""Published temperature scales used as cross-checks: PLTS-2000.

The Provisional Low Temperature Scale PLTS-2000 (Rusby et al., J. Low Temp. Phys. 126, 633
(2002)) defines temperature between 0.902 mK and 1 K through the melting pressure of ³He, given
as a polynomial p(T) in T and 1/T. The melting curve has a minimum near 315 mK, so one pressure
belongs to two temperatures: the inversion p -> T needs to know the branch. Close to the minimum
dp/dT vanishes and a small pressure error becomes a large temperature error; there the inversion
still answers but says so in its warnings, because the linear propagation of u(p) to u(T) is then
no longer trustworthy.

All pressures are in pascal and all temperatures in kelvin.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal

import numpy as np
from scipy.optimize import brentq, minimize_scalar

# PLTS-2000 coefficients a_i of p/MPa = sum_{i=-3}^{9} a_i (T/K)^i (Rusby et al. 2002, eq. 1;
# from memory, they reproduce the four fixed points within 2 Pa).
_EXPONENTS = np.arange(-3, 10)
_COEFFICIENTS_MPA = np.array(
    [
        -1.3855442e-12,
        4.5557026e-9,
        -6.4430869e-6,
        3.4467434,
        -4.4176438,
        1.5417437e1,
        -3.5789853e1,
        7.1499125e1,
        -1.0414379e2,
        1.0518538e2,
        -6.9443767e1,
        2.6833087e1,
        -4.5875709,
    ]
)

#: Lower and upper ends of the scale (the Néel transition of solid ³He and 1 K).
T_LOWEST = 0.902e-3
T_HIGHEST = 1.0

#: Fixed points of PLTS-2000 as (temperature K, pressure Pa) (Rusby et al. 2002, Table 2; from
#: memory). The scale is defined by the polynomial; these are what it must reproduce.
FIXED_POINTS: dict[str, tuple[float, float]] = {
    "minimum": (315.24e-3, 2.93113e6),
    "superfluid A": (2.444e-3, 3.43407e6),
    "A-B": (1.896e-3, 3.43609e6),
    "Neel": (0.902e-3, 3.43934e6),
}

#: Default slope below which an inversion is flagged as being "near the minimum":
#: |dp/dT| < 0.2 MPa/K, i.e. roughly 285-347 mK, where 100 Pa of pressure error is > 0.5 mK.
NEAR_MINIMUM_SLOPE_PA_PER_K = 2.0e5

Branch = Literal["low", "high"]


class ScaleRangeError(ValueError):
    """A temperature or pressure lies outside the range where the scale is defined."""


def _check_temperature(t: np.ndarray) -> None:
    if not np.all(np.isfinite(t)):
        raise ScaleRangeError("PLTS-2000: temperature must be a finite number of kelvin")
    bad = (t < T_LOWEST * (1 - 1e-12)) | (t > T_HIGHEST * (1 + 1e-12))
    if np.any(bad):
        value = float(np.asarray(t)[bad].flat[0])
        raise ScaleRangeError(
            f"PLTS-2000 is defined from {T_LOWEST * 1e3:.3f} mK to {T_HIGHEST:g} K; "
            f"got {value:.6g} K"
        )


def melting_pressure(temperature: float | np.ndarray) -> float | np.ndarray:
    """³He melting pressure p(T) in Pa on PLTS-2000.

    Rusby et al., J. Low Temp. Phys. 126, 633 (2002), eq. (1): p/MPa = Σ_{i=-3}^{9} a_i (T/K)^i.
    Refuses temperatures outside 0.902 mK – 1 K with :class:`ScaleRangeError`.
    """
    t = np.asarray(temperature, dtype=float)
    _check_temperature(t)
    p = np.sum(_COEFFICIENTS_MPA * np.power.outer(t, _EXPONENTS), axis=-1) * 1e6
    return float(p) if p.ndim == 0 else p


def melting_pressure_slope(temperature: float | np.ndarray) -> float | np.ndarray:
    """dp/dT in Pa/K, the term-by-term derivative of Rusby et al. (2002) eq. (1)."""
    t = np.asarray(temperature, dtype=float)
    _check_temperature(t)
    d = np.sum(_COEFFICIENTS_MPA * _EXPONENTS * np.power.outer(t, _EXPONENTS - 1), axis=-1) * 1e6
    return float(d) if d.ndim == 0 else d


def _find_minimum() -> tuple[float, float]:
    # The minimum of the polynomial itself (not the rounded tabulated value), so that the two
    # branches meet exactly and the inversion is consistent with melting_pressure().
    res = minimize_scalar(
        lambda t: melting_pressure(t),
        bounds=(0.25, 0.40),
        method="bounded",
        options={"xatol": 1e-12},
    )
    return float(res.x), float(res.fun)


T_MINIMUM, P_MINIMUM = _find_minimum()
P_AT_LOWEST = float(melting_pressure(T_LOWEST))
P_AT_HIGHEST = float(melting_pressure(T_HIGHEST))


@dataclass(frozen=True)
class MeltingCurveTemperature:
    """A temperature read from a ³He melting-pressure measurement on PLTS-2000."""

    pressure_Pa: float
    temperature_K: float
    branch: Branch
    dT_dp_K_per_Pa: float
    warnings: tuple[str, ...] = ()

    def standard_uncertainty(self, pressure_uncertainty_Pa: float) -> float:
        """u(T) = |dT/dp| u(p) (GUM 5.1.2, first-order propagation).

        Near the minimum the linear approximation fails when u(p) is comparable with
        p − p_min; :attr:`warnings` says when that is the case.
        """
        if pressure_uncertainty_Pa < 0:
            raise ValueError("pressure uncertainty must be non-negative")
        return abs(self.dT_dp_K_per_Pa) * pressure_uncertainty_Pa


def _resolve_branch(branch: Branch | None, temperature_hint: float | None) -> Branch:
    if branch is not None and branch not in ("low", "high"):
        raise ValueError(f"branch must be 'low' or 'high', got {branch!r}")
    if temperature_hint is not None:
        if not (math.isfinite(temperature_hint) and temperature_hint > 0):
            raise ValueError(
                f"temperature hint must be a positive number of kelvin, got {temperature_hint!r}"
            )
        hinted: Branch = "low" if temperature_hint < T_MINIMUM else "high"
        if branch is not None and branch != hinted:
            raise ValueError(
                f"branch {branch!r} contradicts the temperature hint {temperature_hint:.6g} K "
                f"(the melting-curve minimum is at {T_MINIMUM * 1e3:.2f} mK)"
            )
        return hinted
    if branch is None:
        raise ValueError(
            "a ³He melting pressure belongs to two temperatures (either side of the minimum at "
            f"{T_MINIMUM * 1e3:.2f} mK): give branch='low' or 'high', or a temperature hint"
        )
    return branch


def melting_temperature(
    pressure: float,
    branch: Branch | None = None,
    *,
    temperature_hint: float | None = None,
    pressure_uncertainty_Pa: float | None = None,
    near_minimum_slope_Pa_per_K: float = NEAR_MINIMUM_SLOPE_PA_PER_K,
) -> MeltingCurveTemperature:
    """Invert the PLTS-2000 melting curve, p -> T, on the stated or hinted branch.

    Solves Rusby et al. (2002) eq. (1) for T by bracketed root finding on one branch: "low"
    (0.902 mK to the minimum, where dp/dT < 0) or "high" (the minimum to 1 K, dp/dT > 0). The
    branch is given directly or inferred from ``temperature_hint`` (e.g. the CBT's reading).
    Refuses pressures that no temperature on that branch of the scale produces.
    Warnings (returned, never printed) flag the band near the minimum where |dp/dT| is below
    ``near_minimum_slope_Pa_per_K``, and the case where ``pressure_uncertainty_Pa`` is not
    small against the distance to the minimum pressure.
    """
    p = float(pressure)
    if not math.isfinite(p):
        raise ScaleRangeError(
            f"melting pressure must be a finite number of pascal, got {pressure!r}"
        )
    side = _resolve_branch(branch, temperature_hint)
    if side == "low":
        t_lo, t_hi, p_top = T_LOWEST, T_MINIMUM, P_AT_LOWEST
    else:
        t_lo, t_hi, p_top = T_MINIMUM, T_HIGHEST, P_AT_HIGHEST
    if p < P_MINIMUM:
        raise ScaleRangeError(
            f"melting pressure {p:.1f} Pa is below the minimum of the ³He melting curve "
            f"({P_MINIMUM:.1f} Pa at {T_MINIMUM * 1e3:.2f} mK): no temperature on PLTS-2000"
        )
    if p > p_top:
        where = "0.902 mK (Neel point)" if side == "low" else "1 K"
        raise ScaleRangeError(
            f"melting pressure {p:.1f} Pa is above the {side}-branch end of PLTS-2000 "
            f"({p_top:.1f} Pa at {where}): outside the scale"
        )
    if p == P_MINIMUM:
        t = T_MINIMUM
    else:
        t = brentq(lambda x: melting_pressure(x) - p, t_lo, t_hi, xtol=1e-15, rtol=1e-14)
    slope = float(melting_pressure_slope(t))
    warnings: list[str] = []
    if abs(slope) < near_minimum_slope_Pa_per_K:
        warnings.append(
            f"near the melting-curve minimum: |dp/dT| = {abs(slope) / 1e3:.3g} kPa/K, so each "
            f"100 Pa of pressure error is {100 / max(abs(slope), 1e-300) * 1e3:.3g} mK; "
            "the branch and the temperature are poorly determined here"
        )
    if pressure_uncertainty_Pa is not None and pressure_uncertainty_Pa > 0.1 * (p - P_MINIMUM):
        warnings.append(
            f"pressure uncertainty {pressure_uncertainty_Pa:.3g} Pa is not small against the "
            f"height above the minimum ({p - P_MINIMUM:.3g} Pa): first-order propagation of "
            "u(p) to u(T) is unreliable"
        )
    dt_dp = 1.0 / slope if slope != 0 else math.copysign(math.inf, 1.0 if side == "high" else -1.0)
    return MeltingCurveTemperature(p, float(t), side, dt_dp, tuple(warnings))
