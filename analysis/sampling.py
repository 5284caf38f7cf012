"""One place for Markov-chain Monte Carlo: emcee's affine-invariant ensemble sampler.

Sampler: the affine-invariant ensemble of Goodman & Weare, Comm. App. Math. Comp. Sci. 5, 65
(2010), as implemented by emcee (Foreman-Mackey et al., PASP 125, 306 (2013)). By default the
proposals are differential-evolution moves (ter Braak, Stat. Comput. 16, 239 (2006); with the
snooker update of ter Braak & Vrugt, Stat. Comput. 18, 435 (2008)) in an 80/20 mixture, which on
our near-Gaussian posteriors gives autocorrelation times about 2.5× shorter than the stretch move. Walkers start in a small Gaussian ball around a
least-squares optimum, scaled by the optimum's approximate standard errors.

Convergence rule (after the emcee documentation's practice, common practice otherwise): the chain
is run in blocks; after each block the integrated autocorrelation time τ of every parameter is
estimated (Sokal's automatic window, emcee.autocorr). The chain is converged when it is at least
``min_tau_multiple`` (50) times the largest τ long *and* every τ has changed by less than
``tau_tolerance`` (5 %) since the previous block (the τ estimate has settled). Burn-in of 3 τ is then discarded. A chain
that reaches ``max_steps`` first is reported as not converged, and certificates refuse it.
"""

from __future__ import annotations

import logging
import math
import sys
import types
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

log = logging.getLogger(__name__)


def _import_emcee() -> types.ModuleType:
    """emcee, imported without its KDE move.

    emcee's package imports every move it offers, and its KDE move imports scipy.stats (for
    gaussian_kde) at import time: 0.4–1 s of start-up on the 2-core reference machine, in every
    process that samples, for a move we never use. Unless emcee or scipy.stats is already
    loaded, a placeholder stands in for ``emcee.moves.kde`` while emcee is first imported; its
    ``KDEMove`` refuses to be built, saying why. Every other move is emcee's own.
    """
    if "emcee" not in sys.modules and "scipy.stats" not in sys.modules:
        placeholder = types.ModuleType("emcee.moves.kde")

        class KDEMove:
            def __init__(self, *args, **kwargs):
                raise RuntimeError("emcee's KDE move is not loaded in coldcert (it would import "
                                   "scipy.stats at start-up); use a move set of "
                                   "analysis.sampling.MOVE_SETS")

        placeholder.KDEMove = KDEMove
        placeholder.__all__ = ["KDEMove"]
        sys.modules.setdefault("emcee.moves.kde", placeholder)
    import emcee  # noqa: PLC0415

    return emcee


emcee = _import_emcee()

ProgressCallback = Callable[[float, str], None]


@dataclass(frozen=True)
class PosteriorResult:
    """Posterior samples with the diagnostics a certificate records."""

    names: tuple[str, ...]
    samples: np.ndarray  # (n_samples, n_params), burn-in removed, thinned by ~τ/2
    log_prob: np.ndarray  # (n_samples,)
    autocorrelation_time: tuple[float, ...]
    acceptance_fraction: float
    effective_sample_size: float
    steps: int
    walkers: int
    burn_in: int
    converged: bool
    seed: int
    moves: str = "differential evolution 0.8 + snooker 0.2"

    def mean(self) -> np.ndarray:
        return self.samples.mean(axis=0)

    def std(self) -> np.ndarray:
        return self.samples.std(axis=0, ddof=1)

    def covariance(self) -> np.ndarray:
        return np.atleast_2d(np.cov(self.samples, rowvar=False))

    def interval(self, probability: float = 0.95) -> np.ndarray:
        """Equal-tailed credible intervals, shape (n_params, 2)."""
        lo = 50.0 * (1.0 - probability)
        return np.percentile(self.samples, [lo, 100.0 - lo], axis=0).T

    def diagnostics(self) -> dict:
        return {
            "sampler": f"emcee {emcee.__version__} ensemble sampler ({self.moves})",
            "walkers": self.walkers,
            "steps": self.steps,
            "burn_in_steps": self.burn_in,
            "autocorrelation_time_steps": dict(zip(self.names, map(float, self.autocorrelation_time), strict=True)),
            "acceptance_fraction": float(self.acceptance_fraction),
            "effective_sample_size": float(self.effective_sample_size),
            "converged": bool(self.converged),
            "seed": int(self.seed),
        }


