"""Which dip model a sweep needs, and a fit that chooses it.

The weak-blockade formulas are expansions in u = ΔE/(k_B T). Their published depth and width
(Farhangfar et al., J. Low Temp. Phys. 108, 191 (1997)) are accurate to O(u²), but a fit uses the
whole line shape, and the shape away from the half-depth points carries O(u²) terms in G/G_T that
the series shapes do not have. Measured against the full tunnelling model (exact master-equation
tables, analysis.cbt.full_model), least-squares fits over ±5 V_1/2 read T high by
  first order (Pekola et al. 1994): ≈ 0.105 u   (+1.0e-3 at u = 0.01, +2.1 % at 0.2, +5.0 % at 0.48),
  higher order (this package):     ≈ 0.042 u   (+3.9e-4 at u = 0.01, +0.80 % at 0.2, +2.0 % at 0.48),
for N = 3 and N = 33 alike (benchmarks/bench_cbt_models.py; docs/physics.md §1.2 quotes +1.8 % and
+4.5 % for the first-order formula on exact N = 2 data at u = 0.2 and 0.5). So the full model is
the default wherever it is validated (C₀ > 0 included for N ≤ 4, C₀/C ≤ 0.2: the sweep's
``ground_capacitance_ratio`` is passed to it); the series serves only where it is not (C₀ > 0 on
longer chains or above 0.2 C, u beyond the full model's max_u) up to its own max_u, with its
measured error as a budget row.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

from analysis.cbt.fit import (
    FitSettings,
    ModelEdgeError,
    SweepData,
    SweepFit,
    fit_sweep,
    initial_guess,
    least_squares_fit,
)
from analysis.cbt.full_model import FullModelRangeError, FullTunnellingShape, shared_shape
from analysis.cbt.models import DipShape, higher_order_shape
from analysis.sampling import ProgressCallback

#: Below this relative temperature error the weak-blockade series is accurate enough.
SERIES_ERROR_TARGET = 1e-4


@dataclass(frozen=True)
class ModelChoice:
    shape: DipShape
    reason: str


@functools.lru_cache(maxsize=64)
def full_model_for(n_junctions: int, c0_ratio: float = 0.0) -> FullTunnellingShape | None:
    """The full tunnelling model for this array, or None where no validated table exists (cached)."""
    try:
        return shared_shape(int(n_junctions), float(c0_ratio))
    except FullModelRangeError:
        return None


def choose_shape(u: float, n_junctions: int, c0_ratio: float = 0.0) -> ModelChoice:
    """The model a sweep at this u needs (module docstring), with the reason in words."""
    series_error = higher_order_shape.relative_width_error(u)
    if series_error <= SERIES_ERROR_TARGET:
        return ModelChoice(higher_order_shape, (
            f"u = {u:.4f}: weak-blockade series error {series_error:.1e} ≤ {SERIES_ERROR_TARGET:g}"))
    full = full_model_for(n_junctions, c0_ratio)
    if full is not None and full.min_u <= u <= full.max_u:
        return ModelChoice(full, (
            f"u = {u:.3f}: the weak-blockade series would read T high by up to {series_error:.1e}; "
            f"full tunnelling model used (its error {full.relative_width_error(u):.1e})"))
    why = "no full-model table for this array" if full is None else f"u beyond the full model's range ({full.max_u:g})"
    return ModelChoice(higher_order_shape, (
        f"u = {u:.3f}: {why}; weak-blockade series kept, its error bound {series_error:.1e} in the budget"))


def fit_sweep_chosen(
    data: SweepData, seed: int, c0_ratio: float = 0.0, settings: FitSettings | None = None,
    progress: ProgressCallback | None = None,
) -> tuple[SweepFit, ModelChoice]:
    """Estimate u by least squares with the series, choose the model, then sample its posterior."""
    start = initial_guess(data)
    u0 = float(least_squares_fit(higher_order_shape, data, start)["theta"][1])
    choice = choose_shape(max(u0, 0.0), data.setup.junctions_in_series, c0_ratio)
    try:
        fit = fit_sweep(data, seed=seed, shape=choice.shape, settings=settings, progress=progress)
    except ModelEdgeError as exc:
        # At the edge of the first model's range: another model may hold the sweep inside its own.
        refined = choose_shape(max(exc.u_estimate, 0.0), data.setup.junctions_in_series, c0_ratio)
        if refined.shape == choice.shape:
            raise
        choice = refined
        fit = fit_sweep(data, seed=seed, shape=choice.shape, settings=settings, progress=progress)
    refined = choose_shape(fit.u, data.setup.junctions_in_series, c0_ratio)
    if refined.shape != choice.shape:  # the start was on the wrong side of a boundary
        choice = refined
        fit = fit_sweep(data, seed=seed, shape=choice.shape, settings=settings, progress=progress)
    return fit, choice
