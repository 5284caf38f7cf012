"""Simulated CBT sweeps, for demos, tests of recovery and benchmarks (never as a check's reference)."""

from __future__ import annotations

import functools

import numpy as np
from scipy import interpolate

from analysis.cbt.models import (
    NON_UNIFORMITY_WIDTH_COEFFICIENT,
    DipShape,
    SweepSetup,
    forward_conductance,
    half_width_voltage,
    higher_order_shape,
)
from analysis.constants import BOLTZMANN, ELEMENTARY_CHARGE


def simulate_sweep(
    junctions_in_series: int,
    temperature: float,
    charging_energy: float,
    asymptotic_conductance: float,
    seed: int,
    *,
    points: int = 401,
    range_half_widths: float = 5.0,
    relative_noise: float = 2e-4,
    excitation_rms_V: float = 0.0,
    bias_offset: float = 0.0,
    background_slope: float = 0.0,
    resistance_spread: float = 0.0,
    shape: DipShape | None = None,
) -> tuple[np.ndarray, np.ndarray, SweepSetup]:
    """A sweep with white Gaussian noise of ``relative_noise`` × G_T on every point.

    ``resistance_spread`` σ_R narrows the dip by the first-order factor (1 − 0.7343 σ_R²)
    (docs/physics.md 1.4, derived) while leaving its depth unchanged, as non-uniform junctions do.

    ``shape`` defaults to the full tunnelling model (analysis.cbt.full_model) inside its validated
    range, else the weak-blockade series. The bias grid spans ±``range_half_widths`` V_1/2 about the offset. Returns bias (V),
    conductance (S) and the setup used.
    """
    rng = np.random.default_rng(seed)
    if shape is None:  # the physically right line shape: the full tunnelling model where validated
        from analysis.cbt.choice import full_model_for  # noqa: PLC0415 (choice imports the fit)

        full = full_model_for(junctions_in_series)
        u = charging_energy / temperature
        shape = full if full is not None and full.min_u <= u <= full.max_u else higher_order_shape
    setup = SweepSetup(junctions_in_series, excitation_rms_V)
    vh = half_width_voltage(temperature, junctions_in_series, shape, charging_energy)
    bias = bias_offset + np.linspace(-range_half_widths * vh, range_half_widths * vh, points)
    narrowing = 1.0 - NON_UNIFORMITY_WIDTH_COEFFICIENT * resistance_spread**2
    g = forward_conductance(
        shape, bias_offset + (bias - bias_offset) / narrowing, setup, temperature, charging_energy,
        asymptotic_conductance, bias_offset, background_slope,
    )
    g = g + relative_noise * asymptotic_conductance * rng.standard_normal(points)
    return bias, g, setup


@functools.lru_cache(maxsize=32)
def exact_dip_curve(junctions_in_series: int, u: float) -> interpolate.CubicSpline:
    """G/G_T(x) of a uniform short array from the exact orthodox master equation, as a spline in |x|.

    Solved point by point by analysis.cbt.tunnelling (docs/physics.md 1.3; Melsen et al., PRB 55, 10638
    (1997)) on 0 ≤ x ≤ 40 (0.1 steps to x = 12, 0.5 beyond), then interpolated by a cubic spline;
    beyond x = 40, G/G_T = 1 (the dip is below 2e-7 there). It never touches the fitted models'
    tables, so data made from it test a fit against an independent line shape. Costs seconds to
    tens of seconds per (N, u) on first use, N ≤ 4.
    """
    from analysis.cbt.tunnelling import ArrayDescription, conductance  # noqa: PLC0415 (heavy, optional)

    x = np.concatenate([np.arange(0.0, 12.0, 0.1), np.arange(12.0, 40.0 + 1e-9, 0.5)])
    g = conductance(x, float(u), ArrayDescription(int(junctions_in_series)))
    return interpolate.CubicSpline(x, g, bc_type=((1, 0.0), (1, 0.0)))


def exact_sweep(
    junctions_in_series: int,
    temperature: float,
    u: float,
    asymptotic_conductance: float,
    *,
    points: int = 401,
    range_half_widths: float = 5.0,
    bias_offset: float = 0.0,
) -> tuple[np.ndarray, np.ndarray, SweepSetup]:
    """A noiseless sweep of a short uniform array from the exact master equation (:func:`exact_dip_curve`).

    The bias grid spans ±``range_half_widths`` × the first-order V_1/2 about the offset; DC (no
    lock-in excitation). Add noise and other quirks to the returned conductance.
    """
    curve = exact_dip_curve(int(junctions_in_series), float(u))
    vh = half_width_voltage(temperature, junctions_in_series)
    bias = bias_offset + np.linspace(-range_half_widths * vh, range_half_widths * vh, points)
    x = np.abs(ELEMENTARY_CHARGE * (bias - bias_offset) / (junctions_in_series * BOLTZMANN * temperature))
    g = np.where(x <= 40.0, curve(np.minimum(x, 40.0)), 1.0)
    return bias, asymptotic_conductance * g, SweepSetup(junctions_in_series)
