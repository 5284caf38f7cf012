"""Residual checks for a CBT sweep fit: bad bias values, outliers, correlated noise, structure.

Pure numpy/scipy on arrays already in bias order (and, where stated, already whitened by the fit's
noise model, analysis.cbt.fit.whiten). The fit orchestrates them; nothing here knows the model.

* **Bias values.** A bias value far outside the spacing of the rest (a typing slip in the exponent)
  is not something a fit can absorb: it is refused, naming the point.
* **Outliers.** Residuals are detrended by the running median of their neighbours (so slow wander of correlated noise
  is not mistaken for spikes), scaled by the median absolute deviation (MAD × 1.4826, the normal
  consistency factor; Hampel, J. Am. Stat. Assoc. 69, 383 (1974)), and a point is flagged when it
  lies beyond z_n = Φ⁻¹(1 − 0.0025/n): on clean Gaussian data of n points the chance of flagging
  any point is then about 0.5 % (Bonferroni; common practice, no source for the 0.5 %).
* **Correlated noise.** The lag-1 autocorrelation r₁ of the residuals; under white noise it is
  approximately N(0, 1/n) (Box & Jenkins, *Time Series Analysis*, 1970, §6.2; from memory), so
  |r₁| > 3/√n is taken as evidence and an AR(1) noise model is used.
* **Structure beyond the noise model.** The heteroskedasticity-and-autocorrelation-consistent
  (HAC) covariance of Newey & West, Econometrica 55, 703 (1987) with the Bartlett kernel and the
  bandwidth rule L = ⌊4 (n/100)^(2/9)⌋ (Newey & West, Rev. Econ. Stud. 61, 631 (1994); from
  memory), compared with the model-based covariance: the ratio inflates the temperature's
  uncertainty when the whitened residuals are still correlated (never deflates it).
* **Named causes.** The whitened residuals are regressed on templates of the usual culprits,
  each made orthogonal to the fit's own Jacobian: a linear slope (a background the fit lacks), an
  odd dip-shaped term (asymmetry: thermal gradient, offset or background charge) and the
  bias-dependent broadening of self-heating (∂G/∂T × ((V − V₀)/V_1/2)², the first-order effect of
  T_e(V) rising as V², Wellstood, Urbina & Clarke, PRB 49, 5942 (1994)). A template with
  |t| ≥ 4 is named as the likely cause.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy import special

#: Normal consistency factor of the median absolute deviation (Hampel 1974).
MAD_TO_SIGMA = 1.4826
#: Family-wise false-flag probability of the outlier screen on clean Gaussian data.
OUTLIER_FAMILY_RATE = 0.005
#: Running-median window (points) that removes slow wander before the outlier test.
DETREND_WINDOW = 7
#: More flagged points than this fraction means the sweep is not "clean with a few spikes".
MAX_OUTLIER_FRACTION = 0.05
#: |t| of a residual template at and above which its cause is named.
TEMPLATE_T_LIMIT = 4.0
#: On white residuals the Newey–West variance ratio scatters by about √(2(2L/3 + 1)/n) ≈ 0.15
#: (n = 401, L = 5; Newey & West 1987 for the Bartlett kernel's variance, from memory), so an
#: inflation below 1.15 on a white noise model is noise, not structure.
HAC_SIGNIFICANT = 1.15
#: A bias value further than this many median spacings from every other point is refused.
ISOLATED_BIAS_SPACINGS = 25.0


def isolated_bias_points(bias: np.ndarray) -> list[int]:
    """Indices of bias values that are not finite or sit far outside the spacing of the rest.

    Only the ends of the sorted range can be isolated in this sense (a value inside the range
    is a displaced point, which the outlier screen sees in the conductance).
    """
    bias = np.asarray(bias, dtype=float)
    bad = [int(i) for i in np.nonzero(~np.isfinite(bias))[0]]
    finite = np.nonzero(np.isfinite(bias))[0]
    order = finite[np.argsort(bias[finite], kind="stable")]
    if order.size < 8:
        return bad
    spacing = float(np.median(np.diff(bias[order])))
    if spacing <= 0:
        return bad
    lo, hi = 0, order.size - 1
    for _ in range(max(1, order.size // 20)):  # peel isolated points off either end
        changed = False
        if bias[order[lo + 1]] - bias[order[lo]] > ISOLATED_BIAS_SPACINGS * spacing:
            bad.append(int(order[lo]))
            lo += 1
            changed = True
        if bias[order[hi]] - bias[order[hi - 1]] > ISOLATED_BIAS_SPACINGS * spacing:
            bad.append(int(order[hi]))
            hi -= 1
            changed = True
        if not changed or hi - lo < 8:
            break
    return sorted(set(bad))


def robust_scale(values: np.ndarray) -> float:
    """MAD × 1.4826 about the median: σ of the bulk of the values (Hampel 1974)."""
    v = np.asarray(values, dtype=float)
    return MAD_TO_SIGMA * float(np.median(np.abs(v - np.median(v))))


def difference_noise_scale(values_in_order: np.ndarray) -> float:
    """Model-free noise level: robust scale of first differences / √2 (a smooth curve cancels)."""
    return robust_scale(np.diff(np.asarray(values_in_order, dtype=float))) / math.sqrt(2.0)


def outlier_threshold(n: int) -> float:
    """z_n = Φ⁻¹(1 − 0.0025/n): the screen flags any of n clean Gaussian points with ~0.5 % chance."""
    return float(-special.ndtri(0.5 * OUTLIER_FAMILY_RATE / max(n, 1)))


def flag_outliers(residuals_in_order: np.ndarray) -> tuple[np.ndarray, float]:
    """Positions (in the given order) of isolated outliers, and the robust residual scale used."""
    r = np.asarray(residuals_in_order, dtype=float)
    # Median of the neighbours only (the point itself left out), so a spike does not hide in the
    # reference and the detrended values keep a near-normal distribution.
    half = DETREND_WINDOW // 2
    padded = np.pad(r, half, mode="edge")
    neighbours = [padded[half + k: half + k + r.size] for k in range(-half, half + 1) if k]
    detrended = r - np.median(np.stack(neighbours), axis=0)
    scale = robust_scale(detrended)
    if scale <= 0:
        return np.zeros(0, dtype=int), 0.0
    z = np.abs(detrended - np.median(detrended)) / scale
    return np.nonzero(z > outlier_threshold(r.size))[0], scale


def lag1_correlation(residuals_in_order: np.ndarray) -> float:
    """Lag-1 sample autocorrelation r₁ = Σ e_i e_(i+1) / Σ e_i² of mean-removed residuals."""
    e = np.asarray(residuals_in_order, dtype=float)
    e = e - e.mean()
    denom = float(e @ e)
    return float(e[:-1] @ e[1:]) / denom if denom > 0 else 0.0


def correlation_is_significant(r1: float, n: int) -> bool:
    """|r₁| > 3/√n: beyond what white noise gives (Box & Jenkins 1970, §6.2; from memory)."""
    return abs(r1) > 3.0 / math.sqrt(max(n, 1))


def newey_west_lag(n: int) -> int:
    """Bandwidth rule L = ⌊4 (n/100)^(2/9)⌋ (Newey & West 1994; from memory)."""
    return max(1, int(math.floor(4.0 * (n / 100.0) ** (2.0 / 9.0))))


def hac_inflation(jacobian: np.ndarray, residuals: np.ndarray, lag: int | None = None) -> np.ndarray:
    """Per-parameter factor √(Var_HAC / Var_model) ≥ 1 of a (whitened) least-squares problem.

    Var_model = s² (JᵀJ)⁻¹; Var_HAC = (JᵀJ)⁻¹ S (JᵀJ)⁻¹ with S = Σ_|l|≤L w_l Σ_i J_i e_i e_(i+l) J_(i+l)ᵀ,
    w_l = 1 − |l|/(L + 1) (Bartlett; Newey & West 1987). ``jacobian`` is (n, p) in point order.
    """
    j = np.asarray(jacobian, dtype=float)
    e = np.asarray(residuals, dtype=float)
    n, p = j.shape
    lag = newey_west_lag(n) if lag is None else lag
    s2 = float(e @ e) / max(n - p, 1)
    jtj_inv = np.linalg.pinv(j.T @ j)
    score = j * e[:, None]
    meat = score.T @ score
    for lv in range(1, lag + 1):
        w = 1.0 - lv / (lag + 1.0)
        cross = score[lv:].T @ score[:-lv]
        meat += w * (cross + cross.T)
    v_hac = np.diag(jtj_inv @ meat @ jtj_inv)
    v_model = s2 * np.diag(jtj_inv)
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = np.where(v_model > 0, v_hac / v_model, 1.0)
    return np.sqrt(np.maximum(ratio, 1.0))


@dataclass(frozen=True)
class TemplateTest:
    """One named cause tested against the residuals."""

    cause: str
    t_statistic: float
    #: Shift of the temperature (K) if the template were added to the fit, and its standard error.
    temperature_shift: float
    temperature_shift_std: float
    significant: bool
    advice: str


def template_tests(jacobian: np.ndarray, residuals: np.ndarray, templates: dict[str, tuple[np.ndarray, str]],
                   temperature_column: int = 0) -> list[TemplateTest]:
    """t-statistic of each template in the residuals, orthogonal to the fit's Jacobian.

    All arrays are whitened and in point order; ``templates`` maps a cause to (column, advice).
    The temperature shift is what the augmented least-squares fit would move T by: with
    P = (JᵀJ)⁻¹Jᵀh, ΔT = −P_T c_h and its standard error |P_T| σ_c (c_h the template coefficient).
    """
    j = np.asarray(jacobian, dtype=float)
    e = np.asarray(residuals, dtype=float)
    n, p = j.shape
    sigma = math.sqrt(float(e @ e) / max(n - p - 1, 1))
    q, _ = np.linalg.qr(j)
    out = []
    for cause, (h, advice) in templates.items():
        h = np.asarray(h, dtype=float)
        h_perp = h - q @ (q.T @ h)
        norm2 = float(h_perp @ h_perp)
        if norm2 <= 1e-30 * max(float(h @ h), 1e-300):
            continue
        c = float(h_perp @ e) / norm2
        se = sigma / math.sqrt(norm2)
        t = c / se if se > 0 else 0.0
        proj = np.linalg.lstsq(j, h, rcond=None)[0][temperature_column]
        out.append(TemplateTest(cause, t, -proj * c, abs(proj) * se, abs(t) >= TEMPLATE_T_LIMIT, advice))
    return out


@dataclass(frozen=True)
class ResidualDiagnosis:
    """What the residual checks found, in words a lab can act on."""

    outliers: tuple[int, ...] = ()
    outlier_scale: float = 0.0
    outlier_threshold: float = 0.0
    lag1_before_whitening: float = 0.0
    noise_correlation: float = 0.0
    noise_model: str = "white"
    lag1_after_whitening: float = 0.0
    structure_inflation: float = 1.0
    hac_lag: int = 0
    templates: tuple[TemplateTest, ...] = ()
    background_added: bool = False
    findings: tuple[str, ...] = field(default_factory=tuple)

    @property
    def noise_is_white(self) -> bool:
        """White noise model and no HAC inflation beyond its own sampling noise (see
        :data:`HAC_SIGNIFICANT`)."""
        return self.noise_model == "white" and self.structure_inflation <= HAC_SIGNIFICANT

    def template(self, cause: str) -> TemplateTest | None:
        return next((t for t in self.templates if t.cause == cause), None)

    def as_dict(self) -> dict:
        return {
            "outlier_points": list(self.outliers),
            "outlier_threshold_robust_sigmas": self.outlier_threshold,
            "lag1_residual_correlation_before_noise_model": self.lag1_before_whitening,
            "noise_model": self.noise_model,
            "lag1_after_noise_model": self.lag1_after_whitening,
            "structure_inflation_of_u_T": self.structure_inflation,
            "newey_west_lag": self.hac_lag,
            "linear_background_added": self.background_added,
            "template_tests": [
                {"cause": t.cause, "t": t.t_statistic, "temperature_shift_K": t.temperature_shift,
                 "temperature_shift_std_K": t.temperature_shift_std, "significant": t.significant}
                for t in self.templates
            ],
            "findings": list(self.findings),
        }


# --------------------------------------------------------------------------------------------
# Noise models chosen from the residuals' periodogram


@dataclass(frozen=True)
class NoiseModel:
    """A stationary noise model of the residuals (in bias order), chosen by :func:`choose_noise_model`.

    ``kind`` is "white", "AR(1)" or "1/f + white"; ``rho`` the AR(1) coefficient (AR(1) only);
    ``factor`` the lower Cholesky factor of the correlation matrix of the used points (1/f only;
    AR(1) is whitened exactly by the Prais–Winsten transform instead); ``aic`` the Whittle AIC of
    each candidate.
    """

    kind: str = "white"
    rho: float = 0.0
    alpha: float = 0.0
    flicker_fraction: float = 0.0  # share of the variance in the 1/f part
    factor: np.ndarray | None = field(default=None, repr=False, compare=False)
    aic: tuple[tuple[str, float], ...] = ()

    def describe(self) -> str:
        if self.kind == "AR(1)":
            return f"AR(1), ρ = {self.rho:.2f}"
        if self.kind == "1/f + white":
            return f"1/f^{self.alpha:.2f} + white ({100 * self.flicker_fraction:.0f} % of the variance in 1/f)"
        return "white"


def periodogram(residuals_in_order: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Frequencies f_k = k/n (cycles per point, 0 < f < ½) and the periodogram |E_k|²/n."""
    e = np.asarray(residuals_in_order, dtype=float)
    e = e - e.mean()
    n = e.size
    spec = np.abs(np.fft.rfft(e)) ** 2 / n
    k = np.arange(1, (n - 1) // 2 + 1)
    return k / n, spec[k]


def _whittle(S: np.ndarray, P: np.ndarray) -> float:
    """Whittle's approximate −log-likelihood Σ [log S_k + P_k/S_k] (Whittle, Ark. Mat. 2, 423 (1953))."""
    return float(np.sum(np.log(S) + P / S))


def _power_law_spectrum(f: np.ndarray, white: float, amp: float, alpha: float, f_floor: float) -> np.ndarray:
    return white + amp * np.maximum(f, f_floor) ** (-alpha)


def choose_noise_model(residuals_in_order: np.ndarray) -> NoiseModel:
    """White, AR(1) or 1/f^α + white, whichever has the smallest Whittle AIC (2 ℓ + 2 p).

    The spectra are fitted to the periodogram of the residuals by Whittle's likelihood: white
    S = c; AR(1) S = σ²/(1 − 2ρ cos 2πf + ρ²); flicker S = w + A f^(−α), α ∈ [0.3, 2.5]
    (the usual "1/f plus white" description of low-frequency noise; common practice, no source).
    Below f = 1/(2n) the 1/f spectrum is held flat: slower wander is an offset and slope over the
    sweep, which the fit's amplitude (and background) absorb. Akaike, IEEE Trans. Autom. Control
    19, 716 (1974) for the AIC. A non-white model is taken only if it beats white by more than
    10 in AIC (a likelihood-ratio p below ~0.001 for one or two extra parameters), so clean sweeps
    keep the white likelihood.
    """
    from scipy import optimize  # noqa: PLC0415

    e = np.asarray(residuals_in_order, dtype=float)
    n = e.size
    f, P = periodogram(e)
    c = float(P.mean())
    aic = {"white": 2 * _whittle(np.full_like(P, c), P) + 2}

    def ar1_nll(z):
        rho = math.tanh(z[0])
        s = 1.0 / (1 - 2 * rho * np.cos(2 * np.pi * f) + rho * rho)
        sig2 = float(np.mean(P / s))
        return _whittle(sig2 * s, P)

    ar = optimize.minimize(ar1_nll, [0.0], method="Nelder-Mead", options={"xatol": 1e-6, "fatol": 1e-9})
    rho = math.tanh(float(ar.x[0]))
    aic["AR(1)"] = 2 * ar.fun + 4
    f_floor = 0.5 / n

    def flicker_nll(z):
        w, a, alpha = math.exp(z[0]), math.exp(z[1]), 0.3 + 2.2 / (1 + math.exp(-z[2]))
        return _whittle(_power_law_spectrum(f, w, a, alpha, f_floor), P)

    best = None
    for a0 in (1e-3, 1e-2, 1e-1):
        r = optimize.minimize(flicker_nll, [math.log(0.8 * c), math.log(a0 * c), 0.0], method="Nelder-Mead",
                              options={"xatol": 1e-6, "fatol": 1e-9, "maxiter": 2000})
        if best is None or r.fun < best.fun:
            best = r
    w, a = math.exp(best.x[0]), math.exp(best.x[1])
    alpha = 0.3 + 2.2 / (1 + math.exp(-best.x[2]))
    aic["1/f + white"] = 2 * best.fun + 6
    table = tuple(sorted(aic.items(), key=lambda kv: kv[1]))
    kind = table[0][0]
    if kind == "white" or aic[kind] > aic["white"] - 10.0:
        return NoiseModel("white", aic=table)
    if kind == "AR(1)":
        return NoiseModel("AR(1)", rho=float(np.clip(rho, -0.95, 0.95)), aic=table)
    # Autocovariance of the flicker model by the inverse FFT of its spectrum on a fine grid.
    m = 16 * n
    grid = np.fft.rfftfreq(m)
    spec = _power_law_spectrum(grid, w, a, alpha, f_floor)
    acov = np.fft.irfft(spec, m)[:n]
    corr = acov / acov[0]
    cov = corr[np.abs(np.subtract.outer(np.arange(n), np.arange(n)))]
    factor = np.linalg.cholesky(cov + 1e-10 * np.eye(n))
    flicker_var = float(acov[0]) - w
    return NoiseModel("1/f + white", alpha=alpha, flicker_fraction=max(0.0, flicker_var / float(acov[0])),
                      factor=factor, aic=table)
