"""Drift of a calibrated quantity over its calibration history.

An item calibrated again and again (a sensor's temperature at a fixed resistance, a CBT's
charging energy, a pump's deviation from n·e·f) leaves a short series of values y_i at dates t_i,
each with its standard uncertainty u_i. Three descriptions of how the true value x(t) moves are
fitted to the series, all of them Gaussian so that one likelihood compares them:

* **stable**: x(t) = a, the item does not drift;
* **linear drift**: x(t) = a + b (t − t₁), weighted least squares with weights 1/u_i²;
* **random walk**: x(t) = a + w(t), where w is a Wiener process started at the first calibration,
  Var[w(t) − w(s)] = q |t − s| (the local-level model of Durbin & Koopman, *Time Series Analysis by
  State Space Methods*, 2nd ed. 2012, ch. 2, from memory). The item wanders with no preferred
  direction; its best estimate is the recent calibrations, and the uncertainty of any prediction
  grows with the square root of the time since the last one.

In every model y = X β + ε with Cov(ε) = D + q K, where D = diag(u_i²), K_ij = min(t_i, t_j) − t₁,
and q = 0 except for the random walk. β is the generalised least-squares estimate; q maximises
the likelihood with β profiled out. The model is chosen by the corrected Akaike information
criterion AICc = −2 ln L + 2k + 2k(k + 1)/(n − k − 1) (Hurvich & Tsai, Biometrika 76, 297
(1989), from memory), with k = 1 for the stable item and k = 2 for the others. AICc, rather than
a likelihood-ratio test, because the two drift models are not nested in each other and the
histories are short (three to ten calibrations), where the uncorrected AIC favours extra
parameters. A model is a candidate only when n ≥ k + 2, so that its correction is finite.

Predictions at a later date are the best linear unbiased predictor of x(t) given the series (the
universal-kriging predictor and its variance, Cressie, *Statistics for Spatial Data*, 1993,
eq. 3.4.57–3.4.59, from memory), which for q = 0 reduces to the least-squares line and its
covariance. A new calibration is judged against the prediction with the E_n number of
ISO 13528:2015 (E_n = |x − X| / √(U_x² + U_X²)); E_n > 1 means it departs by more than the two
expanded uncertainties allow.

Times are in days (floats, any origin); the caller converts dates.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Literal

import numpy as np
from scipy import optimize, special

from analysis import budget as gum

DriftKind = Literal["stable", "linear", "random_walk"]
DRIFT_KINDS: tuple[DriftKind, ...] = ("stable", "linear", "random_walk")
_PARAMETERS = {"stable": 1, "linear": 2, "random_walk": 2}
DAYS_PER_YEAR = 365.25


class HistoryError(ValueError):
    """A calibration history that cannot support the requested analysis."""


def _frozen(values: Sequence[float] | np.ndarray, name: str) -> np.ndarray:
    a = np.array(values, dtype=float)
    if a.ndim != 1:
        raise HistoryError(f"{name} must be a one-dimensional sequence")
    a.setflags(write=False)
    return a


@dataclass(frozen=True)
class CalibrationHistory:
    """Successive calibration results of one quantity of one item, in time order.

    ``standard_uncertainties`` are the standard uncertainties u_i (not U = k u) of each value.
    Two calibrations on the same day are allowed; dates out of order are refused, so that a
    mislabelled date is noticed rather than silently sorted.
    """

    time_days: np.ndarray
    values: np.ndarray
    standard_uncertainties: np.ndarray
    labels: tuple[str, ...] = ()
    quantity: str = ""
    unit: str = ""

    def __post_init__(self) -> None:
        for name in ("time_days", "values", "standard_uncertainties"):
            object.__setattr__(self, name, _frozen(getattr(self, name), name))
        n = self.values.size
        labels = tuple(self.labels) or tuple(f"calibration {i + 1}" for i in range(n))
        object.__setattr__(self, "labels", labels)
        if n == 0:
            raise HistoryError("the history holds no calibration")
        for name in ("time_days", "standard_uncertainties"):
            if getattr(self, name).size != n:
                raise HistoryError(f"{name} has {getattr(self, name).size} values, expected {n}")
        if len(labels) != n:
            raise HistoryError(f"{len(labels)} labels for {n} calibrations")
        for i in range(n):
            t, y, u = self.time_days[i], self.values[i], self.standard_uncertainties[i]
            if not math.isfinite(t):
                raise HistoryError(f"{labels[i]}: the date is not a finite number of days")
            if not math.isfinite(y):
                raise HistoryError(f"{labels[i]}: the value is not a finite number")
            if not (math.isfinite(u) and u > 0):
                raise HistoryError(
                    f"{labels[i]}: the standard uncertainty must be a positive number, got {u}"
                )
            if i and t < self.time_days[i - 1]:
                raise HistoryError(
                    f"{labels[i]}: dated {t:g} d, before {labels[i - 1]} ({self.time_days[i - 1]:g} d);"
                    " give the calibrations in time order"
                )

    @property
    def n(self) -> int:
        return int(self.values.size)

    @property
    def span_days(self) -> float:
        return float(self.time_days[-1] - self.time_days[0])


@dataclass(frozen=True)
class Prediction:
    """Predicted true value at a date, its standard uncertainty and coverage factor (95 %)."""

    time_days: float
    value: float
    standard_uncertainty: float
    coverage_factor: float

    @property
    def expanded_uncertainty(self) -> float:
        return self.coverage_factor * self.standard_uncertainty


@dataclass(frozen=True)
class DriftModel:
    """One fitted description of the history (see the module docstring).

    ``coefficients`` are (a,) for the stable item, (a, b) with b per day for the linear drift and
    (a,) for the random walk, whose wander is ``diffusion_per_day`` = q (variance per day). When
    the points scatter about a stable or linear fit more than their uncertainties allow (Birge
    ratio above one) the coefficient covariance is enlarged by χ²/ν and predictions use Student's
    t with ν = n − k (``scaled``); the likelihood and AICc use the stated uncertainties.
    """

    kind: DriftKind
    history: CalibrationHistory
    coefficients: np.ndarray
    coefficient_covariance: np.ndarray
    diffusion_per_day: float
    log_likelihood: float
    chi_squared: float
    degrees_of_freedom: int
    birge_ratio: float
    scaled: bool

    @property
    def parameters(self) -> int:
        return _PARAMETERS[self.kind]

    @property
    def aicc(self) -> float:
        """AICc (Hurvich & Tsai 1989, from memory); infinite when n < k + 2."""
        n, k = self.history.n, self.parameters
        if n < k + 2:
            return math.inf
        return -2.0 * self.log_likelihood + 2 * k + 2 * k * (k + 1) / (n - k - 1)

    @property
    def drift_per_day(self) -> float:
        return float(self.coefficients[1]) if self.kind == "linear" else 0.0

    @property
    def drift_standard_uncertainty_per_day(self) -> float:
        return math.sqrt(self.coefficient_covariance[1, 1]) if self.kind == "linear" else 0.0

    @property
    def coverage_factor(self) -> float:
        nu = self.degrees_of_freedom if self.scaled else math.inf
        return gum.coverage_factor(nu, 0.95)

    def _basis(self, t: np.ndarray) -> np.ndarray:
        t0 = self.history.time_days[0]
        if self.kind == "linear":
            return np.column_stack([np.ones_like(t), t - t0])
        return np.ones((t.size, 1))

    def _covariance(self) -> np.ndarray:
        return _covariance_matrix(self.history, self.diffusion_per_day)

    def predict(self, time_days: float) -> Prediction:
        """Best linear unbiased prediction of the true value x(t) and its uncertainty.

        Universal kriging (Cressie 1993, eq. 3.4.57–3.4.59, from memory):
        x̂ = x*ᵀβ̂ + k*ᵀV⁻¹(y − Xβ̂), var = k** − k*ᵀV⁻¹k* + mᵀ(XᵀV⁻¹X)⁻¹m with
        m = x* − XᵀV⁻¹k*, k*_i = q (min(t_i, t) − t₁), k** = q (t − t₁). With q = 0 this is the
        fitted line x*ᵀβ̂ and its variance x*ᵀ C x*.
        """
        t = float(time_days)
        if not math.isfinite(t):
            raise HistoryError("the prediction date is not a finite number of days")
        h = self.history
        x_star = self._basis(np.array([t]))[0]
        if self.diffusion_per_day == 0.0:
            value = float(x_star @ self.coefficients)
            var = float(x_star @ self.coefficient_covariance @ x_star)
        else:
            if t < h.time_days[0]:
                raise HistoryError(
                    "a random-walk model cannot predict before the first calibration"
                )
            q = self.diffusion_per_day
            t0 = h.time_days[0]
            v = self._covariance()
            k_star = q * (np.minimum(h.time_days, t) - t0)
            x = self._basis(h.time_days)
            vinv_k = np.linalg.solve(v, k_star)
            resid = h.values - x @ self.coefficients
            value = float(x_star @ self.coefficients + vinv_k @ resid)
            m = x_star - x.T @ vinv_k
            var = float(q * (t - t0) - k_star @ vinv_k + m @ self.coefficient_covariance @ m)
        return Prediction(t, value, math.sqrt(max(var, 0.0)), self.coverage_factor)

    def change_after(self, elapsed_days: float | np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Mean and standard deviation of x(t_n + τ) − x(t_n), the change since the last calibration.

        Linear: b τ and u(b) τ; random walk: 0 and √(q τ) (the increments of a Wiener process are
        independent of its past); stable: 0 and 0. The uncertainty of q itself is not included.
        """
        tau = np.asarray(elapsed_days, dtype=float)
        if np.any(tau < 0):
            raise HistoryError("the elapsed time must not be negative")
        if self.kind == "linear":
            return self.drift_per_day * tau, self.drift_standard_uncertainty_per_day * tau
        if self.kind == "random_walk":
            return np.zeros_like(tau), np.sqrt(self.diffusion_per_day * tau)
        return np.zeros_like(tau), np.zeros_like(tau)


