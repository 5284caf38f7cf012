"""Global fit: several sweeps of one device with a shared charging energy.

The charging energy ΔE is a property of the device, not of the temperature, so sweeps of one
CBT at different temperatures constrain it jointly (the practice of fitting all temperatures of a
device together; e.g. Meschke et al., Int. J. Thermophys. 32, 1378 (2011)). With one temperature
T_k per sweep and ΔE shared, the joint posterior is

  p(ΔE, T_1 … T_K | data) ∝ Π_k L_k(T_k, ΔE),

L_k the likelihood of sweep k with its amplitude and noise level integrated out analytically
(analysis.cbt.fit), the bias offset of each sweep held at its own posterior mean (the dip is even,
so the offset is uncorrelated with T and ΔE), and flat priors on every T_k > 0 and on ΔE ≥ 0.

Because only one parameter is shared, the posterior is integrated numerically instead of sampled:
for each ΔE on a grid, each sweep's likelihood is evaluated on a grid in T_k centred on its
conditional mode, which gives the marginal m_k(ΔE) = ∫ L_k dT_k and the conditional moments of
T_k. The shared-ΔE posterior is Π_k m_k(ΔE); the temperatures' means, variances, covariances
(through ΔE) and credible intervals follow by mixing the conditionals. The trapezoid rule on
≥ 41 points over ±10 conditional standard deviations makes the quadrature error negligible next to
the statistical uncertainty; the grids are widened until the tails at their ends are below 1e-9.
The result is deterministic: no seed is involved.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy import optimize, special

from analysis.cbt.fit import SweepData, SweepFit, log_marginal_likelihood
from analysis.cbt.models import DipShape


@dataclass(frozen=True)
class GlobalFit:
    """Shared-ΔE posterior summary for K sweeps of one device."""

    charging_energy: float  # ΔE/k_B, K
    charging_energy_std: float
    temperatures: np.ndarray  # (K,)
    temperature_std: np.ndarray
    temperature_intervals95: np.ndarray  # (K, 2)
    covariance: np.ndarray  # (K + 1, K + 1): T_1 … T_K, ΔE
    independent_temperature_std: np.ndarray
    independent_charging_energy: np.ndarray
    independent_charging_energy_std: np.ndarray
    grid_points: tuple[int, int]
    consistency_chi2: float  # Σ (ΔE_k − ΔE)²/σ_k² of the independent estimates
    consistency_dof: int

    @property
    def correlation(self) -> np.ndarray:
        s = np.sqrt(np.diag(self.covariance))
        return self.covariance / np.outer(s, s)

    @property
    def tightening(self) -> np.ndarray:
        """σ(T_k) of the independent fit over σ(T_k) of the global fit (≥ 1 means tighter)."""
        return self.independent_temperature_std / self.temperature_std


@dataclass(frozen=True)
class SweepSummary:
    """What the global fit needs from one sweep's independent analysis.

    The bias offset, and the joint Gaussian summary of (T, ΔE) within that sweep: the regression
    of T on ΔE, T ≈ a + b ΔE with residual σ_c (to centre the temperature grid), the marginal
    mean and standard deviation of ΔE, and σ(T) for the comparison with the global result.
    """

    bias_offset: float
    a: float
    b: float
    conditional_std: float
    energy_mean: float
    energy_std: float
    temperature_std: float

    @classmethod
    def from_posterior(cls, fit: SweepFit) -> SweepSummary:
        """From MCMC samples (prior flat in (T, u), i.e. ∝ 1/T in (T, ΔE): reweighted by T)."""
        T = fit.posterior.samples[:, 0]
        E = T * fit.posterior.samples[:, 1]
        w = T / T.sum()
        mean = np.array([np.sum(w * T), np.sum(w * E)])
        d = np.stack([T - mean[0], E - mean[1]])
        cov = (d * w) @ d.T
        return cls._from_moments(fit.bias_offset, mean, cov, fit.temperature_std)

    @classmethod
    def from_least_squares(cls, theta: np.ndarray, covariance: np.ndarray) -> SweepSummary:
        """From a least-squares optimum of (T, u, V₀) and its covariance (Laplace approximation)."""
        T, u, v0 = theta
        jac = np.array([[1.0, 0.0, 0.0], [u, T, 0.0]])  # (T, ΔE = u T) from (T, u, V₀)
        cov = jac @ covariance @ jac.T
        return cls._from_moments(v0, np.array([T, u * T]), cov, float(math.sqrt(covariance[0, 0])))

    @classmethod
    def _from_moments(cls, v0: float, mean: np.ndarray, cov: np.ndarray, t_std: float) -> SweepSummary:
        vE = float(cov[1, 1])
        b = float(cov[0, 1] / vE) if vE > 0 else 0.0
        a = float(mean[0] - b * mean[1])
        sc = float(math.sqrt(max(cov[0, 0] - b * cov[0, 1], 0.0)))
        return cls(float(v0), a, b, max(sc, 1e-6 * float(mean[0])), float(mean[1]), math.sqrt(vE), t_std)


def _log_like_grid(shape: DipShape, data: SweepData, v0: float, E: np.ndarray, T: np.ndarray) -> np.ndarray:
    """log L_k on the grid: E (nE,), T (nE, nT) -> (nE, nT)."""
    nE, nT = T.shape
    theta = np.empty((nE * nT, 3))
    theta[:, 0] = T.ravel()
    theta[:, 1] = (E[:, None] / T).ravel()
    theta[:, 2] = v0
    out = np.full(nE * nT, -np.inf)
    ok = theta[:, 0] > 0
    if hasattr(shape, "min_u"):  # a model with a hard validity range (tables)
        ok &= (theta[:, 1] >= shape.min_u) & (theta[:, 1] <= shape.max_u)
    if ok.any():
        out[ok] = log_marginal_likelihood(shape, data, theta[ok])
    return out.reshape(nE, nT)


def fit_global(
    datas: Sequence[SweepData],
    fits: Sequence[SweepFit | SweepSummary],
    shape: DipShape | Sequence[DipShape],
    energy_points: int = 41,
    temperature_points: int = 31,
    span_sigmas: float = 9.0,
) -> GlobalFit:
    """Joint posterior of K sweeps with a shared charging energy (module docstring).

    ``shape`` is one dip model for all sweeps or one per sweep (cold sweeps may need the full
    tunnelling model where warm ones are served by the weak-blockade series).

    ``fits`` are the independent results (MCMC fits or least-squares summaries); they only
    centre the grids and serve as the comparison for the tightening factor. Grid spacing is
    about 0.5 (energy) and 0.6 (temperature) conditional standard deviations, where the trapezoid
    rule's error on near-Gaussian integrands is below 1e-12 of the integral.

    The steps: combine the independent ΔE estimates to centre the energy grid; integrate each
    sweep's temperature out on a grid that widens until the posterior's tails fit; mix the
    conditionals into moments and credible intervals.
    """
    if len(datas) != len(fits) or len(datas) < 2:
        raise ValueError("a global fit needs at least two sweeps, each with its independent fit")
    summaries = [f if isinstance(f, SweepSummary) else SweepSummary.from_posterior(f) for f in fits]
    # Each sweep as its own fit used it (outliers left out, noise model, background), if recorded.
    datas = [getattr(f, "fitted_data", None) or d for d, f in zip(datas, fits, strict=True)]
    shapes = list(shape) if isinstance(shape, Sequence) else [shape] * len(fits)
    independent = _IndependentEnergies.of(summaries)
    posterior = _shared_energy_posterior(
        datas, summaries, shapes, independent, energy_points, temperature_points, span_sigmas
    )
    e_mean, t_mean, cov = _mixture_moments(posterior)
    K = len(fits)
    t_std = np.sqrt(np.diag(cov)[:K])
    return GlobalFit(
        charging_energy=e_mean,
        charging_energy_std=math.sqrt(cov[K, K]),
        temperatures=t_mean,
        temperature_std=t_std,
        temperature_intervals95=_credible_intervals95(posterior, t_mean, t_std),
        covariance=cov,
        independent_temperature_std=np.array([m.temperature_std for m in summaries]),
        independent_charging_energy=independent.means,
        independent_charging_energy_std=independent.stds,
        grid_points=(posterior.energy.size, temperature_points),
        consistency_chi2=independent.chi2,
        consistency_dof=K - 1,
    )


@dataclass(frozen=True)
class _IndependentEnergies:
    """The sweeps' own ΔE estimates and their precision-weighted mean (Gaussian product rule;
    common practice, no source): it centres the energy grid and tests their consistency."""

    means: np.ndarray
    stds: np.ndarray
    combined: float
    combined_std: float
    chi2: float  #: Σ (ΔE_k − ΔE)²/σ_k²

    @classmethod
    def of(cls, summaries: Sequence[SweepSummary]) -> _IndependentEnergies:
        means = np.array([m.energy_mean for m in summaries])
        stds = np.array([m.energy_std for m in summaries])
        prec = 1.0 / stds**2
        combined = float(np.sum(prec * means) / prec.sum())
        chi2 = float(np.sum(prec * (means - combined) ** 2))
        return cls(means, stds, combined, float(prec.sum() ** -0.5), chi2)


@dataclass(frozen=True)
class _EnergyPosterior:
    """The shared-ΔE posterior on its grid, with each sweep's conditional moments of T_k."""

    energy: np.ndarray  #: (nE,) grid of ΔE/k_B, K
    weights: np.ndarray  #: (nE,) normalised trapezoid weights of p(ΔE | all data)
    conditional_mean: np.ndarray  #: (K, nE) E[T_k | ΔE]
    conditional_var: np.ndarray  #: (K, nE) Var[T_k | ΔE]


