"""Pump settling transients: bias and coverage of the measured-transient discard.

Run: .venv/bin/python benchmarks/bench_pump_settling.py [--records 200] [--hours 2]

Records are simulated with transients whose shape is NOT the single exponential per switch that
:mod:`analysis.pump.settling` fits, on top of the ammeter's own first-order settling of the full
step (τ = 1 s):

- switch-on: 45 fA with τ = 3 s plus 15 fA with τ = 8 s after each switch-on only;
- overshoot: the same after switch-on and its mirror image after switch-off;
- lagging: 0.1 % of each step follows a critically damped second-order response (two poles at
  2.5 s), a filter-like lag that is not an exponential;
- none: the ammeter's own settling only (the control).

Every record has 1 s readings, white noise of 5 fA coloured by AR(1) with φ = 0.5, a linear drift
and a wandering (random-walk) offset, and a true deviation of +0.8 ppm. Records last about two
hours by default: long enough for tens of cycles (so the Type A and the jackknife have degrees of
freedom), short enough that the campaign runs in minutes; the transient's bias relative to u does
not shrink with length, it grows (u falls as 1/√T, the bias does not), so a longer record is a
harder case: ``--hours 8`` runs it (about four times longer).

For each shape and segment length the table gives the mean of (D − truth)/u with its standard
error, the fraction of 95 % intervals that contain the truth, the number of records refused,
certified outside 2 U with no warning, and the same figures for the former fixed discard (first
25 % of each segment). Targets: |mean bias| < 0.2 u, coverage 90–98 %, none outside 2 U silently.

The mean bias of a row is itself uncertain: (D − truth)/u scatters by about 1 between records, so
40 records fix the mean only to ±0.16 u, and a row of an unbiased analysis then misses the 0.2 u
target about one time in five. The default is therefore 200 records per row (±0.07 u). The last
column, "paired", is the mean over the same records of (D_measured − D_fixed)/u: the two analyses
see the same noise, so it shows what measuring the transient adds, to a few hundredths of u; in
the "none" family the fixed discard is unbiased (the ammeter's 1 s settling has decayed by e⁻¹⁵
at 15 s), so there it is the bias the transient fit itself introduces.
"""

from __future__ import annotations

import argparse
import math
import time

import numpy as np

from analysis.pump import record as R
from analysis.pump import simulate

TRUTH_PPM = 0.8
SHAPES = {
    "switch-on": {"transient_on": ((45e-15, 3.0), (15e-15, 8.0))},
    "overshoot": {"transient_on": ((45e-15, 3.0), (15e-15, 8.0)),
                  "transient_off": ((-45e-15, 3.0), (-15e-15, 8.0))},
    "lagging": {"lag_fraction": 1e-3, "lag_tau_s": 2.5},
    "none": {},
}


def _settings(shape: str, segment_s: int, hours: float) -> simulate.RecordSettings:
    cycles = max(3, int(round(hours * 3600 / (2 * segment_s))))
    return simulate.RecordSettings(
        deviation_ppm=TRUTH_PPM, cycles=cycles, readings_per_segment=segment_s,
        reading_interval_s=1.0, noise_a=5e-15, ar1=0.5, random_walk_a=1e-17,
        drift_a_per_s=3e-17, settling_tau_s=1.0, **SHAPES[shape])


def _one(t, i, on, seed, measured: bool):
    try:
        if measured:
            res = R.analyse_record(t, i, on, 1.0e9, 1, seed=seed, monte_carlo_draws=20_000)
        else:
            res = R.analyse_record(t, i, on, 1.0e9, 1, seed=seed, monte_carlo_draws=20_000,
                                   settling=R.SettlingRule(fraction=0.25), measure_transient=False)
    except R.RecordError:
        return None
    b = res.precision.budget
    return (b.estimate, b.combined_standard_uncertainty, b.expanded_uncertainty,
            bool(res.warnings()), res.cycles.settling.seconds or 0.0)


def _summary(rows: list) -> str:
    done = [r for r in rows if r is not None]
    refused = len(rows) - len(done)
    if not done:
        return f"{'—':>15} {'—':>9} {refused:>4} {'—':>5}"
    z = np.array([(d - TRUTH_PPM) / u for d, u, *_ in done])
    cover = np.mean([abs(d - TRUTH_PPM) <= big for d, _, big, *_ in done])
    silent = sum(abs(d - TRUTH_PPM) > 2 * big and not warned for d, _, big, warned, _ in done)
    se = np.std(z, ddof=1) / math.sqrt(z.size) if z.size > 1 else math.nan
    return f"{np.mean(z):+6.2f} ± {se:4.2f} u {cover:8.1%} {refused:>4} {silent:>5}"


def _paired(new: list, old: list) -> str:
    """Mean of (D_measured − D_fixed)/u over the records both analyses certified."""
    d = np.array([(a[0] - b[0]) / a[1] for a, b in zip(new, old, strict=True)
                  if a is not None and b is not None])
    if d.size < 2:
        return f"{'—':>13}"
    return f"{d.mean():+5.2f} ± {d.std(ddof=1) / math.sqrt(d.size):4.2f} u"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--records", type=int, default=200, help="records per shape and segment")
    parser.add_argument("--hours", type=float, default=2.0, help="length of each record")
    parser.add_argument("--shapes", nargs="*", default=list(SHAPES))
    parser.add_argument("--segments", nargs="*", type=int, default=[60, 100])
    args = parser.parse_args()
    print(f"{args.records} records of {args.hours:g} h per row, truth +{TRUTH_PPM} ppm")
    print(f"{'shape':<10} {'seg':>4} | {'measured: mean bias':>19} {'cover':>6} {'ref':>4} "
          f"{'>2U!':>5} {'u ppm':>6} {'drop s':>6} | {'fixed 25 %: bias':>16} {'cover':>6} "
          f"{'ref':>4} {'>2U!':>5} | {'paired':>13}")
    t_start = time.perf_counter()
    for shape in args.shapes:
        for seg in args.segments:
            settings = _settings(shape, seg, args.hours)
            new, old = [], []
            for k in range(args.records):
                t, i, on = simulate.on_off_record(settings, seed=10_000 * seg + k)
                new.append(_one(t, i, on, k, True))
                old.append(_one(t, i, on, k, False))
            done = [r for r in new if r is not None]
            u = np.mean([r[1] for r in done]) if done else math.nan
            drop = np.median([r[4] for r in done]) if done else math.nan
            print(f"{shape:<10} {seg:>4} | {_summary(new)} {u:6.2f} {drop:6.0f} | {_summary(old)} | "
                  f"{_paired(new, old)}", flush=True)
    print(f"campaign time {time.perf_counter() - t_start:.0f} s")


if __name__ == "__main__":
    main()
