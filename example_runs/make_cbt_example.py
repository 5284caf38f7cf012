"""Generate the invented CBT demo run in example_runs/cbt-hollowmere/ with the project's simulator.

The scenario is invented: the "Hollowmere Low Temperature Laboratory", its customer and its
device are fictional. Run: .venv/bin/python example_runs/make_cbt_example.py
"""

from __future__ import annotations

from pathlib import Path

from analysis.cbt.simulate import simulate_sweep

HERE = Path(__file__).parent / "cbt-hollowmere"

# Invented device: N = 33 junctions in series, M = 10 rows, R_T = 20 kohm per junction,
# C = 0.25 pF per junction -> Delta E / k_B = (32/33) e^2/(C k_B) = 7.2 mK.
N, M, R_T = 33, 10, 20e3
CHARGING_ENERGY_K = 7.2e-3
G_T = M / (N * R_T)
TEMPERATURES_K = (0.015, 0.030, 0.060, 0.120, 0.250)
EXCITATION_RMS_V = 4e-6
RESISTANCE_SPREAD = 0.03  # relative standard deviation of R_T, as stated in run.toml [device]


def main() -> None:
    HERE.mkdir(parents=True, exist_ok=True)
    for k, T in enumerate(TEMPERATURES_K):
        bias, g, _ = simulate_sweep(
            N, T, CHARGING_ENERGY_K, G_T, seed=1000 + k, points=401, range_half_widths=5.0,
            relative_noise=1.5e-4, excitation_rms_V=EXCITATION_RMS_V, bias_offset=2.0e-6,
            resistance_spread=RESISTANCE_SPREAD,
        )
        name = HERE / f"sweep_{k + 1:02d}_{T * 1e3:.0f}mK.csv"
        with open(name, "w", encoding="utf-8") as fh:
            fh.write(f"# junctions_in_series: {N}\n")
            fh.write(f"# parallel_rows: {M}\n")
            fh.write(f"# excitation_rms_V: {EXCITATION_RMS_V:g}\n")
            fh.write("# device: HLT-CBT-07\n")
            fh.write(f"# sweep_started: 2026-11-24T{9 + 2 * k:02d}:00:00Z\n")
            fh.write(f"# bath_temperature_K: {T:g}\n")
            fh.write("bias_V,conductance_S\n")
            for v, c in zip(bias, g, strict=True):
                fh.write(f"{v:.8e},{c:.8e}\n")
    print(f"wrote {len(TEMPERATURES_K)} sweeps to {HERE}")


if __name__ == "__main__":
    main()