def _shared_energy_posterior(
    datas: Sequence[SweepData],
    summaries: Sequence[SweepSummary],
    shapes: Sequence[DipShape],
    independent: _IndependentEnergies,
    energy_points: int,
    temperature_points: int,
    span_sigmas: float,
) -> _EnergyPosterior:
    """p(ΔE | data) ∝ Π_k m_k(ΔE) on a grid of ``span_sigmas`` combined standard deviations about
    the combined estimate, widened by half on a side whose end still carries 1e-9 of the
    posterior (at most six times), with trapezoid weights (module docstring)."""
    lo = independent.combined - span_sigmas * independent.combined_std
    hi = independent.combined + span_sigmas * independent.combined_std
    for _ in range(6):
        E = np.linspace(max(lo, 0.0), hi, energy_points)
        log_m = np.zeros(E.size)
        cond_mean = np.empty((len(summaries), E.size))
        cond_var = np.empty((len(summaries), E.size))
        for k, (data, summ) in enumerate(zip(datas, summaries, strict=True)):
            log_mk, cond_mean[k], cond_var[k] = _integrate_temperature(
                k, shapes[k], data, summ, E, temperature_points, span_sigmas
            )
            log_m += log_mk
        wE = np.exp(log_m - log_m.max())
        wE[[0, -1]] *= 0.5
        wE /= wE.sum()
        tail_lo = wE[0] if E[0] > 0 else 0.0
        if tail_lo < 1e-9 and wE[-1] < 1e-9:
            return _EnergyPosterior(E, wE, cond_mean, cond_var)
        width = hi - lo
        lo = lo - 0.5 * width if tail_lo >= 1e-9 else lo
        hi = hi + 0.5 * width if wE[-1] >= 1e-9 else hi
    raise ValueError("the shared charging-energy posterior did not fit inside a finite grid")


