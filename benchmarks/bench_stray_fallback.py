"""Benchmark: how far T goes wrong when the dip model ignores a stated stray capacitance C_0.

    .venv/bin/python benchmarks/bench_stray_fallback.py [--n 3 4] [--c0 0.05 0.1 0.2] [--reach 1.5]
    .venv/bin/python benchmarks/bench_stray_fallback.py --solver --n 5 --c0 0.2 --u 1 2
    .venv/bin/python benchmarks/bench_stray_fallback.py --trend [--n 3 4 5 6]   (~3 min)

For a chain longer than the stray-capacitance tables (N > 4) the certificate fits a model without
C_0: the weak-blockade series (u <= 1) or the full C_0 = 0 model (u <= 2 for long chains). This
prints, per (N, C_0/C, nominal u), the relative error T_fit/T - 1 of a noiseless least-squares
fit of each fallback model to a curve *with* C_0, next to the same fit to the C_0 = 0 curve (the
model's own error), and the difference (what C_0 adds), with u_fit the fitted (effective) u.

Truth: for N = 3, 4 the exact stray-capacitance tables (FullTunnellingShape(N, c0_ratio), which
reproduce the orthodox master equation to <= 1e-6 of G_T, docs/models.md); with ``--solver`` the
master equation itself (analysis.cbt.tunnelling, any N; slow beyond N = 4).

``--trend`` prints instead how the part of the exact dip beyond the rescaling grows with N:
G_0/G_T(x, r_N u) − G/G_T(x, u; C_0) from the master equation at C_0/C = 0.2, near the
half-depth bias (x = 2.7 at u = 1, 3.1 at u = 2), for each N given.
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from analysis.cbt import tunnelling
from analysis.cbt.fit import SweepData, initial_guess, least_squares_fit
from analysis.cbt.full_model import FullTunnellingShape, first_order_depth_factor
from analysis.cbt.models import SweepSetup, higher_order_shape
from analysis.constants import BOLTZMANN, ELEMENTARY_CHARGE

T_TRUE = 0.02
G_T = 2e-6


def truth_curve(n: int, c0: float, u: float, x: np.ndarray, solver: bool) -> np.ndarray:
    if solver and c0:  # the C_0 = 0 reference stays the exact tables (N <= 6)
        half = tunnelling.conductance(np.abs(x[x >= 0]), u, tunnelling.ArrayDescription(n, c0_ratio=c0))
        return np.concatenate((half[:0:-1], half)) if x[0] < 0 else half
    return FullTunnellingShape(n, c0)(x, u) if c0 else FullTunnellingShape(n)(x, u)


def fitted_error(shape, n: int, x: np.ndarray, g: np.ndarray) -> tuple[float, float]:
    bias = x * n * BOLTZMANN * T_TRUE / ELEMENTARY_CHARGE
    data = SweepData(bias, G_T * g, SweepSetup(n))
    theta = least_squares_fit(shape, data, initial_guess(data))["theta"]
    return float(theta[0] / T_TRUE - 1.0), float(theta[1])


def trend(ns: list[int], c0: float = 0.2) -> None:
    for u, x in ((1.0, 2.7), (2.0, 3.1)):
        for n in ns:
            start = time.perf_counter()
            r = first_order_depth_factor(n, c0)
            with_c0 = tunnelling.solve_master_equation(tunnelling.ArrayDescription(n, c0_ratio=c0), x, u)
            rescaled = tunnelling.solve_master_equation(tunnelling.ArrayDescription(n), x, r * u)
            print(f"u = {u:g}, x = {x:g}, N = {n}, C_0/C = {c0:g} (r = {r:.4f}): dip beyond the rescaling "
                  f"{rescaled.conductance - with_c0.conductance:+.3e} [{time.perf_counter() - start:.1f} s]",
                  flush=True)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--n", type=int, nargs="+", default=[3, 4])
    ap.add_argument("--c0", type=float, nargs="+", default=[0.05, 0.1, 0.2])
    ap.add_argument("--u", type=float, nargs="+", default=[0.1, 0.25, 0.5, 1.0, 1.5, 2.0, 2.3])
    ap.add_argument("--points", type=int, default=201, help="points over the sweep (odd: x = 0 included)")
    ap.add_argument("--reach", type=float, default=5.0,
                    help="sweep reach in units of the first-order FWHM V_1/2 = 5.44 N k_B T/e")
    ap.add_argument("--solver", action="store_true", help="truth with C_0 from the master equation itself")
    ap.add_argument("--trend", action="store_true", help="N-trend of the dip beyond the rescaling")
    args = ap.parse_args()
    if args.trend:
        trend(args.n)
        return
    for n in args.n:
        zero = FullTunnellingShape(n)
        for c0 in args.c0:
            r = first_order_depth_factor(n, c0)
            print(f"N = {n}, C_0/C = {c0:g} (first-order depth factor r = {r:.4f})", flush=True)
            for u in args.u:
                start = time.perf_counter()
                span = args.reach * 5.44  # first-order FWHM in x (docs/physics.md 1.1)
                x = np.linspace(-span, span, args.points)
                g_c0 = truth_curve(n, c0, u, x, args.solver)
                g_0 = truth_curve(n, 0.0, r * u, x, args.solver)  # C_0 = 0 at the effective u
                cells = []
                for label, shape in (("series", higher_order_shape), ("full C_0=0", zero)):
                    if r * u > shape.max_u:
                        continue
                    e_c0, u_fit = fitted_error(shape, n, x, g_c0)
                    e_0, _ = fitted_error(shape, n, x, g_0)
                    cells.append(f"{label}: {e_c0:+.2e} (C_0 = 0 curve {e_0:+.2e}, C_0 adds "
                                 f"{e_c0 - e_0:+.2e}, u_fit {u_fit:.3f})")
                print(f"  u = {u:4.2f}: " + "; ".join(cells) + f" [{time.perf_counter() - start:.1f} s]",
                      flush=True)


if __name__ == "__main__":
    main()
