"""Benchmark: a 20-point sensor calibration with degree selection and the table.

Target (issue 4): at most 5 s for the curve fit, degree selection and a table, excluding the CBT
fits that produce the reference temperatures. The points come from the invented RuO2-like
simulated sensor; the recovery figures (how far the fitted table is from the known curve, in
units of its expanded uncertainty) are printed beside the timings.

Run: .venv/bin/python benchmarks/bench_sensors.py
"""

from __future__ import annotations

import time

import numpy as np

from analysis import sensors


def main() -> None:
    sensor = sensors.SimulatedSensor()
    temperatures = np.geomspace(0.01, 1.0, 20)
    sim = sensors.simulate_calibration(sensor, temperatures, seed=20261201)

    for criterion in ("aicc", "loo"):
        t0 = time.perf_counter()
        fit = sensors.fit_calibration_curve(sim.data, criterion=criterion)
        t1 = time.perf_counter()
        table = fit.curve.table(points=101)
        budgets = [fit.curve.budget(r) for r in table.resistance_ohm]
        assert len(budgets) == table.resistance_ohm.size
        t2 = time.perf_counter()
        truth = sensor.temperature(table.resistance_ohm)
        ratio = np.abs(table.temperature_K - truth) / table.expanded_uncertainty_K
        print(
            f"criterion {criterion}: degree {fit.degree} of {len(fit.scores)} candidates, "
            f"{fit.iterations} effective-variance iterations, Birge ratio {fit.birge_ratio:.3f}"
        )
        print(f"  fit + degree selection + hopping check: {t1 - t0:.3f} s")
        print(f"  table (101 points) + 101 GUM budgets:   {t2 - t1:.3f} s")
        print(f"  total: {t2 - t0:.3f} s (target <= 5 s): {'PASS' if t2 - t0 <= 5 else 'FAIL'}")
        print(
            f"  recovery: {np.mean(ratio <= 1) * 100:.1f} % of table points within U "
            f"(max |error|/U = {ratio.max():.2f}); relative U from "
            f"{np.min(table.expanded_uncertainty_K / table.temperature_K) * 100:.2f} % to "
            f"{np.max(table.expanded_uncertainty_K / table.temperature_K) * 100:.2f} %"
        )
        hop = fit.hopping
        print(
            f"  hopping check: p = {hop.exponent:.3f}, max |T_hop/T - 1| = "
            f"{hop.max_relative_difference * 100:.2f} %, max normalised difference "
            f"{hop.max_normalised_difference:.1f}"
        )

    # Pooled coverage over repeated simulated calibrations (the honesty bar of DESIGN.md).
    t0 = time.perf_counter()
    covered = []
    for seed in range(100):
        s = sensors.simulate_calibration(sensor, temperatures, seed=seed)
        f = sensors.fit_calibration_curve(s.data, hopping_check=False)
        tab = f.curve.table(points=21)
        covered.append(
            np.abs(tab.temperature_K - sensor.temperature(tab.resistance_ohm))
            <= tab.expanded_uncertainty_K
        )
    covered = np.array(covered)
    print(
        f"coverage over 100 simulated calibrations: {covered.mean() * 100:.1f} % of table points "
        f"within their 95 % interval ({time.perf_counter() - t0:.1f} s)"
    )


if __name__ == "__main__":
    main()