class NotConvergedError(RuntimeError):
    """The chain did not meet the convergence rule within the step limit."""


def initial_ball(
    centre: np.ndarray, scale: np.ndarray, walkers: int, rng: np.random.Generator,
    log_prob: Callable[[np.ndarray], np.ndarray], spread: float = 0.1,
    covariance: np.ndarray | None = None,
) -> np.ndarray:
    """Walkers in a Gaussian ball of ``spread`` × ``scale`` around ``centre``, all of finite log_prob.

    With ``covariance`` (e.g. the inverse Fisher matrix of a least-squares optimum) the ball has
    that shape and ``spread`` scales it: spread 1 draws the walkers from the Gaussian
    approximation of the posterior itself, so little of the chain is spent forgetting the start.
    """
    centre = np.asarray(centre, dtype=float)
    # A zero or vanishing scale (e.g. a standard error on a prior boundary) would give a flat ball.
    floor = np.abs(centre) * 1e-4 + 1e-12
    if covariance is not None:
        cov = np.atleast_2d(np.asarray(covariance, dtype=float))
        cov = 0.5 * (cov + cov.T) + np.diag(floor**2)
        try:
            factor = np.linalg.cholesky(cov)
        except np.linalg.LinAlgError:
            factor = np.diag(np.sqrt(np.maximum(np.diag(cov), floor**2)))
    else:
        factor = np.diag(np.maximum(np.asarray(scale, dtype=float), floor))

    def draw(k: int, spread: float) -> np.ndarray:
        return centre + spread * rng.standard_normal((k, centre.size)) @ factor.T

    pos = draw(walkers, spread)
    for attempt in range(200):
        bad = ~np.isfinite(log_prob(pos))
        if not bad.any():
            return pos
        # Redraw only the walkers outside the support, at the same spread first (a centre on a
        # prior boundary then still gets a full-rank half-ball), shrinking only if that keeps failing.
        if attempt and attempt % 40 == 0:
            spread *= 0.5
        pos[bad] = draw(int(bad.sum()), spread)
    raise ValueError("could not place walkers where the posterior is finite; check the start point")


def independence_move(centre: np.ndarray, covariance: np.ndarray, df: float = 5.0,
                      inflate: float = 1.25) -> emcee.moves.MHMove:
    """Independence Metropolis–Hastings proposal from a multivariate Student t.

    Proposals are drawn from t_df(centre, inflate² × covariance) whatever the walker's position
    and accepted with the Metropolis–Hastings ratio p(x′) q(x) / (p(x) q(x′)) (Tierney, Ann. Stat.
    22, 1701 (1994), the independence chain). With a Gaussian approximation of the posterior (the
    least-squares optimum and its covariance) nearly every proposal is an independent draw, so the
    autocorrelation time falls to 1–2 steps; the heavier t tails (df = 5) and the 1.25 inflation
    keep q wider than the posterior, the condition for geometric ergodicity of this chain
    (Mengersen & Tweedie, Ann. Stat. 24, 101 (1996)). Its random numbers come from emcee's seeded
    state, so chains stay reproducible.
    """
    centre = np.asarray(centre, dtype=float)
    d = centre.size
    factor = np.linalg.cholesky(np.atleast_2d(covariance) * inflate**2)

    def log_q(x: np.ndarray) -> np.ndarray:
        z = np.linalg.solve(factor, (np.atleast_2d(x) - centre).T)
        return -0.5 * (df + d) * np.log1p(np.sum(z * z, axis=0) / df)

    def propose(coords: np.ndarray, random: np.random.RandomState) -> tuple[np.ndarray, np.ndarray]:
        k = coords.shape[0]
        z = random.randn(k, d) / np.sqrt(random.chisquare(df, k) / df)[:, None]
        new = centre + z @ factor.T
        return new, log_q(coords) - log_q(new)

    return emcee.moves.MHMove(propose)


