"""Generate the invented sensor-calibration demo run in example_runs/sensor-larkspur/.

The scenario is invented: the "Larkspur Cryogenic Metrology Laboratory", its customer, the fridge
and its RuO2-like sensor are fictional. The CBT sweeps come from the project's CBT simulator, the
sensor's resistance from the simulated sensor of analysis.sensors, the ³He melting pressures from
the PLTS-2000 equation; all noise is drawn from fixed seeds.

Run: .venv/bin/python example_runs/make_sensor_example.py
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from pathlib import Path

import numpy as np

from analysis.cbt.simulate import simulate_sweep
from analysis.scales import melting_pressure
from analysis.sensors import SimulatedSensor

HERE = Path(__file__).parent
RUN = HERE / "sensor-larkspur"
LOG = HERE / "sensor-larkspur-log"

# Invented CBT: N = 33 junctions in series, M = 10 rows, R_T = 22 kohm, ΔE/k_B = 7.0 mK, so
# u = ΔE/k_BT runs from 0.7 at 10 mK to 0.007 at 1 K (inside the higher-order model's range).
N, M, R_T = 33, 10, 22e3
CHARGING_ENERGY_K = 7.0e-3
G_T = M / (N * R_T)
# 18 fridge set points from 10 mK to 1 K, roughly evenly spaced in ln T.
TEMPERATURES_K = np.round(np.geomspace(0.010, 1.0, 18), 5)
SENSOR = SimulatedSensor(r0_ohm=1150.0, t0_K=0.42, exponent=0.31, ripple=0.025)
#: Sweeps at which the ³He melting-curve thermometer was also read (avoiding its minimum).
MELTING_CURVE_AT = (0, 4, 8, 16)
START = datetime(2026, 11, 23, 8, 0, tzinfo=UTC)


def main() -> None:
    rng = np.random.default_rng(77001)
    RUN.mkdir(parents=True, exist_ok=True)
    LOG.mkdir(parents=True, exist_ok=True)
    for k, t in enumerate(TEMPERATURES_K):
        # Longer averaging at high temperature where the dip is shallow: noise ∝ T^-1/2.
        noise = 1.2e-4 * (t / 0.010) ** -0.5
        excitation = 2.0e-6 * (t / 0.010)  # keep e·a/(N k_B T) near 0.1
        bias, g, _ = simulate_sweep(
            N,
            float(t),
            CHARGING_ENERGY_K,
            G_T,
            seed=5100 + k,
            points=401,
            range_half_widths=5.0,
            relative_noise=noise,
            excitation_rms_V=excitation,
            bias_offset=1.5e-6,
        )
        resistance = float(SENSOR.resistance(t)) * (1.0 + 1e-4 * rng.standard_normal())
        started = START + timedelta(hours=3 * k)
        ended = started + timedelta(minutes=40)
        name = RUN / f"sweep_{k + 1:02d}_{t * 1e3:.1f}mK.csv"
        with open(name, "w", encoding="utf-8") as fh:
            fh.write(f"# junctions_in_series: {N}\n")
            fh.write(f"# parallel_rows: {M}\n")
            fh.write(f"# excitation_rms_V: {excitation:.4g}\n")
            fh.write("# device: LCM-CBT-3\n")
            fh.write(f"# sensor_resistance_ohm: {resistance:.6f}\n")
            if k in MELTING_CURVE_AT:
                p = float(melting_pressure(t)) + 20.0 * rng.standard_normal()
                fh.write(f"# melting_pressure_Pa: {p:.1f}\n")
            fh.write(f"# sweep_started: {started.isoformat().replace('+00:00', 'Z')}\n")
            fh.write(f"# sweep_ended: {ended.isoformat().replace('+00:00', 'Z')}\n")
            fh.write(f"# bath_temperature_K: {t:g}\n")
            fh.write("bias_V,conductance_S\n")
            for v, c in zip(bias, g, strict=True):
                fh.write(f"{v:.8e},{c:.8e}\n")

    # A later fridge log for the secondary use (coldcert sensor-temperatures): a slow cool-down
    # from 0.8 K to 12 mK, one reading a minute, with a few readings after a warm-up above 1 K
    # at the end (outside the calibrated range on purpose).
    minutes = np.arange(0, 600)
    t_fridge = 0.012 + (0.8 - 0.012) * np.exp(-minutes / 90.0)
    r_log = SENSOR.resistance(t_fridge) * (1.0 + 1e-4 * rng.standard_normal(minutes.size))
    warm = SENSOR.resistance(np.array([1.2, 1.5, 2.0]))
    with open(LOG / "mixing_chamber_log.csv", "w", encoding="utf-8") as fh:
        fh.write("# note: invented fridge log for the sensor-temperatures demo\n")
        fh.write("time_s,resistance_ohm\n")
        for m, r in zip(minutes, r_log, strict=True):
            fh.write(f"{m * 60:.0f},{r:.4f}\n")
        for j, r in enumerate(warm):
            fh.write(f"{(minutes[-1] + 1 + j) * 60:.0f},{r:.4f}\n")
    print(f"wrote {len(TEMPERATURES_K)} sweeps to {RUN} and a fridge log to {LOG}")


if __name__ == "__main__":
    main()
