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
``ground_capacitance_ratio`` is passed to it); the series serves where its own error is below
:data:`SERIES_ERROR_TARGET` and no C₀ is stated, and where no full model exists for the chain,
up to its own max_u, with its measured error as a budget row.

A stated stray capacitance (0 < C₀/C ≤ 0.2) on a chain longer than the exact tables (N > 4) is
fitted with the C₀ = 0 full model of that N, u rescaled by the first-order depth factor r_N
(:class:`StrayCapacitanceFallback`), and what C₀ does to the line shape beyond that rescaling is
a budget row of its own (:data:`STRAY_FALLBACK_ERROR_PER_U`, measured by
benchmarks/bench_stray_fallback.py). Above C₀/C = 0.2 no table and no measurement bounds the
error, and the sweep is refused (:class:`StrayCapacitanceRangeError`).
"""

from __future__ import annotations

import functools
from dataclasses import dataclass, field

import numpy as np

from analysis.cbt.fit import (
    FitSettings,
    ModelEdgeError,
    SweepData,
    SweepFit,
    fit_sweep,
    initial_guess,
    least_squares_fit,
)
from analysis.cbt.full_model import (
    MAX_C0_RATIO,
    STRAY_LENGTHS,
    FullModelRangeError,
    FullTunnellingShape,
    first_order_depth_factor,
    shared_shape,
)
from analysis.cbt.models import DipShape, higher_order_shape
from analysis.sampling import ProgressCallback

#: Below this relative temperature error the weak-blockade series is accurate enough.
SERIES_ERROR_TARGET = 1e-4


#: Largest effective u (r_N u) at which a C₀ = 0 model stands in for a stated C₀ (the range of
#: the measurement below, and the long-array model's own limit).
STRAY_FALLBACK_MAX_U = 2.0

#: Bound on |T_fit/T − 1| per unit of nominal u at C₀/C = MAX_C0_RATIO when the C₀ = 0 full model
#: (u rescaled by r_N) is fitted to a dip with C₀. Measured by noiseless least-squares fits to exact
#: curves at C₀/C = 0.2 (benchmarks/bench_stray_fallback.py): T reads *low*, by nearly the same
#: amount per unit u at u = 0.1–2.3, more for narrower sweeps: N = 3 from 0.93e-4 u (±8 V_1/2) to
#: 2.1e-4 u (±1.5 V_1/2), N = 4 from 1.6e-4 u to 3.7e-4 u (3.1e-4 u on the exact solver's
#: centre-dense bias nodes at u = 1). It grows with N: the part of the exact dip beyond the
#: rescaling near the half-depth bias (analysis.cbt.tunnelling; it tracks the T shift, ratio N4/N3
#: 1.70 against 1.68) is 0.93, 1.58, 2.06, 2.40e-5 at u = 1, x = 2.7 and 2.79, 4.92, 6.70,
#: 8.11e-5 at u = 2, x = 3.1 for N = 3, 4, 5, 6; continuing its shrinking steps geometrically
#: (ratios 0.71–0.8) ends at 2.1 (u = 1) to 2.8 (u = 2) times N = 4 for N → ∞, i.e. about
#: 1.0e-3 u for the narrowest sweeps. The bound, 1.5e-3 u, is 1.4 times that (an assumption: no
#: exact chain beyond N = 6 with C₀ is solved). Scaled linearly in C₀/C, which over-covers below
#: 0.2: the measured shift grows about as (C₀/C)^1.7 (1.7e-5, 5.9e-5, 1.8e-4 at N = 4, u = 1,
#: ±5 V_1/2 for C₀/C = 0.05, 0.1, 0.2).
STRAY_FALLBACK_ERROR_PER_U = 1.5e-3


class StrayCapacitanceRangeError(ModelEdgeError):
    """A stated C₀/C beyond anything the models take or their measured error bounds."""

    def __init__(self, c0_ratio: float, n_junctions: int):
        super().__init__(
            f"ground_capacitance_ratio = {c0_ratio:g} (C_0/C) for N = {n_junctions}: beyond the "
            f"validated range C_0/C <= {MAX_C0_RATIO:g} (exact stray-capacitance tables for "
            f"N = {STRAY_LENGTHS[0]}-{STRAY_LENGTHS[-1]}; longer chains the C_0 = 0 model with a "
            f"measured budget row, r_N u <= {STRAY_FALLBACK_MAX_U:g}); its effect on the dip is not "
            "bounded there, so no temperature is certified (docs/models.md)",
            "ground_capacitance_ratio", float("nan"))


@dataclass(frozen=True)
class StrayCapacitanceFallback:
    """A C₀ = 0 dip model standing in for a chain with stated stray capacitance C₀ (N > 4).

    G/G_T(x, u) = base(x, r_N u): to first order in u the stray capacitance only scales the dip
    by r_N, the junction average of the charging bracket over its C₀ = 0 value
    (:func:`analysis.cbt.full_model.first_order_depth_factor`; docs/physics.md §1.3–1.4), so
    u keeps its nominal meaning ΔE/(k_B T), ΔE = ((N − 1)/N) e²/C, as in the tables for N ≤ 4.
    The rescaling does not move T (u is free in the fit); the line-shape change beyond it does,
    and :meth:`stray_capacitance_error` bounds that (:data:`STRAY_FALLBACK_ERROR_PER_U`).
    """

    base: DipShape
    n_junctions: int
    c0_ratio: float
    depth_factor: float = field(init=False)
    name: str = field(init=False)
    max_u: float = field(init=False)
    min_u: float = field(init=False, default=0.0)

    def __post_init__(self) -> None:
        r = first_order_depth_factor(int(self.n_junctions), float(self.c0_ratio))
        object.__setattr__(self, "depth_factor", r)
        object.__setattr__(self, "max_u", min(float(self.base.max_u), STRAY_FALLBACK_MAX_U) / r)
        object.__setattr__(self, "name", (
            f"{self.base.name} with u scaled by r = {r:.4f} for C_0/C = {self.c0_ratio:g} "
            "(no C_0 table for this chain)"))

    def __call__(self, x: np.ndarray, u: np.ndarray) -> np.ndarray:
        return self.base(x, self.depth_factor * np.asarray(u, dtype=float))

    def relative_width_error(self, u: float) -> float:
        """The C₀ = 0 model's own width error at the effective u = r_N u."""
        return self.base.relative_width_error(self.depth_factor * float(u))

    def stray_capacitance_error(self, u: float) -> float:
        """Bound on |T_fit/T − 1| from the line shape C₀ adds beyond the rescaling (measured)."""
        return STRAY_FALLBACK_ERROR_PER_U * (float(self.c0_ratio) / MAX_C0_RATIO) * abs(float(u))


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
    """The model a sweep at this u needs (module docstring), with the reason in words.

    Raises :class:`StrayCapacitanceRangeError` for a stated C₀/C above :data:`MAX_C0_RATIO`.
    """
    c0 = float(c0_ratio)
    if c0 > MAX_C0_RATIO or not c0 >= 0.0:
        raise StrayCapacitanceRangeError(c0, int(n_junctions))
    series_error = higher_order_shape.relative_width_error(u)
    if c0 > 0.0:
        # The series has no C_0 at any u: a stated one always goes to a full model.
        full = full_model_for(n_junctions, c0)
        if full is not None:
            return ModelChoice(full, (
                f"u = {u:.3f}, C_0/C = {c0:g}: full tunnelling model with the exact stray-capacitance "
                f"tables (its error {full.relative_width_error(min(u, full.max_u)):.1e})"))
        fallback = StrayCapacitanceFallback(full_model_for(n_junctions, 0.0), int(n_junctions), c0)
        return ModelChoice(fallback, (
            f"u = {u:.3f}, C_0/C = {c0:g}: no stray-capacitance table for N = {n_junctions} "
            f"(N = {STRAY_LENGTHS[0]}-{STRAY_LENGTHS[-1]} only); the C_0 = 0 full model with u scaled by "
            f"r = {fallback.depth_factor:.4f}, the line shape C_0 adds beyond that in the budget "
            f"({fallback.stray_capacitance_error(u):.1e} relative here)"))
    if series_error <= SERIES_ERROR_TARGET:
        return ModelChoice(higher_order_shape, (
            f"u = {u:.4f}: weak-blockade series error {series_error:.1e} ≤ {SERIES_ERROR_TARGET:g}"))
    full = full_model_for(n_junctions, c0)
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
