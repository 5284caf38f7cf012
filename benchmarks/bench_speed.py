"""How long a certificate takes: likelihood, one-sweep posterior, the CLI on the example runs.

    .venv/bin/python benchmarks/bench_speed.py [--quick] [--baseline DIR] [--skip-cli]

Prints figures and asserts nothing. The machine is shared, so every figure carries the load
average at the time, and before/after pairs are measured side by side in the same run.

1. Full-model log posterior of one N = 33, 401-point lock-in sweep (the call ``emcee`` makes: a
   half ensemble of 6 walkers, and all 12): the table spline evaluated point by point (the
   evaluation before the cheap grid, ``FullTunnellingShape.reference``) against the grid
   (``FullTunnellingShape.__call__``), same data, same walkers: the fastest of many calls (the
   least disturbed by other users' load) and the CPU time per call, and their ratios.
2. One such sweep to a converged posterior with the model choice of ``coldcert certify``
   (``fit_sweep_chosen``): wall and CPU seconds, steps and τ, for three seeds.
3. The CLI as a user meets it: ``coldcert --help``, ``coldcert verify --help`` and ``coldcert
   certify`` of the three example runs, wall seconds. With ``--baseline DIR`` (a checkout or
   ``git archive`` of an older commit) the same commands also run from DIR, interleaved with
   ours, for a before/after pair measured under the same load.
"""

from __future__ import annotations

import argparse
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")  # before numpy loads BLAS: one thread per process

import numpy as np  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]


def load() -> str:
    return f"load {os.getloadavg()[0]:.1f}"


def per_call(fn, calls: int) -> tuple[float, float]:
    """(minimum wall seconds of one call, CPU seconds per call averaged over all calls)."""
    fn()
    times = np.empty(calls)
    cpu = time.process_time()
    for i in range(calls):
        start = time.perf_counter()
        fn()
        times[i] = time.perf_counter() - start
    return float(times.min()), (time.process_time() - cpu) / calls


def likelihood(quick: bool) -> None:
    from analysis.cbt.choice import full_model_for
    from analysis.cbt.fit import SweepData, make_log_posterior
    from analysis.cbt.simulate import simulate_sweep

    n, temperature, u, gt = 33, 0.05, 1.0, 3e-6
    grid = full_model_for(n)

    class TableSpline:  # the same model evaluated the way it was before the grid
        name, max_u, min_u = grid.name, grid.max_u, grid.min_u

        def __call__(self, x, uu):
            return grid.reference(x, uu)

    bias, g, setup = simulate_sweep(n, temperature, u * temperature, gt, seed=1, points=401,
                                    relative_noise=2e-4, excitation_rms_V=3e-6)
    data = SweepData(bias, g, setup)
    span = bias.max() - bias.min()
    window = (bias.min() + 0.25 * span, bias.max() - 0.25 * span)
    rng = np.random.default_rng(0)
    print("1. full-model log posterior, N = 33, 401 points, lock-in (3 quadrature nodes)")
    for walkers in (6, 12):
        theta = np.array([temperature, u, 0.0]) + rng.normal(size=(walkers, 3)) * [5e-5, 1e-3, 1e-7]
        before = make_log_posterior(TableSpline(), data, window)
        after = make_log_posterior(grid, data, window)
        diff = float(np.max(np.abs(before(theta) - after(theta))))
        b_min, b_cpu = per_call(lambda f=before, t=theta: f(t), 40 if quick else 200)
        a_min, a_cpu = per_call(lambda f=after, t=theta: f(t), 400 if quick else 2000)
        print(f"   {walkers:2d} walkers: table spline {1e3 * b_min:.2f} ms fastest call, "
              f"{1e3 * b_cpu:.2f} ms CPU per call; grid {1e3 * a_min:.3f} ms, {1e3 * a_cpu:.3f} ms "
              f"CPU; ratio {b_min / a_min:.1f}x (CPU {b_cpu / a_cpu:.1f}x); "
              f"max |Δ log p| {diff:.1e}; {load()}")