def _covariance_matrix(history: CalibrationHistory, q: float) -> np.ndarray:
    t = history.time_days
    v = np.diag(history.standard_uncertainties**2)
    if q > 0:
        v = v + q * (np.minimum.outer(t, t) - t[0])
    return v


def _gls(
    x: np.ndarray, y: np.ndarray, v: np.ndarray
) -> tuple[np.ndarray, np.ndarray, float, float]:
    """β̂ = (XᵀV⁻¹X)⁻¹XᵀV⁻¹y (Aitken 1935, from memory), its covariance, χ² and ln L.

    ln L = −½[rᵀV⁻¹r + ln det V + n ln 2π], the Gaussian log-likelihood at β̂.
    """
    chol = np.linalg.cholesky(v)
    xw = np.linalg.solve(chol, x)
    yw = np.linalg.solve(chol, y)
    beta, *_ = np.linalg.lstsq(xw, yw, rcond=None)
    cov = np.linalg.inv(xw.T @ xw)
    rw = yw - xw @ beta
    chi2 = float(rw @ rw)
    log_det = 2.0 * float(np.sum(np.log(np.diag(chol))))
    log_l = -0.5 * (chi2 + log_det + y.size * math.log(2.0 * math.pi))
    return beta, cov, chi2, log_l


def _fit_fixed(history: CalibrationHistory, kind: DriftKind, q: float) -> DriftModel:
    h = history
    t0 = h.time_days[0]
    if kind == "linear":
        x = np.column_stack([np.ones(h.n), h.time_days - t0])
    else:
        x = np.ones((h.n, 1))
    beta, cov, chi2, log_l = _gls(x, h.values, _covariance_matrix(h, q))
    dof = h.n - x.shape[1]
    birge = math.sqrt(chi2 / dof) if dof > 0 else math.nan
    scaled = kind != "random_walk" and dof > 0 and birge > 1.0
    if scaled:
        cov = cov * birge**2
    beta.setflags(write=False)
    cov.setflags(write=False)
    return DriftModel(kind, h, beta, cov, q, log_l, chi2, dof, birge, scaled)


