"""Simulated pump data for demonstrations, benchmarks and recovery checks (never test references).

Plateau scans follow the plateau models of :mod:`analysis.pump.plateau` with Gaussian current
noise and an offset. On/off records add to the pump current an ammeter offset that drifts
(linearly plus a slow random walk), white reading noise with optional AR(1) colouring, and a
first-order settling transient after every switch. Every draw comes from
``numpy.random.default_rng(seed)``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from analysis.pump.plateau import MODEL
from analysis.pump.quantized import nominal_current


def plateau_scan(
    gate_v: np.ndarray, frequency_hz: float, model: str, params: np.ndarray, seed: int,
    noise_a: float = 0.2e-12, offset_a: float = 0.0, baseline: int = 0,
) -> np.ndarray:
    """Current I = e f ⟨n⟩(V) + offset + N(0, noise²) at the given gate voltages (A)."""
    rng = np.random.default_rng(seed)
    gate_v = np.asarray(gate_v, dtype=float)
    ef = nominal_current(frequency_hz, 1)
    mean = MODEL[model].mean(gate_v, np.asarray(params, dtype=float), baseline)
    return ef * mean + offset_a + noise_a * rng.standard_normal(gate_v.shape)


def plateau_map(
    gate_v: np.ndarray, gate2_v: np.ndarray, frequency_hz: float, seed: int,
    slope_per_v: float = 60.0, first_step_v: float = -0.70, delta2_peak: float = 21.0,
    delta2_curvature: float = 400.0, gate2_optimum_v: float = -0.25, shift_per_v: float = 0.3,
    delta3: float = 7.0, noise_a: float = 0.2e-12,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """A 2-D decay-cascade map in long format (gate, gate2, current).

    An invented device: the second gate shifts the steps by ``shift_per_v`` V/V and sets the
    figure of merit δ₂ = delta2_peak − delta2_curvature (V₂ − optimum)², so the flattest plateau 1
    lies at ``gate2_optimum_v``.
    """
    rng = np.random.default_rng(seed)
    g1, g2 = np.meshgrid(np.asarray(gate_v, float), np.asarray(gate2_v, float))
    g1, g2 = g1.ravel(), g2.ravel()
    a = slope_per_v
    c1 = first_step_v + shift_per_v * g2
    d2 = delta2_peak - delta2_curvature * (g2 - gate2_optimum_v) ** 2
    c2 = c1 + d2 / a
    c3 = c2 + delta3 / a
    params = np.stack([np.full_like(g1, a), c1, c2, c3], axis=1)
    # One parameter vector per point: evaluate the model row by row in one batch.
    mean = MODEL["decay_cascade"].mean(g1[:, None], params)[:, 0]
    ef = nominal_current(frequency_hz, 1)
    return g1, g2, ef * mean + noise_a * rng.standard_normal(g1.shape)


@dataclass(frozen=True)
class RecordSettings:
    """Knobs of a simulated on/off record (defaults: an invented 1 GHz pump, ~1 s readings)."""

    frequency_hz: float = 1.0e9
    electrons_per_cycle: int = 1
    deviation_ppm: float = 0.0  # true (I − n e f)/(n e f)
    cycles: int = 60
    readings_per_segment: int = 60
    reading_interval_s: float = 1.0
    noise_a: float = 20e-15  # white noise of one reading
    ar1: float = 0.0  # AR(1) coefficient of the reading noise
    offset_a: float = 2e-12
    drift_a_per_s: float = 3e-17  # linear offset drift
    random_walk_a: float = 0.0  # per-reading step of a random-walk offset
    settling_tau_s: float = 1.0  # ammeter settling time constant after each switch
    gain_error_ppm: float = 0.0  # chain gain above nominal: indicated = true × (1 + g)
    # Extra transients, not of the single-exponential form the analysis fits:
    transient_on: tuple[tuple[float, float], ...] = ()  # (amplitude A, τ s) terms after switch-on
    transient_off: tuple[tuple[float, float], ...] = ()  # the same after switch-off
    lag_fraction: float = 0.0  # part of each step that lags behind ...
    lag_tau_s: float = 2.5  # ... a critically damped second-order response with these poles


def on_off_record(settings: RecordSettings, seed: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(time_s, indicated current_A, pump_on) starting and ending with an off segment.

    Pattern: off, on, off, on, …, off with ``cycles`` on segments. After each switch the reading
    relaxes to the new level as 1 − exp(−t/τ) (a first-order ammeter filter). On top of that,
    optional transients of other shapes: sums of exponentials Σ A_i exp(−t/τ_i) after switch-on
    and after switch-off, and a fraction c of each step Δ that follows a critically damped
    second-order response, −c Δ (1 + t/τ_l) exp(−t/τ_l) (step response of two equal poles, any
    control-theory text).
    """
    s = settings
    rng = np.random.default_rng(seed)
    nseg = 2 * s.cycles + 1
    per = s.readings_per_segment
    n = nseg * per
    t = np.arange(n) * s.reading_interval_s
    state = np.tile(np.repeat(np.array([0, 1], dtype=np.int8), per), s.cycles + 1)[:n]
    i_pump = nominal_current(s.frequency_hz, s.electrons_per_cycle) * (1 + 1e-6 * s.deviation_ppm)
    ideal = i_pump * state
    # First-order settling: level approaches the new state exponentially from the old one.
    since = (np.arange(n) % per) * s.reading_interval_s
    levels = ideal[::per]
    seg_prev = np.repeat(np.concatenate(([0.0], levels[:-1])), per)
    settled = ideal + (seg_prev - ideal) * np.exp(-since / s.settling_tau_s)
    switched = np.arange(n) >= per  # the start of the record is not a switch
    after_on = switched & (state == 1)
    after_off = switched & (state == 0)
    for amp, tau in s.transient_on:
        settled = settled + np.where(after_on, amp * np.exp(-since / tau), 0.0)
    for amp, tau in s.transient_off:
        settled = settled + np.where(after_off, amp * np.exp(-since / tau), 0.0)
    if s.lag_fraction:
        step = np.where(switched, ideal - seg_prev, 0.0)
        x = since / s.lag_tau_s
        settled = settled - s.lag_fraction * step * (1 + x) * np.exp(-x)
    white = s.noise_a * rng.standard_normal(n)
    if s.ar1:
        # AR(1) noise with the same marginal standard deviation as the white noise.
        from scipy.signal import lfilter

        white = lfilter([np.sqrt(1 - s.ar1**2)], [1.0, -s.ar1], white)
    walk = np.cumsum(s.random_walk_a * rng.standard_normal(n)) if s.random_walk_a else 0.0
    offset = s.offset_a + s.drift_a_per_s * t + walk
    indicated = (settled + offset) * (1 + 1e-6 * s.gain_error_ppm) + white
    return t, indicated, state
