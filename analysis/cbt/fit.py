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
from dataclasses import dataclass, field

import numpy as np
from scipy import optimize

from analysis.cbt.models import (
    HALF_WIDTH_FACTOR,
    DipShape,
    SweepSetup,
    depth_series,
    dip_function,
    forward_conductance,
    higher_order_shape,
    invert_depth_series,
    numerical_fwhm,
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
    """One sweep: bias (V) and conductance (S) arrays, optional per-point standard uncertainty."""

    bias: np.ndarray
    conductance: np.ndarray
    setup: SweepSetup
    conductance_uncertainty: np.ndarray | None = None
    background: bool = False


@dataclass(frozen=True)
class FitSettings:
    """Sampler settings. Defaults give certificate-grade chains; tests may use lighter ones."""

    walkers: int = 12
    block: int = 100
    max_steps: int = 20_000
    min_tau_multiple: float = 50.0
    tau_tolerance: float = 0.05


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


# --------------------------------------------------------------------------------------------
# Linear amplitude parameters


def _design(shape: DipShape, data: SweepData, theta: np.ndarray) -> np.ndarray:
    """Design matrices A, shape (batch, n, k): columns S and (V − V₀) S."""
    T, u, v0 = theta[:, 0], theta[:, 1], theta[:, 2]
    s = forward_conductance(shape, data.bias, data.setup, T, u * T, np.ones_like(T), v0)
    if not data.background:
        return s[..., None]
    return np.stack([s, (data.bias - v0[:, None]) * s], axis=-1)


def _weights(data: SweepData) -> np.ndarray:
    if data.conductance_uncertainty is None:
        return np.ones_like(data.conductance)
    return 1.0 / np.asarray(data.conductance_uncertainty, dtype=float)


def _profile(shape: DipShape, data: SweepData, theta: np.ndarray):
    """Least-squares linear parameters, RSS and log|AᵀA| for each row of theta."""
    w = _weights(data)
    a = _design(shape, data, theta) * w[None, :, None]
    y = data.conductance * w
    ata = np.einsum("bni,bnj->bij", a, a)
    aty = np.einsum("bni,n->bi", a, y)
    coef = np.linalg.solve(ata, aty[..., None])[..., 0]
    resid = y[None, :] - np.einsum("bni,bi->bn", a, coef)
    rss = np.einsum("bn,bn->b", resid, resid)
    _, logdet = np.linalg.slogdet(ata)
    return coef, rss, logdet, ata


def make_log_posterior(shape: DipShape, data: SweepData, bias_window: tuple[float, float]):
    """Vectorised log posterior of (T, ΔE/k_B, V₀) with the amplitudes marginalised (module doc)."""
    n = data.conductance.size
    k = 2 if data.background else 1
    lo, hi = bias_window
    # A model with a hard validity range (tables) bounds the prior on u to it.
    u_lo = getattr(shape, "min_u", 0.0)
    u_hi = min(MAX_U_PRIOR, shape.max_u) if hasattr(shape, "min_u") else MAX_U_PRIOR

    def log_prob(theta: np.ndarray) -> np.ndarray:
        theta = np.atleast_2d(theta)
        T, u, v0 = theta[:, 0], theta[:, 1], theta[:, 2]
        ok = (T > 0) & (T <= 100.0) & (u >= u_lo) & (u <= u_hi)
        ok &= (v0 >= lo) & (v0 <= hi)
        out = np.full(theta.shape[0], -np.inf)
        if not ok.any():
            return out
        _, rss, logdet, _ = _profile(shape, data, theta[ok])
        out[ok] = -0.5 * logdet - 0.5 * (n - k) * np.log(rss)
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


def least_squares_fit(shape: DipShape, data: SweepData, start: np.ndarray) -> dict:
    """Profile least squares over (T, u, V₀); returns optimum, scales and linear parameters."""
    scale0 = np.array([start[0], max(start[1], 1e-3), start[0] * BOLTZMANN / ELEMENTARY_CHARGE])

    def resid(z: np.ndarray) -> np.ndarray:
        theta = (z * scale0)[None, :]
        if hasattr(shape, "min_u") and not shape.min_u <= theta[0, 1] <= shape.max_u:
            return np.full(data.conductance.size, 1e6)  # outside a tabulated model's range
        coef, _, _, _ = _profile(shape, data, theta)
        a = _design(shape, data, theta)[0]
        return (data.conductance - a @ coef[0]) * _weights(data)

    sol = optimize.least_squares(resid, start / scale0, method="lm", x_scale="jac")
    theta = sol.x * scale0
    coef, rss, _, ata = _profile(shape, data, theta[None, :])
    n, k = data.conductance.size, coef.shape[1]
    dof = n - 3 - k
    s2 = float(rss[0]) / dof
    jac = sol.jac / scale0
    try:
        cov = np.linalg.inv(jac.T @ jac) * s2
        se = np.sqrt(np.abs(np.diag(cov)))
    except np.linalg.LinAlgError:
        se = np.abs(theta) * 1e-2
        cov = np.diag(se**2)
    return {
        "theta": theta,
        "standard_errors": se,
        "covariance": cov,
        "amplitudes": coef[0],
        "rss": float(rss[0]),
        "degrees_of_freedom": dof,
        "success": bool(sol.success),
    }


# --------------------------------------------------------------------------------------------


def fwhm_volts(shape: DipShape, setup: SweepSetup, temperature: float, u: float) -> float:
    """Numerical full width at half depth (V) of the instrument-averaged model dip."""
    N = setup.junctions_in_series
    vt = N * BOLTZMANN * temperature / ELEMENTARY_CHARGE
    v = np.linspace(0.0, 12.0 * vt + 4 * setup.excitation_peak_V, 6001)
    g = forward_conductance(shape, v, setup, temperature, u * temperature, 1.0, 0.0)
    return numerical_fwhm(v, g)[1]


def fit_sweep(
    data: SweepData,
    seed: int,
    shape: DipShape = higher_order_shape,
    settings: FitSettings | None = None,
    progress: ProgressCallback | None = None,
    min_range_half_widths: float = 2.5,
) -> SweepFit:
    """Least-squares start, range check, then the posterior of (T, ΔE, V₀) by emcee.

    Raises SweepError when the swept bias does not reach ``min_range_half_widths`` × V_1/2 on both
    sides of the dip (the asymptote G_T is then not fixed: 6g(x) is still 0.1 % of the depth at
    2 V_1/2; PHYSICS.md 1.4).
    """
    settings = settings or FitSettings()
    start = initial_guess(data)
    ls = least_squares_fit(shape, data, start)
    T0, u0, v00 = ls["theta"]
    ec0 = u0 * T0
    if not (T0 > 0 and u0 > 0 and math.isfinite(T0)):
        raise SweepError("no Coulomb-blockade dip found: the least-squares fit gives no positive temperature and charging energy", field="conductance_S")
    v_half = fwhm_volts(shape, data.setup, T0, u0)
    reach = min(v00 - data.bias.min(), data.bias.max() - v00) / v_half
    if reach < min_range_half_widths:
        raise SweepError(
            f"bias range reaches only ±{reach:.2f} V_1/2 around the dip (V_1/2 ≈ {v_half:.3g} V); "
            f"at least ±{min_range_half_widths} V_1/2 is needed to fix the asymptotic conductance",
            field="bias_V",
        )
    span = data.bias.max() - data.bias.min()
    window = (data.bias.min() + 0.25 * span, data.bias.max() - 0.25 * span)
    log_prob = make_log_posterior(shape, data, window)
    post = sample_posterior(
        log_prob, ls["theta"], seed, names=NONLINEAR, scale=ls["standard_errors"],
        walkers=settings.walkers, block=settings.block, max_steps=settings.max_steps,
        min_tau_multiple=settings.min_tau_multiple, tau_tolerance=settings.tau_tolerance,
        progress=progress,
    )
    s = post.samples
    coef, rss, _, ata = _profile(shape, data, s)
    n, k = data.conductance.size, coef.shape[1]
    # Amplitudes: law of total variance over the conditional least-squares estimates.
    sigma2 = rss / (n - k)
    cond_var = sigma2 * np.linalg.inv(ata)[:, 0, 0]
    gt_mean = float(coef[:, 0].mean())
    gt_std = float(math.sqrt(coef[:, 0].var(ddof=1) + cond_var.mean()))
    T_mean = float(s[:, 0].mean())
    T_std = float(s[:, 0].std(ddof=1))
    ec_samples = s[:, 0] * s[:, 1]
    ec_mean = float(ec_samples.mean())
    lo, hi = np.percentile(s[:, 0], [2.5, 97.5])

    best = np.array([T_mean, float(s[:, 1].mean()), float(s[:, 2].mean())])
    coef_b, rss_b, _, _ = _profile(shape, data, best[None, :])
    a = _design(shape, data, best[None, :])[0]
    curve = a @ coef_b[0]
    resid = data.conductance - curve
    noise = float(math.sqrt(rss_b[0] / (n - 3 - k)))
    w = resid * _weights(data)
    r1 = float(np.corrcoef(w[:-1][np.argsort(data.bias)[:-1]], w[np.argsort(data.bias)][1:])[0, 1]) if n > 3 else 0.0
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
    )


def heating_fraction(setup: SweepSetup, temperature: float, fwhm: float) -> float:
    """Relative electron heating (T_e − T)/T at the half-depth bias ±V_1/2/2 (PHYSICS.md 1.4)."""
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
    "SweepData",
    "SweepError",
    "SweepFit",
    "dip_function",
    "fit_sweep",
    "fwhm_volts",
    "initial_guess",
    "least_squares_fit",
]
