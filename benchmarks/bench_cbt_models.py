"""Benchmark: temperature recovery across the blockade regimes with automatic model choice.

    .venv/bin/python benchmarks/bench_cbt_models.py [--per-u K]
    .venv/bin/python benchmarks/bench_cbt_models.py --strong [--per-u 20] [--n 3]
    .venv/bin/python benchmarks/bench_cbt_models.py --stray [--per-u 20] [--n 3] [--c0 0.1 0.2] [--u 1 3 4.5]

``--strong`` runs the recovery campaign in strong blockade instead (u = 3.5, 4, 4.5, within the
full model's validated u <= 5 for N <= 6), reporting per u the fraction of fits whose expanded
interval U (the certificate's GUM budget, with the model row) covers the true T, besides the normalised bias.

``--stray`` runs it with stray capacitance C_0/C = 0.1 and 0.2 (u = 1, 3, 4.5), the sweeps
simulated with C_0 and fitted with the ratio given, as a manifest's ``ground_capacitance_ratio``.

Sweeps are simulated with the exact orthodox master equation (analysis.cbt.tunnelling, an
independent solver) for a 3-junction chain at u = 0.05 … 3, fitted through the same path as
`coldcert certify` (analysis.cbt.choice: the series only where it is accurate enough, else the
full tunnelling model), and the mean normalised bias (T_fit − T)/σ is reported per u (target |mean| < 0.2).
Also times one 401-point sweep at u = 1 fitted with the full model (target ≤ 5 s).
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from analysis.cbt import tunnelling
from analysis.cbt.choice import choose_shape, fit_sweep_chosen
from analysis.cbt.fit import FitSettings, SweepData, fit_sweep
from analysis.cbt.models import SweepSetup
from analysis.cbt.uncertainty import TypeBInputs, temperature_budget
from analysis.constants import BOLTZMANN, ELEMENTARY_CHARGE

_CURVES: dict = {}


def exact_sweep(n, T, u, seed, points=401, noise=2e-4, span=None, c0_ratio=0.0):
    span = span or (8.0 + 2.5 * u) * 2.0
    x = np.linspace(-span, span, points)
    key = (n, u, points, span, c0_ratio)
    if key not in _CURVES:  # the noiseless exact curve is shared by all seeds
        _CURVES[key] = tunnelling.conductance(
            x, u, tunnelling.ArrayDescription(n, c0_ratio=c0_ratio))
    g = _CURVES[key]
    rng = np.random.default_rng(seed)
    bias = x * n * BOLTZMANN * T / ELEMENTARY_CHARGE
    return SweepData(bias, 2e-6 * (g + noise * rng.standard_normal(points)), SweepSetup(n))


def strong_campaign(n: int, T: float, per_u: int, settings: FitSettings, c0_ratio: float = 0.0,
                    us: tuple[float, ...] = (3.5, 4.0, 4.5)) -> None:
    stray = f", C_0/C = {c0_ratio:g}" if c0_ratio else ""
    print(f"recovery on exact master-equation sweeps, N = {n}{stray}, {per_u} seeds per u")
    for u in us:
        z, covered, names = [], 0, set()
        start = time.perf_counter()
        for s in range(per_u):
            data = exact_sweep(n, T, u, seed=1000 * s + int(100 * u), c0_ratio=c0_ratio)
            fit, choice = fit_sweep_chosen(data, seed=s, c0_ratio=c0_ratio, settings=settings)
            names.add(choice.shape.name)
            z.append((fit.temperature - T) / fit.temperature_std)
            # The certificate's T and expanded uncertainty U (GUM budget with the model row).
            budget, _ = temperature_budget(fit, choice.shape, data.setup, TypeBInputs(), data=data)
            covered += abs(budget.estimate - T) <= budget.expanded_uncertainty
        z = np.array(z)
        print(f"  u = {u:4.2f}: mean z {z.mean():+.2f} +- {z.std(ddof=1) / np.sqrt(z.size):.2f}, "
              f"std z {z.std(ddof=1):.2f}, truth within U in {covered}/{per_u}; "
              f"model {', '.join(sorted(names))} ({time.perf_counter() - start:.0f} s)", flush=True)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--per-u", type=int, default=6)
    ap.add_argument("--strong", action="store_true", help="u = 3.5-4.5 campaign only")
    ap.add_argument("--stray", action="store_true",
                    help="C_0/C = 0.1, 0.2 campaign (u = 1, 3, 4.5) only")
    ap.add_argument("--c0", type=float, nargs="+", default=[0.1, 0.2],
                    help="with --stray: the C_0/C values")
    ap.add_argument("--u", type=float, nargs="+", default=None,
                    help="with --strong or --stray: the u values (defaults 3.5 4 4.5 / 1 3 4.5)")
    ap.add_argument("--n", type=int, default=3, help="junctions in the simulated chain")
    args = ap.parse_args()
    n, T = args.n, 0.02
    settings = FitSettings()
    if args.strong:
        strong_campaign(n, T, args.per_u, settings, us=tuple(args.u or (3.5, 4.0, 4.5)))
        return
    if args.stray:
        for c0 in args.c0:
            strong_campaign(n, T, args.per_u, settings, c0_ratio=c0,
                            us=tuple(args.u or (1.0, 3.0, 4.5)))
        return
    print(f"recovery on exact master-equation sweeps, N = {n}, {args.per_u} seeds per u")
    pooled = []
    for u in (0.05, 0.3, 0.7, 1.0, 1.5, 2.0, 3.0):
        z, names = [], set()
        for s in range(args.per_u):
            data = exact_sweep(n, T, u, seed=1000 * s + int(100 * u))
            fit, choice = fit_sweep_chosen(data, seed=s, settings=settings)
            names.add(choice.shape.name.split(",")[0])
            z.append((fit.temperature - T) / fit.temperature_std)
        z = np.array(z)
        pooled.extend(z)
        print(f"  u = {u:4.2f}: mean z {z.mean():+.2f} +- {z.std(ddof=1) / np.sqrt(z.size):.2f} (target |.| < 0.2), std z {z.std(ddof=1):.2f}; model {', '.join(sorted(names))}")

    pooled = np.array(pooled)
    print(f"  pooled over all u: mean z {pooled.mean():+.3f} +- {pooled.std(ddof=1) / np.sqrt(pooled.size):.3f} "
          f"(standard error), std z {pooled.std(ddof=1):.2f}, {pooled.size} fits")

    data = exact_sweep(n, T, 1.0, seed=7)
    full = choose_shape(1.0, n).shape
    fit_sweep(data, seed=0, shape=full)
    t0 = time.perf_counter()
    fit = fit_sweep(data, seed=1, shape=full)
    print(f"one 401-point sweep at u = 1, full model: {time.perf_counter() - t0:.2f} s to a converged posterior "
          f"({fit.posterior.steps} steps, converged {fit.posterior.converged}; target <= 5 s)")


if __name__ == "__main__":
    main()
