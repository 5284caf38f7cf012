"""Calibration curves of resistance thermometers (RuO₂, germanium, carbon) against a reference.

The curve is ln T written as a Chebyshev series in the normalised logarithm of the resistance,
x = [2 ln R − (ln R_max + ln R_min)] / (ln R_max − ln R_min), so that the calibration points span
x ∈ [−1, 1] and the design matrix stays well conditioned at any degree (common practice for
cryogenic sensors, no source). Both coordinates of a calibration point are uncertain: the
reference temperature (a CBT reading with its posterior) and the resistance (the bridge reading
and its spread during the sweep). The fit is a generalised least squares on ln T with the *full*
covariance of the points, in which the resistance uncertainty enters through the local slope of
the curve (the effective-variance method, Orear, Am. J. Phys. 50, 912 (1982), from memory); the
slope is re-evaluated from the current curve until the coefficients settle. This is the same
first-order treatment of errors in both variables as orthogonal distance regression, but unlike
scipy.odr (deprecated since SciPy 1.17, and limited to uncertainties that are independent from
point to point) it carries correlations *between* points. Those matter here: a bias-voltage gain
error, a junction non-uniformity or a model error in the CBT moves every reference temperature
together, and a bridge gain error moves every resistance together. Such components are declared
as :class:`CorrelatedComponent` and kept separate through the fit: the coefficient covariance is
split into one part per component, so every temperature read from the curve has a budget whose
rows name them, and points of a table move together as they should.

The degree is chosen by the corrected Akaike information criterion (AICc) or by leave-one-out
prediction error, never with fewer than about two points per coefficient, and only among curves
that are monotonic over the calibrated range. A variable-range-hopping form R = R₀ exp[(T₀/T)^p]
is fitted beside the series as a physical sanity check and its disagreement reported. The curve
refuses resistances outside the calibrated range: a calibration does not extrapolate.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Literal

import numpy as np
from numpy.polynomial import chebyshev as cheb
from scipy import optimize, special
from scipy.linalg import solve_triangular

from analysis import budget as gum

log = logging.getLogger(__name__)

Criterion = Literal["aicc", "loo"]
ResidualScaling = Literal["never", "if_larger", "always"]
CurveScaling = Literal["never", "if_larger"]

#: Relative slack on the calibrated range so that the calibration points themselves (and values
#: rounded on their way through a certificate) are not refused.
_RANGE_SLACK = 1e-9


class OutOfRangeError(ValueError):
    """A resistance outside the calibrated range of a curve (no extrapolation)."""


class CalibrationFitError(ValueError):
    """The calibration points cannot support the requested curve."""


# --------------------------------------------------------------------------------------------
# Chebyshev machinery


def normalise_log_resistance(
    resistance: float | np.ndarray, ln_r_min: float, ln_r_max: float
) -> np.ndarray:
    """x = [2 ln R − (ln R_max + ln R_min)] / (ln R_max − ln R_min) (common practice, no source)."""
    ln_r = np.log(np.asarray(resistance, dtype=float))
    return (2.0 * ln_r - (ln_r_max + ln_r_min)) / (ln_r_max - ln_r_min)


def chebyshev_design(x: np.ndarray, degree: int) -> np.ndarray:
    """Design matrix T_j(x), j = 0..degree (numpy.polynomial.chebyshev.chebvander)."""
    return cheb.chebvander(np.asarray(x, dtype=float), degree)


# --------------------------------------------------------------------------------------------
# Generalised least squares


@dataclass(frozen=True)
class LeastSquaresResult:
    """Solution of a generalised least-squares problem y = X β + ε, Cov(ε) = V."""

    coefficients: np.ndarray
    covariance: np.ndarray  #: Cov(β̂), scaled by the residuals if that was asked for
    gain: np.ndarray  #: M = (Xᵀ V⁻¹ X)⁻¹ Xᵀ V⁻¹, so that β̂ = M y
    residuals: np.ndarray
    chi_squared: float
    degrees_of_freedom: int
    birge_ratio: float  #: sqrt(χ²/ν)
    scaled: bool  #: whether ``covariance`` was multiplied by χ²/ν


def generalised_least_squares(
    design: np.ndarray,
    y: np.ndarray,
    covariance: np.ndarray,
    *,
    scale_by_residuals: ResidualScaling = "never",
) -> LeastSquaresResult:
    """Generalised (weighted, correlated) least squares: β̂ = (Xᵀ V⁻¹ X)⁻¹ Xᵀ V⁻¹ y.

    Aitken, Proc. R. Soc. Edinburgh 55, 42 (1935) (from memory); Cov(β̂) = (Xᵀ V⁻¹ X)⁻¹ when V is
    the known covariance of y. With
    ``scale_by_residuals="always"`` the covariance is multiplied by χ²/ν, i.e. V is known only
    up to a factor estimated from the scatter (as in GUM H.3, where s² is estimated from the
    residuals); ``"if_larger"`` does so only when χ²/ν > 1 (Birge ratio above one).
    Solved through the Cholesky factor of V so that no explicit inverse of V is formed.
    """
    x = np.asarray(design, dtype=float)
    yv = np.asarray(y, dtype=float)
    v = np.asarray(covariance, dtype=float)
    n, p = x.shape
    if yv.shape != (n,) or v.shape != (n, n):
        raise ValueError(
            f"shapes do not match: design {x.shape}, y {yv.shape}, covariance {v.shape}"
        )
    if n < p:
        raise CalibrationFitError(f"{n} points cannot determine {p} coefficients")
    try:
        chol = np.linalg.cholesky(v)
    except np.linalg.LinAlgError:
        raise CalibrationFitError(
            "the covariance of the calibration points is not positive definite: every point "
            "needs a non-zero independent uncertainty"
        ) from None
    # Whiten with L⁻¹ (V = L Lᵀ) and solve the ordinary problem by QR. The matrices are small
    # (tens of points), so one triangular inverse each is cheaper than repeated solves.
    l_inv = solve_triangular(chol, np.eye(n), lower=True)
    xw = l_inv @ x
    yw = l_inv @ yv
    q, r = np.linalg.qr(xw)
    if np.min(np.abs(np.diag(r))) < 1e-12 * np.max(np.abs(np.diag(r))):
        raise CalibrationFitError("the design matrix is rank deficient (too few distinct points)")
    r_inv = solve_triangular(r, np.eye(p))
    beta = r_inv @ (q.T @ yw)
    cov = r_inv @ r_inv.T
    # M = (XᵀV⁻¹X)⁻¹ XᵀV⁻¹ = R⁻¹ Qᵀ L⁻¹
    gain = r_inv @ q.T @ l_inv
    resid = yv - x @ beta
    rw = yw - xw @ beta
    chi2 = float(rw @ rw)
    dof = n - p
    birge = math.sqrt(chi2 / dof) if dof > 0 else math.nan
    scaled = False
    if dof > 0 and (
        scale_by_residuals == "always" or (scale_by_residuals == "if_larger" and birge > 1.0)
    ):
        cov = cov * birge**2
        scaled = True
    elif scale_by_residuals not in ("never", "if_larger", "always"):
        raise ValueError(f"unknown residual scaling {scale_by_residuals!r}")
    return LeastSquaresResult(beta, cov, gain, resid, chi2, dof, birge, scaled)


# --------------------------------------------------------------------------------------------
# Calibration points


def _frozen_array(values: Sequence[float] | np.ndarray, name: str) -> np.ndarray:
    a = np.array(values, dtype=float)
    if a.ndim != 1:
        raise ValueError(f"{name} must be a one-dimensional sequence")
    a.setflags(write=False)
    return a


@dataclass(frozen=True)
class CorrelatedComponent:
    """An uncertainty component fully correlated across the calibration points.

    ``relative_uncertainties[i]`` is the standard uncertainty it contributes to ln T_i
    (``quantity="temperature"``) or ln R_i (``quantity="resistance"``) at point i; all points
    move together, in proportion to these values. A bias-voltage gain error of the CBT is the
    same relative amount at every point; a model error may grow with the charging parameter.
    """

    name: str
    quantity: Literal["temperature", "resistance"]
    relative_uncertainties: np.ndarray
    note: str = ""

    def __post_init__(self) -> None:
        object.__setattr__(
            self,
            "relative_uncertainties",
            _frozen_array(self.relative_uncertainties, f"component {self.name!r}"),
        )
        if self.quantity not in ("temperature", "resistance"):
            raise ValueError(
                f"component {self.name!r}: quantity must be 'temperature' or 'resistance'"
            )
        u = self.relative_uncertainties
        if not np.all(np.isfinite(u)) or np.any(u < 0):
            raise ValueError(f"component {self.name!r}: uncertainties must be finite and >= 0")

    @classmethod
    def common(
        cls,
        name: str,
        quantity: Literal["temperature", "resistance"],
        relative: float,
        n_points: int,
        note: str = "",
    ) -> CorrelatedComponent:
        """The same relative uncertainty at every point (a gain, a scale factor)."""
        return cls(name, quantity, np.full(n_points, float(relative)), note)


@dataclass(frozen=True)
class CalibrationData:
    """Calibration points: the sensor's resistance and the reference temperature at each.

    ``u_ln_temperature`` and ``u_ln_resistance`` are the independent (point-to-point) relative
    standard uncertainties, e.g. the CBT posterior and the spread of the bridge readings during
    a sweep. ``ln_temperature_covariance``, if given, replaces the diagonal built from
    ``u_ln_temperature`` (for references from a global fit whose posteriors are correlated).
    """

    resistance_ohm: np.ndarray
    temperature_K: np.ndarray
    u_ln_temperature: np.ndarray
    u_ln_resistance: np.ndarray
    components: tuple[CorrelatedComponent, ...] = ()
    labels: tuple[str, ...] = ()
    ln_temperature_covariance: np.ndarray | None = None

    def __post_init__(self) -> None:
        for name in ("resistance_ohm", "temperature_K", "u_ln_temperature", "u_ln_resistance"):
            object.__setattr__(self, name, _frozen_array(getattr(self, name), name))
        n = self.resistance_ohm.size
        labels = tuple(self.labels) or tuple(f"point {i + 1}" for i in range(n))
        object.__setattr__(self, "labels", labels)
        object.__setattr__(self, "components", tuple(self.components))
        for name in ("temperature_K", "u_ln_temperature", "u_ln_resistance"):
            if getattr(self, name).size != n:
                raise ValueError(f"{name} has {getattr(self, name).size} values, expected {n}")
        if len(labels) != n:
            raise ValueError(f"{len(labels)} labels for {n} points")
        for i in range(n):
            r, t = self.resistance_ohm[i], self.temperature_K[i]
            if not (math.isfinite(r) and r > 0):
                raise ValueError(
                    f"{labels[i]}: resistance must be a positive number of ohm, got {r}"
                )
            if not (math.isfinite(t) and t > 0):
                raise ValueError(
                    f"{labels[i]}: temperature must be a positive number of kelvin, got {t}"
                )
            for name in ("u_ln_temperature", "u_ln_resistance"):
                u = getattr(self, name)[i]
                if not (math.isfinite(u) and u >= 0):
                    raise ValueError(f"{labels[i]}: {name} must be finite and >= 0, got {u}")
        for c in self.components:
            if c.relative_uncertainties.size != n:
                raise ValueError(
                    f"component {c.name!r} has {c.relative_uncertainties.size} values "
                    f"for {n} points"
                )
        if self.ln_temperature_covariance is not None:
            v = np.array(self.ln_temperature_covariance, dtype=float)
            if v.shape != (n, n) or not np.allclose(v, v.T):
                raise ValueError(f"ln_temperature_covariance must be a symmetric {n}x{n} matrix")
            v.setflags(write=False)
            object.__setattr__(self, "ln_temperature_covariance", v)

    @property
    def n_points(self) -> int:
        return int(self.resistance_ohm.size)

    def independent_ln_temperature_covariance(self) -> np.ndarray:
        if self.ln_temperature_covariance is not None:
            return np.array(self.ln_temperature_covariance)
        return np.diag(self.u_ln_temperature**2)


# --------------------------------------------------------------------------------------------
# The curve


@dataclass(frozen=True)
class CovariancePart:
    """One named share of the coefficient covariance (the parts add up to the total).

    Each part becomes one row of the budget of every temperature read from the curve.
    ``kind`` is the GUM evaluation type of the underlying input (4.2 / 4.3).
    """

    name: str
    covariance: np.ndarray
    kind: str = "B"
    degrees_of_freedom: float = math.inf
    correlated_across_points: bool = False
    note: str = ""

    def __post_init__(self) -> None:
        c = np.array(self.covariance, dtype=float)
        c.setflags(write=False)
        object.__setattr__(self, "covariance", c)


@dataclass(frozen=True)
class CurveTable:
    """Temperatures on a resistance grid with their uncertainties."""

    resistance_ohm: np.ndarray
    temperature_K: np.ndarray
    standard_uncertainty_K: np.ndarray
    expanded_uncertainty_K: np.ndarray
    coverage_factor: np.ndarray
    effective_degrees_of_freedom: np.ndarray
    coverage_probability: float
    sensitivity_dlnR_dlnT: np.ndarray
    in_range: np.ndarray  #: False where a resistance lay outside the calibrated range


@dataclass(frozen=True)
class CalibrationCurve:
    """ln T = Σ c_j T_j(x) on the calibrated range, with its coefficient covariance in parts.

    Chebyshev series in normalised ln R (common practice, no source); evaluation by
    numpy.polynomial.chebyshev.
    """

    coefficients: np.ndarray
    ln_resistance_min: float
    ln_resistance_max: float
    covariance_parts: tuple[CovariancePart, ...]

    def __post_init__(self) -> None:
        c = _frozen_array(self.coefficients, "coefficients")
        object.__setattr__(self, "coefficients", c)
        object.__setattr__(self, "covariance_parts", tuple(self.covariance_parts))
        if not self.ln_resistance_max > self.ln_resistance_min:
            raise ValueError("the calibrated range is empty")
        for part in self.covariance_parts:
            if part.covariance.shape != (c.size, c.size):
                raise ValueError(f"covariance part {part.name!r} has the wrong shape")

    @property
    def degree(self) -> int:
        return self.coefficients.size - 1

    @property
    def covariance(self) -> np.ndarray:
        """Total covariance of the coefficients (sum of the parts)."""
        return sum((p.covariance for p in self.covariance_parts), np.zeros((self.degree + 1,) * 2))

    @property
    def resistance_range_ohm(self) -> tuple[float, float]:
        return math.exp(self.ln_resistance_min), math.exp(self.ln_resistance_max)

    @property
    def temperature_range_K(self) -> tuple[float, float]:
        ends = np.exp(cheb.chebval(np.array([-1.0, 1.0]), self.coefficients))
        return float(ends.min()), float(ends.max())

    # -- evaluation ------------------------------------------------------------------------

    def _x(
        self, resistance: float | np.ndarray, strict: bool = True
    ) -> tuple[np.ndarray, np.ndarray]:
        r = np.atleast_1d(np.asarray(resistance, dtype=float))
        with np.errstate(divide="ignore", invalid="ignore"):
            x = normalise_log_resistance(r, self.ln_resistance_min, self.ln_resistance_max)
        inside = np.isfinite(x) & (np.abs(x) <= 1.0 + _RANGE_SLACK)
        if strict and not np.all(inside):
            bad = np.flatnonzero(~inside)
            lo, hi = self.resistance_range_ohm
            shown = ", ".join(f"index {i}: {r[i]:.6g} Ω" for i in bad[:5])
            more = f" and {bad.size - 5} more" if bad.size > 5 else ""
            raise OutOfRangeError(
                f"{bad.size} resistance value(s) outside the calibrated range "
                f"{lo:.6g}–{hi:.6g} Ω ({shown}{more}); the curve does not extrapolate"
            )
        return np.clip(np.where(inside, x, 0.0), -1.0, 1.0), inside

    def ln_temperature(self, resistance: float | np.ndarray) -> np.ndarray:
        x, _ = self._x(resistance)
        return cheb.chebval(x, self.coefficients)

    def dlnT_dlnR(self, resistance: float | np.ndarray) -> np.ndarray:
        """Slope of the curve, d ln T / d ln R = (dx/d ln R) Σ c_j T_j′(x)."""
        x, _ = self._x(resistance)
        return (
            cheb.chebval(x, cheb.chebder(self.coefficients))
            * 2.0
            / (self.ln_resistance_max - self.ln_resistance_min)
        )

    def sensitivity(self, resistance: float | np.ndarray) -> np.ndarray:
        """Dimensionless sensitivity d ln R / d ln T (negative for RuO₂, Ge, carbon)."""
        return 1.0 / self.dlnT_dlnR(resistance)

    def _u_parts(self, x: np.ndarray) -> np.ndarray:
        g = chebyshev_design(x, self.degree)
        return np.sqrt(
            np.maximum(
                [np.einsum("ij,jk,ik->i", g, p.covariance, g) for p in self.covariance_parts], 0.0
            )
        )

    def ln_temperature_covariance(self, resistance: float | np.ndarray) -> np.ndarray:
        """Covariance of ln T between resistances (the table's points are correlated)."""
        x, _ = self._x(resistance)
        g = chebyshev_design(x, self.degree)
        return g @ self.covariance @ g.T

    def temperature(
        self, resistance: float | np.ndarray, u_ln_resistance: float | np.ndarray = 0.0
    ) -> tuple[np.ndarray, np.ndarray]:
        """T(R) and its standard uncertainty u(T), both in K.

        u²(ln T) = gᵀ C g + (d ln T/d ln R)² u²(ln R), with g the Chebyshev basis at x(R) and C
        the coefficient covariance (GUM 5.1.2 / 5.2.2); ``u_ln_resistance`` is the relative
        uncertainty of the user's own reading. Refuses resistances outside the range.
        """
        x, _ = self._x(resistance)
        t = np.exp(cheb.chebval(x, self.coefficients))
        parts = self._u_parts(x)
        slope = self.dlnT_dlnR(resistance)
        u_ln = np.sqrt(np.sum(parts**2, axis=0) + (slope * np.asarray(u_ln_resistance)) ** 2)
        return t, t * u_ln

    def budget(
        self, resistance: float, u_ln_resistance: float = 0.0, coverage_probability: float = 0.95
    ) -> gum.Budget:
        """GUM budget of T at one resistance: one row per covariance part (plus the reading)."""
        x, _ = self._x(resistance)
        t = float(np.exp(cheb.chebval(x, self.coefficients))[0])
        parts = self._u_parts(x)[:, 0]
        rows = [
            gum.BudgetRow(
                quantity=p.name,
                estimate=0.0,
                standard_uncertainty=float(u),
                unit="1",
                kind=p.kind,
                distribution="normal",
                sensitivity=t,
                degrees_of_freedom=p.degrees_of_freedom,
                sensitivity_unit="K",
                note=(
                    "relative uncertainty of T carried through the curve fit"
                    + ("; common to all points" if p.correlated_across_points else "")
                    + (f"; {p.note}" if p.note else "")
                ),
            )
            for p, u in zip(self.covariance_parts, parts, strict=True)
        ]
        if u_ln_resistance > 0:
            slope = float(self.dlnT_dlnR(resistance)[0])
            rows.append(
                gum.BudgetRow(
                    quantity="resistance reading (user)",
                    estimate=float(resistance),
                    standard_uncertainty=float(u_ln_resistance) * float(resistance),
                    unit="ohm",
                    kind="B",
                    distribution="normal",
                    sensitivity=t * slope / float(resistance),
                    sensitivity_unit="K/ohm",
                )
            )
        return gum.combine(
            f"temperature at R = {float(resistance):.6g} ohm",
            "K",
            t,
            rows,
            coverage_probability=coverage_probability,
        )

    def table(
        self,
        resistance: np.ndarray | None = None,
        *,
        points: int = 41,
        u_ln_resistance: float | np.ndarray = 0.0,
        coverage_probability: float = 0.95,
        out_of_range: Literal["refuse", "mark"] = "refuse",
    ) -> CurveTable:
        """T(R), u(T) and U(T) on a grid (default: ``points`` log-spaced over the range).

        U = k u_c with k from Student's t at the Welch-Satterthwaite ν_eff of the parts
        (analysis.budget; GUM G.4.1, G.3). ``out_of_range="mark"`` returns NaN with
        ``in_range`` False for resistances outside the range instead of refusing them.
        """
        if resistance is None:
            lo, hi = self.resistance_range_ohm
            resistance = np.geomspace(lo, hi, points)
            resistance[0], resistance[-1] = lo, hi
        r = np.atleast_1d(np.asarray(resistance, dtype=float))
        if out_of_range not in ("refuse", "mark"):
            raise ValueError(f"out_of_range must be 'refuse' or 'mark', got {out_of_range!r}")
        x, inside = self._x(r, strict=out_of_range == "refuse")
        t = np.exp(cheb.chebval(x, self.coefficients))
        slope = (
            cheb.chebval(x, cheb.chebder(self.coefficients))
            * 2.0
            / (self.ln_resistance_max - self.ln_resistance_min)
        )
        parts = self._u_parts(x) * t
        reading = np.abs(slope * np.broadcast_to(np.asarray(u_ln_resistance, float), r.shape)) * t
        contributions = np.vstack([parts, reading[None, :]])
        dofs = [p.degrees_of_freedom for p in self.covariance_parts] + [math.inf]
        u_c = np.sqrt(np.sum(contributions**2, axis=0))
        nu = np.array([gum.welch_satterthwaite(contributions[:, i], dofs) for i in range(r.size)])
        k_cache: dict[float, float] = {}
        k = np.empty(r.size)
        for i, v in enumerate(nu):
            key = math.inf if math.isinf(v) else float(math.floor(v))
            if key not in k_cache:
                k_cache[key] = gum.coverage_factor(key, coverage_probability)
            k[i] = k_cache[key]
        nan = np.where(inside, 1.0, np.nan)
        return CurveTable(
            resistance_ohm=r,
            temperature_K=t * nan,
            standard_uncertainty_K=u_c * nan,
            expanded_uncertainty_K=k * u_c * nan,
            coverage_factor=k * nan,
            effective_degrees_of_freedom=nu * nan,
            coverage_probability=coverage_probability,
            sensitivity_dlnR_dlnT=(1.0 / slope) * nan,
            in_range=inside,
        )


def convert_resistance_log(
    curve: CalibrationCurve,
    resistance_ohm: np.ndarray,
    *,
    u_ln_resistance: float | np.ndarray = 0.0,
    coverage_probability: float = 0.95,
    out_of_range: Literal["refuse", "mark"] = "refuse",
) -> CurveTable:
    """Temperatures with uncertainties for a log of sensor resistances (secondary use).

    By default any reading outside the calibrated range refuses the whole conversion with an
    error listing the offending entries; ``out_of_range="mark"`` keeps the in-range readings and
    returns NaN, flagged in ``in_range``, for the others.
    """
    r = np.asarray(resistance_ohm, dtype=float)
    if r.ndim != 1 or r.size == 0:
        raise ValueError("the resistance log must be a non-empty one-dimensional sequence")
    return curve.table(
        r,
        u_ln_resistance=u_ln_resistance,
        coverage_probability=coverage_probability,
        out_of_range=out_of_range,
    )


# --------------------------------------------------------------------------------------------
# Fitting


@dataclass(frozen=True)
class DegreeScore:
    degree: int
    chi_squared: float
    degrees_of_freedom: int
    aicc: float
    loo: float  #: weighted leave-one-out prediction error, mean e²/V_ii (nan if not computed)
    monotonic: bool


@dataclass(frozen=True)
class HoppingCheck:
    """Hopping form R = R₀ exp[(T₀/T)^p] fitted beside the series as a sanity check."""

    r0_ohm: float
    t0_K: float
    exponent: float
    chi_squared: float
    degrees_of_freedom: int
    max_relative_difference: float  #: max |T_hop/T_series − 1| over the calibrated range
    max_normalised_difference: float  #: max |ln T_hop − ln T_series| / u(ln T_series)
    at_resistance_ohm: float  #: where the normalised difference is largest
    note: str


@dataclass(frozen=True)
class CalibrationFit:
    """Everything a calibration produced: the curve, the points and how well they agree."""

    curve: CalibrationCurve
    data: CalibrationData
    criterion: str
    scores: tuple[DegreeScore, ...]
    residuals_ln_T: np.ndarray  #: ln T_i − curve(R_i)
    normalised_residuals: np.ndarray  #: residual / its standard deviation (leverage included)
    chi_squared: float
    degrees_of_freedom: int
    birge_ratio: float
    iterations: int
    hopping: HoppingCheck | None
    warnings: tuple[str, ...] = field(default_factory=tuple)

    @property
    def degree(self) -> int:
        return self.curve.degree


def _covariances(
    data: CalibrationData, slope: np.ndarray
) -> tuple[list[tuple[str, np.ndarray, CorrelatedComponent | None]], np.ndarray]:
    """Parts of Cov(ln T_i) in the effective-variance sense, and their sum.

    A resistance uncertainty u(ln R_i) enters ln T_i as (d ln T/d ln R)_i u(ln R_i)
    (Orear 1982, effective variance, from memory).
    """
    parts: list[tuple[str, np.ndarray, CorrelatedComponent | None]] = [
        (
            "reference temperatures (posterior)"
            if data.ln_temperature_covariance is not None
            else "reference temperatures (independent)",
            data.independent_ln_temperature_covariance(),
            None,
        ),
        (
            "sensor resistance readings (independent)",
            np.diag((slope * data.u_ln_resistance) ** 2),
            None,
        ),
    ]
    for c in data.components:
        v = c.relative_uncertainties * (slope if c.quantity == "resistance" else 1.0)
        parts.append((c.name, np.outer(v, v), c))
    total = sum((p[1] for p in parts), np.zeros((data.n_points, data.n_points)))
    return parts, total


def _slope_at(coef: np.ndarray, x: np.ndarray, half_span: float) -> np.ndarray:
    return cheb.chebval(x, cheb.chebder(coef)) / half_span


def _fit_degree(
    x: np.ndarray,
    y: np.ndarray,
    data: CalibrationData,
    degree: int,
    half_span: float,
    max_iterations: int = 50,
) -> tuple[LeastSquaresResult, np.ndarray, list, int]:
    design = chebyshev_design(x, degree)
    slope = np.zeros_like(x)
    # Start from the straight line through the end points' logs: a sensible slope for the
    # first effective variances.
    slope[:] = np.polyfit(x, y, 1)[0] / half_span
    previous = None
    for it in range(1, max_iterations + 1):
        parts, v = _covariances(data, slope)
        ls = generalised_least_squares(design, y, v)
        new_slope = _slope_at(ls.coefficients, x, half_span)
        if previous is not None and np.allclose(ls.coefficients, previous, rtol=1e-11, atol=1e-12):
            return ls, slope, parts, it
        previous = ls.coefficients
        slope = new_slope
    log.warning(
        "effective-variance iteration did not settle in %d steps (degree %d)",
        max_iterations,
        degree,
    )
    return ls, slope, parts, max_iterations


def _is_monotonic(coef: np.ndarray) -> bool:
    d = cheb.chebval(np.linspace(-1.0, 1.0, 801), cheb.chebder(coef))
    return bool(np.all(d < 0) or np.all(d > 0))


def _leave_one_out(x, y, data, degree, half_span, slope) -> float:
    """Weighted PRESS: mean of e_i²/V_ii over points, e_i the error of predicting point i from
    the others (leave-one-out cross-validation; Allen, Technometrics 16, 125 (1974), from memory).

    The weight is the point's own variance only. Dividing by the prediction's variance as well
    would reward a curve for being uncertain between the points, i.e. favour high degrees.
    Only the independent parts enter: a component common to all points shifts the left-out
    point and its prediction alike and cancels in the error.
    """
    n = x.size
    v_ind = data.independent_ln_temperature_covariance() + np.diag(
        (slope * data.u_ln_resistance) ** 2
    )
    design = chebyshev_design(x, degree)
    total = 0.0
    for i in range(n):
        keep = np.arange(n) != i
        ls = generalised_least_squares(design[keep], y[keep], v_ind[np.ix_(keep, keep)])
        err = y[i] - design[i] @ ls.coefficients
        total += err**2 / v_ind[i, i]
    return total / n


def maximum_degree(n_points: int) -> int:
    """Highest degree allowed for n points: about two points per coefficient, (d + 1) ≤ n/2."""
    return n_points // 2 - 1


def fit_calibration_curve(
    data: CalibrationData,
    *,
    degree: int | None = None,
    criterion: Criterion = "aicc",
    max_degree: int | None = None,
    residual_scaling: CurveScaling = "if_larger",
    hopping_check: bool = True,
) -> CalibrationFit:
    """Fit ln T as a Chebyshev series in normalised ln R, with errors in both variables.

    Generalised least squares with the full covariance of ln T, the resistance uncertainty
    carried through the slope and re-evaluated to convergence (effective variance, Orear 1982,
    from memory). Degree: given, or the minimum of AICc = χ² + 2p + 2p(p+1)/(n−p−1) (Hurvich &
    Tsai, Biometrika 76, 297 (1989), from memory) or of the mean squared normalised
    leave-one-out prediction error, over degrees 1 … min(max_degree, n/2 − 1) whose curve is
    monotonic over the range. With ``residual_scaling="if_larger"`` an excess scatter (Birge
    ratio B > 1) adds a Type A part (B² − 1) × (independent parts) with ν = n − p.
    """
    n = data.n_points
    if n < 4:
        raise CalibrationFitError(f"a calibration needs at least 4 points, got {n}")
    ln_r = np.log(data.resistance_ohm)
    # Repeated points at one resistance are welcome (they test reproducibility), but the curve
    # needs enough distinct resistances to be determined at all.
    distinct = np.unique(ln_r).size
    if distinct < 3:
        raise CalibrationFitError(
            f"the points cover only {distinct} distinct resistance(s); a curve needs at least 3"
        )
    y = np.log(data.temperature_K)
    lo, hi = float(ln_r.min()), float(ln_r.max())
    half_span = 0.5 * (hi - lo)
    x = normalise_log_resistance(data.resistance_ohm, lo, hi)
    top = min(maximum_degree(n), distinct - 1)
    if max_degree is not None:
        top = min(top, max_degree)
    if degree is not None:
        if degree < 1 or degree > maximum_degree(n):
            raise CalibrationFitError(
                f"degree {degree} needs {2 * (degree + 1)} points at two per coefficient; "
                f"{n} points allow degrees 1–{maximum_degree(n)}"
            )
        candidates = [degree]
    else:
        if top < 1:
            raise CalibrationFitError(f"{n} points are too few for any curve")
        candidates = list(range(1, top + 1))
    if residual_scaling not in ("never", "if_larger"):
        raise ValueError(
            f"residual_scaling must be 'never' or 'if_larger', got {residual_scaling!r}"
        )
    if criterion not in ("aicc", "loo"):
        raise ValueError(f"criterion must be 'aicc' or 'loo', got {criterion!r}")

    fits = {}
    scores = []
    for d in candidates:
        ls, slope, parts, its = _fit_degree(x, y, data, d, half_span)
        p = d + 1
        aicc = ls.chi_squared + 2 * p + 2 * p * (p + 1) / (n - p - 1)
        loo = _leave_one_out(x, y, data, d, half_span, slope) if criterion == "loo" else math.nan
        mono = _is_monotonic(ls.coefficients)
        scores.append(DegreeScore(d, ls.chi_squared, ls.degrees_of_freedom, aicc, loo, mono))
        fits[d] = (ls, slope, parts, its)
    acceptable = [s for s in scores if s.monotonic]
    if not acceptable:
        raise CalibrationFitError(
            "no candidate curve is monotonic over the calibrated range: check the points for "
            "a mislabelled resistance or temperature"
        )
    key = (lambda s: s.aicc) if criterion == "aicc" else (lambda s: s.loo)
    best = min(acceptable, key=key)
    ls, slope, parts, its = fits[best.degree]

    # Split Cov(β̂) = M V Mᵀ into one share per input (exact: the parts of V add up to V).
    m = ls.gain
    warnings: list[str] = []
    cov_parts: list[CovariancePart] = []
    independent = np.zeros_like(ls.covariance)
    for name, v, comp in parts:
        c = m @ v @ m.T
        if comp is None:
            independent = independent + c
            reference = name.startswith("reference temperatures")
            correlated = reference and data.ln_temperature_covariance is not None
            cov_parts.append(
                CovariancePart(
                    name,
                    c,
                    kind="A" if reference else "B",
                    correlated_across_points=correlated,
                    note=(
                        "reference posteriors, with their correlation between points"
                        if correlated
                        else "reference posteriors"
                        if reference
                        else "spread and noise of the resistance readings"
                    ),
                )
            )
        else:
            cov_parts.append(
                CovariancePart(name, c, kind="B", correlated_across_points=True, note=comp.note)
            )
    birge = ls.birge_ratio
    dof = ls.degrees_of_freedom
    if dof > 0 and birge > 1:
        # The enlargement applies whenever B > 1 (conservative); a warning only when the excess
        # is significant at the 5 % level (chi-squared test, common practice).
        significant = ls.chi_squared > 2.0 * special.gammaincinv(0.5 * dof, 0.95)  # χ²₀.₉₅(dof)
        if residual_scaling == "if_larger":
            cov_parts.append(
                CovariancePart(
                    "excess scatter of the points about the curve",
                    (birge**2 - 1.0) * independent,
                    kind="A",
                    degrees_of_freedom=float(dof),
                    note=f"Birge ratio {birge:.3g}: independent parts scaled by its square",
                )
            )
        if significant:
            warnings.append(
                f"the points scatter more than their uncertainties allow (Birge ratio "
                f"{birge:.3g}, chi2 = {ls.chi_squared:.3g} for {dof} degrees of freedom)"
                + (
                    "; the curve's uncertainty is enlarged accordingly"
                    if residual_scaling == "if_larger"
                    else ""
                )
            )
    if best.degree == top and degree is None and top > 1:
        warnings.append(
            f"the criterion chose the highest degree allowed ({top}); more points "
            "would let the curve follow the data more freely"
        )
    if not all(s.monotonic for s in scores):
        rejected = [s.degree for s in scores if not s.monotonic]
        warnings.append(f"degrees {rejected} rejected: their curves are not monotonic")

    curve = CalibrationCurve(ls.coefficients, lo, hi, tuple(cov_parts))
    design = chebyshev_design(x, best.degree)
    v_total = sum((v for _, v, _ in parts), np.zeros((n, n)))
    unscaled = np.linalg.inv(design.T @ np.linalg.solve(v_total, design))
    resid_var = np.diag(v_total - design @ unscaled @ design.T)
    normalised = ls.residuals / np.sqrt(np.maximum(resid_var, 1e-300))
    hop = _hopping_check(data, curve, slope) if hopping_check else None
    return CalibrationFit(
        curve=curve,
        data=data,
        criterion=criterion if degree is None else "fixed degree",
        scores=tuple(scores),
        residuals_ln_T=ls.residuals,
        normalised_residuals=normalised,
        chi_squared=ls.chi_squared,
        degrees_of_freedom=dof,
        birge_ratio=birge,
        iterations=its,
        hopping=hop,
        warnings=tuple(warnings),
    )


def _hopping_check(
    data: CalibrationData, curve: CalibrationCurve, slope_lnT_lnR: np.ndarray
) -> HoppingCheck | None:
    """Fit ln R = ln R₀ + (T₀/T)^p (variable-range hopping; Mott, Phil. Mag. 19, 835 (1969) for
    p = 1/4, Efros & Shklovskii, J. Phys. C 8, L49 (1975) for p = 1/2; from memory) and compare.
    """
    ln_r = np.log(data.resistance_ohm)
    t = data.temperature_K
    # Independent uncertainties expressed in ln R: u(ln R)² + (d ln R/d ln T)² u(ln T)².
    u_lnt = np.sqrt(np.diag(data.independent_ln_temperature_covariance()))
    sigma = np.sqrt(data.u_ln_resistance**2 + (u_lnt / slope_lnT_lnR) ** 2)

    def resid(theta):
        ln_r0, ln_t0, p = theta
        return (ln_r - ln_r0 - np.exp(p * (ln_t0 - np.log(t)))) / sigma

    best = None
    for p0 in (0.25, 0.35, 0.5):
        a = np.exp(-p0 * np.log(t))
        slope, intercept = np.polyfit(a, ln_r, 1)
        if slope <= 0:
            continue
        start = (intercept, math.log(slope) / p0, p0)
        try:
            r = optimize.least_squares(
                resid, start, bounds=([-np.inf, -np.inf, 0.05], [np.inf, np.inf, 2.0])
            )
        except ValueError:
            continue
        if best is None or r.cost < best.cost:
            best = r
    if best is None or not best.success:
        return None
    ln_r0, ln_t0, p = best.x
    chi2 = float(2 * best.cost)
    dof = data.n_points - 3
    lo, hi = curve.resistance_range_ohm
    grid = np.geomspace(lo, hi, 201)
    grid[0], grid[-1] = lo, hi
    excess = np.log(grid) - ln_r0
    note = ""
    if np.any(excess <= 0):
        note = "the hopping form has no solution over part of the range"
        excess = np.maximum(excess, 1e-300)
    ln_t_hop = ln_t0 - np.log(excess) / p
    ln_t_series = curve.ln_temperature(grid)
    _, u_t = curve.temperature(grid)
    u_ln = u_t / np.exp(ln_t_series)
    diff = ln_t_hop - ln_t_series
    i = int(np.argmax(np.abs(diff) / u_ln))
    if not note:
        note = f"exponent p = {p:.3f}" + (
            "" if 0.2 <= p <= 0.6 else " (outside the usual 1/4 to 1/2 of hopping)"
        )
    return HoppingCheck(
        r0_ohm=float(math.exp(ln_r0)),
        t0_K=float(math.exp(ln_t0)),
        exponent=float(p),
        chi_squared=chi2,
        degrees_of_freedom=dof,
        max_relative_difference=float(np.max(np.abs(np.expm1(diff)))),
        max_normalised_difference=float(np.abs(diff[i]) / u_ln[i]),
        at_resistance_ohm=float(grid[i]),
        note=note,
    )


# --------------------------------------------------------------------------------------------
# A simulated sensor, for demonstrations and recovery tests only


@dataclass(frozen=True)
class SimulatedSensor:
    """An invented RuO₂-like resistance thermometer (not a published device).

    ln R = ln R₀ + (T₀/T)^p + b sin(ln(T / 1 K)): a hopping-like rise towards low temperature
    with a smooth departure from the pure hopping form, so that no simple form fits it exactly.
    Defaults give about 2.2 kΩ at 1 K and 24 kΩ at 10 mK.
    """

    r0_ohm: float = 1000.0
    t0_K: float = 0.45
    exponent: float = 0.32
    ripple: float = 0.03

    def resistance(self, temperature: float | np.ndarray) -> np.ndarray:
        t = np.asarray(temperature, dtype=float)
        return self.r0_ohm * np.exp(
            (self.t0_K / t) ** self.exponent + self.ripple * np.sin(np.log(t))
        )

    def temperature(self, resistance: float | np.ndarray) -> np.ndarray:
        """Inverse of :meth:`resistance` by bracketed root finding on ln T (1e-5 K to 100 K)."""
        r = np.atleast_1d(np.asarray(resistance, dtype=float))
        out = np.empty(r.size)
        for i, ri in enumerate(r):
            target = math.log(ri)
            out[i] = math.exp(
                optimize.brentq(
                    lambda lt, target=target: (
                        math.log(float(self.resistance(math.exp(lt)))) - target
                    ),
                    math.log(1e-5),
                    math.log(100.0),
                    xtol=1e-14,
                )
            )
        return out


@dataclass(frozen=True)
class SimulatedCalibration:
    data: CalibrationData
    true_temperature_K: np.ndarray
    true_resistance_ohm: np.ndarray
    temperature_gain_error: float  #: the common relative error drawn for the reference
    resistance_gain_error: float


def simulate_calibration(
    sensor: SimulatedSensor,
    temperatures_K: Sequence[float] | np.ndarray,
    seed: int,
    *,
    u_ln_temperature: float = 0.004,
    u_ln_resistance: float = 2e-4,
    temperature_gain_uncertainty: float = 0.003,
    resistance_gain_uncertainty: float = 1e-4,
) -> SimulatedCalibration:
    """Noisy calibration points of a simulated sensor (demos and recovery tests only).

    Each reference temperature gets an independent relative error N(0, u_ln_temperature) and a
    common one N(0, temperature_gain_uncertainty) (a CBT bias-gain error); each resistance an
    independent N(0, u_ln_resistance) and a common bridge-gain error. All draws from
    numpy.random.default_rng(seed).
    """
    rng = np.random.default_rng(seed)
    t_true = np.asarray(temperatures_K, dtype=float)
    r_true = sensor.resistance(t_true)
    n = t_true.size
    gain_t = rng.normal(0.0, temperature_gain_uncertainty)
    gain_r = rng.normal(0.0, resistance_gain_uncertainty)
    t_obs = t_true * np.exp(gain_t + rng.normal(0.0, u_ln_temperature, n))
    r_obs = r_true * np.exp(gain_r + rng.normal(0.0, u_ln_resistance, n))
    components = []
    if temperature_gain_uncertainty > 0:
        components.append(
            CorrelatedComponent.common(
                "CBT bias-voltage gain",
                "temperature",
                temperature_gain_uncertainty,
                n,
                "scales every reference temperature alike",
            )
        )
    if resistance_gain_uncertainty > 0:
        components.append(
            CorrelatedComponent.common(
                "bridge calibration (gain)",
                "resistance",
                resistance_gain_uncertainty,
                n,
                "scales every resistance reading alike",
            )
        )
    data = CalibrationData(
        resistance_ohm=r_obs,
        temperature_K=t_obs,
        u_ln_temperature=np.full(n, u_ln_temperature),
        u_ln_resistance=np.full(n, u_ln_resistance),
        components=tuple(components),
        labels=tuple(f"simulated point {i + 1}" for i in range(n)),
    )
    return SimulatedCalibration(data, t_true, r_true, gain_t, gain_r)