def fit_stable(history: CalibrationHistory) -> DriftModel:
    """Weighted mean a = Σ y_i/u_i² / Σ 1/u_i² and u²(a) = 1/Σ 1/u_i² (Birge-scaled if χ²/ν > 1)."""
    return _fit_fixed(history, "stable", 0.0)


def fit_linear_drift(history: CalibrationHistory) -> DriftModel:
    """Weighted least-squares line y = a + b (t − t₁), weights 1/u_i² (Aitken 1935, from memory).

    Needs calibrations on at least two different dates.
    """
    if history.n < 2 or history.span_days <= 0:
        raise HistoryError("a drift rate needs calibrations on at least two different dates")
    return _fit_fixed(history, "linear", 0.0)


def fit_random_walk(history: CalibrationHistory) -> DriftModel:
    """Local-level model y_i = a + w(t_i) + ε_i, Var[dw] = q dt (Durbin & Koopman 2012, ch. 2).

    q is the maximum-likelihood value with a profiled out: a scan in half-decade steps over
    twelve decades around var(y)/span, refined by a bounded scalar search, and compared with q = 0 (the stable
    item), which wins ties. Needs calibrations on at least two different dates.
    """
    h = history
    if h.n < 2 or h.span_days <= 0:
        raise HistoryError("a random walk needs calibrations on at least two different dates")
    spread = float(np.var(h.values)) + float(np.mean(h.standard_uncertainties**2))
    q_typical = spread / h.span_days

    def neg_log_l(log_q: float) -> float:
        return -_fit_fixed(h, "random_walk", math.exp(log_q)).log_likelihood

    # Half-decade steps, then a bounded search between the neighbours of the best step.
    grid = np.linspace(
        math.log(q_typical) - 8 * math.log(10), math.log(q_typical) + 4 * math.log(10), 25
    )
    values = np.array([neg_log_l(g) for g in grid])
    i = int(np.argmin(values))
    lo, hi = grid[max(i - 1, 0)], grid[min(i + 1, grid.size - 1)]
    best_log_q, best = grid[i], values[i]
    if hi > lo:
        r = optimize.minimize_scalar(
            neg_log_l, bounds=(lo, hi), method="bounded", options={"xatol": 1e-6}
        )
        if r.fun < best:
            best_log_q, best = float(r.x), float(r.fun)
    at_zero = _fit_fixed(h, "random_walk", 0.0)
    if -at_zero.log_likelihood <= best:
        return at_zero
    return _fit_fixed(h, "random_walk", math.exp(best_log_q))


