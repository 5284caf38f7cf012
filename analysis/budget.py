"""GUM uncertainty budgets.

A measurand y = f(x_1, ..., x_n) is replaced by its first-order Taylor expansion about the input
estimates (JCGM 100:2008, the GUM, clause 5). Each input contributes c_i u(x_i) to the combined
standard uncertainty, where c_i = df/dx_i is its sensitivity coefficient; with correlated inputs
u_c^2 = c^T V c (GUM eq. 13). The degrees of freedom of u_c follow from the Welch-Satterthwaite
formula (GUM G.4.1), the coverage factor from Student's t at the stated coverage probability
(GUM G.3, Table G.2), and reported figures are rounded as GUM 7.2.6 recommends.

Where the linearisation is in doubt, :func:`monte_carlo` propagates the distributions themselves
(JCGM 101:2008), giving probabilistically symmetric and shortest coverage intervals (JCGM 101
7.7) with the adaptive stopping rule of 7.9.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from decimal import ROUND_CEILING, ROUND_HALF_EVEN, Decimal

import numpy as np
from scipy import special

#: Divisors that turn a half-width a into a standard uncertainty (GUM 4.3.7, 4.3.9, 4.3.10 and
#: the arcsine (U-shaped) case of JCGM 101 6.4.6).
_DIVISORS = {
    "rectangular": math.sqrt(3.0),
    "triangular": math.sqrt(6.0),
    "arcsine": math.sqrt(2.0),
}
DISTRIBUTIONS = ("normal", "t", "rectangular", "triangular", "arcsine", "posterior")


def standard_uncertainty_from_half_width(half_width: float, distribution: str) -> float:
    """Standard uncertainty of an input known only to lie within ±half_width.

    GUM 4.3.7 (rectangular: a/√3), 4.3.9 (triangular: a/√6); arcsine a/√2 (JCGM 101 6.4.6).
    """
    if half_width < 0:
        raise ValueError(f"half-width must be non-negative, got {half_width}")
    try:
        return half_width / _DIVISORS[distribution]
    except KeyError:
        raise ValueError(
            f"unknown distribution {distribution!r}; expected one of {sorted(_DIVISORS)}"
        ) from None


def standard_uncertainty_from_expanded(expanded: float, coverage_factor: float) -> float:
    """Standard uncertainty from a quoted expanded uncertainty U and its k (GUM 4.3.3)."""
    if coverage_factor <= 0:
        raise ValueError(f"coverage factor must be positive, got {coverage_factor}")
    return expanded / coverage_factor


@dataclass(frozen=True)
class BudgetRow:
    """One input quantity of a GUM budget (one line of the table of GUM H.1, Table H.1)."""

    quantity: str
    estimate: float
    standard_uncertainty: float
    unit: str
    kind: str  # "A" or "B" (GUM 4.2, 4.3)
    distribution: str
    sensitivity: float
    degrees_of_freedom: float = math.inf
    sensitivity_unit: str = ""
    note: str = ""

    def __post_init__(self) -> None:
        if self.kind not in ("A", "B"):
            raise ValueError(f"{self.quantity}: evaluation type must be 'A' or 'B'")
        if self.distribution not in DISTRIBUTIONS:
            raise ValueError(f"{self.quantity}: unknown distribution {self.distribution!r}")
        if not (self.standard_uncertainty >= 0 and math.isfinite(self.standard_uncertainty)):
            raise ValueError(f"{self.quantity}: standard uncertainty must be finite and >= 0")
        if not self.degrees_of_freedom > 0:
            raise ValueError(f"{self.quantity}: degrees of freedom must be positive")

    @property
    def contribution(self) -> float:
        """|c_i| u(x_i), the row's uncertainty contribution in the measurand's unit (GUM 5.1.3)."""
        return abs(self.sensitivity) * self.standard_uncertainty


def welch_satterthwaite(contributions: Sequence[float], degrees_of_freedom: Sequence[float]) -> float:
    """Effective degrees of freedom ν_eff = u_c⁴ / Σ u_i⁴/ν_i (GUM G.4.1, eq. G.2b).

    Rows with infinite ν (well-known Type B inputs) add nothing to the denominator; if all rows are
    infinite, so is ν_eff.
    """
    u = np.asarray(contributions, dtype=float)
    nu = np.asarray(degrees_of_freedom, dtype=float)
    uc4 = float(np.sum(u**2)) ** 2
    finite = np.isfinite(nu)
    denom = float(np.sum(u[finite] ** 4 / nu[finite]))
    if uc4 == 0.0:
        return math.inf
    if denom == 0.0:
        return math.inf
    return uc4 / denom


def coverage_factor(degrees_of_freedom: float, coverage_probability: float = 0.95) -> float:
    """k = t_p(ν) from Student's t distribution (GUM G.3.4, Table G.2).

    GUM G.4.1 note 1 truncates a non-integer ν_eff to the next lower integer; we do the same so
    that the factor matches Table G.2.
    """
    if not 0 < coverage_probability < 1:
        raise ValueError("coverage probability must lie strictly between 0 and 1")
    tail = 0.5 * (1.0 + coverage_probability)
    if math.isinf(degrees_of_freedom):
        return float(special.ndtri(tail))  # the normal quantile
    nu = math.floor(degrees_of_freedom)
    if nu < 1:
        raise ValueError(f"degrees of freedom must be at least 1, got {degrees_of_freedom}")
    return float(special.stdtrit(nu, tail))  # Student t quantile


def degrees_of_freedom_from_reliability(relative_uncertainty_of_u: float) -> float:
    """ν ≈ ½ (Δu/u)⁻² for a Type B standard uncertainty whose own relative uncertainty is Δu/u.

    GUM G.4.2, eq. (G.3); the GUM's example there: judged reliable to about 25 % gives ν = 8.
    Δu/u = 0 (an input known exactly) gives ν = ∞.
    """
    r = float(relative_uncertainty_of_u)
    if r < 0 or not math.isfinite(r):
        raise ValueError(f"relative uncertainty of the uncertainty must be finite and >= 0, got {r}")
    return math.inf if r == 0 else 0.5 / r**2


@dataclass(frozen=True)
class Budget:
    """A combined GUM budget for one measurand."""

    measurand: str
    unit: str
    estimate: float
    rows: tuple[BudgetRow, ...]
    correlation: tuple[tuple[float, ...], ...] | None
    combined_standard_uncertainty: float
    effective_degrees_of_freedom: float
    coverage_probability: float
    coverage_factor: float
    expanded_uncertainty: float
    notes: tuple[str, ...] = field(default_factory=tuple)

    def as_dict(self) -> dict:
        """Plain-data form for records (JSON-friendly; infinities become None)."""

        def num(x: float) -> float | None:
            return None if (x is None or math.isinf(x)) else float(x)

        return {
            "measurand": self.measurand,
            "unit": self.unit,
            "estimate": float(self.estimate),
            "combined_standard_uncertainty": float(self.combined_standard_uncertainty),
            "effective_degrees_of_freedom": num(self.effective_degrees_of_freedom),
            "coverage_probability": float(self.coverage_probability),
            "coverage_factor": float(self.coverage_factor),
            "expanded_uncertainty": float(self.expanded_uncertainty),
            "rows": [
                {
                    "quantity": r.quantity,
                    "estimate": float(r.estimate),
                    "unit": r.unit,
                    "standard_uncertainty": float(r.standard_uncertainty),
                    "type": r.kind,
                    "distribution": r.distribution,
                    "sensitivity_coefficient": float(r.sensitivity),
                    "sensitivity_unit": r.sensitivity_unit,
                    "contribution": float(r.contribution),
                    "degrees_of_freedom": num(r.degrees_of_freedom),
                    "note": r.note,
                }
                for r in self.rows
            ],
            "correlation": None
            if self.correlation is None
            else [list(map(float, row)) for row in self.correlation],
            "notes": list(self.notes),
        }


def sensitivity_coefficients(
    model: Callable[..., float], estimates: Mapping[str, float], **fixed: object
) -> tuple[float, dict[str, float]]:
    """The model's value and its sensitivity coefficients c_i = ∂f/∂x_i at the input estimates
    (GUM 5.1.3), taken from the model function itself.

    The derivatives are exact first-order ones (automatic differentiation by the `uncertainties`
    package, which follows every arithmetic operation of the model), so a budget's sensitivities
    cannot drift apart from the measurement equation it states. The model must be written with
    operators (and ``uncertainties.umath`` for functions); ``fixed`` are keyword arguments that
    are not inputs of the budget. An input the model does not depend on has c_i = 0.
    """
    from uncertainties import ufloat  # here, not at the top: most budgets do not need it

    variables = {name: ufloat(float(x), 1.0, tag=name) for name, x in estimates.items()}
    y = model(**variables, **fixed)
    derivatives = getattr(y, "derivatives", {})
    value = float(getattr(y, "nominal_value", y))
    return value, {name: float(derivatives.get(v, 0.0)) for name, v in variables.items()}


def combine(
    measurand: str,
    unit: str,
    estimate: float,
    rows: Sequence[BudgetRow],
    correlation: np.ndarray | Sequence[Sequence[float]] | None = None,
    coverage_probability: float = 0.95,
    notes: Sequence[str] = (),
) -> Budget:
    """Combine input rows into u_c, ν_eff, k and U.

    u_c² = cᵀ V c with V_ij = r_ij u_i u_j (GUM 5.2.2, eq. 16). With correlated rows the
    Welch-Satterthwaite formula is not strictly valid (GUM G.4.1 assumes independence); we then
    apply it to the rows' contributions as is common practice (no source) and say so in the notes.
    """
    if not rows:
        raise ValueError(f"budget for {measurand} has no rows")
    c = np.array([r.sensitivity for r in rows], dtype=float)
    u = np.array([r.standard_uncertainty for r in rows], dtype=float)
    cu = c * u
    notes = list(notes)
    if correlation is None:
        uc2 = float(np.sum(cu**2))
        corr_t = None
    else:
        r = np.asarray(correlation, dtype=float)
        if r.shape != (len(rows), len(rows)):
            raise ValueError(f"correlation matrix must be {len(rows)}x{len(rows)}, got {r.shape}")
        if not np.allclose(r, r.T) or not np.allclose(np.diag(r), 1.0) or np.any(np.abs(r) > 1):
            raise ValueError("correlation matrix must be symmetric with unit diagonal, |r| <= 1")
        uc2 = float(cu @ r @ cu)
        if uc2 < 0:
            raise ValueError("correlation matrix is not positive semi-definite for these rows")
        corr_t = tuple(tuple(float(v) for v in row) for row in r)
        if np.any(np.abs(r - np.eye(len(rows))) > 0):
            notes.append(
                "correlated inputs: Welch-Satterthwaite applied to the row contributions "
                "(common practice; GUM G.4.1 assumes independent inputs)"
            )
    uc = math.sqrt(uc2)
    nu = welch_satterthwaite(np.abs(cu), [r.degrees_of_freedom for r in rows])
    k = coverage_factor(nu, coverage_probability)
    return Budget(
        measurand=measurand,
        unit=unit,
        estimate=float(estimate),
        rows=tuple(rows),
        correlation=corr_t,
        combined_standard_uncertainty=uc,
        effective_degrees_of_freedom=nu,
        coverage_probability=coverage_probability,
        coverage_factor=k,
        expanded_uncertainty=k * uc,
        notes=tuple(notes),
    )


def round_for_report(value: float, uncertainty: float, digits: int = 2, up: bool = False) -> tuple[str, str]:
    """Round an uncertainty to ``digits`` significant digits and the value to match (GUM 7.2.6).

    ``up=True`` rounds the uncertainty up rather than to nearest, which GUM 7.2.6 allows when
    rounding down would understate it. Returns decimal strings so no binary float re-enters.
    """
    if not (uncertainty > 0 and math.isfinite(uncertainty)):
        raise ValueError(f"uncertainty must be positive and finite, got {uncertainty}")
    if not math.isfinite(value):
        raise ValueError(f"value must be finite, got {value}")
    du = Decimal(repr(float(uncertainty)))
    exponent = du.adjusted() - (digits - 1)
    quantum = Decimal(1).scaleb(exponent)
    u_r = du.quantize(quantum, rounding=ROUND_CEILING if up else ROUND_HALF_EVEN)
    if u_r.adjusted() > du.adjusted():  # e.g. 0.0996 -> 0.10: keep `digits` significant digits
        quantum = Decimal(1).scaleb(exponent + 1)
        u_r = u_r.quantize(quantum)
    v_r = Decimal(repr(float(value))).quantize(quantum, rounding=ROUND_HALF_EVEN)
    return format(v_r, "f"), format(u_r, "f")


# --------------------------------------------------------------------------------------------
# JCGM 101 Monte Carlo propagation


@dataclass(frozen=True)
class MonteCarloResult:
    """Summary of a JCGM 101 propagation of distributions."""

    estimate: float
    standard_uncertainty: float
    coverage_probability: float
    symmetric_interval: tuple[float, float]
    shortest_interval: tuple[float, float]
    draws: int
    seed: int
    converged: bool


def coverage_intervals(values: np.ndarray, p: float) -> tuple[tuple[float, float], tuple[float, float]]:
    """Probabilistically symmetric and shortest coverage intervals (JCGM 101 7.7.1, 7.7.2)."""
    y = np.sort(np.asarray(values, dtype=float))
    m = y.size
    if m < 2:
        raise ValueError("coverage intervals need at least two values")
    q = int(p * m + 0.5)  # JCGM 101 7.7.1: q = pM rounded to an integer
    q = min(max(q, 1), m - 1)
    # JCGM 101 7.7.1: the interval is [y_(r), y_(r+q)], r = 1..M−q; with G(y_(r)) = (r − 1/2)/M
    # (7.5.1) it holds probability q/M = p.
    r_sym = int((m - q) / 2 + 0.5)
    r_sym = min(max(r_sym, 1), m - q)
    symmetric = (float(y[r_sym - 1]), float(y[r_sym + q - 1]))
    widths = y[q:] - y[: m - q]
    r = int(np.argmin(widths))
    shortest = (float(y[r]), float(y[r + q]))
    return symmetric, shortest


def monte_carlo(
    model: Callable[..., np.ndarray],
    samplers: Mapping[str, Callable[[np.random.Generator, int], np.ndarray]],
    seed: int,
    coverage_probability: float = 0.95,
    draws: int | None = None,
    tolerance: float | None = None,
    batch: int = 10_000,
    max_draws: int = 10_000_000,
) -> MonteCarloResult:
    """Propagate input distributions through ``model`` (JCGM 101:2008).

    ``samplers`` maps each input name to a function (rng, n) -> n draws; ``model`` takes the
    inputs as keyword arrays and returns n output values. With ``draws`` given, exactly that many
    are used. Otherwise the adaptive procedure of JCGM 101 7.9 runs batches until twice the standard
    deviations of the batch means of the estimate, its standard uncertainty and both interval
    ends are within ``tolerance`` (the numerical tolerance δ of 7.9.2; default: half a unit in the
    second significant digit of u, as 7.9.2 suggests for two significant digits).
    """
    if seed is None:
        raise ValueError("a seed is required so that the propagation can be reproduced")
    rng = np.random.default_rng(seed)

    def run(n: int) -> np.ndarray:
        inputs = {name: np.asarray(s(rng, n), dtype=float) for name, s in samplers.items()}
        return np.asarray(model(**inputs), dtype=float)

    if draws is not None:
        y = run(draws)
        sym, short = coverage_intervals(y, coverage_probability)
        return MonteCarloResult(
            float(np.mean(y)), float(np.std(y, ddof=1)), coverage_probability, sym, short, draws,
            seed, True,
        )

    chunks: list[np.ndarray] = []
    summaries: list[tuple[float, float, float, float]] = []
    converged = False
    total = 0
    while total < max_draws:
        y = run(batch)
        chunks.append(y)
        total += batch
        sym, _ = coverage_intervals(y, coverage_probability)
        summaries.append((float(np.mean(y)), float(np.std(y, ddof=1)), sym[0], sym[1]))
        if len(summaries) < 2:
            continue
        s = np.array(summaries)
        h = len(summaries)
        spread = 2.0 * s.std(axis=0, ddof=1) / math.sqrt(h)
        delta = tolerance
        if delta is None:
            u = float(np.mean(s[:, 1]))
            delta = 0.5 * 10.0 ** (math.floor(math.log10(u)) - 1) if u > 0 else 0.0
        if np.all(spread <= delta):
            converged = True
            break
    y = np.concatenate(chunks)
    sym, short = coverage_intervals(y, coverage_probability)
    return MonteCarloResult(
        float(np.mean(y)), float(np.std(y, ddof=1)), coverage_probability, sym, short, y.size,
        seed, converged,
    )
