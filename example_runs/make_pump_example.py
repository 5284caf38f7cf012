"""Generate the invented electron-pump demo run in example_runs/pump-quillfen/ with the simulator.

The scenario is invented: the "Quillfen Electrical Quantum Standards Laboratory", its customer,
the pump "LQ-P12" and every instrument are fictional, and so are all the numbers below.
Run: .venv/bin/python example_runs/make_pump_example.py
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from analysis.pump import plateau as P
from analysis.pump import simulate

HERE = Path(__file__).parent / "pump-quillfen"
FREQUENCY_HZ = 1.0e9
# Invented pump: decay-cascade steps with a = 55 /V on the exit gate, figure of merit δ₂ ≈ 20.
SCAN_TRUTH = np.array([55.0, -0.70, -0.33, -0.22])
# Invented chain: transresistance 4.2 ppm above nominal, voltmeter reading 0.8 ppm low, so the
# indicated current is 3.4 ppm high; the pump itself is 0.3 ppm low.
TRUE_DEVIATION_PPM = -0.3
INDICATED_GAIN_PPM = 4.2 - 0.8


def _write(name: str, header: list[str], columns: list[str], rows) -> None:
    with open(HERE / name, "w", encoding="utf-8") as fh:
        for line in header:
            fh.write(f"# {line}\n")
        fh.write(",".join(columns) + "\n")
        for row in rows:
            fh.write(",".join(f"{v:.10g}" if isinstance(v, float) else str(v) for v in row) + "\n")


def main() -> None:
    HERE.mkdir(parents=True, exist_ok=True)
    gate = np.round(np.linspace(-0.80, -0.10, 281), 6)
    current = simulate.plateau_scan(gate, FREQUENCY_HZ, P.DECAY_CASCADE, SCAN_TRUTH, seed=5101,
                                    noise_a=0.25e-12, offset_a=0.04e-12)
    _write("scan_exit_gate.csv",
           ["frequency_Hz: 1.0e9", "electrons_per_cycle: 1", "device: LQ-P12",
            "magnetic_field_T: 12", "note: exit-gate scan, entrance gate at -0.25 V"],
           ["gate_V", "current_A"], zip(gate.tolist(), current.tolist(), strict=True))

    # The same invented pump: at entrance gate -0.25 V the map's slice is the scan above.
    g1 = np.round(np.linspace(-0.90, -0.10, 161), 6)
    g2 = np.round(np.linspace(-0.35, -0.15, 11), 6)
    a, b, i = simulate.plateau_map(
        g1, g2, FREQUENCY_HZ, seed=5102, slope_per_v=SCAN_TRUTH[0],
        first_step_v=SCAN_TRUTH[1] - 0.3 * (-0.25), shift_per_v=0.3,
        delta2_peak=SCAN_TRUTH[0] * (SCAN_TRUTH[2] - SCAN_TRUTH[1]), gate2_optimum_v=-0.25,
        delta3=SCAN_TRUTH[0] * (SCAN_TRUTH[3] - SCAN_TRUTH[2]), noise_a=0.25e-12)
    _write("map_exit_entrance.csv",
           ["frequency_Hz: 1.0e9", "electrons_per_cycle: 1", "device: LQ-P12",
            "note: exit gate scanned at each entrance-gate setting (long format)"],
           ["gate_V", "entrance_gate_V", "current_A"],
           zip(a.tolist(), b.tolist(), i.tolist(), strict=True))

    working = P.working_point(P.DECAY_CASCADE, SCAN_TRUTH, 1).gate_V
    settings = simulate.RecordSettings(
        frequency_hz=FREQUENCY_HZ, deviation_ppm=TRUE_DEVIATION_PPM, cycles=180,
        readings_per_segment=60, reading_interval_s=1.0, noise_a=12e-15, ar1=0.2,
        offset_a=-3.1e-12, drift_a_per_s=4e-17, random_walk_a=3e-17, settling_tau_s=1.0,
        gain_error_ppm=INDICATED_GAIN_PPM,
    )
    t, cur, on = simulate.on_off_record(settings, seed=5104)
    _write("record_1GHz.csv",
           ["frequency_Hz: 1.0e9", "electrons_per_cycle: 1", "settling_s: 20",
            f"operating_gate_V: {working:.4f}", "second_gate_V: -0.25", "magnetic_field_T: 12",
            "device: LQ-P12", "note: 60 s on / 60 s off, 1 s readings of the current amplifier"],
           ["time_s", "current_A", "pump_on"],
           zip(t.tolist(), cur.tolist(), on.tolist(), strict=True))


if __name__ == "__main__":
    main()
