"""Fit one CBT conductance sweep: least squares, then the Bayesian posterior of the temperature.

Model: G_i = G_T [S(V_i; T, ΔE, V₀) + β (V_i − V₀) S(V_i; …)] + ε_i, with S a dip shape averaged
over the lock-in excitation (analysis.cbt.models), ε_i independent normal with a common unknown
standard deviation σ (scaled by per-point weights when the data give them).

The amplitude parameters G_T and G_T β enter linearly. With flat priors on them and Jeffreys'
prior 1/σ on σ they integrate out analytically, leaving
  p(T, ΔE, V₀ | data) ∝ p(T, ΔE, V₀) · |AᵀA|^(−1/2) · RSS(T, ΔE, V₀)^(−(n − k)/2),
with A the n×k design matrix of the linear parameters and RSS the least-squares residual sum
(Bretthorst, *Bayesian Spectrum Analysis and Parameter Estimation*, Springer 1988, ch. 3;
Sivia & Skilling, *Data Analysis: A Bayesian Tutorial*, 2nd ed., OUP 2006, §3.5 and §8.2). The sampler
then explores only three parameters, which keeps chains short. Priors on the rest, documented:
T uniform on (0, 100 K]; u = ΔE/(k_B T) uniform on [0, 5] (the dip's depth fixes u and its width T,
so this pair is nearly uncorrelated and the chains mix fast); V₀ uniform within the central half of
the swept range. ΔE/k_B = u T is reported from the same samples.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace

import numpy as np
from scipy import linalg, optimize

from analysis.cbt.models import (
    HALF_WIDTH_FACTOR,
    DipShape,
    SweepSetup,
    averaged_shape,
    depth_series,
    dip_function,
    forward_conductance,
    higher_order_shape,
    invert_depth_series,
    numerical_fwhm,
)
from analysis.cbt.robust import (
    HAC_SIGNIFICANT,
    MAX_OUTLIER_FRACTION,
    ResidualDiagnosis,
    choose_noise_model,
    difference_noise_scale,
    flag_outliers,
    hac_inflation,
    isolated_bias_points,
    lag1_correlation,
    newey_west_lag,
    outlier_threshold,
    template_tests,
)
from analysis.constants import BOLTZMANN, ELEMENTARY_CHARGE
from analysis.sampling import PosteriorResult, ProgressCallback, sample_posterior

MAX_U_PRIOR = 5.0
NONLINEAR = ("temperature_K", "u", "bias_offset_V")


class SweepError(ValueError):
    """The sweep cannot be analysed as it is (e.g. bias range too narrow); message says why."""

    def __init__(self, message: str, field: str | None = None):
        super().__init__(message)
        self.field = field


@dataclass(frozen=True)
class SweepData:
    """One sweep: bias (V) and conductance (S) arrays, optional per-point standard uncertainty.

    Any bias order is accepted (the noise model works in bias order). ``excluded`` lists the
    points (indices into the arrays) left out of the likelihood, e.g. by :func:`screen_outliers`;
    ``noise_correlation`` is the AR(1) coefficient ρ of the noise between neighbouring points in
    bias order (0: white noise).
    """

    bias: np.ndarray
    conductance: np.ndarray
    setup: SweepSetup
    conductance_uncertainty: np.ndarray | None = None
    background: bool = False
    excluded: tuple[int, ...] = ()
    noise_correlation: float = 0.0
    #: Lower Cholesky factor of the noise correlation of the used points in bias order (a general
    #: stationary noise model, analysis.cbt.robust.NoiseModel); None for white or AR(1) noise.
    noise_factor: np.ndarray | None = field(default=None, repr=False, compare=False)

    def used_order(self) -> np.ndarray:
        """Indices of the points in the likelihood, sorted by bias."""
        order = np.argsort(self.bias, kind="stable")
        if self.excluded:
            keep = np.ones(self.bias.size, dtype=bool)
            keep[list(self.excluded)] = False
            order = order[keep[order]]
        return order


@dataclass(frozen=True)
class FitSettings:
    """Sampler settings. Defaults give certificate-grade chains; tests may use lighter ones."""

    walkers: int = 12
    block: int = 50
    max_steps: int = 20_000
    min_tau_multiple: float = 50.0
    tau_tolerance: float = 0.05
    #: analysis.sampling.MOVE_SETS; the independence proposal from the least-squares covariance
    #: has τ ≈ 2 steps on these posteriors against ≈ 13 for differential evolution
    #: (benchmarks/bench_cbt_sampler.py).
    moves: str = "independence"


@dataclass(frozen=True)
class SweepFit:
    """Result of fitting one sweep."""

    model: str
    model_max_u: float
    parameter_names: tuple[str, ...]
    least_squares: dict
    posterior: PosteriorResult
    temperature: float
    temperature_std: float
    temperature_interval95: tuple[float, float]
    charging_energy: float
    charging_energy_std: float
    asymptotic_conductance: float
    asymptotic_conductance_std: float
    bias_offset: float
    background_slope: float
    u: float
    depth: float
    half_width_voltage: float
    noise_std: float
    residuals: np.ndarray
    model_curve: np.ndarray
    corrected_bias: np.ndarray
    corrected_conductance: np.ndarray
    lag1_residual_correlation: float
    diagnostics: dict = field(default_factory=dict)
    #: With a heating model: T above is the phonon (bath) temperature; these give the electrons'.
    electron_temperature_zero_bias: float | None = None
    heating_at_half_width: float = 0.0  # (T_e(V_1/2/2) − T_p)/T_p
    #: The data exactly as the posterior used them (outliers excluded, noise model, background).
    fitted_data: SweepData | None = None
    #: Residual checks (analysis.cbt.diagnosis.ResidualDiagnosis); None if not run.
    diagnosis: object | None = None


# --------------------------------------------------------------------------------------------
# Linear amplitude parameters and the noise model


def _design(shape: DipShape, data: SweepData, theta: np.ndarray) -> np.ndarray:
    """Design matrices A, shape (batch, n, k): columns S and (V − V₀) S, all points in data order."""
    T, u, v0 = theta[:, 0], theta[:, 1], theta[:, 2]
    centred = data.bias - v0[:, None]
    s = averaged_shape(shape, centred, data.setup, T, u)
    if not data.background:
        return s[..., None]
    return np.stack([s, centred * s], axis=-1)


def _weights(data: SweepData) -> np.ndarray:
    if data.conductance_uncertainty is None:
        return np.ones_like(data.conductance)
    return 1.0 / np.asarray(data.conductance_uncertainty, dtype=float)


def whiten(data: SweepData, values: np.ndarray, axis: int = -1) -> np.ndarray:
    """Weighted values at the used points, in bias order, with the AR(1) noise decorrelated.

    For AR(1) noise ε_i = ρ ε_(i−1) + η_i (η white) the Prais–Winsten transform z_1 = √(1 − ρ²) y_1,
    z_i = y_i − ρ y_(i−1) turns generalised least squares into ordinary least squares (Prais &
    Winsten, Cowles Commission Discussion Paper 383 (1954); the exact AR(1) GLS transform).
    ``values`` has the data's points along ``axis``.
    """
    order = data.used_order()
    y = np.moveaxis(np.asarray(values, dtype=float), axis, -1)
    y = _decorrelate(data, y[..., order] * _weights(data)[order])
    return np.moveaxis(y, -1, axis)


def _decorrelate(data: SweepData, y: np.ndarray) -> np.ndarray:
    """The noise model's decorrelation of weighted values at the used points (last axis, bias order)."""
    rho = data.noise_correlation
    if rho != 0.0:
        z = np.empty_like(y)
        z[..., 0] = math.sqrt(1.0 - rho * rho) * y[..., 0]
        z[..., 1:] = y[..., 1:] - rho * y[..., :-1]
        y = z
    if data.noise_factor is not None:
        # General stationary noise with correlation L Lᵀ: z = L⁻¹ y is white (GLS by Cholesky).
        m = y.shape[-1]
        flat = y.reshape(-1, m).T
        y = linalg.solve_triangular(data.noise_factor, flat, lower=True, check_finite=False).T.reshape(y.shape)
    return y


