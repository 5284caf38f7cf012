"""Plateau models of single-electron pumps, their fits, and the working point they predict.

A tunable-barrier pump captures electrons in a dot while its entrance barrier rises; each captured
electron is then ejected to the drain. Sweeping a gate voltage V moves the pump across current
plateaus I = n e f. How flat a plateau is tells how accurately the pump can deliver n e f, and the
shape of the steps tells which physics limits it:

* **decay cascade** (Kashcheyevs & Kaestner, PRL 104, 186805 (2010)): while the barrier closes,
  electrons escape back one by one at rates that fall exponentially with V; the mean number kept is
  ⟨n⟩ = Σ_k exp[−exp(−aV + Δ_k)] (their eq. for the universal cascade). Every step is a Gumbel
  (double-exponential) curve with the same slope a; the plateau n is flatter the larger
  δ_{n+1} = Δ_{n+1} − Δ_n.
* **thermal** (Fricke et al., PRL 110, 126803 (2013)): capture decided in thermal equilibrium with
  the lead gives symmetric logistic steps ⟨n⟩ = Σ_k 1/(1 + exp(−(V − V_k)/w_k)) whose widths grow
  with temperature.

Both models are fitted by least squares, then sampled (``analysis.sampling``); an information
criterion says which the data support. The working point is the inflection point of the plateau
(minimum slope), where the model predicts the smallest deviation of ⟨n⟩ from n; its posterior
distribution gives that prediction an uncertainty.

Parameter vectors (the coordinates in which we fit and sample, chosen so that the posterior is
nearly Gaussian):

* decay cascade: ``[a, c_1, …, c_K]`` with c_k = Δ_k / a the gate voltage at which step k has
  its steepest rise, so Δ_k = a c_k;
* thermal: ``[c_1, …, c_K, w_1, …, w_K]``.

Model functions accept a gate array of shape (m,) or (B, m) and parameters of shape (p,) or (B, p)
and return (m,) or (B, m): a whole ensemble of walkers is evaluated in one call.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from scipy import ndimage, optimize, special

from analysis.sampling import PosteriorResult, sample_posterior

log = logging.getLogger(__name__)

DECAY_CASCADE = "decay_cascade"
THERMAL = "thermal"
MODELS = (DECAY_CASCADE, THERMAL)

#: −aV + Δ_k at which a decay-cascade step reaches half height: exp(−exp(z)) = 1/2 (derived from
#: Kashcheyevs & Kaestner 2010).
HALF_HEIGHT_Z = math.log(math.log(2.0))

#: Width of a Gumbel step between 10 % and 90 % of its height, in units of 1/a (derived):
#: z from ln ln 10 to ln(−ln 0.9).
_GUMBEL_10_90 = math.log(math.log(10.0)) - math.log(-math.log(0.9))
#: Width of a logistic step between 10 % and 90 %, in units of w: 2 ln 9 (derived).
_LOGISTIC_10_90 = 2.0 * math.log(9.0)

_Z_MAX = 700.0  # exp(700) is finite; exp(−exp(700)) is already exactly 0.


class PlateauScanError(ValueError):
    """A plateau scan that cannot be analysed as asked (no plateau, too few steps, ...)."""


# --------------------------------------------------------------------------------------------
# Model functions


def _batch(gate: np.ndarray, params: np.ndarray) -> tuple[np.ndarray, np.ndarray, bool]:
    p = np.asarray(params, dtype=float)
    single = p.ndim == 1
    p = np.atleast_2d(p)
    g = np.asarray(gate, dtype=float)
    if g.ndim == 1:
        g = g[None, :]
    return g, p, single


def _out(x: np.ndarray, single: bool) -> np.ndarray:
    return x[0] if single else x


def _dc_z(gate: np.ndarray, params: np.ndarray) -> np.ndarray:
    """z_k = −aV + Δ_k = −a (V − c_k), shape (B, m, K)."""
    a = params[:, :1, None]
    c = params[:, None, 1:]
    return np.minimum(-a * (gate[..., None] - c), _Z_MAX)


def decay_cascade_mean(gate: np.ndarray, params: np.ndarray, baseline: int = 0) -> np.ndarray:
    """⟨n⟩(V) = n₀ + Σ_k exp[−exp(−aV + Δ_k)], Δ_k = a c_k.

    Kashcheyevs & Kaestner, PRL 104, 186805 (2010), decay-cascade expression for the mean number of
    captured electrons; n₀ counts steps completed below the scanned range.
    """
    g, p, single = _batch(gate, params)
    terms = np.exp(-np.exp(_dc_z(g, p)))
    return _out(baseline + terms.sum(axis=-1), single)


def decay_cascade_slope(gate: np.ndarray, params: np.ndarray) -> np.ndarray:
    """d⟨n⟩/dV = Σ_k a e^{z_k} exp(−e^{z_k}) for the decay cascade (derivative of the above)."""
    g, p, single = _batch(gate, params)
    ez = np.exp(_dc_z(g, p))
    return _out((p[:, :1, None] * ez * np.exp(-ez)).sum(axis=-1), single)


def decay_cascade_deviation(
    gate: np.ndarray, params: np.ndarray, plateau: int, baseline: int = 0
) -> np.ndarray:
    """⟨n⟩ − n on plateau n, computed without cancellation.

    Steps at or below the plateau contribute exp(−e^z) − 1 = expm1(−e^z), steps above it exp(−e^z):
    the deviation keeps full relative precision down to 1e-300 (same model as above).
    """
    g, p, single = _batch(gate, params)
    ez = np.exp(_dc_z(g, p))
    below = plateau - baseline
    dev = np.expm1(-ez[..., :below]).sum(axis=-1) + np.exp(-ez[..., below:]).sum(axis=-1)
    return _out(dev, single)


def _th_t(gate: np.ndarray, params: np.ndarray) -> np.ndarray:
    k = params.shape[1] // 2
    c = params[:, None, :k]
    w = params[:, None, k:]
    return (gate[..., None] - c) / w


def thermal_mean(gate: np.ndarray, params: np.ndarray, baseline: int = 0) -> np.ndarray:
    """⟨n⟩(V) = n₀ + Σ_k 1/(1 + exp(−(V − V_k)/w_k)).

    Thermal-equilibrium capture: Fricke et al., PRL 110, 126803 (2013); Zhao et al.,
    arXiv:1703.04795 (2017) (logistic steps whose width w_k grows with temperature).
    """
    g, p, single = _batch(gate, params)
    return _out(baseline + special.expit(_th_t(g, p)).sum(axis=-1), single)


def thermal_slope(gate: np.ndarray, params: np.ndarray) -> np.ndarray:
    """d⟨n⟩/dV = Σ_k σ(t_k) σ(−t_k) / w_k for the thermal model (derivative of the above)."""
    g, p, single = _batch(gate, params)
    t = _th_t(g, p)
    k = p.shape[1] // 2
    w = p[:, None, k:]
    return _out((special.expit(t) * special.expit(-t) / w).sum(axis=-1), single)


def thermal_deviation(
    gate: np.ndarray, params: np.ndarray, plateau: int, baseline: int = 0
) -> np.ndarray:
    """⟨n⟩ − n on plateau n for the thermal model, using σ(t) − 1 = −σ(−t) (no cancellation)."""
    g, p, single = _batch(gate, params)
    t = _th_t(g, p)
    below = plateau - baseline
    dev = -special.expit(-t[..., :below]).sum(axis=-1) + special.expit(t[..., below:]).sum(axis=-1)
    return _out(dev, single)


@dataclass(frozen=True)
class PlateauModel:
    """One plateau model behind a common interface, so that fits can swap models."""

    name: str
    mean: Callable[..., np.ndarray]
    slope: Callable[[np.ndarray, np.ndarray], np.ndarray]
    deviation: Callable[..., np.ndarray]
    source: str

    def parameter_names(self, steps: int) -> tuple[str, ...]:
        if self.name == DECAY_CASCADE:
            return ("a_per_V", *(f"c{k}_V" for k in range(1, steps + 1)))
        return (*(f"V{k}_V" for k in range(1, steps + 1)), *(f"w{k}_V" for k in range(1, steps + 1)))

    def steps(self, params: np.ndarray) -> int:
        n = np.shape(params)[-1]
        return n - 1 if self.name == DECAY_CASCADE else n // 2

    def centres(self, params: np.ndarray) -> np.ndarray:
        """Gate voltage of each step's steepest rise, shape (..., K)."""
        p = np.asarray(params, dtype=float)
        if self.name == DECAY_CASCADE:
            return p[..., 1:]
        return p[..., : p.shape[-1] // 2]

    def direction(self, params: np.ndarray) -> np.ndarray:
        """+1 where ⟨n⟩ grows with the gate voltage, −1 where it falls."""
        p = np.asarray(params, dtype=float)
        scale = p[..., 0] if self.name == DECAY_CASCADE else p[..., p.shape[-1] // 2]
        return np.sign(scale)


MODEL = {
    DECAY_CASCADE: PlateauModel(
        DECAY_CASCADE, decay_cascade_mean, decay_cascade_slope, decay_cascade_deviation,
        "Kashcheyevs & Kaestner, PRL 104, 186805 (2010)",
    ),
    THERMAL: PlateauModel(
        THERMAL, thermal_mean, thermal_slope, thermal_deviation,
        "Fricke et al., PRL 110, 126803 (2013); Zhao et al., arXiv:1703.04795 (2017)",
    ),
}


# --------------------------------------------------------------------------------------------
# Closed forms for the two-step decay cascade (used as checks and for quick estimates)


def cascade_inflection(delta: float) -> tuple[float, float]:
    """Inflection point x = aV and ⟨n⟩ − 1 there for steps Δ₁ = 0, Δ₂ = δ.

    Setting d²⟨n⟩/dx² = 0 for exp(−e^{−x}) + exp(−e^{δ−x}) and neglecting e^{−x} against 1 in the
    first step's curvature gives (y − 1) e^{−y} = e^{−δ} with y = e^{δ−x} (derived from
    Kashcheyevs & Kaestner 2010); solved here by Brent's method on the larger root.
    """
    if delta <= 2.0:
        raise ValueError(f"the two-step closed form needs δ > 2 for a plateau, got {delta}")
    f = lambda y: math.log(y - 1.0) - y + delta  # noqa: E731 - log of (y − 1)e^{−y} = e^{−δ}
    y = optimize.brentq(f, 2.0, delta + math.log(delta) + 10.0, xtol=1e-14)
    x = delta - math.log(y)
    dev = math.expm1(-math.exp(-x)) + math.exp(-y)
    return x, dev


# --------------------------------------------------------------------------------------------
# Reading a scan: direction, baseline, number of steps, plateaus


@dataclass(frozen=True)
class ScanShape:
    """What a first look at a scan shows, before any fit."""

    direction: int  # +1: current grows with gate voltage
    baseline: int  # whole plateaus completed before the scan starts
    steps: int  # steps (rising edges) inside the scan
    plateaus: tuple[int, ...]  # plateau levels n ≥ 1 on which the scan dwells
    smoothed: np.ndarray  # median-filtered ⟨n⟩ in gate order


def _smooth(y: np.ndarray) -> np.ndarray:
    width = max(3, (y.size // 50) | 1)
    return ndimage.median_filter(y, size=width, mode="nearest")


def inspect_scan(gate: np.ndarray, electrons: np.ndarray, tolerance: float = 0.02) -> ScanShape:
    """Direction, baseline, step count and the plateaus a scan reaches.

    ``electrons`` is I/(e f). A plateau at level n ≥ 1 counts when at least max(5, 5 %) of the
    points in a row lie within a band of n after a median filter: ``tolerance``, or three times
    the filtered noise if that is larger (robust noise from the median absolute first difference).
    A steady ramp through a level stays inside a ±0.02 band for only 0.04/rise of its points, so
    it is not mistaken for a plateau (common practice, no source). Raises
    :class:`PlateauScanError` for a scan that never reaches a plateau.
    """
    gate = np.asarray(gate, dtype=float)
    y = np.asarray(electrons, dtype=float)
    if gate.shape != y.shape or gate.ndim != 1:
        raise PlateauScanError("gate voltage and current must be one-dimensional and of equal length")
    if gate.size < 20:
        raise PlateauScanError(f"a plateau scan needs at least 20 points, got {gate.size}")
    if not np.all(np.isfinite(gate)) or not np.all(np.isfinite(y)):
        raise PlateauScanError("the scan contains non-finite values")
    order = np.argsort(gate, kind="stable")
    ys = _smooth(y[order])
    tenth = max(2, ys.size // 10)
    lo_mean, hi_mean = float(np.mean(ys[:tenth])), float(np.mean(ys[-tenth:]))
    direction = 1 if hi_mean >= lo_mean else -1
    along = ys if direction > 0 else ys[::-1]
    baseline = max(0, int(round(float(np.median(along[:tenth])))))
    top = float(np.max(along))
    steps = max(0, math.ceil(top - 0.15) - baseline)

    need = max(5, int(0.05 * ys.size))
    raw_sorted = y[order]
    noise = 1.4826 * float(np.median(np.abs(np.diff(raw_sorted)))) / math.sqrt(2.0)
    width = max(3, (y.size // 50) | 1)
    tolerance = max(tolerance, 3.0 * noise / math.sqrt(width))
    plateaus = []
    for level in range(max(1, baseline), int(math.floor(top + tolerance)) + 1):
        near = np.abs(ys - level) < tolerance
        if _longest_run(near) >= need:
            plateaus.append(level)
    if not plateaus:
        raise PlateauScanError(
            f"the scan never reaches a current plateau: no run of {need} points lies within "
            f"{tolerance:.2g} e·f of a whole number of electrons per cycle (highest level "
            f"{top:.3g} e·f); check the frequency and the gate range"
        )
    return ScanShape(direction, baseline, steps, tuple(plateaus), along)


def _longest_run(mask: np.ndarray) -> int:
    if not mask.any():
        return 0
    padded = np.concatenate(([0], mask.astype(np.int8), [0]))
    edges = np.flatnonzero(np.diff(padded))
    return int(np.max(edges[1::2] - edges[::2]))


# --------------------------------------------------------------------------------------------
# Least-squares fits


@dataclass(frozen=True)
class PlateauFit:
    """Least-squares fit of one plateau model to ⟨n⟩ = I/(e f)."""

    model: str
    parameters: np.ndarray  # model parameter vector (module docstring)
    offset: float  # current offset in units of e·f
    covariance: np.ndarray  # of [parameters..., offset], from the Jacobian and σ̂²
    names: tuple[str, ...]
    baseline: int
    direction: int
    noise: float  # σ̂ = √(RSS/m), e·f units (maximum-likelihood)
    log_likelihood: float  # Gaussian, at σ̂
    n_points: int
    aic: float
    bic: float
    success: bool
    message: str

    @property
    def n_free(self) -> int:
        """Free parameters counted by the information criteria: shape, offset and noise."""
        return self.parameters.size + 2

    def predict(self, gate: np.ndarray) -> np.ndarray:
        return MODEL[self.model].mean(gate, self.parameters, self.baseline) + self.offset

    def standard_errors(self) -> np.ndarray:
        return np.sqrt(np.clip(np.diag(self.covariance), 0.0, None))


def _step_edges(gate_sorted: np.ndarray, along: np.ndarray, level: float, direction: int) -> float:
    """Gate voltage at which the smoothed scan first reaches ``level`` (direction-aware)."""
    g = gate_sorted if direction > 0 else gate_sorted[::-1]
    idx = np.flatnonzero(along >= level)
    if idx.size == 0:
        return math.nan
    i = int(idx[0])
    if i == 0:
        return float(g[0])
    y0, y1 = along[i - 1], along[i]
    frac = (level - y0) / (y1 - y0) if y1 != y0 else 0.5
    return float(g[i - 1] + frac * (g[i] - g[i - 1]))


def _initial_guess(
    model: str, gate: np.ndarray, shape: ScanShape, steps: int
) -> tuple[np.ndarray, float]:
    g_sorted = np.sort(gate)
    span = float(g_sorted[-1] - g_sorted[0])
    s = shape.direction
    n0 = shape.baseline
    widths = []
    halves = []
    for j in range(1, steps + 1):
        base = n0 + j - 1
        halves.append(_step_edges(g_sorted, shape.smoothed, base + 0.5, s))
        v10 = _step_edges(g_sorted, shape.smoothed, base + 0.1, s)
        v90 = _step_edges(g_sorted, shape.smoothed, base + 0.9, s)
        if math.isfinite(v10) and math.isfinite(v90) and v90 != v10:
            widths.append(abs(v90 - v10))
    width = float(np.median(widths)) if widths else span / 20.0
    width = max(width, span / max(gate.size, 1))
    end = g_sorted[-1] if s > 0 else g_sorted[0]
    for j, h in enumerate(halves):
        if not math.isfinite(h):  # step only begins inside the scan: put its middle just past the end
            halves[j] = end + s * width * (1 + j)
    halves_arr = np.array(halves)
    if model == DECAY_CASCADE:
        a = s * _GUMBEL_10_90 / width
        centres = halves_arr + HALF_HEIGHT_Z / a  # z = −a(V − c) = ln ln 2 at half height
        return np.concatenate(([a], centres)), 0.0
    w = s * width / _LOGISTIC_10_90
    return np.concatenate((halves_arr, np.full(steps, w))), 0.0


def fit_plateau(
    gate: np.ndarray,
    electrons: np.ndarray,
    model: str = DECAY_CASCADE,
    steps: int | None = None,
    shape: ScanShape | None = None,
) -> PlateauFit:
    """Least-squares fit of ``model`` (plus a current offset) to a scan ⟨n⟩ = I/(e f).

    Starts from the half-height crossings of the median-filtered scan and the 10–90 % width of the
    steps; uses scipy's trust-region reflective solver with the direction fixed by bounds.
    """
    if model not in MODEL:
        raise ValueError(f"unknown plateau model {model!r}; expected one of {MODELS}")
    gate = np.asarray(gate, dtype=float)
    y = np.asarray(electrons, dtype=float)
    shape = shape or inspect_scan(gate, y)
    k = steps if steps is not None else shape.steps
    if k < 1:
        raise PlateauScanError("the scan contains no step to fit")
    m = MODEL[model]
    p0, off0 = _initial_guess(model, gate, shape, k)
    x0 = np.concatenate((p0, [off0]))
    s = shape.direction
    lower = np.full(x0.size, -np.inf)
    upper = np.full(x0.size, np.inf)
    scale_idx = [0] if model == DECAY_CASCADE else list(range(k, 2 * k))
    for i in scale_idx:  # keep the slope parameters on the side the scan shows
        if s > 0:
            lower[i] = 0.0
        else:
            upper[i] = 0.0
    x0 = np.clip(x0, np.nextafter(lower, 0), np.nextafter(upper, 0))

    def resid(x: np.ndarray) -> np.ndarray:
        return m.mean(gate, x[:-1], shape.baseline) + x[-1] - y

    sol = optimize.least_squares(resid, x0, bounds=(lower, upper), x_scale="jac", method="trf",
                                 xtol=1e-12, ftol=1e-12, gtol=1e-12, max_nfev=2000 * x0.size)
    r = sol.fun
    npts = y.size
    rss = float(r @ r)
    sigma2 = max(rss / npts, np.finfo(float).tiny)
    loglik = -0.5 * npts * (math.log(2 * math.pi * sigma2) + 1.0)
    jac = sol.jac
    try:
        cov = np.linalg.pinv(jac.T @ jac) * rss / max(npts - x0.size, 1)
    except np.linalg.LinAlgError:
        cov = np.full((x0.size, x0.size), np.nan)
    n_free = x0.size + 1
    return PlateauFit(
        model=model,
        parameters=sol.x[:-1].copy(),
        offset=float(sol.x[-1]),
        covariance=cov,
        names=(*m.parameter_names(k), "offset_ef"),
        baseline=shape.baseline,
        direction=s,
        noise=math.sqrt(sigma2),
        log_likelihood=loglik,
        n_points=npts,
        aic=2 * n_free - 2 * loglik,
        bic=n_free * math.log(npts) - 2 * loglik,
        success=bool(sol.success),
        message=str(sol.message),
    )


# --------------------------------------------------------------------------------------------
# Model comparison


@dataclass(frozen=True)
class ModelComparison:
    """Which plateau model the data support, by the Bayesian information criterion."""

    preferred: str
    bic: dict[str, float]
    aic: dict[str, float]
    delta_bic: float  # BIC(other) − BIC(preferred) ≥ 0
    strength: str
    statement: str


def compare_models(fits: dict[str, PlateauFit]) -> ModelComparison:
    """Rank fits by BIC = k ln m − 2 ln L̂ (Schwarz, Ann. Stat. 6, 461 (1978)).

    The strength of the preference follows the scale of Kass & Raftery, JASA 90, 773 (1995) for
    2 ln(Bayes factor) ≈ ΔBIC: < 2 not worth more than a mention, 2–6 positive, 6–10 strong,
    > 10 very strong (from memory).
    """
    if len(fits) < 2:
        raise ValueError("model comparison needs at least two fits")
    bic = {k: f.bic for k, f in fits.items()}
    aic = {k: f.aic for k, f in fits.items()}
    ranked = sorted(bic, key=bic.get)
    best, second = ranked[0], ranked[1]
    d = bic[second] - bic[best]
    if d < 2:
        strength = "inconclusive"
    elif d < 6:
        strength = "positive"
    elif d < 10:
        strength = "strong"
    else:
        strength = "very strong"
    label = {DECAY_CASCADE: "decay-cascade", THERMAL: "thermal (logistic)"}
    if strength == "inconclusive":
        statement = (
            f"The data do not distinguish the {label[best]} and {label[second]} step shapes "
            f"(ΔBIC = {d:.1f} < 2)."
        )
    else:
        statement = (
            f"The data support the {label[best]} model over the {label[second]} model "
            f"(ΔBIC = {d:.1f}, {strength} evidence on the Kass–Raftery scale)."
        )
    return ModelComparison(best, bic, aic, d, strength, statement)


# --------------------------------------------------------------------------------------------
# Working point


def _slope_derivatives(model: str, gate: np.ndarray, params: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """First and second derivatives of d⟨n⟩/dV with respect to V, gate shape (B, m).

    Decay cascade (derived from Kashcheyevs & Kaestner 2010, z = −a(V − c)): the slope is
    Σ a e^{z − e^z}, so its derivatives are −a² Σ (1 − e^z) e^{z − e^z} and
    a³ Σ (1 − 3e^z + e^{2z}) e^{z − e^z}. Thermal (derived from Fricke et al. 2013, t = (V − c)/w,
    p = σ(t)): the slope is Σ p(1 − p)/w, its derivatives Σ p(1 − p)(1 − 2p)/w² and
    Σ p(1 − p)(1 − 6p + 6p²)/w³.
    """
    if model == DECAY_CASCADE:
        a = params[:, :1, None]
        ez = np.exp(_dc_z(gate, params))
        core = ez * np.exp(-ez)
        first = -(a * a) * ((1.0 - ez) * core)
        second = (a * a * a) * ((1.0 - 3.0 * ez + ez * ez) * core)
        return first.sum(axis=-1), second.sum(axis=-1)
    k = params.shape[1] // 2
    w = params[:, None, k:]
    p = special.expit(_th_t(gate, params))
    h = p * (1.0 - p)
    first = h * (1.0 - 2.0 * p) / (w * w)
    second = h * (1.0 - 6.0 * p + 6.0 * p * p) / (w * w * w)
    return first.sum(axis=-1), second.sum(axis=-1)


def minimum_slope_gate(
    model: str, params: np.ndarray, plateau: int, baseline: int = 0, points: int = 65,
    max_iterations: int = 60,
) -> np.ndarray:
    """Gate voltage of minimum |d⟨n⟩/dV| on plateau n, for each parameter vector.

    The inflection point lies between the steepest points of steps n and n+1. A grid of
    ``points`` nodes between them finds the best node; the root of the slope's derivative next to
    it is then polished by Newton's method kept inside the bracket of the two neighbouring nodes,
    with bisection wherever a Newton step would leave it (the safeguarded Newton iteration,
    Press et al., *Numerical Recipes*, 3rd ed., §9.4), all parameter vectors at once, to a few
    parts in 10¹² of the distance between the two steps.
    """
    m = MODEL[model]
    p = np.atleast_2d(np.asarray(params, dtype=float))
    j = plateau - baseline
    c = m.centres(p)
    if j < 1 or j + 1 > c.shape[-1]:
        raise PlateauScanError(
            f"plateau {plateau} needs steps {plateau} and {plateau + 1} in the scan; the fit has "
            f"steps {baseline + 1}..{baseline + c.shape[-1]}"
        )
    lo = np.minimum(c[:, j - 1], c[:, j])
    hi = np.maximum(c[:, j - 1], c[:, j])
    step = (hi - lo) / (points - 1)
    grid = lo[:, None] + step[:, None] * np.arange(points)[None, :]
    best = np.argmin(np.abs(m.slope(grid, p)), axis=1)
    v = lo + best * step
    left = lo + np.maximum(best - 1, 0) * step
    right = lo + np.minimum(best + 1, points - 1) * step
    ends = _slope_derivatives(model, np.stack([left, right], axis=1), p)[0]
    sign_left = np.sign(ends[:, 0])
    # A sign change of the slope's derivative brackets the minimum; without one (a degenerate
    # plateau) the best node is kept.
    todo = sign_left * np.sign(ends[:, 1]) < 0
    tolerance = 1e-12 * (hi - lo) + 4.0 * np.finfo(float).eps * np.maximum(np.abs(lo), np.abs(hi))
    for _ in range(max_iterations):
        if not todo.any():
            break
        d1, d2 = (d[:, 0] for d in _slope_derivatives(model, v[:, None], p))
        same = np.sign(d1) == sign_left
        left = np.where(todo & same, v, left)
        right = np.where(todo & ~same, v, right)
        with np.errstate(divide="ignore", invalid="ignore"):
            newton = v - d1 / d2
        inside = (newton >= left) & (newton <= right)
        new = np.where(inside, newton, 0.5 * (left + right))
        done = (inside & (np.abs(newton - v) <= tolerance)) | (d1 == 0.0) | (right - left <= tolerance)
        v = np.where(todo & (d1 != 0.0), new, v)
        todo &= ~done
    return v


@dataclass(frozen=True)
class WorkingPoint:
    """Recommended gate voltage on plateau n and the deviation the model predicts there."""

    model: str
    plateau: int
    gate_V: float
    gate_standard_uncertainty_V: float
    relative_deviation: float  # posterior mean of (⟨n⟩ − n)/n at the working point
    relative_deviation_standard_uncertainty: float
    relative_deviation_median: float
    relative_deviation_interval: tuple[float, float]  # 95 % equal-tailed credible interval
    samples: int

    def as_dict(self) -> dict:
        return {
            "model": self.model,
            "plateau": self.plateau,
            "gate_V": self.gate_V,
            "gate_standard_uncertainty_V": self.gate_standard_uncertainty_V,
            "predicted_relative_deviation": self.relative_deviation,
            "predicted_relative_deviation_standard_uncertainty":
                self.relative_deviation_standard_uncertainty,
            "predicted_relative_deviation_median": self.relative_deviation_median,
            "predicted_relative_deviation_interval_95": list(self.relative_deviation_interval),
            "samples": self.samples,
        }


def working_point(
    model: str, param_samples: np.ndarray, plateau: int, baseline: int = 0, max_samples: int = 4000
) -> WorkingPoint:
    """Inflection point of plateau n and the predicted relative deviation, over posterior samples.

    ``param_samples`` is (S, p) (model parameters only). At most ``max_samples`` evenly spaced
    samples are used, so the result is deterministic given the samples.
    """
    p = np.atleast_2d(np.asarray(param_samples, dtype=float))
    if p.shape[0] > max_samples:
        p = p[np.linspace(0, p.shape[0] - 1, max_samples).round().astype(int)]
    v = minimum_slope_gate(model, p, plateau, baseline)
    m = MODEL[model]
    dev = m.deviation(v[:, None], p, plateau, baseline)[:, 0] / plateau
    ddof = 1 if p.shape[0] > 1 else 0
    return WorkingPoint(
        model=model,
        plateau=plateau,
        gate_V=float(np.mean(v)),
        gate_standard_uncertainty_V=float(np.std(v, ddof=ddof)),
        relative_deviation=float(np.mean(dev)),
        relative_deviation_standard_uncertainty=float(np.std(dev, ddof=ddof)),
        relative_deviation_median=float(np.median(dev)),
        relative_deviation_interval=(float(np.percentile(dev, 2.5)), float(np.percentile(dev, 97.5))),
        samples=int(p.shape[0]),
    )


def cascade_parameters(samples: np.ndarray) -> dict[str, np.ndarray]:
    """a, Δ_k = a c_k and δ_k = Δ_k − Δ_{k−1} (k ≥ 2) from decay-cascade parameter samples.

    Δ_k refer to the gate-voltage origin of the scan (only the differences δ_k are independent of
    it), as in Kashcheyevs & Kaestner 2010.
    """
    p = np.atleast_2d(np.asarray(samples, dtype=float))
    a = p[:, 0]
    delta = a[:, None] * p[:, 1:]
    out = {"a_per_V": a}
    for k in range(delta.shape[1]):
        out[f"Delta_{k + 1}"] = delta[:, k]
    for k in range(1, delta.shape[1]):
        out[f"delta_{k + 1}"] = delta[:, k] - delta[:, k - 1]
    return out


# --------------------------------------------------------------------------------------------
# Posterior


def _log_posterior(
    model: str, gate: np.ndarray, y: np.ndarray, baseline: int, direction: int
) -> Callable[[np.ndarray], np.ndarray]:
    """Vectorised log marginal posterior of the model parameters.

    Gaussian noise of unknown σ and an unknown current offset b: with a flat prior on b and the
    Jeffreys prior 1/σ, both integrate out in closed form (Gaussian and gamma integrals; derived,
    e.g. Sivia & Skilling, Data Analysis, 2nd ed., section 3.3), leaving
    p(θ | y) ∝ S(θ)^{−(m−1)/2}, S the residual sum of squares at the best offset. Sampling θ alone
    is faster and mixes better than sampling (θ, b, σ). Priors on θ: flat, restricted to steps in
    the scan's order and direction, centres within a span of the scanned range and widths between
    1e-5 and 1 span (common practice, no source).
    """
    m = MODEL[model]
    gmin, gmax = float(gate.min()), float(gate.max())
    span = gmax - gmin
    power = -0.5 * (y.size - 1)

    def log_prob(theta: np.ndarray) -> np.ndarray:
        p = np.atleast_2d(theta)
        c = m.centres(p)
        if model == DECAY_CASCADE:
            width = 1.0 / np.abs(p[:, 0])
            same_side = direction * p[:, 0] > 0
        else:
            k = p.shape[1] // 2
            width = np.abs(p[:, k:]).min(axis=1)
            same_side = np.all(direction * p[:, k:] > 0, axis=1)
        ok = (
            same_side
            & np.all(direction * np.diff(c, axis=1) > 0, axis=1)
            & np.all((c > gmin - span) & (c < gmax + span), axis=1)
            & (width > 1e-5 * span) & (width < span)
        )
        out = np.full(p.shape[0], -np.inf)
        if ok.any():
            r = y[None, :] - m.mean(gate, p[ok], baseline)
            r -= r.mean(axis=1, keepdims=True)
            out[ok] = power * np.log(np.einsum("ij,ij->i", r, r))
        return out

    return log_prob


@dataclass(frozen=True)
class ParameterSummary:
    """Posterior mean, standard deviation and 95 % equal-tailed interval of one quantity."""

    name: str
    mean: float
    standard_uncertainty: float
    interval: tuple[float, float]

    @classmethod
    def of(cls, name: str, x: np.ndarray) -> ParameterSummary:
        x = np.asarray(x, dtype=float)
        return cls(name, float(np.mean(x)), float(np.std(x, ddof=1)),
                   (float(np.percentile(x, 2.5)), float(np.percentile(x, 97.5))))

    def as_dict(self) -> dict:
        return {"name": self.name, "mean": self.mean,
                "standard_uncertainty": self.standard_uncertainty,
                "interval_95": list(self.interval)}


@dataclass(frozen=True)
class PlateauPosterior:
    """Posterior of one plateau model's parameters (offset and noise integrated out)."""

    model: str
    fit: PlateauFit
    result: PosteriorResult

    @property
    def parameter_samples(self) -> np.ndarray:
        return self.result.samples

    def summaries(self) -> list[ParameterSummary]:
        s = self.result.samples
        return [ParameterSummary.of(n, s[:, i]) for i, n in enumerate(self.result.names)]


def _positive_definite(matrix: np.ndarray) -> bool:
    if not np.all(np.isfinite(matrix)):
        return False
    try:
        np.linalg.cholesky(0.5 * (matrix + matrix.T))
    except np.linalg.LinAlgError:
        return False
    return True


def sample_plateau_posterior(
    gate: np.ndarray, electrons: np.ndarray, fit: PlateauFit, seed: int, **sampler_options
) -> PlateauPosterior:
    """Posterior of a fitted model by ``analysis.sampling.sample_posterior``, started at the fit."""
    gate = np.asarray(gate, dtype=float)
    y = np.asarray(electrons, dtype=float)
    log_prob = _log_posterior(fit.model, gate, y, fit.baseline, fit.direction)
    k = fit.parameters.size
    se = fit.standard_errors()[:k]
    scale = np.where(np.isfinite(se), se, 0.0)
    # Blocks of 100 steps (not the module default of 200) let a short chain stop as soon as it
    # meets the rule; the rule itself (≥ 50 τ, τ settled) is unchanged.
    options = {"block": 100, **sampler_options}
    # The least-squares covariance of the shape parameters (the offset's block left out: the
    # posterior integrates the offset) is the Gaussian approximation of this posterior; drawn
    # from by the independence proposal it gives τ of 1–2 steps instead of 15–20 for
    # differential evolution (benchmarks/bench_pump.py). Without a usable covariance the
    # differential-evolution default stays.
    cov = fit.covariance[:k, :k]
    if "moves" not in options and _positive_definite(cov):
        options.update(moves="independence", covariance=cov)
    try:
        result = sample_posterior(log_prob, fit.parameters, seed, names=fit.names[:k], scale=scale,
                                  **options)
    except ValueError as exc:
        raise PlateauScanError(
            f"the {fit.model.replace('_', '-')} posterior could not be started at the least-squares "
            f"fit ({exc}); the scan may not show the steps it seems to"
        ) from None
    return PlateauPosterior(fit.model, fit, result)


# --------------------------------------------------------------------------------------------
# Whole scan


@dataclass(frozen=True)
class PlateauAnalysis:
    """Both models fitted and sampled, compared, and the working point on plateau n."""

    electrons_per_cycle: int
    shape: ScanShape
    fits: dict[str, PlateauFit]
    comparison: ModelComparison
    posteriors: dict[str, PlateauPosterior]
    cascade: tuple[ParameterSummary, ...]  # a, Δ_k, δ_k
    working_points: dict[str, WorkingPoint]
    converged: bool
    notes: tuple[str, ...]

    @property
    def working_point(self) -> WorkingPoint:
        """The working point of the model the data support."""
        return self.working_points[self.comparison.preferred]


def analyse_plateau_scan(
    gate: np.ndarray,
    electrons: np.ndarray,
    electrons_per_cycle: int,
    seed: int,
    models: tuple[str, ...] = MODELS,
    progress: Callable[[float, str], None] | None = None,
    **sampler_options,
) -> PlateauAnalysis:
    """Fit, sample and compare plateau models; locate the working point on plateau n.

    ``electrons`` is I/(e f) with the nominal frequency. Every model is sampled with a seed derived
    from ``seed`` (seed + index), so the whole analysis reproduces bit for bit.
    """
    gate = np.asarray(gate, dtype=float)
    y = np.asarray(electrons, dtype=float)
    shape = inspect_scan(gate, y)
    n = electrons_per_cycle
    notes = []
    if n not in shape.plateaus:
        raise PlateauScanError(
            f"the scan does not dwell on plateau n = {n} (plateaus seen: "
            f"{', '.join(map(str, shape.plateaus))}); check electrons_per_cycle and the gate range"
        )
    if shape.steps + shape.baseline < n + 1:
        raise PlateauScanError(
            f"the scan ends on plateau {n}: the onset of step {n + 1} is needed to locate the "
            "working point; extend the gate range"
        )
    if shape.baseline > 0:
        notes.append(f"the scan starts on plateau {shape.baseline}; lower steps are taken as complete")
    fits = {name: fit_plateau(gate, y, name, shape=shape) for name in models}
    for name, f in fits.items():
        if not f.success:
            notes.append(f"{name} least-squares fit: {f.message}")
    comparison = compare_models(fits) if len(fits) > 1 else ModelComparison(
        models[0], {models[0]: fits[models[0]].bic}, {models[0]: fits[models[0]].aic}, 0.0,
        "single model", "Only one model was fitted.")
    posteriors = {}
    for i, name in enumerate(models):
        if progress is not None:
            sub = lambda frac, msg, i=i, name=name: progress((i + frac) / len(models), f"{name}: {msg}")  # noqa: E731
            sampler_options["progress"] = sub
        posteriors[name] = sample_plateau_posterior(gate, y, fits[name], seed + i, **sampler_options)
    wps = {name: working_point(name, post.parameter_samples, n, shape.baseline)
           for name, post in posteriors.items()}
    cascade: tuple[ParameterSummary, ...] = ()
    if DECAY_CASCADE in posteriors:
        derived = cascade_parameters(posteriors[DECAY_CASCADE].parameter_samples)
        cascade = tuple(ParameterSummary.of(k, v) for k, v in derived.items())
    converged = all(bool(p.result.converged) for p in posteriors.values())
    if not converged:
        notes.append("a posterior chain did not meet the convergence rule; results are provisional")
    return PlateauAnalysis(n, shape, fits, comparison, posteriors, cascade, wps, converged,
                           tuple(notes))


# --------------------------------------------------------------------------------------------
# Two-gate maps


@dataclass(frozen=True)
class MapSlice:
    """Decay-cascade fit of one scan of a 2-D map at a fixed second-gate voltage."""

    gate2_V: float
    working_gate_V: float
    delta_next: float  # δ_{n+1} of the fit
    predicted_relative_deviation: float  # median over the Laplace draws
    deviation_interval: tuple[float, float]  # 95 % interval of the relative deviation
    points: int

    def as_dict(self) -> dict:
        return {"gate2_V": self.gate2_V, "working_gate_V": self.working_gate_V,
                "delta_next": self.delta_next,
                "predicted_relative_deviation": self.predicted_relative_deviation,
                "predicted_relative_deviation_interval_95": list(self.deviation_interval),
                "points": self.points}


@dataclass(frozen=True)
class MapAnalysis:
    """Best working point of a two-gate map and how robust it is to the second gate."""

    electrons_per_cycle: int
    slices: tuple[MapSlice, ...]
    best: MapSlice
    tolerance: float
    robust_window_V: tuple[float, float] | None  # gate2 range around best with |dev| ≤ tolerance
    working_gate_shift_per_V: float  # dV*/dV₂ around the best slice
    skipped: tuple[str, ...]
    statement: str


def analyse_plateau_map(
    gate: np.ndarray, gate2: np.ndarray, electrons: np.ndarray, electrons_per_cycle: int,
    seed: int, draws: int = 2000, tolerance: float = 1e-7,
) -> MapAnalysis:
    """Fit the decay cascade to every second-gate slice and pick the flattest working point.

    Each slice's uncertainty comes from ``draws`` parameter vectors drawn from the Gaussian
    (Laplace) approximation of its posterior, N(θ̂, covariance of the least-squares fit) — a full
    MCMC per slice would cost minutes for a map. The best slice has the smallest median |predicted
    deviation|; its robustness is the contiguous gate2 range around it over which the 97.5 %
    bound of |deviation| stays within ``tolerance``, and the shift of the working gate voltage
    per volt on the second gate.
    """
    gate = np.asarray(gate, dtype=float)
    gate2 = np.asarray(gate2, dtype=float)
    y = np.asarray(electrons, dtype=float)
    n = electrons_per_cycle
    rng = np.random.default_rng(seed)
    slices: list[MapSlice] = []
    skipped: list[str] = []
    for v2 in np.unique(gate2):
        sel = gate2 == v2
        try:
            slices.append(_map_slice(gate[sel], y[sel], float(v2), n, rng, draws))
        except (PlateauScanError, ValueError, np.linalg.LinAlgError) as exc:
            skipped.append(f"gate2 = {v2:g} V: {exc}")
    if not slices:
        raise PlateauScanError("no slice of the map shows plateau "
                               f"{n} with the onset of the next step: " + "; ".join(skipped[:3]))
    ibest = int(np.argmin([abs(s.predicted_relative_deviation) for s in slices]))
    best = slices[ibest]
    window = _flat_window(slices, ibest, tolerance)
    shift = _working_gate_shift(slices, ibest)
    statement = _map_statement(n, best, tolerance, window, shift)
    return MapAnalysis(n, tuple(slices), best, tolerance, window, shift, tuple(skipped), statement)


def _map_slice(g: np.ndarray, yy: np.ndarray, v2: float, n: int, rng: np.random.Generator,
               draws: int) -> MapSlice:
    """Fit the decay cascade (Kashcheyevs & Kaestner, PRL 104, 186805 (2010)) to one gate2
    slice and summarise it as a MapSlice.

    The working point's deviation comes from ``draws`` vectors of the Laplace approximation
    N(θ̂, covariance), drawn from ``rng`` (shared across slices, so the order of slices fixes the
    draws). Raises PlateauScanError when plateau ``n`` and the next step's onset are not both
    seen or the covariance is not finite."""
    shape = inspect_scan(g, yy)
    if n not in shape.plateaus or shape.baseline + shape.steps < n + 1:
        raise PlateauScanError(f"plateau {n} and the onset of step {n + 1} not both seen")
    fit = fit_plateau(g, yy, DECAY_CASCADE, shape=shape)
    k = fit.parameters.size
    cov = fit.covariance[:k, :k]
    if not np.all(np.isfinite(cov)):
        raise PlateauScanError("fit covariance not finite")
    sample = rng.multivariate_normal(fit.parameters, cov, size=draws, method="eigh")
    sample = sample[np.sign(sample[:, 0]) == fit.direction]
    wp_best = working_point(DECAY_CASCADE, fit.parameters, n, shape.baseline)
    # Its median deviation is the slice's figure (computed once, inside working_point).
    wp = working_point(DECAY_CASCADE, sample, n, shape.baseline, max_samples=max(draws, 1))
    j = n - shape.baseline
    a = fit.parameters[0]
    delta_next = float(a * (fit.parameters[1 + j] - fit.parameters[j]))
    return MapSlice(v2, wp_best.gate_V, delta_next, wp.relative_deviation_median,
                    wp.relative_deviation_interval, int(g.size))


def _flat_window(slices: list[MapSlice], ibest: int, tolerance: float
                 ) -> tuple[float, float] | None:
    """The contiguous gate2 range around the best slice over which the 97.5 % bound of
    |deviation| stays within ``tolerance``; None when even the best slice exceeds it."""
    def within(s: MapSlice) -> bool:
        return max(abs(s.deviation_interval[0]), abs(s.deviation_interval[1])) <= tolerance

    if not within(slices[ibest]):
        return None
    lo = hi = ibest
    while lo - 1 >= 0 and within(slices[lo - 1]):
        lo -= 1
    while hi + 1 < len(slices) and within(slices[hi + 1]):
        hi += 1
    return (slices[lo].gate2_V, slices[hi].gate2_V)


def _working_gate_shift(slices: list[MapSlice], ibest: int) -> float:
    """Working gate voltage per volt on gate2: the least-squares slope over the best slice and
    its neighbours (NaN when the map has one slice)."""
    nb = slices[max(0, ibest - 1): ibest + 2]
    if len(nb) < 2:
        return math.nan
    return float(np.polyfit([s.gate2_V for s in nb], [s.working_gate_V for s in nb], 1)[0])


def _map_statement(n: int, best: MapSlice, tolerance: float,
                   window: tuple[float, float] | None, shift: float) -> str:
    """The sentence the certificate prints about the map's working point and its robustness."""
    if window is None:
        return (
            f"The flattest plateau {n} is at gate2 = {best.gate2_V:g} V, gate = "
            f"{best.working_gate_V:.6g} V, predicted deviation {best.predicted_relative_deviation:.2g}; "
            f"its 95 % bound exceeds the tolerance {tolerance:g} even there."
        )
    return (
        f"The flattest plateau {n} is at gate2 = {best.gate2_V:g} V, gate = "
        f"{best.working_gate_V:.6g} V, predicted deviation {best.predicted_relative_deviation:.2g}; "
        f"the predicted deviation stays within {tolerance:g} (95 % bound) for gate2 from "
        f"{window[0]:g} V to {window[1]:g} V, and the working gate moves by "
        f"{shift:.3g} V per volt on gate2."
    )
