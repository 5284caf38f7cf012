"""Benchmark: global fit of 20 sweeps of one device (target <= 20 s). Prints figures.

    .venv/bin/python benchmarks/bench_cbt_global.py

Times the independent fits (MCMC, the bulk of the work) and the shared-charging-energy integration
separately, and reports the recovery of every temperature and of the shared energy.
"""

from __future__ import annotations

import time

import numpy as np

from analysis.cbt.fit import SweepData, fit_sweep, initial_guess, least_squares_fit
from analysis.cbt.global_fit import SweepSummary, fit_global
from analysis.cbt.models import higher_order_shape
from analysis.cbt.simulate import simulate_sweep


def main() -> None:
    ec, gt = 0.0072, 1.5e-5
    temps = np.geomspace(0.009, 0.5, 20)
    datas = []
    for k, T in enumerate(temps):
        b, g, s = simulate_sweep(33, float(T), ec, gt, seed=300 + k, relative_noise=2e-4, excitation_rms_V=3e-6,
                                 shape=higher_order_shape)  # machinery check: data of the fitted model
        datas.append(SweepData(b, g, s))
    print(f"20 sweeps (N = 33, 9-500 mK, u from {ec / temps[-1]:.3f} to {ec / temps[0]:.2f})")
    # (a) least-squares starting points -> shared-energy integration (the global fit proper)
    t0 = time.perf_counter()
    summaries = []
    for d in datas:
        ls = least_squares_fit(higher_order_shape, d, initial_guess(d))
        summaries.append(SweepSummary.from_least_squares(ls["theta"], ls["covariance"]))
    t1 = time.perf_counter()
    g = fit_global(datas, summaries, higher_order_shape)
    t2 = time.perf_counter()
    print(f"  (a) least-squares starts {t1 - t0:.1f} s + shared-energy integration {t2 - t1:.1f} s = "
          f"{t2 - t0:.1f} s (target <= 20 s)")
    # (b) as 'coldcert certify' does it: a converged MCMC posterior per sweep first
    t3 = time.perf_counter()
    fits = [fit_sweep(d, seed=k) for k, d in enumerate(datas)]
    t4 = time.perf_counter()
    g_mcmc = fit_global(datas, fits, higher_order_shape)
    t5 = time.perf_counter()
    print(f"  (b) with per-sweep MCMC: {t4 - t3:.1f} s + {t5 - t4:.1f} s = {t5 - t3:.1f} s; largest difference "
          f"from (a): {np.max(np.abs(g_mcmc.temperatures - g.temperatures) / g.temperature_std):.3f} sigma")
    z = (g.temperatures - temps) / g.temperature_std
    print(f"  dE/k_B = {g.charging_energy * 1e3:.5f} +- {g.charging_energy_std * 1e3:.5f} mK (true {ec * 1e3} mK, "
          f"z = {(g.charging_energy - ec) / g.charging_energy_std:+.2f})")
    print(f"  temperatures: |z| max {np.abs(z).max():.2f}, mean z {z.mean():+.2f}, std z {z.std(ddof=1):.2f}")
    print(f"  tightening sigma_indep/sigma_global: min {g.tightening.min():.2f}, max {g.tightening.max():.2f}")


if __name__ == "__main__":
    main()