def _integrate_temperature(
    k: int,
    shape: DipShape,
    data: SweepData,
    summary: SweepSummary,
    E: np.ndarray,
    temperature_points: int,
    span_sigmas: float,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """For sweep k at each ΔE of the grid: log m_k(ΔE) = log ∫ L_k dT_k and the conditional mean
    and variance of T_k, by the trapezoid rule on a T grid centred on the regression line
    a + b ΔE (module docstring). Refuses a likelihood that peaks at the grid's edge."""
    centre = summary.a + summary.b * E
    offsets = np.linspace(-span_sigmas, span_sigmas, temperature_points)
    T = centre[:, None] + summary.conditional_std * offsets[None, :]
    ll = _log_like_grid(shape, data, summary.bias_offset, E, T)
    peak = np.argmax(ll, axis=1)
    if np.any((peak == 0) | (peak == temperature_points - 1)):
        raise ValueError(
            f"sweep {k + 1}: its likelihood peaks at the edge of the temperature grid for some "
            "charging energies; the sweeps may not share one charging energy"
        )
    dT = T[:, 1] - T[:, 0]
    w = np.exp(ll - ll.max(axis=1, keepdims=True))
    w[:, [0, -1]] *= 0.5  # trapezoid rule
    norm = w.sum(axis=1)
    log_m = ll.max(axis=1) + np.log(norm * dT)
    p = w / norm[:, None]
    mean = np.sum(p * T, axis=1)
    var = np.sum(p * (T - mean[:, None]) ** 2, axis=1)
    return log_m, mean, var


def _mixture_moments(posterior: _EnergyPosterior) -> tuple[float, np.ndarray, np.ndarray]:
    """Mean of ΔE, means of T_1 … T_K and the covariance of (T_1 … T_K, ΔE) by mixing the conditionals over
    p(ΔE | data): the law of total expectation and of total covariance (common practice, no
    source). The temperatures correlate through ΔE."""
    wE, E = posterior.weights, posterior.energy
    cond_mean, cond_var = posterior.conditional_mean, posterior.conditional_var
    e_mean = float(np.sum(wE * E))
    e_var = float(np.sum(wE * (E - e_mean) ** 2))
    t_mean = cond_mean @ wE
    K = cond_mean.shape[0]
    cov = np.empty((K + 1, K + 1))
    centred = cond_mean - t_mean[:, None]
    cov[:K, :K] = (centred * wE) @ centred.T + np.diag(cond_var @ wE)
    cov[:K, K] = cov[K, :K] = centred @ (wE * (E - e_mean))
    cov[K, K] = e_var
    return e_mean, t_mean, cov


def _credible_intervals95(posterior: _EnergyPosterior, t_mean: np.ndarray, t_std: np.ndarray) -> np.ndarray:
    """Equal-tailed 95 % intervals of each T_k from its marginal CDF, a mixture of the Gaussian
    conditionals over p(ΔE | data), inverted by Brent's method (scipy.optimize.brentq)."""
    wE = posterior.weights
    K = t_mean.size
    intervals = np.empty((K, 2))
    for k in range(K):
        sd = np.sqrt(posterior.conditional_var[k])
        mean_k = posterior.conditional_mean[k]

        def cdf(t, mean_k=mean_k, sd=sd):
            return float(np.sum(wE * special.ndtr((t - mean_k) / sd)))

        span = 10 * t_std[k]
        intervals[k, 0] = optimize.brentq(lambda t: cdf(t) - 0.025, t_mean[k] - span, t_mean[k] + span)
        intervals[k, 1] = optimize.brentq(lambda t: cdf(t) - 0.975, t_mean[k] - span, t_mean[k] + span)
    return intervals