@dataclass(frozen=True)
class DriftAnalysis:
    """The candidate models, the one chosen by AICc, and the tests of the stable hypothesis."""

    history: CalibrationHistory
    candidates: tuple[DriftModel, ...]
    chosen: DriftModel
    criterion: str
    #: χ² of the values about their weighted mean and its p-value (the stable hypothesis)
    stable_chi_squared: float
    stable_p_value: float
    notes: tuple[str, ...] = field(default_factory=tuple)

    def model(self, kind: DriftKind) -> DriftModel | None:
        for m in self.candidates:
            if m.kind == kind:
                return m
        return None

    @property
    def interval_model(self) -> DriftModel | None:
        """The model a recall interval is computed from.

        The random walk when it is chosen; otherwise the linear drift whenever it can be
        fitted, even if the stable model is preferred: a drift too small to resolve is not a
        drift known to be zero, and its uncertainty bounds how long the item may go uncalibrated.
        """
        if self.chosen.kind == "random_walk":
            return self.chosen
        return self.model("linear")


def analyse_drift(history: CalibrationHistory) -> DriftAnalysis:
    """Fit the three models and choose the one with the smallest AICc among those with n ≥ k + 2.

    With a single calibration only the stable model exists and nothing is chosen by criterion;
    with two or three, only the stable model has a finite AICc (the notes say so).
    """
    h = history
    notes: list[str] = []
    candidates = [fit_stable(h)]
    if h.n >= 2 and h.span_days > 0:
        candidates.append(fit_linear_drift(h))
        candidates.append(fit_random_walk(h))
    elif h.n >= 2:
        notes.append("all calibrations share one date: no drift can be estimated")
    eligible = [m for m in candidates if math.isfinite(m.aicc)]
    if eligible:
        chosen = min(eligible, key=lambda m: (m.aicc, m.parameters))
        criterion = "AICc"
        skipped = [m.kind for m in candidates if not math.isfinite(m.aicc)]
        if skipped:
            notes.append(
                f"{h.n} calibrations are too few to judge {', '.join(skipped)} by AICc "
                "(a model with k parameters needs at least k + 2)"
            )
    else:
        chosen = candidates[0]
        criterion = "too few calibrations for a criterion"
        notes.append(f"{h.n} calibration(s): drift cannot be judged from fewer than three")
    stable = candidates[0]
    dof = h.n - 1
    p = float(special.chdtrc(dof, stable.chi_squared)) if dof > 0 else math.nan
    return DriftAnalysis(
        h, tuple(candidates), chosen, criterion, stable.chi_squared, p, tuple(notes)
    )


# --------------------------------------------------------------------------------------------
# E_n numbers


def en_number(
    value: float,
    expanded_uncertainty: float,
    reference: float,
    reference_expanded_uncertainty: float,
) -> float:
    """E_n = |x − X| / √(U_x² + U_X²) (ISO 13528:2015, the E_n score; both U at about 95 %).

    |E_n| ≤ 1 means the two values agree within their expanded uncertainties.
    """
    for name, u in (
        ("expanded uncertainty", expanded_uncertainty),
        ("reference expanded uncertainty", reference_expanded_uncertainty),
    ):
        if not (math.isfinite(u) and u >= 0):
            raise HistoryError(f"the {name} must be a finite number >= 0, got {u}")
    denominator = math.hypot(expanded_uncertainty, reference_expanded_uncertainty)
    if denominator == 0:
        raise HistoryError("E_n needs at least one non-zero expanded uncertainty")
    return float(abs(value - reference) / denominator)