#: Move sets by name: ``"de-snooker"`` differential evolution 0.8 + snooker 0.2 (the default),
#: ``"stretch"`` the affine-invariant stretch move, ``"independence"`` the independence proposal
#: of :func:`independence_move` 0.7 with differential evolution 0.3 (needs a covariance; the DE
#: share keeps the chain moving where the Gaussian approximation is poor).
MOVE_SETS = ("de-snooker", "stretch", "independence")


def _moves(name: str, initial: np.ndarray, covariance: np.ndarray | None):
    if name == "de-snooker":
        return [(emcee.moves.DEMove(), 0.8), (emcee.moves.DESnookerMove(), 0.2)], "differential evolution 0.8 + snooker 0.2"
    if name == "stretch":
        return None, "stretch"
    if name == "independence":
        if covariance is None:
            raise ValueError("the independence move needs a covariance (e.g. from least squares)")
        return ([(independence_move(initial, covariance), 0.9), (emcee.moves.DEMove(), 0.1)],
                "independence t5 (least-squares covariance × 1.25²) 0.9 + differential evolution 0.1")
    raise ValueError(f"unknown move set {name!r}; expected one of {MOVE_SETS}")


def sample_posterior(
    log_prob: Callable[[np.ndarray], np.ndarray],
    initial: np.ndarray,
    seed: int,
    *,
    names: tuple[str, ...] | None = None,
    scale: np.ndarray | None = None,
    covariance: np.ndarray | None = None,
    ball_spread: float | None = None,
    walkers: int | None = None,
    block: int = 200,
    max_steps: int = 20_000,
    min_tau_multiple: float = 50.0,
    tau_tolerance: float = 0.05,
    vectorized: bool = True,
    differential_evolution: bool = True,
    progress: ProgressCallback | None = None,
    moves: str | None = None,
) -> PosteriorResult:
    """Run emcee from around ``initial`` until the convergence rule holds (module docstring).

    ``log_prob`` takes an (n_walkers, n_params) array and returns (n_walkers,) log densities (with
    ``vectorized=True``), −inf outside the prior. ``scale`` is a typical parameter uncertainty
    (e.g. least-squares standard errors) that sizes the initial ball; ``covariance`` (e.g. the
    least-squares covariance) shapes it instead, drawn at ``ball_spread`` (default 1 with a
    covariance, 0.1 with a scale). ``progress(fraction, step)``
    is called after each block with a conservative completed fraction. ``moves`` names a move
    set of :data:`MOVE_SETS` (default: differential evolution, or stretch when
    ``differential_evolution`` is False).
    """
    if seed is None:
        raise ValueError("an explicit seed is required for a reproducible posterior")
    initial = np.asarray(initial, dtype=float)
    nwalk = walkers or max(16, 4 * initial.size)
    names = names or tuple(f"p{i}" for i in range(initial.size))
    sampler, p0, move_words = _start_sampler(
        log_prob, initial, seed, nwalk, scale=scale, covariance=covariance, ball_spread=ball_spread,
        vectorized=vectorized, moves=moves or ("de-snooker" if differential_evolution else "stretch"))
    chain = _run_until_converged(sampler, p0, block=block, max_steps=max_steps,
                                 min_tau_multiple=min_tau_multiple, tau_tolerance=tau_tolerance,
                                 progress=progress)
    result = _posterior_from_chain(sampler, chain, names=tuple(names), walkers=nwalk, seed=seed,
                                   moves=move_words)
    if progress is not None:
        progress(1.0, "sampling done")
    return result


def _start_sampler(
    log_prob: Callable[[np.ndarray], np.ndarray], initial: np.ndarray, seed: int, walkers: int, *,
    scale: np.ndarray | None, covariance: np.ndarray | None, ball_spread: float | None,
    vectorized: bool, moves: str,
) -> tuple[emcee.EnsembleSampler, np.ndarray, str]:
    """The walkers' starting ball and an emcee sampler whose random state derives from ``seed``.

    The one generator seeded by ``seed`` first places the ball (:func:`initial_ball`), then seeds
    the legacy RandomState emcee draws from, so one seed fixes the whole chain. Returns the
    sampler, the starting positions and the move set's description for the certificate.
    """
    ndim = initial.size
    rng = np.random.default_rng(seed)
    sc = scale if scale is not None else np.abs(initial) * 1e-3 + 1e-12
    spread = ball_spread if ball_spread is not None else (1.0 if covariance is not None else 0.1)
    p0 = initial_ball(initial, sc, walkers, rng, log_prob if vectorized else _vectorise(log_prob),
                      spread=spread, covariance=covariance)

    # emcee draws from a legacy RandomState; seed it from our generator so one seed fixes all.
    move_list, move_words = _moves(moves, initial, covariance)
    sampler = emcee.EnsembleSampler(walkers, ndim, log_prob, vectorize=vectorized, moves=move_list)
    sampler._random = np.random.RandomState(int(rng.integers(0, 2**31 - 1)))
    return sampler, p0, move_words