def one_sweep(quick: bool) -> None:
    from analysis.cbt.choice import fit_sweep_chosen
    from analysis.cbt.fit import SweepData
    from analysis.cbt.simulate import simulate_sweep

    print("2. one N = 33, 401-point lock-in sweep (u = 1) to a converged posterior, full model")
    bias, g, setup = simulate_sweep(33, 0.05, 0.05, 3e-6, seed=1, points=401, relative_noise=2e-4,
                                    excitation_rms_V=3e-6)
    data = SweepData(bias, g, setup)
    fit_sweep_chosen(data, seed=99)  # warm-up: imports, the model's grid, caches
    walls = []
    for seed in range(1 if quick else 3):
        wall, cpu = time.perf_counter(), time.process_time()
        fit, choice = fit_sweep_chosen(data, seed=seed)
        wall, cpu = time.perf_counter() - wall, time.process_time() - cpu
        walls.append(wall)
        post = fit.posterior
        print(f"   seed {seed}: {wall:.2f} s wall, {cpu:.2f} s CPU; {post.steps} steps x "
              f"{post.walkers} walkers, tau max {max(post.autocorrelation_time):.1f}, "
              f"converged {post.converged}; {load()}")
    print(f"   median {float(np.median(walls)):.2f} s wall; model: {choice.shape.name}")


def cli_commands(out: Path) -> list[tuple[str, list[str]]]:
    runs = ROOT / "example_runs"
    return [
        ("coldcert --help", ["--help"]),
        ("coldcert verify --help", ["verify", "--help"]),
        ("certify cbt-hollowmere", ["certify", str(runs / "cbt-hollowmere"), "--out", str(out / "cbt")]),
        ("certify pump-quillfen", ["certify", str(runs / "pump-quillfen"), "--out", str(out / "pump")]),
        ("certify sensor-larkspur", ["certify", str(runs / "sensor-larkspur"), "--out", str(out / "sensor")]),
    ]


def run_cli(args: list[str], tree: Path) -> tuple[float, float]:
    """Wall seconds and CPU seconds (the command and every process it waited for)."""
    env = dict(os.environ, PYTHONPATH=str(tree), OPENBLAS_NUM_THREADS="1")
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    start = time.perf_counter()
    module = "service.cli.main" if (tree / "service" / "cli" / "main.py").exists() else "service.cli"
    done = subprocess.run([sys.executable, "-m", module, *args], cwd=tree, env=env,
                          stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True, check=False)
    wall = time.perf_counter() - start
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu = after.ru_utime - before.ru_utime + after.ru_stime - before.ru_stime
    if done.returncode != 0:
        print(f"      exit status {done.returncode}: {done.stderr.strip().splitlines()[-1:]}")
    return wall, cpu


def cli(baseline: Path | None) -> None:
    print("3. the CLI (a fresh process each; CPU = user + system of it and its workers)")
    with tempfile.TemporaryDirectory() as tmp:
        for label, args in cli_commands(Path(tmp)):
            ours, ours_cpu = run_cli(args, ROOT)
            line = f"   {label:26s} {ours:6.2f} s wall {ours_cpu:6.2f} s CPU"
            if baseline is not None:
                args_b = [a.replace(str(ROOT), str(baseline)).replace(tmp, tmp + "/baseline")
                          for a in args]
                theirs, theirs_cpu = run_cli(args_b, baseline)
                line += (f" | baseline {theirs:6.2f} s wall {theirs_cpu:6.2f} s CPU | ratio "
                         f"{theirs / ours:4.1f}x wall {theirs_cpu / ours_cpu:4.1f}x CPU")
            print(f"{line}   {load()}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer calls and one seed")
    parser.add_argument("--baseline", type=Path, help="older tree to time the CLI against")
    parser.add_argument("--skip-cli", action="store_true", help="only the likelihood and one sweep")
    args = parser.parse_args()
    print(f"{os.cpu_count()} CPUs; {load()}")
    likelihood(args.quick)
    one_sweep(args.quick)
    if not args.skip_cli:
        cli(args.baseline.resolve() if args.baseline else None)


if __name__ == "__main__":
    main()
