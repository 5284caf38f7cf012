"""Sampler efficiency on CBT sweep posteriors: autocorrelation time and likelihood calls to converge.

Same posterior, same certificate convergence rule (chain ≥ 50 τ, τ settled to 5 %), different
starts, coordinates and moves:

  before        (T, u, V₀), ball of 0.1 × least-squares standard errors, DE 0.8 + snooker 0.2
  lnT+fisher    (ln T, u, V₀), ball drawn from the least-squares covariance, DE 0.8 + snooker 0.2
  stretch       (ln T, u, V₀), covariance ball, affine-invariant stretch move
  independence  (ln T, u, V₀), covariance ball, independence t proposal 0.7 + DE 0.3 (the default)

Sweeps: N = 33, 401 points, lock-in excitation, full tunnelling model (the issue's reference
case), plus an exact N = 3 sweep at u = 2. "calls" counts parameter vectors evaluated.

    .venv/bin/python benchmarks/bench_cbt_sampler.py [--sweeps 3]
"""

from __future__ import annotations

import argparse
import math
import os
import sys
import time
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import numpy as np  # noqa: E402

from analysis.cbt.choice import full_model_for  # noqa: E402
from analysis.cbt.fit import (  # noqa: E402
    SweepData,
    initial_guess,
    least_squares_fit,
    make_log_posterior,
)
from analysis.cbt.models import SweepSetup  # noqa: E402
from analysis.cbt.simulate import exact_sweep, simulate_sweep  # noqa: E402
from analysis.sampling import sample_posterior  # noqa: E402

CONFIGS = {
    "before": dict(log_t=False, fisher=False, moves="de-snooker"),
    "lnT+fisher": dict(log_t=True, fisher=True, moves="de-snooker"),
    "stretch": dict(log_t=True, fisher=True, moves="stretch"),
    "independence": dict(log_t=True, fisher=True, moves="independence"),
    "indep+block50": dict(log_t=True, fisher=True, moves="independence", block=50),
}


def sweeps(n: int):
    for k in range(n):
        T = 0.02 * 2**k
        bias, g, setup = simulate_sweep(33, T, 0.5 * T, 1.5e-5, seed=100 + k, excitation_rms_V=4e-6 * (1 + k),
                                        relative_noise=3e-4, bias_offset=2e-6)
        yield f"N=33 T={1e3 * T:.0f} mK u=0.5", SweepData(bias, g, setup), full_model_for(33)
    bias, g, _ = exact_sweep(3, 0.05, 2.0, 3e-6)
    g = g + 3e-4 * 3e-6 * np.random.default_rng(7).standard_normal(g.size)
    yield "exact N=3 u=2", SweepData(bias, g, SweepSetup(3)), full_model_for(3)


def run(config: dict, shape, data: SweepData, seed: int) -> dict:
    ls = least_squares_fit(shape, data, initial_guess(data))
    T0, u0, v0 = ls["theta"]
    inner = make_log_posterior(shape, data, log_temperature=config["log_t"])
    calls = [0]

    def counted(theta):
        calls[0] += np.atleast_2d(theta).shape[0]
        return inner(theta)

    if config["log_t"]:
        to_log = np.diag([1.0 / T0, 1.0, 1.0])
        start, cov = np.array([math.log(T0), u0, v0]), to_log @ ls["covariance"] @ to_log
    else:
        start, cov = ls["theta"], ls["covariance"]
    t0 = time.perf_counter()
    post = sample_posterior(counted, start, seed, scale=ls["standard_errors"],
                            covariance=cov if config["fisher"] else None, walkers=12, block=config.get("block", 100),
                            moves=config["moves"])
    s = post.samples[:, 0]
    t_mean = float(np.exp(s).mean() if config["log_t"] else s.mean())
    return {"tau": max(post.autocorrelation_time), "steps": post.steps, "calls": calls[0],
            "seconds": time.perf_counter() - t0, "converged": post.converged, "T": t_mean,
            "ess": post.effective_sample_size, "acc": post.acceptance_fraction}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sweeps", type=int, default=2, help="N = 33 sweeps (one exact N = 3 sweep is added)")
    args = ap.parse_args()
    print(f"{'sweep':<22} {'config':<13} {'tau_max':>7} {'steps':>6} {'calls':>7} {'ESS':>6} {'acc':>5} "
          f"{'s':>6} {'conv':>5} {'T (K)':>11}")
    totals: dict[str, list] = {k: [] for k in CONFIGS}
    for label, data, shape in sweeps(args.sweeps):
        for name, cfg in CONFIGS.items():
            r = run(cfg, shape, data, seed=11)
            totals[name].append(r)
            print(f"{label:<22} {name:<13} {r['tau']:>7.2f} {r['steps']:>6} {r['calls']:>7} {r['ess']:>6.0f} "
                  f"{r['acc']:>5.2f} {r['seconds']:>6.2f} {str(r['converged']):>5} {r['T']:>11.6g}")
    print()
    base = totals["before"]
    for name, rs in totals.items():
        ratio_calls = np.mean([b["calls"] / r["calls"] for b, r in zip(base, rs, strict=True)])
        ratio_tau = np.mean([b["tau"] / r["tau"] for b, r in zip(base, rs, strict=True)])
        print(f"{name:<13} mean tau {np.mean([r['tau'] for r in rs]):6.2f}  mean calls {np.mean([r['calls'] for r in rs]):8.0f}"
              f"  tau ratio before/this {ratio_tau:5.2f}  calls ratio before/this {ratio_calls:5.2f}")


if __name__ == "__main__":
    main()