#: Parameter sets are evaluated in batches of about this many bias points (times the lock-in
#: nodes): a few hundred kB per intermediate array stays in cache, where one batch of 600
#: posterior samples at once ran 4.6x slower per point (measured on the 2-core machine).
CHUNK_POINTS = 1 << 14


class ProfiledLikelihood:
    """The likelihood of one sweep with its linear amplitudes profiled out, for many parameter sets.

    Built once per (shape, data): the used points in bias order, their weights and the whitened
    data are kept, so that each call only evaluates the model at those points (a walker batch of
    the sampler, the least-squares residuals, the global fit's grid). With one or two linear
    amplitudes the normal equations AᵀA c = Aᵀy are 1×1 or 2×2 and solved in closed form per row;
    the residual sum is formed from the residuals themselves, not as yᵀy − cᵀAᵀy, which would
    cancel to a few digits on a well-fitting sweep.
    """

    def __init__(self, shape: DipShape, data: SweepData) -> None:
        order = data.used_order()
        self.shape, self.data = shape, data
        self.bias = data.bias[order]
        self.weights = _weights(data)[order]
        self.white = data.noise_correlation == 0.0 and data.noise_factor is None
        self.y = self._whiten(np.asarray(data.conductance, dtype=float)[order])
        self.points = int(order.size)
        self.amplitudes = 2 if data.background else 1

    def _whiten(self, values: np.ndarray) -> np.ndarray:
        values = values * self.weights
        return values if self.white else _decorrelate(self.data, values)

    def columns(self, theta: np.ndarray) -> list[np.ndarray]:
        """The whitened design columns S and, with a background, (V − V₀) S; each (batch, m)."""
        T, u, v0 = theta[:, 0], theta[:, 1], theta[:, 2]
        centred = self.bias - v0[:, None]
        s = averaged_shape(self.shape, centred, self.data.setup, T, u)
        if self.amplitudes == 1:
            return [self._whiten(s)]
        return [self._whiten(s), self._whiten(centred * s)]

    def profile(self, theta: np.ndarray):
        """Least-squares amplitudes (batch, k), RSS, log|AᵀA| and AᵀA (batch, k, k) per row of theta."""
        rows = max(1, CHUNK_POINTS // self.points)
        if theta.shape[0] > rows:
            parts = [self._profile(theta[i:i + rows]) for i in range(0, theta.shape[0], rows)]
            return tuple(np.concatenate(p) for p in zip(*parts, strict=True))
        return self._profile(theta)

    def _profile(self, theta: np.ndarray):
        cols = self.columns(theta)
        y = self.y
        if len(cols) == 1:
            a = cols[0]
            s00 = np.einsum("bn,bn->b", a, a)
            coef = ((a @ y) / s00)[:, None]
            resid = y - coef * a
            ata = s00[:, None, None]
            logdet = np.log(s00)
        else:
            a0, a1 = cols
            s00 = np.einsum("bn,bn->b", a0, a0)
            s01 = np.einsum("bn,bn->b", a0, a1)
            s11 = np.einsum("bn,bn->b", a1, a1)
            t0, t1 = a0 @ y, a1 @ y
            det = s00 * s11 - s01 * s01
            coef = np.stack([(s11 * t0 - s01 * t1) / det, (s00 * t1 - s01 * t0) / det], axis=-1)
            resid = y - coef[:, :1] * a0 - coef[:, 1:] * a1
            ata = np.stack([np.stack([s00, s01], axis=-1), np.stack([s01, s11], axis=-1)], axis=-2)
            logdet = np.log(det)
        rss = np.einsum("bn,bn->b", resid, resid)
        return coef, rss, logdet, ata

    def __call__(self, theta: np.ndarray) -> np.ndarray:
        """log p(data | T, u, V₀) up to a constant (:func:`log_marginal_likelihood`)."""
        _, rss, logdet, _ = self.profile(theta)
        return -0.5 * logdet - 0.5 * (self.points - self.amplitudes) * np.log(rss)


def _profile(shape: DipShape, data: SweepData, theta: np.ndarray):
    """Least-squares linear parameters, RSS and log|AᵀA| for each row of theta (whitened space)."""
    return ProfiledLikelihood(shape, data).profile(theta)


def log_marginal_likelihood(shape: DipShape, data: SweepData, theta: np.ndarray) -> np.ndarray:
    """log p(data | T, u, V₀) up to a constant, amplitudes and noise level integrated out.

    −½ log|AᵀA| − ½ (m − k) log RSS over the m used points in the whitened space (module doc).
    """
    return ProfiledLikelihood(shape, data)(theta)


def prior_bounds(shape: DipShape, data: SweepData) -> dict[str, tuple[float, float]]:
    """The box the posterior lives in: T in (0, 100 K], u in the model's validated range (or
    [0, 5] for the series), V₀ within the central half of the swept bias range."""
    u_lo = float(getattr(shape, "min_u", 0.0))
    u_hi = min(MAX_U_PRIOR, float(shape.max_u)) if hasattr(shape, "min_u") else MAX_U_PRIOR
    # A hard range is kept by a relative 1e-9 so that u = ΔE/(k_B T), where it is recomputed from
    # ΔE = u T (forward_conductance), cannot step over it by rounding.
    u_lo, u_hi = u_lo + 1e-9 * (u_hi - u_lo), u_hi - 1e-9 * (u_hi - u_lo)
    span = float(data.bias.max() - data.bias.min())
    return {
        "temperature_K": (0.0, 100.0),
        "u": (u_lo, u_hi),
        "bias_offset_V": (float(data.bias.min()) + 0.25 * span, float(data.bias.max()) - 0.25 * span),
    }


def make_log_posterior(shape: DipShape, data: SweepData, bias_window: tuple[float, float] | None = None,
                       log_temperature: bool = False):
    """Vectorised log posterior of (T, u, V₀) with the amplitudes marginalised (module doc).

    With ``log_temperature`` the first coordinate is ln T and the Jacobian T is included, so the
    prior stays uniform in T (ln T decorrelates the width from the depth in the sampler's metric).
    """
    bounds = prior_bounds(shape, data)
    lo, hi = bias_window if bias_window is not None else bounds["bias_offset_V"]
    u_lo, u_hi = bounds["u"]
    likelihood = ProfiledLikelihood(shape, data)

    lower = np.array([0.0, u_lo, lo])
    upper = np.array([100.0, u_hi, hi])

    def log_prob(theta: np.ndarray) -> np.ndarray:
        theta = np.array(theta, dtype=float, ndmin=2)
        jac = np.zeros(theta.shape[0])
        if log_temperature:
            jac = theta[:, 0].copy()
            with np.errstate(over="ignore"):
                theta[:, 0] = np.exp(jac)
        # T > 0 (strict), every parameter inside its box; NaN fails every comparison.
        ok = ((theta >= lower) & (theta <= upper)).all(axis=1) & (theta[:, 0] > 0.0)
        if ok.all():
            return likelihood(theta) + jac
        out = np.full(theta.shape[0], -np.inf)
        if ok.any():
            out[ok] = likelihood(theta[ok]) + jac[ok]
        return out

    return log_prob


# --------------------------------------------------------------------------------------------
# Starting point


def initial_guess(data: SweepData) -> np.ndarray:
    """(T, ΔE/k_B, V₀) from the dip's depth and width read directly off the data.

    Asymptote from the outer 10 % of points at each end, depth from the smallest values near
    the centre, width from the half-depth crossings (5.439 N k_B T/e, Pekola et al. 1994), u from
    the inverted depth series (Farhangfar et al. 1997).
    """
    v, g = data.bias, data.conductance
    order = np.argsort(v)
    v, g = v[order], g[order]
    n = v.size
    edge = max(3, n // 10)
    # Baseline through the two edges (a straight line, so a sloped background does not fool it).
    gl, gr = np.median(g[:edge]), np.median(g[-edge:])
    vl, vr = np.median(v[:edge]), np.median(v[-edge:])
    gt = 0.5 * (gl + gr)
    g = g / (1.0 + (gr - gl) / gt / (vr - vl) * (v - 0.5 * (vl + vr)))
    kernel = max(1, n // 50)
    smooth = np.convolve(g, np.ones(kernel) / kernel, mode="same")
    inner = slice(edge, n - edge)
    i_min = edge + int(np.argmin(smooth[inner]))
    depth = max(1e-6, 1.0 - smooth[i_min] / gt)
    half = gt * (1.0 - depth / 2.0)
    left = np.nonzero(smooth[:i_min] >= half)[0]
    right = np.nonzero(smooth[i_min:] >= half)[0]
    v_left = v[left[-1]] if left.size else v[0]
    v_right = v[i_min + right[0]] if right.size else v[-1]
    fwhm = max(v_right - v_left, 1e-12)
    N = data.setup.junctions_in_series
    d = min(depth, 0.4)
    u = float(invert_depth_series(d))
    T = fwhm * ELEMENTARY_CHARGE / (HALF_WIDTH_FACTOR * N * BOLTZMANN * (1 + 0.3921 * d))
    return np.array([T, u, 0.5 * (v_left + v_right)])


def least_squares_fit(shape: DipShape, data: SweepData, start: np.ndarray,
                      robust_scale: float | None = None) -> dict:
    """Profile least squares over (T, u, V₀) inside :func:`prior_bounds`; optimum, covariance, amplitudes.

    Trust-region reflective least squares with the box as bounds (scipy.optimize.least_squares), so
    a model with a hard validity range is never evaluated outside it; ``at_bound`` names the
    parameters whose optimum lies on a bound of the box (the fit then only says "the truth is at
    or beyond this edge", and :func:`fit_sweep` refuses it). With ``robust_scale`` (a noise level
    in the weighted units) the amplitudes become explicit parameters and the loss is soft-L1 with
    scale 3σ (Huber-type M-estimation, Huber, *Robust Statistics*, Wiley 1981), so a few wild
    points cannot pull the optimum; the covariance is then still the ordinary one at that optimum.
    """
    problem = _ScaledProblem.build(shape, data, start)
    if robust_scale is not None and robust_scale > 0:
        z_opt, active, sol = problem.robust_optimum(robust_scale, float(np.ptp(data.bias)))
    else:
        z_opt, active, sol = problem.ordinary_optimum()
    lo, hi = problem.lo, problem.hi
    theta = np.clip(z_opt * problem.scale0, lo, hi)
    coef, rss, _, _ = problem.likelihood.profile(theta[None, :])
    m = problem.likelihood.points
    dof = m - 3 - problem.likelihood.amplitudes
    s2 = float(rss[0]) / dof
    cov, se = problem.covariance(z_opt, theta, s2)
    near = np.minimum(theta - lo, hi - theta) <= np.maximum(1e-6 * (hi - lo), 1e-3 * se)
    at_bound = tuple(name for name, a, nb in zip(NONLINEAR, active, near, strict=True) if a != 0 or nb)
    return {
        "theta": theta,
        "standard_errors": se,
        "covariance": cov,
        "amplitudes": coef[0],
        "rss": float(rss[0]),
        "degrees_of_freedom": dof,
        "success": bool(sol.success),
        "at_bound": at_bound,
        "bounds": (lo, hi),
    }


@dataclass(frozen=True)
class _ScaledProblem:
    """The profiled least-squares problem of :func:`least_squares_fit` in the optimiser's units.

    Parameters are scaled by ``scale0`` (T, u, and the thermal voltage k_B T/e for V₀) and the
    residuals by ``unit``, a noise level from successive differences, so that the optimiser's
    tolerances mean the same on any conductance scale (scipy's gradient test is absolute).
    ``lo``/``hi`` are the prior box (:func:`prior_bounds`) and ``start`` the clipped start point.
    """

    likelihood: ProfiledLikelihood
    lo: np.ndarray
    hi: np.ndarray
    start: np.ndarray
    scale0: np.ndarray
    unit: float
    y: np.ndarray

    @classmethod
    def build(cls, shape: DipShape, data: SweepData, start: np.ndarray) -> _ScaledProblem:
        bounds = prior_bounds(shape, data)
        lo = np.array([bounds[k][0] for k in NONLINEAR])
        hi = np.array([bounds[k][1] for k in NONLINEAR])
        lo[0] = max(lo[0], 1e-9 * max(abs(float(start[0])), 1e-12))
        margin = 1e-7 * (hi - lo)
        start = np.clip(np.asarray(start, dtype=float), lo + margin, hi - margin)
        scale0 = np.array([start[0], max(start[1], 1e-3), start[0] * BOLTZMANN / ELEMENTARY_CHARGE])
        likelihood = ProfiledLikelihood(shape, data)
        y_raw = likelihood.y
        unit = difference_noise_scale(y_raw) or float(np.median(np.abs(y_raw))) * 1e-6 or 1.0
        return cls(likelihood, lo, hi, start, scale0, unit, y_raw / unit)

    def design(self, theta: np.ndarray) -> np.ndarray:
        """Whitened design matrix (m, k) at one parameter set, in units of ``unit``."""
        return np.stack(self.likelihood.columns(theta[None, :]), axis=-1)[0] / self.unit

    def profile_resid(self, z: np.ndarray) -> np.ndarray:
        """Residuals at scaled parameters ``z`` with the amplitudes solved by linear least squares."""
        a = self.design(np.clip(z * self.scale0, self.lo, self.hi))
        coef = np.linalg.lstsq(a, self.y, rcond=None)[0]
        return self.y - a @ coef

    def ordinary_optimum(self):
        """Trust-region reflective least squares of the profiled residuals inside the box."""
        sol = optimize.least_squares(self.profile_resid, self.start / self.scale0,
                                     bounds=(self.lo / self.scale0, self.hi / self.scale0),
                                     method="trf", x_scale="jac")
        return sol.x, sol.active_mask, sol

    def robust_optimum(self, robust_scale: float, bias_span: float):
        """Soft-L1 least squares (scale 3 ``robust_scale``) with the amplitudes as explicit parameters.

        Huber-type M-estimation (Huber, *Robust Statistics*, Wiley 1981) with scipy's soft-L1 loss;
        the background amplitude is scaled by the swept ``bias_span``.
        """
        k = self.likelihood.amplitudes
        scale0, lo, hi, y = self.scale0, self.lo, self.hi, self.y
        a0 = self.design(self.start)
        amp0 = np.linalg.lstsq(a0, y, rcond=None)[0]
        amp_scale = np.full(k, abs(amp0[0]) if amp0[0] != 0 else 1.0)
        if k == 2:
            amp_scale[1] = amp_scale[0] / max(bias_span, 1e-30)

        def full_resid(z: np.ndarray) -> np.ndarray:
            return y - self.design(np.clip(z[:3] * scale0, lo, hi)) @ (z[3:] * amp_scale)

        z0 = np.concatenate([self.start / scale0, amp0 / amp_scale])
        zl = np.concatenate([lo / scale0, np.full(k, -np.inf)])
        zh = np.concatenate([hi / scale0, np.full(k, np.inf)])
        sol = optimize.least_squares(full_resid, z0, bounds=(zl, zh), method="trf", x_scale="jac",
                                     loss="soft_l1", f_scale=3.0 * robust_scale / self.unit)
        return sol.x[:3], sol.active_mask[:3], sol

    def covariance(self, z_opt: np.ndarray, theta: np.ndarray, s2: float) -> tuple[np.ndarray, np.ndarray]:
        """Covariance s² (JᵀJ)⁻¹ of (T, u, V₀) and standard errors at the optimum.

        J is the Jacobian of the profiled residual by central differences (steps inside the box),
        the usual Gauss–Newton approximation of the inverse Fisher matrix (Bates & Watts,
        *Nonlinear Regression Analysis and Its Applications*, Wiley 1988, ch. 2; from memory). A
        singular JᵀJ falls back to 1 % of each parameter.
        """
        step = 1e-5 * np.maximum(np.abs(z_opt), 1e-3)
        jac = np.empty((self.y.size, 3))
        for i in range(3):
            e = np.zeros(3)
            e[i] = step[i]
            jac[:, i] = (self.profile_resid(z_opt + e) - self.profile_resid(z_opt - e)) / (2 * step[i])
        jac = jac * self.unit / self.scale0
        try:
            cov = np.linalg.inv(jac.T @ jac) * s2
            se = np.sqrt(np.abs(np.diag(cov)))
        except np.linalg.LinAlgError:
            se = np.abs(theta) * 1e-2
            cov = np.diag(se**2)
        return cov, se


# --------------------------------------------------------------------------------------------


def fwhm_volts(shape: DipShape, setup: SweepSetup, temperature: float, u: float) -> float:
    """Numerical full width at half depth (V) of the instrument-averaged model dip."""
    N = setup.junctions_in_series
    vt = N * BOLTZMANN * temperature / ELEMENTARY_CHARGE
    v = np.linspace(0.0, 12.0 * vt + 4 * setup.excitation_peak_V, 6001)
    g = forward_conductance(shape, v, setup, temperature, u * temperature, 1.0, 0.0)
    return numerical_fwhm(v, g)[1]


class ModelEdgeError(SweepError):
    """The optimum or the posterior touches a bound of the model's validated range (or the prior box).

    The data then say only that the truth lies at or beyond that edge, so no temperature may be
    certified from this model; ``parameter`` names the bound, ``u_estimate`` the u seen there.
    """

    def __init__(self, message: str, parameter: str, u_estimate: float):
        super().__init__(message, field="conductance_S")
        self.parameter = parameter
        self.u_estimate = u_estimate


class ResidualStructureError(SweepError):
    """The residuals are smooth structure, not noise: the model does not describe the sweep."""

    def __init__(self, message: str):
        super().__init__(message, field="conductance_S")


#: A noise model this close to a deterministic curve (AR(1) ρ at its 0.95 clip, or a 1/f^α
#: spectrum steeper than α = 2.3, i.e. beyond a random walk's 1/f²) is structure, not noise; the
#: fit is refused. (The 1/f share of the variance is no guide: with small α the power law alone
#: also fits white-ish noise.)
STRUCTURE_RHO = 0.94
STRUCTURE_ALPHA = 2.3


class PointError(SweepError):
    """One or more data points cannot be used as they are; ``points`` are their indices."""

    def __init__(self, message: str, field: str, points: tuple[int, ...]):
        super().__init__(message, field=field)
        self.points = points


#: A posterior "touches" a bound when its 0.1 % (99.9 %) quantile lies within this many posterior
#: standard deviations of that bound: the likelihood is then visibly cut by the prior box.
EDGE_SD_MARGIN = 0.25

_EDGE_WORDS = {
    "u": "u = ΔE/k_BT",
    "temperature_K": "the temperature",
    "bias_offset_V": "the bias offset V₀ (the dip is not in the central half of the sweep)",
}


def _edge_message(shape: DipShape, name: str, side: str, bound: float, value: float, where: str) -> str:
    if name == "u":
        if side == "upper":
            why = (f"the sweep is at or beyond the largest u this model is validated for ({bound:g}); "
                   "no temperature is certified from the edge of a model: measure warmer, or use a "
                   "model validated to larger u")
        else:
            why = (f"the dip is not resolved above u = {bound:g} (too shallow for the noise); "
                   "measure colder or average longer")
        return f"{where} of {_EDGE_WORDS[name]} reaches the {side} bound u = {bound:g} of the {shape.name} model ({value:.4g}): {why}"
    return f"{where} of {_EDGE_WORDS[name]} reaches its {side} bound {bound:.4g} ({value:.4g}); the sweep does not fix it"


def edge_of_least_squares(shape: DipShape, ls: dict) -> ModelEdgeError | None:
    """A :class:`ModelEdgeError` if the least-squares optimum lies on a bound of the box, else None."""
    if not ls.get("at_bound"):
        return None
    name = ls["at_bound"][0]
    i = NONLINEAR.index(name)
    lo, hi = ls["bounds"]
    value = float(ls["theta"][i])
    side = "upper" if hi[i] - value < value - lo[i] else "lower"
    bound = float(hi[i] if side == "upper" else lo[i])
    return ModelEdgeError(_edge_message(shape, name, side, bound, value, "the least-squares optimum"),
                          name, float(ls["theta"][1]))


def edge_of_posterior(shape: DipShape, samples: np.ndarray, bounds: dict) -> ModelEdgeError | None:
    """A :class:`ModelEdgeError` if the posterior touches a bound (see :data:`EDGE_SD_MARGIN`)."""
    for i, name in enumerate(NONLINEAR):
        lo, hi = bounds[name]
        col = samples[:, i]
        q_lo, q_hi = np.percentile(col, [0.1, 99.9])
        sd = float(col.std(ddof=1))
        for side, bound, gap in (("upper", hi, hi - q_hi), ("lower", lo, q_lo - lo)):
            if gap < EDGE_SD_MARGIN * sd:
                q = q_hi if side == "upper" else q_lo
                return ModelEdgeError(
                    _edge_message(shape, name, side, float(bound), float(q),
                                  f"the posterior's {'99.9' if side == 'upper' else '0.1'} % quantile"),
                    name, float(samples[:, 1].mean()))
    return None


def _model_parts(shape: DipShape, data: SweepData, theta: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Model curve (data order), its whitened Jacobian (T, u, V₀, amplitudes) and whitened residuals."""
    coef, _, _, _ = _profile(shape, data, theta[None, :])
    coef = coef[0]

    def curve(th: np.ndarray) -> np.ndarray:
        return _design(shape, data, th[None, :])[0] @ coef

    c0 = curve(theta)
    bounds = prior_bounds(shape, data)
    cols = []
    for i, name in enumerate(NONLINEAR):
        h = 1e-5 * (abs(theta[i]) if i < 2 else theta[0] * BOLTZMANN / ELEMENTARY_CHARGE * 1e2)
        lo, hi = bounds[name]
        up, dn = theta.copy(), theta.copy()
        up[i] = min(theta[i] + h, hi)
        dn[i] = max(theta[i] - h, lo)
        cols.append((curve(up) - curve(dn)) / (up[i] - dn[i]))
    design = _design(shape, data, theta[None, :])[0]
    jac = np.column_stack(cols + [design[:, j] for j in range(design.shape[1])])
    return c0, whiten(data, jac, axis=0), whiten(data, data.conductance - c0)


def _describe_points(data: SweepData, points) -> str:
    return ", ".join(f"{data.bias[i]:.4g} V" for i in sorted(points))


def screen_and_model_noise(shape: DipShape, data: SweepData, ls: dict,
                           auto_background: bool = True) -> tuple[SweepData, dict, ResidualDiagnosis]:
    """Robust start, outlier screen, noise model and named causes (analysis.cbt.robust).

    1. Soft-L1 least squares from the ordinary optimum ``ls`` (a few spikes cannot pull it); 2. residuals screened
    for isolated outliers, which are excluded and named (more than 5 % of the points: refused);
    3. a noise model (white, AR(1) or 1/f + white) chosen from the residuals' periodogram by
    Whittle's likelihood and AIC, used in the likelihood (Prais–Winsten or Cholesky whitening); 4. templates of a slope, an asymmetry and self-heating
    tested against the whitened residuals; a significant slope adds the linear background (when
    ``auto_background``); 5. the Newey–West inflation of u(T) for what the noise model misses.
    Returns the data as the posterior should see them, the final least-squares fit and the findings.
    """
    data, ls, screen = _screen_outliers(shape, data, ls)
    data, ls, background_added, slope_t = _add_background_if_sloped(shape, data, ls, auto_background)
    data, ls, noise, r1 = _model_noise(shape, data, ls)
    tests, jac_w, e_w = _cause_tests(shape, data, ls)
    inflation = float(hac_inflation(jac_w, e_w)[0])
    r1_after = lag1_correlation(e_w)
    findings = _findings(data, screen, background_added, slope_t, noise, r1, tests, inflation, r1_after,
                         newey_west_lag(e_w.size))
    diagnosis = ResidualDiagnosis(
        outliers=screen.outliers, outlier_scale=screen.scale, outlier_threshold=screen.threshold,
        lag1_before_whitening=r1, noise_correlation=data.noise_correlation, noise_model=noise.describe(),
        lag1_after_whitening=r1_after,
        structure_inflation=inflation, hac_lag=newey_west_lag(e_w.size), templates=tuple(tests),
        background_added=background_added, findings=tuple(findings),
    )
    return data, ls, diagnosis


@dataclass(frozen=True)
class _OutlierScreen:
    """What the outlier screen found: the new outliers (indices) and its robust scale and threshold."""

    outliers: tuple[int, ...]
    scale: float
    threshold: float


def _screen_outliers(shape: DipShape, data: SweepData, ls: dict) -> tuple[SweepData, dict, _OutlierScreen]:
    """Steps 1–2 of :func:`screen_and_model_noise`: a soft-L1 fit, then isolated outliers excluded.

    The robust scale is the successive-difference noise level of the whitened data; up to four
    rounds flag points beyond the robust threshold (analysis.cbt.robust.flag_outliers), exclude
    them and refit. More than :data:`MAX_OUTLIER_FRACTION` of the points is refused (PointError).
    """
    sigma0 = difference_noise_scale(whiten(data, data.conductance))
    ls = least_squares_fit(shape, data, ls["theta"], robust_scale=sigma0)
    given = set(data.excluded)
    excluded = set(given)
    threshold, scale = 0.0, 0.0
    for _ in range(4):
        order = data.used_order()
        curve = _design(shape, data, ls["theta"][None, :])[0] @ ls["amplitudes"]
        resid = ((data.conductance - curve) * _weights(data))[order]
        pos, scale = flag_outliers(resid)
        threshold = outlier_threshold(resid.size)
        new = {int(order[p]) for p in pos} - excluded
        if not new:
            break
        excluded |= new
        if len(excluded) > MAX_OUTLIER_FRACTION * data.bias.size:
            raise PointError(
                f"{len(excluded)} of {data.bias.size} points deviate from the fitted dip by more than "
                f"{threshold:.1f} robust standard deviations (at {_describe_points(data, excluded)}): "
                "this is not a clean sweep with a few spikes; check for charge jumps, drift or a "
                "wrong column", field="conductance_S", points=tuple(sorted(excluded)))
        data = replace(data, excluded=tuple(sorted(excluded)))
        ls = least_squares_fit(shape, data, ls["theta"])
    return data, ls, _OutlierScreen(tuple(sorted(excluded - given)), scale, threshold)


def _add_background_if_sloped(shape: DipShape, data: SweepData, ls: dict,
                              auto_background: bool) -> tuple[SweepData, dict, bool, float]:
    """Step 4's slope test, done first and under white noise; a significant slope adds a background.

    Returns the data (now white-noise, with a background if one was added), the refitted least
    squares, whether the background was added and the slope's t statistic.
    """
    # A slope is tested first, under white noise: a deterministic line would otherwise be taken
    # for low-frequency noise. Under genuinely correlated noise this test fires more easily; the
    # background it then adds costs a little precision and no bias.
    background_added, slope_t = False, 0.0
    data = replace(data, noise_correlation=0.0, noise_factor=None)
    if not data.background:
        ls = least_squares_fit(shape, data, ls["theta"])
        theta = ls["theta"]
        _, jac_w, e_w = _model_parts(shape, data, theta)
        s_curve = _design(shape, data, theta[None, :])[0][:, 0] * ls["amplitudes"][0]
        slope_test = template_tests(jac_w, e_w, {"slope": (whiten(data, (data.bias - theta[2]) * s_curve), "")})
        if auto_background and slope_test and slope_test[0].significant:
            data = replace(data, background=True)
            background_added, slope_t = True, slope_test[0].t_statistic
            ls = least_squares_fit(shape, data, theta)
    return data, ls, background_added, slope_t


def _model_noise(shape: DipShape, data: SweepData, ls: dict):
    """Step 3: choose the noise model from the residuals and refit in it; refuse structure.

    The model (white, AR(1) or 1/f + white) is chosen by Whittle's likelihood and AIC
    (analysis.cbt.robust.choose_noise_model); a noise model as steep as :data:`STRUCTURE_RHO` or
    :data:`STRUCTURE_ALPHA` raises :class:`ResidualStructureError`. Returns the data with the noise
    model, the refitted least squares, the noise model and the residuals' lag-1 correlation.
    """
    order = data.used_order()
    curve = _design(shape, data, ls["theta"][None, :])[0] @ ls["amplitudes"]
    resid = ((data.conductance - curve) * _weights(data))[order]
    r1 = lag1_correlation(resid)
    noise = choose_noise_model(resid)
    if (noise.kind == "AR(1)" and abs(noise.rho) >= STRUCTURE_RHO) or (
            noise.kind == "1/f + white" and noise.alpha >= STRUCTURE_ALPHA):
        raise ResidualStructureError(_structure_message(shape, data, ls, noise, r1))
    if noise.kind != "white":
        data = replace(data, noise_correlation=noise.rho, noise_factor=noise.factor)
        ls = least_squares_fit(shape, data, ls["theta"])
    return data, ls, noise, r1


def _findings(data: SweepData, screen: _OutlierScreen, background_added: bool, slope_t: float, noise,
              r1: float, tests, inflation: float, r1_after: float, hac_lag: int) -> list[str]:
    """The residual checks' findings in words, in the order of the procedure."""
    outliers, threshold = screen.outliers, screen.threshold
    findings = []
    if outliers:
        findings.append(f"{len(outliers)} isolated outlier(s) beyond {threshold:.1f} robust standard deviations "
                        f"left out of the fit (at {_describe_points(data, outliers)})")
    if background_added:
        findings.append(f"a linear slope under the dip (t = {slope_t:.1f}) was found and a linear "
                        "background fitted; state linear_background to make this explicit")
    if noise.kind != "white":
        findings.append(f"the noise is not white (lag-1 correlation {r1:.2f}): a {noise.describe()} noise "
                        "model, chosen from the residuals' periodogram, is used in the likelihood")
    for t in tests:
        if t.significant:
            findings.append(f"{t.advice} (t = {t.t_statistic:.1f}; adding it would move T by "
                            f"{t.temperature_shift:.3g} K)")
    # Named only when it is beyond its own sampling noise on white residuals (HAC_SIGNIFICANT), or
    # rides on a non-white noise model: that is also when the budget carries it (uncertainty.py).
    if inflation > 1.0 + 1e-9 and (noise.kind != "white" or inflation > HAC_SIGNIFICANT):
        findings.append(f"residuals remain correlated after the noise model (lag-1 {r1_after:.2f}): u(T) is "
                        f"inflated by {inflation:.2f} (Newey–West, lag {hac_lag})")
    return findings


def _cause_tests(shape: DipShape, data: SweepData, ls: dict):
    """Named-cause templates (asymmetry, self-heating, slope) tested against the residuals at the
    least-squares optimum ``ls`` in the data's noise model; also returns the whitened Jacobian and
    residuals they were tested against."""
    theta = ls["theta"]
    _, jac_w, e_w = _model_parts(shape, data, theta)
    s_curve = _design(shape, data, theta[None, :])[0][:, 0] * ls["amplitudes"][0]
    centred = data.bias - theta[2]
    v_half = fwhm_volts(shape, data.setup, theta[0], theta[1])
    templates = {
        "asymmetry": (whiten(data, np.sign(centred) * (ls["amplitudes"][0] - s_curve)),
                      "the dip is asymmetric: check for a thermal gradient along the array, a drifting "
                      "bias offset or background-charge jumps"),
        "self-heating": (whiten(data, _heating_template(shape, data, theta, ls, v_half)),
                         "the residuals show the bias-dependent broadening of self-heating: give the "
                         "electron-phonon coupling (island volume and constant) to fit a heating model"),
    }
    if not data.background:
        templates["slope"] = (whiten(data, centred * s_curve),
                              "a linear slope under the dip: fit it with the linear background option "
                              "(linear_background)")
    return template_tests(jac_w, e_w, templates), jac_w, e_w


def _structure_message(shape: DipShape, data: SweepData, ls: dict, noise, r1: float) -> str:
    """Why a sweep whose residuals are structure is refused, with the likeliest named cause."""
    u_ls = float(ls["theta"][1])
    if u_ls > shape.max_u:
        # Beyond the model's validated range the misfit is the model's own: say that first.
        return (f"the residuals are smooth structure, not noise (lag-1 correlation {r1:.2f}): the "
                f"least-squares u = ΔE/k_BT = {u_ls:.2f} lies beyond the validated range of the "
                f"{shape.name} model (u ≤ {shape.max_u:g}), which does not describe this sweep, so "
                "no temperature is certified from it; a model validated at this u is needed, or "
                "a warmer sweep")
    tests = sorted(_cause_tests(shape, data, ls)[0], key=lambda t: -abs(t.t_statistic))
    cause = (f"likely cause ({tests[0].cause}, t = {tests[0].t_statistic:.1f} under white noise): {tests[0].advice}"
             if tests and tests[0].significant else "no named cause fits; check the model choice and the set-up")
    return (f"the residuals are smooth structure, not noise (lag-1 correlation {r1:.2f}; as noise they would "
            f"need a {noise.describe()} spectrum): the {shape.name} model does not describe this sweep, "
            f"so no temperature is certified from it; {cause}")


def _heating_template(shape: DipShape, data: SweepData, theta: np.ndarray, ls: dict, v_half: float) -> np.ndarray:
    """∂G/∂ln T × ((V − V₀)/V_1/2)²: first-order effect of T_e(V) = T (1 + κ (V/V_1/2)²) (data order)."""
    T = theta[0]
    up, dn = theta.copy(), theta.copy()
    up[0], dn[0] = T * (1 + 1e-5), T * (1 - 1e-5)
    amp = ls["amplitudes"]
    d = (_design(shape, data, up[None, :])[0] @ amp - _design(shape, data, dn[None, :])[0] @ amp) / 2e-5
    return d * ((data.bias - theta[2]) / v_half) ** 2


def fit_sweep(
    data: SweepData,
    seed: int,
    shape: DipShape = higher_order_shape,
    settings: FitSettings | None = None,
    progress: ProgressCallback | None = None,
    min_range_half_widths: float = 2.5,
    robust: bool = True,
) -> SweepFit:
    """Checks, robust least squares and noise model, then the posterior of (T, ΔE, V₀) by emcee.

    Raises :class:`PointError` for a bias value far outside the sweep (a typing slip) or a sweep
    with too many outliers, naming the points; SweepError when the swept bias does not reach
    ``min_range_half_widths`` × V_1/2 on both sides of the dip (the asymptote G_T is then not
    fixed: 6g(x) is still 0.1 % of the depth at 2 V_1/2; docs/physics.md 1.4); :class:`ModelEdgeError`
    when the least-squares optimum or the posterior touches a bound of the model's validated
    range or of the prior box. With ``robust`` (default) outliers are screened out, correlated
    noise is modelled and the residuals are diagnosed (:func:`screen_and_model_noise`).

    The sampler works in (ln T, u, V₀), starting from a ball shaped by the least-squares
    covariance (analysis.sampling); results are reported in T.
    """
    settings = settings or FitSettings()
    _check_bias_values(data)
    data, ls, diagnosis = _checked_least_squares(shape, data, robust)
    T0, u0, v00 = ls["theta"]
    ec0 = u0 * T0
    reach = _bias_reach(shape, data, T0, u0, v00, min_range_half_widths)
    post = _sample_in_temperature(shape, data, ls, seed, settings, progress)
    s = post.samples
    gt_mean, gt_std = _asymptote_summary(shape, data, s)
    T_mean = float(s[:, 0].mean())
    T_std = float(s[:, 0].std(ddof=1))
    ec_samples = s[:, 0] * s[:, 1]
    ec_mean = float(ec_samples.mean())
    lo, hi = np.percentile(s[:, 0], [2.5, 97.5])
    best, coef_b, curve, resid, noise, r1 = _curve_at_posterior_mean(shape, data, s)
    u = float(s[:, 1].mean())
    return SweepFit(
        model=shape.name,
        model_max_u=shape.max_u,
        parameter_names=NONLINEAR + ("asymptotic_conductance_S",) + (("background_slope_per_V",) if data.background else ()),
        least_squares={
            "temperature_K": float(T0),
            "charging_energy_K": float(ec0),
            "u": float(u0),
            "bias_offset_V": float(v00),
            "standard_errors": [float(x) for x in ls["standard_errors"]],
        },
        posterior=post,
        temperature=T_mean,
        temperature_std=T_std,
        temperature_interval95=(float(lo), float(hi)),
        charging_energy=ec_mean,
        charging_energy_std=float(ec_samples.std(ddof=1)),
        asymptotic_conductance=gt_mean,
        asymptotic_conductance_std=gt_std,
        bias_offset=float(best[2]),
        background_slope=float(coef_b[0][1] / coef_b[0][0]) if data.background else 0.0,
        u=float(u),
        depth=float(depth_series(u)),
        half_width_voltage=fwhm_volts(shape, data.setup, T_mean, u),
        noise_std=noise,
        residuals=resid,
        model_curve=curve,
        corrected_bias=data.bias,
        corrected_conductance=data.conductance,
        lag1_residual_correlation=r1,
        diagnostics={"bias_reach_half_widths": float(reach)},
        electron_temperature_zero_bias=None if data.setup.heating is None else float(
            data.setup.heating.electron_temperature(0.0, T_mean, data.setup.junctions_in_series)),
        heating_at_half_width=heating_fraction(data.setup, T_mean, fwhm_volts(shape, data.setup, T_mean, u)),
        fitted_data=data,
        diagnosis=diagnosis,
    )


def _check_bias_values(data: SweepData) -> None:
    """Refuse a bias value far outside the rest of the sweep (PointError naming it)."""
    bad = isolated_bias_points(data.bias)
    if bad:
        i = bad[0]
        raise PointError(
            f"bias value {data.bias[i]:g} V lies far outside the rest of the sweep (the other values are "
            f"spaced about {np.median(np.abs(np.diff(np.sort(data.bias)))):.3g} V apart): a typing slip in "
            "the exponent or a wrong unit?", field="bias_V", points=tuple(bad))


def _checked_least_squares(shape: DipShape, data: SweepData,
                           robust: bool) -> tuple[SweepData, dict, ResidualDiagnosis | None]:
    """Least squares from :func:`initial_guess`, checked for a dip and for the box's edges.

    With ``robust`` the data are then screened and given a noise model
    (:func:`screen_and_model_noise`) and the refitted optimum is checked again. Returns the data
    as the posterior sees them, the final least-squares fit and the diagnosis (None if not robust).
    """
    ls = least_squares_fit(shape, data, initial_guess(data))
    diagnosis = None
    for attempt in range(2):
        T0, u0, v00 = ls["theta"]
        if not (T0 > 0 and u0 > 0 and math.isfinite(T0)):
            raise SweepError("no Coulomb-blockade dip found: the least-squares fit gives no positive temperature and charging energy", field="conductance_S")
        edge = edge_of_least_squares(shape, ls)
        if edge is not None:
            raise edge
        if not robust or attempt:
            break
        data, ls, diagnosis = screen_and_model_noise(shape, data, ls)
    return data, ls, diagnosis


def _bias_reach(shape: DipShape, data: SweepData, T0: float, u0: float, v00: float,
                min_range_half_widths: float) -> float:
    """How far the sweep reaches on its shorter side, in half-widths V_1/2; SweepError if too little.

    Beyond ``min_range_half_widths`` × V_1/2 the asymptote G_T is fixed by the data
    (docs/physics.md 1.4).
    """
    v_half = fwhm_volts(shape, data.setup, T0, u0)
    reach = min(v00 - data.bias.min(), data.bias.max() - v00) / v_half
    if reach < min_range_half_widths:
        raise SweepError(
            f"bias range reaches only ±{reach:.2f} V_1/2 around the dip (V_1/2 ≈ {v_half:.3g} V); "
            f"at least ±{min_range_half_widths} V_1/2 is needed to fix the asymptotic conductance",
            field="bias_V",
        )
    return reach


def _sample_in_temperature(shape: DipShape, data: SweepData, ls: dict, seed: int, settings: FitSettings,
                           progress: ProgressCallback | None) -> PosteriorResult:
    """The posterior of (T, u, V₀), sampled in (ln T, u, V₀) from the least-squares optimum.

    The least-squares covariance is carried to ln T by the Jacobian diag(1/T, 1, 1); the samples
    are returned in T. A posterior that touches a bound of the prior box raises ModelEdgeError.
    """
    T0, u0, v00 = ls["theta"]
    bounds = prior_bounds(shape, data)
    log_prob = make_log_posterior(shape, data, log_temperature=True)
    to_log = np.diag([1.0 / T0, 1.0, 1.0])
    post = sample_posterior(
        log_prob, np.array([math.log(T0), u0, v00]), seed, names=("ln_temperature",) + NONLINEAR[1:],
        covariance=to_log @ ls["covariance"] @ to_log,
        walkers=settings.walkers, block=settings.block, max_steps=settings.max_steps,
        min_tau_multiple=settings.min_tau_multiple, tau_tolerance=settings.tau_tolerance,
        progress=progress, moves=settings.moves,
    )
    s = post.samples.copy()
    s[:, 0] = np.exp(s[:, 0])
    post = replace(post, samples=s)
    edge = edge_of_posterior(shape, s, bounds)
    if edge is not None:
        raise edge
    return post


def _asymptote_summary(shape: DipShape, data: SweepData, s: np.ndarray) -> tuple[float, float]:
    """Mean and standard deviation of G_T over the posterior samples ``s`` (T, u, V₀).

    The amplitudes were integrated out (module doc); their spread is the law of total variance over
    the conditional least-squares estimates, Var = Var(E[G_T | θ]) + E[Var(G_T | θ)], with
    Var(G_T | θ) = σ² (AᵀA)⁻¹₀₀ the linear least-squares variance (common practice, no source),
    from at most 600 evenly spaced samples (plenty for a standard deviation).
    """
    sub = s[:: max(1, s.shape[0] // 600)]
    coef, rss, _, ata = _profile(shape, data, sub)
    n, k = data.used_order().size, coef.shape[1]
    sigma2 = rss / (n - k)
    cond_var = sigma2 * np.linalg.inv(ata)[:, 0, 0]
    gt_mean = float(coef[:, 0].mean())
    gt_std = float(math.sqrt(coef[:, 0].var(ddof=1) + cond_var.mean()))
    return gt_mean, gt_std


def _curve_at_posterior_mean(shape: DipShape, data: SweepData, s: np.ndarray):
    """The model at the posterior mean of (T, u, V₀) with its least-squares amplitudes.

    Returns that parameter set, the amplitudes, the curve and residuals (data order), the noise
    standard deviation of the weighted residuals (n − 3 − k degrees of freedom) and their lag-1
    correlation in bias order.
    """
    best = np.array([float(s[:, 0].mean()), float(s[:, 1].mean()), float(s[:, 2].mean())])
    coef_b, _, _, _ = _profile(shape, data, best[None, :])
    curve = _design(shape, data, best[None, :])[0] @ coef_b[0]
    resid = data.conductance - curve
    order = data.used_order()
    n, k = order.size, coef_b.shape[1]
    rw = (resid * _weights(data))[order]
    noise = float(math.sqrt(float(rw @ rw) / (n - 3 - k)))
    r1 = lag1_correlation(rw) if n > 3 else 0.0
    return best, coef_b, curve, resid, noise, r1


def heating_fraction(setup: SweepSetup, temperature: float, fwhm: float) -> float:
    """Relative electron heating (T_e − T)/T at the half-depth bias ±V_1/2/2 (docs/physics.md 1.4)."""
    if setup.heating is None:
        return 0.0
    te = float(setup.heating.electron_temperature(fwhm / 2, temperature, setup.junctions_in_series))
    return te / temperature - 1.0


def estimate_asymptote(data: SweepData) -> float:
    """G_T from the outer 10 % of points at each end (for the heating model's R_T)."""
    g = data.conductance[np.argsort(data.bias)]
    edge = max(3, g.size // 10)
    return float(0.5 * (np.median(g[:edge]) + np.median(g[-edge:])))


__all__ = [
    "FitSettings",
    "ModelEdgeError",
    "PointError",
    "ResidualStructureError",
    "SweepData",
    "SweepError",
    "SweepFit",
    "dip_function",
    "fit_sweep",
    "fwhm_volts",
    "initial_guess",
    "least_squares_fit",
]
