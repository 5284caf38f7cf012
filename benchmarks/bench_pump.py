"""Electron-pump benchmarks: speed of the record and plateau analyses, and recovery coverage.

Run: .venv/bin/python benchmarks/bench_pump.py [--seeds 200]

1. A precision record of 10⁶ readings analysed end to end (segments, settling cut, cycle
   differences, Allan deviation, Type A with autocorrelation, GUM budget and a fixed-size JCGM 101
   Monte Carlo). Target ≤ 1 s.
2. A plateau scan with three plateaus (four steps) fitted by least squares and sampled to a
   converged posterior (decay-cascade model, default convergence rule). Target ≤ 2 s.
3. Plateau honesty: over simulated scans, the fraction of 95 % credible intervals of the predicted
   deviation at the working point that contain the true model's deviation there.
4. Recovery: simulated records with an injected deviation of +0.8 ppm (white reading noise,
   linear and random-walk offset drift, settling transients, AR(1) colouring in half the seeds);
   the fraction of seeds whose 95 % interval contains +0.8 ppm should be about 0.95.
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from analysis.pump import plateau as P
from analysis.pump import record as R
from analysis.pump import simulate
from analysis.pump.quantized import nominal_current


def bench_record() -> float:
    settings = simulate.RecordSettings(cycles=5000, readings_per_segment=100, reading_interval_s=0.1,
                                       deviation_ppm=0.8, random_walk_a=2e-17,
                                       settling_tau_s=0.05)
    t, i, on = simulate.on_off_record(settings, seed=1)
    t, i, on = t[:1_000_000], i[:1_000_000], on[:1_000_000]
    best = np.inf
    for _ in range(3):
        t0 = time.perf_counter()
        res = R.analyse_record(t, i, on, 1.0e9, 1, seed=2, settling=R.SettlingRule(seconds=1.0),
                               monte_carlo_draws=100_000)
        best = min(best, time.perf_counter() - t0)
    b = res.precision.budget
    print(f"record: {t.size:,} readings, {res.cycles.differences.size} cycles, "
          f"Allan points {res.allan.m.size}: best of 3 {best:.3f} s (target ≤ 1 s); "
          f"D = {b.estimate:.3f} ppm, u = {b.combined_standard_uncertainty:.3f} ppm, "
          f"n_eff/n = {res.type_a.effective_n / res.type_a.n:.2f}")
    return best


def bench_plateau() -> float:
    gate = np.linspace(-0.80, 0.10, 301)
    truth = np.array([50.0, -0.70, -0.42, -0.24, -0.04])  # δ = 14, 9, 10: plateaus 1, 2, 3
    current = simulate.plateau_scan(gate, 1.0e9, P.DECAY_CASCADE, truth, seed=3, noise_a=0.3e-12)
    y = current / nominal_current(1.0e9)
    times = []
    for seed in (1, 2, 3):
        t0 = time.perf_counter()
        fit = P.fit_plateau(gate, y, P.DECAY_CASCADE)
        post = P.sample_plateau_posterior(gate, y, fit, seed=seed)
        wp = P.working_point(P.DECAY_CASCADE, post.parameter_samples, 1)
        times.append(time.perf_counter() - t0)
    r = post.result
    print(f"plateau: {fit.parameters.size - 1} steps (plateaus {P.inspect_scan(gate, y).plateaus}), "
          f"{gate.size} points: median {np.median(times):.2f} s over 3 seeds (target ≤ 2 s); "
          f"converged {r.converged}, {r.walkers} walkers × {r.steps} steps, max τ "
          f"{max(r.autocorrelation_time):.1f}; working point {wp.gate_V:.5f} V, predicted "
          f"deviation {wp.relative_deviation:.3g} ± {wp.relative_deviation_standard_uncertainty:.2g}")
    return float(np.median(times))


def bench_plateau_coverage(seeds: int) -> float:
    gate = np.linspace(-0.80, -0.25, 221)
    truth = np.array([50.0, -0.70, -0.40, -0.30])  # δ₂ = 15
    true_dev = P.working_point(P.DECAY_CASCADE, truth, 1).relative_deviation
    hits = 0
    for s in range(seeds):
        current = simulate.plateau_scan(gate, 1.0e9, P.DECAY_CASCADE, truth, seed=200 + s,
                                        noise_a=0.4e-12)
        y = current / nominal_current(1.0e9)
        fit = P.fit_plateau(gate, y, P.DECAY_CASCADE)
        post = P.sample_plateau_posterior(gate, y, fit, seed=s)
        lo, hi = P.working_point(P.DECAY_CASCADE, post.parameter_samples, 1).relative_deviation_interval
        hits += lo <= true_dev <= hi
    frac = hits / seeds
    se = (0.95 * 0.05 / seeds) ** 0.5
    print(f"plateau coverage: {hits}/{seeds} = {frac:.2f} of 95 % credible intervals contain the "
          f"true predicted deviation {true_dev:.3g} (binomial standard error {se:.3f})")
    return frac


def bench_coverage(seeds: int) -> float:
    truth = 0.8
    hits = 0
    z = []
    for s in range(seeds):
        settings = simulate.RecordSettings(
            deviation_ppm=truth, cycles=150, readings_per_segment=60, noise_a=20e-15,
            random_walk_a=5e-17, ar1=0.5 if s % 2 else 0.0, settling_tau_s=1.0)
        t, i, on = simulate.on_off_record(settings, seed=1000 + s)
        res = R.analyse_record(t, i, on, 1.0e9, 1, seed=s, monte_carlo_draws=20_000)
        b = res.precision.budget
        hits += abs(b.estimate - truth) <= b.expanded_uncertainty
        z.append((b.estimate - truth) / b.combined_standard_uncertainty)
    frac = hits / seeds
    se = (0.95 * 0.05 / seeds) ** 0.5
    print(f"coverage: {hits}/{seeds} = {frac:.3f} of 95 % intervals contain +{truth} ppm "
          f"(binomial standard error {se:.3f}); "
          f"standardised error mean {np.mean(z):+.2f}, sd {np.std(z, ddof=1):.2f} (ideal 0, 1)")
    return frac


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, default=600, help="records in the recovery check")
    parser.add_argument("--plateau-seeds", type=int, default=40, help="scans in the plateau check")
    args = parser.parse_args()
    bench_record()
    bench_plateau()
    bench_plateau_coverage(args.plateau_seeds)
    bench_coverage(args.seeds)


if __name__ == "__main__":
    main()
