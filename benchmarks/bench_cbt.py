"""Benchmarks for single-sweep CBT thermometry. Prints figures; asserts nothing.

    .venv/bin/python benchmarks/bench_cbt.py [--quick] [--coverage N]

1. Time for one 401-point sweep to a converged posterior (target ≤ 1 s on 2 cores), and a naive
   baseline timed in the same run: emcee with one walker per call and a scalar first-order formula
   looped over points, sampling all five parameters (T, ΔE, G_T, V₀, σ). Its time to convergence is
   projected from its measured cost per evaluation and our own chain length (a lower bound: the naive
   five-parameter chain mixes no faster). Target speed-up ≥ 20×.
2. Posterior σ(T) against the Cramér–Rao bound from the model's Fisher information (target ≤ 1.1).
3. Coverage: the fraction of 95 % credible intervals containing the true T over simulated sweeps
   (target 93–97 % over ≥ 200 sweeps).
All three use data simulated with the model that is fitted (the weak-blockade series), so they
measure the sampler and the statistics; benchmarks/bench_cbt_models.py measures the physics
(recovery on exact master-equation data with the model choice of `coldcert certify`).
"""

from __future__ import annotations

import argparse
import math
import time

import emcee
import numpy as np

from analysis.cbt.fit import SweepData, fit_sweep
from analysis.cbt.models import higher_order_shape
from analysis.cbt.planning import cramer_rao_temperature
from analysis.cbt.simulate import simulate_sweep
from analysis.constants import BOLTZMANN, ELEMENTARY_CHARGE


def naive_log_prob(theta, bias, g, n_junctions):
    """Scalar first-order model, one point at a time (the baseline we compare against)."""
    T, ec, gt, v0, sigma = theta
    if T <= 0 or ec < 0 or gt <= 0 or sigma <= 0:
        return -math.inf
    total = 0.0
    for v, y in zip(bias, g, strict=True):
        x = ELEMENTARY_CHARGE * (v - v0) / (n_junctions * BOLTZMANN * T)
        ax = abs(x)
        if ax < 1e-3:
            gx = 1 / 6 - ax * ax / 60
        else:
            s = math.sinh(ax / 2)
            gx = (ax * math.sinh(ax) - 4 * s * s) / (8 * s**4) if ax < 700 else 0.0
        model = gt * (1 - ec / T * gx)
        total += -0.5 * ((y - model) / sigma) ** 2 - math.log(sigma)
    return total


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true", help="50 coverage sweeps instead of 200")
    ap.add_argument("--coverage", type=int, default=None)
    args = ap.parse_args()
    n_cov = args.coverage or (50 if args.quick else 200)

    # --- 1. speed ---------------------------------------------------------------------------
    N, T, u, gt = 33, 0.05, 0.3, 3e-6
    bias, g, setup = simulate_sweep(N, T, u * T, gt, seed=1, points=401, relative_noise=2e-4,
                                    excitation_rms_V=3e-6, shape=higher_order_shape)
    data = SweepData(bias, g, setup)
    fit_sweep(data, seed=0)  # warm-up (imports, caches)
    times = []
    for seed in range(3):
        t0 = time.perf_counter()
        fit = fit_sweep(data, seed=seed)
        times.append(time.perf_counter() - t0)
    ours = float(np.median(times))
    print("1. one 401-point sweep to a converged posterior")
    print(f"   time (median of 3): {ours:.3f} s   steps {fit.posterior.steps} x {fit.posterior.walkers} walkers, "
          f"tau max {max(fit.posterior.autocorrelation_time):.1f}, converged {fit.posterior.converged}")

    # Naive baseline: stretch move, 32 walkers, started at the truth (as kind to it as possible).
    # Its autocorrelation time is measured on a chain of `naive_steps`; its time to the same
    # convergence rule (50 tau) is projected from its measured cost per evaluation.
    nw, naive_steps = 32, 300 if args.quick else 1500
    p0 = np.array([T, u * T, gt, 0.0, 2e-4 * gt])
    rng = np.random.default_rng(0)
    start = p0 * (1 + 1e-3 * rng.standard_normal((nw, 5)))
    start[:, 3] = 1e-7 * rng.standard_normal(nw)
    sampler = emcee.EnsembleSampler(nw, 5, naive_log_prob, args=(bias, g, N))
    t0 = time.perf_counter()
    sampler.run_mcmc(start, naive_steps, progress=False)
    per_eval = (time.perf_counter() - t0) / (nw * naive_steps)
    tau_naive = float(np.max(emcee.autocorr.integrated_time(sampler.get_chain(discard=naive_steps // 3), tol=0)))
    naive = per_eval * nw * 50 * tau_naive
    print(f"   naive baseline: {per_eval * 1e3:.2f} ms per evaluation, tau {tau_naive:.0f} steps "
          f"(from {naive_steps} steps) -> {naive:.1f} s to 50 tau")
    print(f"   speed-up {naive / ours:.0f}x  (target >= 20x; target time <= 1 s)")

    # --- 2. Cramér–Rao ----------------------------------------------------------------------
    print("2. posterior sigma(T) / Cramer-Rao bound")
    ratios = []
    for k, (Tk, uk) in enumerate([(0.02, 0.5), (0.05, 0.3), (0.2, 0.1), (1.0, 0.02)]):
        noise = 2e-4
        b, gg, st = simulate_sweep(N, Tk, uk * Tk, gt, seed=100 + k, relative_noise=noise, excitation_rms_V=0.0,
                                   shape=higher_order_shape)
        f = fit_sweep(SweepData(b, gg, st), seed=k)
        crb = cramer_rao_temperature(b, st, Tk, uk, gt, noise * gt)
        ratios.append(f.temperature_std / crb)
        print(f"   T = {Tk * 1e3:6.1f} mK, u = {uk:4.2f}: sigma_post {f.temperature_std:.3e} K, CRB {crb:.3e} K, "
              f"ratio {ratios[-1]:.3f}")
    print(f"   mean ratio {np.mean(ratios):.3f} (target <= 1.1)")

    # --- 3. coverage ------------------------------------------------------------------------
    print(f"3. coverage of 95 % credible intervals over {n_cov} simulated sweeps")
    rng = np.random.default_rng(2026)
    hits = 0
    z = []
    t0 = time.perf_counter()
    for k in range(n_cov):
        Tk = float(np.exp(rng.uniform(np.log(0.01), np.log(1.0))))
        uk = float(rng.uniform(0.02, 0.8))
        nk = int(rng.choice([10, 33, 100]))
        b, gg, st = simulate_sweep(nk, Tk, uk * Tk, gt, seed=10_000 + k, relative_noise=float(rng.uniform(1e-4, 1e-3)),
                                   excitation_rms_V=0.0, bias_offset=float(rng.normal(0, 1e-6)),
                                   shape=higher_order_shape)
        f = fit_sweep(SweepData(b, gg, st), seed=k)
        lo, hi = f.temperature_interval95
        hits += lo <= Tk <= hi
        z.append((f.temperature - Tk) / f.temperature_std)
    z = np.array(z)
    print(f"   {hits}/{n_cov} = {100 * hits / n_cov:.1f} % inside (target 93-97 %); "
          f"mean z {z.mean():+.3f}, std z {z.std(ddof=1):.3f}; {time.perf_counter() - t0:.0f} s")


if __name__ == "__main__":
    main()
