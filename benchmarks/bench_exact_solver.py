"""Speed of the exact orthodox master equation on a full bias sweep (analysis.cbt.tunnelling).

Run (one core, ~5-10 min on a shared 2-core machine):

    OPENBLAS_NUM_THREADS=1 nice -n 15 .venv/bin/python benchmarks/bench_exact_solver.py
    ... --n 5 --u 2 --x-max 10 --sigmas 7   (other settings)

Prints, per bias point of the sweep, the number of charge states in the energy-bounded window,
the linear solve used, the stationary probability on the window edge and the wall time; then
the window change (|ΔG/G_T| on enlarging the window by 1.5 σ) at three biases and the totals.
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from analysis.cbt.tunnelling import ArrayDescription, solve_master_equation


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=int, default=6, help="junctions in the chain (default 6)")
    parser.add_argument("--u", type=float, default=3.0, help="u = ΔE/k_BT (default 3)")
    parser.add_argument("--x-max", type=float, default=12.0,
                        help="largest reduced bias eV/(N k_BT) of the sweep (default 12)")
    parser.add_argument("--step", type=float, default=0.5, help="bias step (default 0.5)")
    parser.add_argument("--sigmas", type=float, default=6.5, help="window size (default 6.5)")
    args = parser.parse_args()
    array = ArrayDescription(args.n)
    xs = np.arange(0.0, args.x_max + 1e-9, args.step)
    print(f"N = {args.n}, u = {args.u}, {xs.size} biases x = 0 … {args.x_max} "
          f"(the dip is even in x), window {args.sigmas} σ")
    total = time.perf_counter()
    previous = None
    for x in xs:
        start = time.perf_counter()
        sol = solve_master_equation(array, float(x), args.u, sigmas=args.sigmas,
                                    warm_start=previous)
        previous = sol
        print(f"  x = {x:5.2f}: G/G_T = {sol.conductance:.10f}  {sol.n_states:8d} states  "
              f"{sol.solver:5s} edge {sol.boundary_probability:.1e}  "
              f"{time.perf_counter() - start:6.2f} s", flush=True)
    sweep_seconds = time.perf_counter() - total
    for x in (0.0, 0.5 * xs[-1], xs[-1]):
        sol = solve_master_equation(array, float(x), args.u, sigmas=args.sigmas,
                                    check_window=True)
        print(f"  window check x = {x:5.2f}: |ΔG/G_T| = {sol.window_change:.1e} on +1.5 σ")
    print(f"sweep: {xs.size} points in {sweep_seconds:.0f} s "
          f"({sweep_seconds / xs.size:.1f} s per point)")


if __name__ == "__main__":
    main()