@dataclass(frozen=True)
class _Chain:
    """Where a run stopped: steps taken, last autocorrelation times, and whether the rule held."""

    steps: int
    tau: np.ndarray
    converged: bool


def _run_until_converged(
    sampler: emcee.EnsembleSampler, state: np.ndarray, *, block: int, max_steps: int,
    min_tau_multiple: float, tau_tolerance: float, progress: ProgressCallback | None,
) -> _Chain:
    """Advance the chain block by block until the convergence rule (module docstring) holds.

    τ is emcee's integrated autocorrelation time with Sokal's automatic window (emcee.autocorr;
    Sokal, in *Functional Integration*, Plenum 1997); the rule needs the chain at least
    ``min_tau_multiple`` × max τ long and every τ within ``tau_tolerance`` of its previous value.
    """
    ndim = sampler.ndim
    old_tau = np.full(ndim, np.inf)
    converged = False
    tau = np.full(ndim, np.nan)
    steps = 0
    while steps < max_steps:
        # Our ball is checked above (finite posterior, scaled per parameter); emcee's own check of
        # the raw coordinates' condition number misfires when parameters differ by many decades.
        state = sampler.run_mcmc(state, block, progress=False, skip_initial_state_check=True)
        steps += block
        tau = emcee.autocorr.integrated_time(sampler.get_chain(), tol=0)
        tau_max = float(np.max(tau))
        settled = np.all(np.abs(old_tau - tau) < tau_tolerance * tau)
        long_enough = steps >= min_tau_multiple * tau_max
        old_tau = tau
        if progress is not None:
            need = max(min_tau_multiple * tau_max, steps + (0 if settled else block))
            progress(min(0.99, steps / need), f"sampling: {steps} steps, tau {tau_max:.1f}")
        if long_enough and settled:
            converged = True
            break
    return _Chain(steps=steps, tau=tau, converged=converged)


def _posterior_from_chain(sampler: emcee.EnsembleSampler, chain: _Chain, *, names: tuple[str, ...],
                          walkers: int, seed: int, moves: str) -> PosteriorResult:
    """Discard a burn-in of 3 τ (at most half the chain), thin by τ/2 and summarise the samples.

    The effective sample size is walkers × kept steps / τ (emcee documentation, common practice).
    A chain that did not converge is still returned, flagged, and logged as a warning.
    """
    steps, tau = chain.steps, chain.tau
    tau_max = float(np.max(tau))
    burn = int(math.ceil(3 * tau_max)) if math.isfinite(tau_max) else steps // 2
    burn = min(burn, steps // 2)
    thin = max(1, int(tau_max / 2)) if math.isfinite(tau_max) else 1
    flat = sampler.get_chain(discard=burn, thin=thin, flat=True)
    lp = sampler.get_log_prob(discard=burn, thin=thin, flat=True)
    ess = walkers * (steps - burn) / tau_max if math.isfinite(tau_max) and tau_max > 0 else 0.0
    if not chain.converged:
        log.warning("chain not converged after %d steps (tau %s)", steps, tau)
    return PosteriorResult(
        names=names,
        samples=flat,
        log_prob=lp,
        autocorrelation_time=tuple(float(t) for t in tau),
        acceptance_fraction=float(np.mean(sampler.acceptance_fraction)),
        effective_sample_size=float(ess),
        steps=steps,
        walkers=walkers,
        burn_in=burn,
        converged=chain.converged,
        seed=seed,
        moves=moves,
    )


def _vectorise(f: Callable[[np.ndarray], float]) -> Callable[[np.ndarray], np.ndarray]:
    return lambda p: np.array([f(row) for row in np.atleast_2d(p)])
