"""Speed and accuracy of the long-array full-tunnelling dip shape (analysis.cbt.full_model).

Run: .venv/bin/python benchmarks/bench_full_model.py [--quick]

Prints (1) the evaluation rate in conductance points per second for the MCMC call pattern
(u of shape (walkers, 1), x of shape (points,)), of the table spline evaluated point by point and
of the evaluation grid built from it (analysis.cbt.dip_grid), side by side, (2) the model's error against exact
master-equation solutions (live off-grid points for N = 2, 3, 4 and cheap N = 5 points, plus the
stored validation points of make_tables.py --validate) and (3) its agreement with the orthodox
Monte Carlo for long chains (N = 10, 30, 100), where no exact solution is feasible.
"""

from __future__ import annotations

import argparse
import os
import time
from importlib import resources

import numpy as np
from scipy.integrate import quad

from analysis.cbt.full_model import MEASURED_ERROR, FullTunnellingShape
from analysis.cbt.orthodox_mc import simulate_current
from analysis.cbt.tunnelling import ArrayDescription, solve_master_equation


def evaluation_rate() -> None:
    shape = FullTunnellingShape(50)
    x = np.linspace(-25.0, 25.0, 401)
    for walkers in (1, 16, 64):
        u = np.linspace(0.3, 2.5, walkers)[:, None]
        rates = []
        for evaluate in (shape.reference, shape):  # the table spline point by point, the grid
            evaluate(x, u)
            repeats = max(5, 4000 // walkers) if evaluate is shape else max(5, 400 // walkers)
            fastest = np.inf  # the fastest call: the least disturbed by other users of the machine
            for _ in range(repeats):
                start = time.perf_counter()
                evaluate(x, u)
                fastest = min(fastest, time.perf_counter() - start)
            rates.append((walkers * x.size / fastest, 1e3 * fastest))
        (r_ref, ms_ref), (r_grid, ms_grid) = rates
        print(f"  {walkers:3d} walkers x 401 points: table spline {r_ref:,.0f} points/s "
              f"({ms_ref:.2f} ms per call), grid {r_grid:,.0f} points/s ({ms_grid:.3f} ms), "
              f"ratio {r_grid / r_ref:.1f}x (fastest of many calls; {os.getloadavg()[0]:.1f} load)")
    worst = max(float(np.max(np.abs(shape(x, u) - shape.reference(x, u))))
                for u in (np.linspace(0.0, 3.0, 31)[:, None],))
    print(f"  grid against the table spline: max |ΔG/G_T| = {worst:.1e} "
          f"(measured at build: {shape._grid.measured_error:.1e})")


def error_against_exact(quick: bool) -> None:
    rng = np.random.default_rng(2026)
    print("  interpolation (off-grid, exact tables N = 2, 3, 4):")
    for n in (2, 3, 4):
        shape = FullTunnellingShape(n)
        worst = 0.0
        for x, u in zip(rng.uniform(0, 12, 6 if quick else 20),
                        rng.uniform(0.5 if n == 4 else 0.05, 3.0, 6 if quick else 20),
                        strict=True):
            exact = solve_master_equation(ArrayDescription(n), float(x), float(u)).conductance
            worst = max(worst, abs(float(shape(x, u)) - exact))
        print(f"    N = {n}: max |ΔG/G_T| = {worst:.1e}")
    print("  exact N = 5, 6 tables and the continuation to N = 7 (live exact solutions):")
    for n, x, u in ((5, 0.6, 1.8), (5, 3.1, 4.6), (6, 1.1, 2.2), (6, 0.3, 3.9), (7, 0.0, 2.2),
                    (7, 1.0, 1.6)):
        shape = FullTunnellingShape(n)
        exact = solve_master_equation(ArrayDescription(n), x, u, sigmas=6.5).conductance
        print(f"    N = {n}, x = {x:4.1f}, u = {u:3.1f}: ΔG/G_T = {float(shape(x, u)) - exact:+.1e}"
              f"  (stated bound {shape.model_error(u):.1e})")
    for name in ("bound_points.npz", "held_out.npz"):
        ref = resources.files("analysis.cbt.tables").joinpath(name)
        with resources.as_file(ref) as path, np.load(path) as data:
            res = [abs(float(FullTunnellingShape(int(k))(xx, uu)) - g) for k, uu, xx, g in
                   zip(data["n"], data["u"], data["x"], data["conductance"], strict=True)]
            ratio = [r / FullTunnellingShape(int(k)).model_error(uu) for r, k, uu in
                     zip(res, data["n"], data["u"], strict=True)]
        print(f"  {name}: {len(res)} exact N = 5, 6 points, max |ΔG/G_T| = {max(res):.1e}, "
              f"max residual / stated bound = {max(ratio):.2f}")
    ref = resources.files("analysis.cbt.tables").joinpath("validation.npz")
    with resources.as_file(ref) as path, np.load(path) as data:
        n, u, x, g = data["n"], data["u"], data["x"], data["conductance"]
    print("  stored validation points (make_tables.py --validate):")
    bands = (0.0,) + MEASURED_ERROR["u_band_upper"]
    for lo, hi in zip(bands[:-1], bands[1:], strict=True):
        for length in (4, 5):
            if hi > 3.0:
                continue
            sel = (u > lo) & (u <= hi) & (n == length)
            if not sel.any():
                continue
            shape = FullTunnellingShape(length)
            res = np.abs(shape(x[sel], u[sel]) - g[sel])
            print(f"    N = {length}, {lo:.1f} < u <= {hi:.1f}: {sel.sum():2d} points, "
                  f"max |ΔG/G_T| = {res.max():.1e}")


def agreement_with_monte_carlo(quick: bool) -> None:
    events = 1500 if quick else 6000
    for n in (10, 30, 100):
        model = FullTunnellingShape(n)
        for u, x in ((1.0, 2.0), (2.0, 3.0), (2.5, 3.0)):
            start = time.perf_counter()
            mc = simulate_current(ArrayDescription(n), x, u, seed=n, n_replicas=400,
                                  events_per_replica=events, burn_in_events=max(500, 20 * n))
            seconds = time.perf_counter() - start
            current = quad(lambda t, m=model, uu=u: float(m(t, uu)), 0.0, x, epsabs=1e-12)[0]
            print(f"    N = {n:3d}, u = {u}, x = {x}: J_MC = {mc.current:.6f} ± "
                  f"{mc.standard_error:.1e}, J_model = {current:.6f}, "
                  f"difference {(mc.current - current) / mc.standard_error:+.1f} σ "
                  f"({seconds:.0f} s)")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer points, shorter Monte Carlo")
    args = parser.parse_args()
    print("Evaluation rate of FullTunnellingShape(50):")
    evaluation_rate()
    print("Error against the exact master equation:")
    error_against_exact(args.quick)
    print("Long chains against the orthodox Monte Carlo (current J = ∫ G/G_T dx):")
    agreement_with_monte_carlo(args.quick)
    print("Stated model error max |ΔG/G_T| (FullTunnellingShape(N).model_error(u)):")
    for n in (4, 5, 6, 10, 30, 100):
        shape = FullTunnellingShape(n)
        row = ", ".join(f"u<={b}: {shape.model_error(b):.1e}"
                        for b in MEASURED_ERROR["u_band_upper"] if b <= shape.max_u)
        print(f"  N = {n:3d}: {row}")


if __name__ == "__main__":
    main()