@dataclass(frozen=True)
class DepartureCheck:
    """A calibration judged against the prediction from the history before it."""

    label: str
    time_days: float
    value: float
    expanded_uncertainty: float
    prediction: Prediction
    model: DriftKind
    en: float

    @property
    def departs(self) -> bool:
        """E_n > 1: the calibration departs from the item's drift model (ISO 13528)."""
        return bool(self.en > 1.0)


def check_new_calibration(
    model: DriftModel,
    time_days: float,
    value: float,
    expanded_uncertainty: float,
    label: str = "new calibration",
) -> DepartureCheck:
    """E_n of a new calibration against the model's prediction at its date (ISO 13528:2015)."""
    pred = model.predict(time_days)
    en = en_number(value, expanded_uncertainty, pred.value, pred.expanded_uncertainty)
    return DepartureCheck(
        label, float(time_days), float(value), float(expanded_uncertainty), pred, model.kind, en
    )


def sequential_checks(
    history: CalibrationHistory, coverage_factor: float = 2.0, minimum_earlier: int = 2
) -> tuple[DepartureCheck, ...]:
    """Each calibration from the (minimum_earlier + 1)-th on, against a model of the ones before.

    The model is the one :func:`analyse_drift` chooses on the earlier calibrations; the
    calibration's own U is ``coverage_factor`` × its standard uncertainty. Shows when an item
    first departed from its earlier behaviour.
    """
    if minimum_earlier < 1:
        raise HistoryError("at least one earlier calibration is needed for a prediction")
    h = history
    out = []
    for i in range(minimum_earlier, h.n):
        earlier = CalibrationHistory(
            h.time_days[:i],
            h.values[:i],
            h.standard_uncertainties[:i],
            h.labels[:i],
            h.quantity,
            h.unit,
        )
        chosen = analyse_drift(earlier).chosen
        out.append(
            check_new_calibration(
                chosen,
                h.time_days[i],
                h.values[i],
                coverage_factor * h.standard_uncertainties[i],
                h.labels[i],
            )
        )
    return tuple(out)


def successive_en(history: CalibrationHistory, coverage_factor: float = 2.0) -> np.ndarray:
    """E_n between each calibration and the one before it (ISO 13528:2015), U = k u for both.

    The calibrations are taken as independent. A component common to both (the same reference
    standard) cancels in their difference, so the true E_n would be larger: this check may miss
    a small change, never invent one.
    """
    h = history
    u = coverage_factor * h.standard_uncertainties
    return np.array(
        [en_number(h.values[i], u[i], h.values[i - 1], u[i - 1]) for i in range(1, h.n)]
    )


# --------------------------------------------------------------------------------------------
# Has the item changed?


@dataclass(frozen=True)
class Trend:
    """A device parameter across certificates (a CBT's E_C or G_T, a pump's deviation)."""

    analysis: DriftAnalysis
    successive_en: np.ndarray
    changed: bool
    reasons: tuple[str, ...]


def judge_trend(
    history: CalibrationHistory,
    coverage_factor: float = 2.0,
    significance: float = 0.05,
    analysis: DriftAnalysis | None = None,
) -> Trend:
    """Drift analysis plus a verdict: has the quantity moved beyond its uncertainties?

    Changed when two successive calibrations disagree (E_n > 1, ISO 13528:2015) or, with three
    or more, when the values are inconsistent with one constant value (χ² of the weighted mean
    above its (1 − significance) quantile, common practice, no source). A charging energy is
    fixed by the junction capacitances, so a CBT whose E_C moves has itself changed; its
    asymptotic conductance G_T follows the junction resistances, which age. ``analysis``, if
    given, is :func:`analyse_drift` of this same history (saves fitting it again).
    """
    h = history
    a = analysis if analysis is not None and analysis.history is h else analyse_drift(h)
    en = successive_en(h, coverage_factor) if h.n > 1 else np.zeros(0)
    reasons = [
        f"{h.labels[i + 1]} differs from {h.labels[i]} by E_n = {e:.2f}"
        for i, e in enumerate(en)
        if e > 1.0
    ]
    if h.n >= 3 and a.stable_p_value < significance:
        reasons.append(
            f"the {h.n} values are not consistent with one constant value "
            f"(chi2 = {a.stable_chi_squared:.3g} for {h.n - 1} degrees of freedom, "
            f"p = {a.stable_p_value:.2g})"
        )
    return Trend(a, en, bool(reasons), tuple(reasons))
