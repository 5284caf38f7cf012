"""Fast full-tunnelling dip shape for long CBT arrays (N = 10–100), usable inside an MCMC.

The exact orthodox master equation (analysis.cbt.tunnelling, PHYSICS.md 1.3) is exact at any u
but only affordable for chains of up to four or five junctions, while sensors have 10–100.
This module bridges the gap in two steps, both precomputed by the committed script
``analysis/cbt/tables/make_tables.py``:

1. **Tables.** For N = 2, 3, 4 the exact reduced dip D_N(x, u) = (1 − G/G_T)/u is tabulated on a
   grid of x = eV/(N k_B T) ∈ [0, 40] and u = ΔE/(k_B T) ∈ [0, 3.2] (u = 0 is the first-order
   limit g(x) of Pekola et al., PRL 73, 2903 (1994)), and interpolated by a bivariate quintic
   spline. Beyond |x| = 40 (where 1 − G/G_T < 2e-7) the tail is continued exponentially.
2. **Extrapolation in 1/N.** In the uniform chain the dip depends on N only at order u³ in
   G/G_T (the depth series and the width factor of Farhangfar et al. 1997 are N-independent);
   the remainder falls off roughly as 1/N² (PHYSICS.md 1.3 table). For N > 4 we continue the
   exact N = 3 and N = 4 tables in 1/N² (see :func:`extrapolation_weights`).

Its error (max |ΔG/G_T| over the dip, per u band) was *measured* against exact master-equation
solutions at N = 5 (off the table, so the extrapolation is tested out of sample) and at off-grid
points of the tables; the figures are in :data:`MEASURED_ERROR` and the test suite checks them.
For N > 5 the extrapolated part of the error is scaled by the extrapolation length in 1/N²
(an assumption, stated); an orthodox Monte Carlo of a long chain (analysis.cbt.orthodox_mc)
checks the result at its own, coarser, statistical resolution (~1e-4 in the current).
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, field
from functools import lru_cache
from importlib import resources

import numpy as np
from scipy.interpolate import RectBivariateSpline

from analysis.cbt.dip_grid import GridDip

logger = logging.getLogger(__name__)

TABLE_FILE = "short_arrays.npz"

#: Largest u at which the model is validated for certificates (the tables reach 3.2 so that the
#: spline has no edge effect at 3.0).
MAX_U = 3.0

#: Beyond this |x| the tables end; there 1 − G/G_T < 2e-7 for u <= 3 and it is continued as
#: D(40, u) exp(−TAIL_DECAY (|x| − 40)), TAIL_DECAY the slowest decay rate of the tabulated tail
#: between x = 35 and 40 (0.41 at u = 3.2; faster at smaller u).
X_TABLE_END = 40.0
TAIL_DECAY = 0.4

#: Measured max |ΔG/G_T| of the model per u band (upper band edges in ``u_band_upper``):
#: ``interpolation_short`` for the exact N = 2, 3 tables (off-grid points against the exact
#: solver), ``interpolation_n4`` for the N = 4 table (off-grid and where it is a continuation),
#: ``extrapolation_n5`` the residual of the 1/N² continuation against exact N = 5 solutions.
#: From make_tables.py --validate and benchmarks/bench_full_model.py, rounded up by ~1.5x
#: (measured maxima: N = 5 residual 2.6e-8 at u = 0.5 (x = 0 only; the u³ scaling of the u = 1
#: value gives 3e-7), 2.4e-6 at u = 1, 6.4e-6 at 1.5, 1.4e-5 at 2, 6.5e-5 at 2.5, 2.0e-4 at 3;
#: N = 4 table 2.9e-7 below u = 0.5 (continuation), 7e-8 to u = 2, 1.0e-6 at u = 3, x = 25;
#: N = 2, 3 tables 1.1e-9). Checked by tests/test_full_model.py.
MEASURED_ERROR: dict[str, tuple[float, ...]] = {
    "u_band_upper": (0.5, 1.0, 1.5, 2.0, 2.5, 3.0),
    "interpolation_short": (1e-8, 1e-8, 1e-8, 1e-8, 1e-8, 1e-8),
    "interpolation_n4": (5e-7, 5e-7, 5e-7, 5e-7, 2e-6, 2e-6),
    "extrapolation_n5": (5e-7, 3.5e-6, 1e-5, 2e-5, 1e-4, 3e-4),
}

#: Safety factor on the extrapolation residual when it is scaled to longer chains: the scaling
#: with the extrapolation length assumes the residual grows linearly in 1/N², which the
#: N = 2…5 sequence supports only roughly.
EXTRAPOLATION_SAFETY = 2.0

#: Above this u the exact dip converges in N faster than 1/N² (N = 2…5 depths at u = 3 differ by
#: 5.4e-3, 5.3e-4, 4.6e-5), so the continuation may overshoot: there the bound also covers the
#: whole correction applied beyond N = 4.
NON_ALGEBRAIC_U = 2.0


class FullModelRangeError(ValueError):
    """A full-model evaluation was asked outside the range where its error has been measured."""


@lru_cache(maxsize=1)
def _load_tables() -> dict[str, np.ndarray]:
    ref = resources.files("analysis.cbt.tables").joinpath(TABLE_FILE)
    with resources.as_file(ref) as path, np.load(path) as data:
        return {key: np.array(data[key]) for key in data.files}


def extrapolation_weights(n_junctions: int) -> tuple[float, float, float]:
    """Weights (w_2, w_3, w_4) of the exact tables D_2, D_3, D_4 that give the N-junction dip.

    N ≤ 4: the exact table itself. N > 4: D_N = D_4 + (D_4 − D_3)(1/16 − 1/N²)/(1/9 − 1/16), the
    continuation in 1/N² through the two longest exact chains (PHYSICS.md 1.3: the N-dependence
    of the exact depth and width at u = 1 falls off close to 1/N²).
    """
    if n_junctions in (2, 3, 4):
        return tuple(1.0 if n == n_junctions else 0.0 for n in (2, 3, 4))  # type: ignore[return-value]
    f = (1.0 / 16.0 - 1.0 / n_junctions**2) / (1.0 / 9.0 - 1.0 / 16.0)
    return (0.0, -f, 1.0 + f)


def extrapolation_length(n_junctions: int) -> float:
    """How far (in units of the N = 4 → 5 step in 1/N²) the tables are continued; 0 for N ≤ 4."""
    if n_junctions <= 4:
        return 0.0
    return (1.0 / 16.0 - 1.0 / n_junctions**2) / (1.0 / 16.0 - 1.0 / 25.0)


@dataclass(frozen=True)
class FullTunnellingShape:
    """Full orthodox-tunnelling dip shape G/G_T(x, u) of a uniform chain of N junctions.

    A dip shape in the sense of analysis.cbt.models: ``shape(x, u)`` with x = eV/(N k_B T) and
    u = ΔE/(k_B T), ΔE = ((N − 1)/N) e²/C, broadcasting x against u; vectorised (measured
    3.3–3.8e6 points per second on a shared 2-core machine, benchmarks/bench_full_model.py).
    Source: the orthodox master equation of PHYSICS.md 1.3 (Melsen et al., PRB 55, 10638 (1997)
    for arrays), solved exactly for N = 2, 3, 4 and continued in 1/N² (module docstring).

    Validated for 0 ≤ u ≤ 3 (refused outside with :class:`FullModelRangeError`). ``c0_ratio``
    (C_0/C) other than 0 is refused: no tables with stray capacitance are shipped (the exact
    solver :mod:`analysis.cbt.tunnelling` handles C_0 for short chains).
    """

    n_junctions: int
    c0_ratio: float = 0.0
    name: str = field(init=False)
    max_u: float = field(init=False, default=MAX_U)
    min_u: float = field(init=False, default=0.0)
    _spline: RectBivariateSpline = field(init=False, repr=False, compare=False)
    _correction_beyond_four: tuple[float, ...] = field(init=False, repr=False, compare=False)
    _grid: GridDip = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        if not isinstance(self.n_junctions, int | np.integer) or self.n_junctions < 2:
            raise FullModelRangeError(
                f"n_junctions must be an integer >= 2; got {self.n_junctions!r}"
            )
        if self.c0_ratio != 0.0:
            raise FullModelRangeError(
                f"c0_ratio = {self.c0_ratio!r}: the full-model tables are for C_0 = 0 only; fit an "
                "effective ΔE (PHYSICS.md 1.4) or solve short chains with "
                "analysis.cbt.tunnelling.ArrayDescription(c0_ratio=...)"
            )
        tables = _load_tables()
        w2, w3, w4 = extrapolation_weights(int(self.n_junctions))
        dip = w2 * tables["dip_2"] + w3 * tables["dip_3"] + w4 * tables["dip_4"]
        spline = RectBivariateSpline(tables["x_nodes"], tables["u_nodes"], dip, kx=5, ky=5, s=0)
        object.__setattr__(self, "_spline", spline)
        # max over x of u |D_N − D_4| per u band: the size of the 1/N² correction itself.
        u_nodes = tables["u_nodes"]
        correction = np.abs(u_nodes * (dip - tables["dip_4"]))
        lower = 0.0
        per_band = []
        for upper in MEASURED_ERROR["u_band_upper"]:
            sel = (u_nodes > lower - 1e-9) & (u_nodes <= upper + 1e-9)
            per_band.append(float(correction[:, sel].max()))
            lower = upper
        object.__setattr__(self, "_correction_beyond_four", tuple(per_band))
        object.__setattr__(
            self, "name", f"full orthodox tunnelling, N = {self.n_junctions} (master equation)"
        )
        # Evaluation path: the reference above, sampled once into a cheap quintic grid over the
        # whole tabulated u range (analysis.cbt.dip_grid); its own error is measured there.
        u_nodes = tables["u_nodes"]
        object.__setattr__(self, "_grid", GridDip(
            self._reference_reduced, (float(u_nodes[0]), float(u_nodes[-1])), X_TABLE_END, TAIL_DECAY))

    def __call__(self, x: np.ndarray, u: np.ndarray) -> np.ndarray:
        u_arr = np.asarray(u, dtype=float)
        self._check_u(u_arr)
        return 1.0 - u_arr * self._grid.reduced(x, u_arr)

    def __reduce__(self):
        # Sent between processes (parallel sweep fits) by its two defining numbers, and rebuilt
        # from a per-process cache, instead of shipping the spline and the grid (~4 MB).
        return (shared_shape, (int(self.n_junctions), float(self.c0_ratio)))

    def _check_u(self, u_arr: np.ndarray) -> None:
        if not u_arr.size:
            return
        lo, hi = u_arr.min(), u_arr.max()  # NaN propagates into both and fails the test below
        if not (lo >= self.min_u and hi <= self.max_u):
            bad = u_arr[(u_arr < self.min_u) | (u_arr > self.max_u) | np.isnan(u_arr)].ravel()[0]
            raise FullModelRangeError(
                f"u = ΔE/k_BT = {bad!r} is outside the full model's validated range "
                f"[{self.min_u}, {self.max_u}]; the sweep is too cold for this model (or the "
                "parameter is unphysical)"
            )

    # ----------------------------------------------------------------------------------------
    # Reference evaluation: the tables' spline and tail, evaluated point by point. Precise but
    # costly; it is sampled once into the cheap grid above (analysis.cbt.dip_grid) and kept for
    # checks and benchmarks.

    def reference(self, x: np.ndarray, u: np.ndarray) -> np.ndarray:
        """G/G_T from the table spline directly (the evaluation the fast grid is built from)."""
        u_arr = np.asarray(u, dtype=float)
        self._check_u(u_arr)
        xb, ub = np.broadcast_arrays(np.abs(np.asarray(x, dtype=float)), u_arr)
        return 1.0 - ub * self._reference_reduced(xb, ub)

    def _reference_reduced(self, x: np.ndarray, u: np.ndarray) -> np.ndarray:
        """Reduced dip D_N(x, u) = (1 − G/G_T)/u from the spline, for x ≥ 0 (any u of the tables)."""
        xb, ub = np.broadcast_arrays(np.asarray(x, dtype=float), np.asarray(u, dtype=float))
        xf = xb.ravel()
        uf = ub.ravel()
        inside = xf <= X_TABLE_END
        reduced = np.empty(xf.shape)
        reduced[inside] = self._spline.ev(xf[inside], uf[inside])
        if not inside.all():
            edge = self._spline.ev(np.full(int((~inside).sum()), X_TABLE_END), uf[~inside])
            reduced[~inside] = edge * np.exp(-TAIL_DECAY * (xf[~inside] - X_TABLE_END))
        return reduced.reshape(xb.shape)

    def model_error(self, u: float | np.ndarray) -> float:
        """Bound on max |ΔG/G_T| over the dip at this u (measured; see :data:`MEASURED_ERROR`).

        Interpolation error of the tables used, plus the N = 5 extrapolation residual of the
        u band scaled by :func:`extrapolation_length` and :data:`EXTRAPOLATION_SAFETY` (zero for
        the exact N = 2, 3, 4 tables); for u > :data:`NON_ALGEBRAIC_U` at least the size of the
        correction applied beyond N = 4; plus the measured difference of the fast evaluation grid
        from the table spline (~1e-15 today). Use it as a model-uncertainty row of the budget.
        """
        u_max = float(np.max(u))
        if not (self.min_u <= u_max <= self.max_u):
            raise FullModelRangeError(
                f"u = {u_max} is outside the validated range [{self.min_u}, {self.max_u}]"
            )
        bands = np.asarray(MEASURED_ERROR["u_band_upper"])
        i = int(np.searchsorted(bands, u_max - 1e-12))
        n = int(self.n_junctions)
        key = "interpolation_short" if n <= 3 else "interpolation_n4"
        interp = MEASURED_ERROR[key][i]
        extrap = EXTRAPOLATION_SAFETY * MEASURED_ERROR["extrapolation_n5"][i]
        extrap *= extrapolation_length(n)
        if n > 4 and u_max > NON_ALGEBRAIC_U:
            extrap = max(extrap, self._correction_beyond_four[i])
        return float(interp + extrap + self._grid.measured_error)

    def relative_width_error(self, u: float) -> float:
        """Relative error of the FWHM (so of T) implied by :meth:`model_error`.

        A conductance error ε shifts the half-depth point by ε/|∂G/∂x|; the slope there is taken
        from the model itself (central difference at the half-depth point).
        """
        u = float(u)
        if u <= 0:
            return 0.0
        xs = np.linspace(0.0, 12.0, 1201)
        g = self(xs, u)
        depth = 1.0 - g[0]
        i = int(np.argmax(g >= 1.0 - 0.5 * depth))
        slope = (g[i + 1] - g[i - 1]) / (xs[i + 1] - xs[i - 1])
        return self.model_error(u) / (abs(slope) * xs[i])


@lru_cache(maxsize=16)
def shared_shape(n_junctions: int, c0_ratio: float = 0.0) -> FullTunnellingShape:
    """One FullTunnellingShape per (N, C_0/C) and process (the grid is built once)."""
    return FullTunnellingShape(n_junctions, c0_ratio)
