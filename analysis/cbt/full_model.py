"""Fast full-tunnelling dip shape for long CBT arrays (N = 10–100), usable inside an MCMC.

The exact orthodox master equation (analysis.cbt.tunnelling, docs/physics.md §1.3) is exact at any u
but affordable only for short chains, while sensors have 10–100 junctions. This module bridges
the gap in three steps, all precomputed by the committed script
``analysis/cbt/tables/make_tables.py`` (docs/models.md gives the commands):

1. **Short tables.** For N = 2, 3, 4 the exact reduced dip D_N(x, u) = (1 − G/G_T)/u is tabulated
   on a grid of x = eV/(N k_B T) ∈ [0, 40] and u = ΔE/(k_B T) ∈ [0, 5.2] (u = 0 is the
   first-order limit g(x) of Pekola et al., PRL 73, 2903 (1994)) and interpolated by a bivariate
   quintic spline. Beyond |x| = 40 the tail is continued exponentially at the slowest decay rate
   the tables show there (:data:`TAIL_DECAY` from the tables).
2. **Exact N = 5, 6 tables** (``long_arrays.npz``, from the energy-bounded solver) on a coarser
   grid (x ≤ 12, u = 1.5–5). They enter as the difference Δ_N = D_N − C_N from the 1/N²
   continuation C_N of the N = 3, 4 tables (:func:`extrapolation_weights`), which is small and
   smooth: a bicubic spline in (x, u) with Δ_N = 0 at u = 0 (all N share g(x) there); beyond the
   last solved x it is continued in proportion to D_4.
3. **Long arrays (N > 6).** Continued from the exact N = 5 and 6 dips by the law
   :data:`LONG_ARRAY_LAW` (1/N), chosen and bounded by independent exact solutions at N = 7, 8
   and checked by an orthodox Monte Carlo of N = 10–30 chains (docs/models.md); validated only
   up to u = :data:`LONG_ARRAY_MAX_U`, beyond which the C_0 = 0 dip does not converge in N.

4. **Stray capacitance** C_0 > 0 (N = 2, 3, 4, 0 < C_0/C ≤ :data:`MAX_C0_RATIO`). Exact tables at
   C_0/C = 0.05–0.2 (``stray_capacitance.npz``) enter as the difference of the reduced dip from
   the scaled C_0 = 0 dip r D_N(x, r u), r = :func:`first_order_depth_factor` (which is the whole
   answer for N = 2, where C_0 only adds to the island's total capacitance); the difference is
   interpolated by a bicubic spline in (x, u) and by the polynomial in C_0/C through C_0 = 0 and
   the tables (C_0/C = 0.05, 0.1, 0.15, 0.2).
   u keeps its nominal meaning ΔE/(k_B T) with ΔE = ((N − 1)/N) e²/C.

Its error (max |ΔG/G_T| over the dip, per u band) was *measured* against exact solutions not used
to build the tables, and against the Monte Carlo; the figures are in :data:`MEASURED_ERROR`, and
the test suite checks them against further held-out points.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, field
from functools import lru_cache
from importlib import resources

import numpy as np
from scipy.interpolate import RectBivariateSpline

from analysis.cbt.dip_grid import GridDip
from analysis.cbt.models import relative_width_from_conductance_error
from analysis.cbt.tunnelling import ArrayDescription

logger = logging.getLogger(__name__)

TABLE_FILE = "short_arrays.npz"
LONG_TABLE_FILE = "long_arrays.npz"
STRAY_TABLE_FILE = "stray_capacitance.npz"

#: Chain lengths with exact stray-capacitance tables, and the largest C_0/C they cover.
STRAY_LENGTHS = (2, 3, 4)
MAX_C0_RATIO = 0.2

#: Chain lengths with exact tables (N = 2–4 on the fine grid, 5 and 6 on the coarse one).
EXACT_LENGTHS = (2, 3, 4, 5, 6)

#: Largest u at which the model is validated for certificates, for the exactly tabulated chains
#: N <= 6 (the short tables reach 5.2 so that their spline has no edge effect at 5.0; the N = 5,
#: 6 tables reach 5.0). Each shape carries its own limit as ``max_u``, which the fit reads.
MAX_U = 5.0

#: ... and for longer chains (N > 6), where the continuation of the exact N = 5, 6 dips has been
#: checked against exact N = 7, 8 solutions and the orthodox Monte Carlo. At u = 2 the 1/N law
#: meets the exact N = 7, 8 depths to 1e-7; from u = 2.5 on its residual per unit of
#: long_array_length grows with N (1.0e-5 at N = 7, 1.4e-5 at N = 8; 6.9e-5 and 9.7e-5 at u = 3):
#: with C_0 = 0 the zero-bias depth keeps growing with N (the unscreened charging energy of a
#: charge in the middle of the chain grows as N e²/(8C)), so no continuation from N <= 6 is safe.
LONG_ARRAY_MAX_U = 2.0

#: Beyond this |x| the tables end and D is continued as D(40, u) exp(−κ (|x| − 40)), κ the
#: slowest decay rate of the tabulated tails between x = 35 and 40 over all u (computed from the
#: tables when they are loaded; 0.41 at u = 3.2, 0.24 at u = 5.2).
X_TABLE_END = 40.0
#: Upper limit of that decay rate (the fastest that may be assumed at small u, where the tail is
#: below 1e-9 at x = 40 anyway).
TAIL_DECAY = 0.4

#: How the dip of a chain longer than the exact tables (N > 6) is continued from the exact N = 5
#: and 6 dips: "inverse_n" D_N = D_6 + (D_6 − D_5)(1/6 − 1/N)/(1/5 − 1/6), "inverse_n2" the same
#: in 1/N², "converged" D_N = D_6. Chosen by the independent N = 7, 8 exact solutions
#: (make_tables.py --long-check; docs/models.md).
LONG_ARRAY_LAW = "inverse_n"

#: Measured max |ΔG/G_T| of the model per u band (upper band edges in ``u_band_upper``):
#: ``interpolation_short`` for the exact N = 2, 3 tables (off-grid points against the exact
#: solver: <= 1.8e-9 for x >= 0.2, but between x = 0 and the first node 1.6e-8 at u <= 0.5
#: rising to 2.6e-7 at u = 3 and 9.5e-7 at u = 5, where the spline does not know D is even);
#: ``interpolation_n4`` for N = 4 (off-grid <= 6e-8, near x = 0.1 up to 1.2e-6; the
#: continuation below u = 0.5 2.9e-7, and beyond x = 20: 1.0e-6 at u = 3, 5.3e-6 at u = 4,
#: 1.6e-5 at u = 5, x = 25); ``extrapolation_n5`` the residual of the 1/N² continuation from
#: N = 3, 4 against exact N = 5 (2.4e-6 at u = 1, 6.4e-6 at 1.5; used for N >= 5 where no
#: N = 5, 6 table exists, u <= 1.5); ``exact_long`` the interpolation and continuation error of
#: the N = 5, 6 tables (make_tables.py --bound: <= 5.7e-7 at u = 2.25, 3.1e-6 at 3.75, 2.1e-5 at
#: 4.75, each band taking the larger of the bound points around it, doubled); ``long_array`` the
#: residual of LONG_ARRAY_LAW against exact N = 7, 8 per unit of long_array_length (<= 4.3e-6 at
#: u = 2, x = 2.75; 3.9e-7 at u = 1.5, x = 0; make_tables.py --long-check), used only up to
#: LONG_ARRAY_MAX_U; ``stray_capacitance`` the interpolation error of the C_0 > 0 tables in x, u
#: and C_0/C, added for C_0 > 0 (make_tables.py --stray-bound: 43 off-grid points at N = 3, 4,
#: C_0/C = 0.03, 0.1, 0.125, 0.2; <= 1.1e-7 for u <= 3.75, 4.4e-7 at u = 4.9, each band doubled,
#: empty bands taking the larger neighbour). Checked
#: by tests/test_full_model.py against held-out points that set none of these numbers.
#: The figures near x = 0 were measured on the unmirrored table spline; mirrored (dip_spline),
#: max |ΔG/G_T| against the exact solver at x = 0.05–0.3, u = 1–5 fell from 2.6e-7 to 2.0e-9
#: (N = 2), 9.5e-7 to 1.6e-8 (N = 3) and 1.1e-6 to 9.6e-8 (N = 4); the bands are kept as they
#: were (they still bound the rest of the dip). Not in these rows: the lock-in quadrature, whose
#: error depends on α and is measured per fit (analysis.cbt.models.lockin_quadrature_error).
MEASURED_ERROR: dict[str, tuple[float, ...]] = {
    "u_band_upper": (0.5, 1.0, 1.5, 2.0, 2.5, 3.0, 3.5, 4.0, 4.5, 5.0),
    "interpolation_short": (3e-8, 6e-8, 1.1e-7, 1.7e-7, 2.7e-7, 4e-7, 7e-7, 1e-6, 1.3e-6, 1.5e-6),
    "interpolation_n4": (5e-7, 5e-7, 5e-7, 5e-7, 2e-6, 2e-6, 5e-6, 8e-6, 1.5e-5, 2.5e-5),
    "extrapolation_n5": (5e-7, 3.5e-6, 1e-5, 2e-5, 1e-4, 3e-4, 3e-4, 3e-4, 3e-4, 3e-4),
    "exact_long": (0.0, 0.0, 0.0, 1.2e-6, 1.2e-6, 6e-6, 6e-6, 6e-6, 4.3e-5, 4.3e-5),
    "long_array": (0.0, 0.0, 0.0, 4.3e-6, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0),
    "stray_capacitance": (1.6e-7, 2.2e-7, 1.7e-7, 4.4e-8, 3e-8, 1.2e-7, 1.2e-7, 1.4e-7, 8.8e-7,
                          8.8e-7),
}

#: Safety factor on a measured residual when it is scaled to longer chains.
EXTRAPOLATION_SAFETY = 2.0

#: Below this u no N = 5, 6 table exists; there the N >= 5 model is the 1/N² continuation and
#: its error the scaled N = 5 residual (the weak N-dependence, O(u³), makes that small).
LONG_TABLE_MIN_U = 1.5


class FullModelRangeError(ValueError):
    """A full-model evaluation was asked outside the range where its error has been measured."""


@lru_cache(maxsize=1)
def _load_tables() -> dict[str, np.ndarray]:
    ref = resources.files("analysis.cbt.tables").joinpath(TABLE_FILE)
    with resources.as_file(ref) as path, np.load(path) as data:
        return {key: np.array(data[key]) for key in data.files}


@lru_cache(maxsize=1)
def _load_stray_tables() -> dict[str, np.ndarray]:
    ref = resources.files("analysis.cbt.tables").joinpath(STRAY_TABLE_FILE)
    with resources.as_file(ref) as path, np.load(path) as data:
        return {key: np.array(data[key]) for key in data.files}


@lru_cache(maxsize=1)
def _load_long_tables() -> dict[str, np.ndarray]:
    ref = resources.files("analysis.cbt.tables").joinpath(LONG_TABLE_FILE)
    with resources.as_file(ref) as path, np.load(path) as data:
        return {key: np.array(data[key]) for key in data.files}


def extrapolation_weights(n_junctions: int) -> tuple[float, float, float]:
    """Weights (w_2, w_3, w_4) of the exact tables D_2, D_3, D_4 of the 1/N² continuation C_N.

    N ≤ 4: the exact table itself. N > 4: C_N = D_4 + (D_4 − D_3)(1/16 − 1/N²)/(1/9 − 1/16), the
    continuation in 1/N² through N = 3 and 4 (docs/physics.md §1.3: the N-dependence of the exact
    depth and width at u = 1 falls off close to 1/N²). For N = 5, 6 and longer chains the exact
    N = 5, 6 tables correct it (:func:`long_array_weights`).
    """
    if n_junctions in (2, 3, 4):
        return tuple(1.0 if n == n_junctions else 0.0 for n in (2, 3, 4))  # type: ignore[return-value]
    f = (1.0 / 16.0 - 1.0 / n_junctions**2) / (1.0 / 9.0 - 1.0 / 16.0)
    return (0.0, -f, 1.0 + f)


def long_array_weights(n_junctions: int, law: str = LONG_ARRAY_LAW) -> tuple[float, float]:
    """Weights (v_5, v_6) of the exact N = 5, 6 dips that give the N-junction dip, N ≥ 5.

    N = 5, 6: the exact dip itself. N > 6: D_N = D_6 + (D_6 − D_5) f(N) with f from ``law``:
    "inverse_n" f = (1/6 − 1/N)/(1/5 − 1/6), "inverse_n2" f = (1/36 − 1/N²)/(1/25 − 1/36),
    "converged" f = 0.
    """
    if n_junctions == 5:
        return (1.0, 0.0)
    if n_junctions == 6:
        return (0.0, 1.0)
    f = long_array_length(n_junctions, law)
    return (-f, 1.0 + f)


def long_array_length(n_junctions: int, law: str = LONG_ARRAY_LAW) -> float:
    """f(N) of :func:`long_array_weights`: the continuation in units of the N = 5 → 6 step."""
    n = int(n_junctions)
    if n <= 6:
        return 0.0
    if law == "inverse_n":
        return (1.0 / 6.0 - 1.0 / n) / (1.0 / 5.0 - 1.0 / 6.0)
    if law == "inverse_n2":
        return (1.0 / 36.0 - 1.0 / n**2) / (1.0 / 25.0 - 1.0 / 36.0)
    if law == "converged":
        return 0.0
    raise ValueError(f"unknown long-array law {law!r}; expected inverse_n, inverse_n2 or converged")


def extrapolation_length(n_junctions: int) -> float:
    """How far (in units of the N = 4 → 5 step in 1/N²) the tables are continued; 0 for N ≤ 4."""
    if n_junctions <= 4:
        return 0.0
    return (1.0 / 16.0 - 1.0 / n_junctions**2) / (1.0 / 16.0 - 1.0 / 25.0)


@lru_cache(maxsize=1)
def exact_long_dips() -> dict[int, np.ndarray]:
    """D_5 and D_6 on the short tables' (x, u) grid: C_N + Δ_N (module docstring, step 2)."""
    tables = _load_tables()
    long = _load_long_tables()
    x_fine, u_fine = tables["x_nodes"], tables["u_nodes"]
    x_c, u_c = long["x_nodes"], long["u_nodes"]
    d4 = dip_spline(x_fine, u_fine, tables["dip_4"])
    out = {}
    for n in (5, 6):
        w2, w3, w4 = extrapolation_weights(n)
        base_fine = w2 * tables["dip_2"] + w3 * tables["dip_3"] + w4 * tables["dip_4"]
        base = dip_spline(x_fine, u_fine, base_fine)
        xg, ug = np.meshgrid(x_c, u_c, indexing="ij")
        delta = (1.0 - long[f"conductance_{n}"]) / ug - base.ev(xg, ug)
        # Beyond the last solved x of a column (the window budget) continue Δ ∝ D_4.
        for j in range(u_c.size):
            solved = np.isfinite(delta[:, j])
            last = int(np.nonzero(solved)[0][-1])
            ratio = d4.ev(x_c[last + 1 :], u_c[j]) / d4.ev(x_c[last], u_c[j])
            delta[last + 1 :, j] = delta[last, j] * ratio
        # Below the first tabulated u the N-dependence of G/G_T is O(u³) (module docstring), so
        # Δ = (1 − G/G_T)/u differences scale as u²: nodes at u = 0.5 and 1 carry Δ(u_1)(u/u_1)²,
        # which keeps the cubic from overshooting in the gap (checked by the N = 5 points of
        # validation.npz at u = 0.5 and 1 and the exact N = 7 point at u = 1.5).
        low_u = np.array([0.5, 1.0])
        u_all = np.concatenate(([0.0], low_u, u_c))
        delta_low = delta[:, :1] * (low_u / u_c[0]) ** 2
        delta_all = np.concatenate((np.zeros((x_c.size, 1)), delta_low, delta), axis=1)
        spline = dip_spline(x_c, u_all, delta_all, degree=3)
        xf, uf = np.meshgrid(x_fine, u_fine, indexing="ij")
        inside = xf <= x_c[-1]
        delta_fine = np.empty_like(base_fine)
        delta_fine[inside] = spline.ev(xf[inside], uf[inside])
        edge = spline.ev(np.full(int((~inside).sum()), x_c[-1]), uf[~inside])
        ratio = d4.ev(xf[~inside], uf[~inside]) / d4.ev(np.full(edge.size, x_c[-1]), uf[~inside])
        delta_fine[~inside] = edge * ratio
        out[n] = base_fine + delta_fine
    return out


def first_order_depth_factor(n_junctions: int, c0_ratio: float) -> float:
    """r_N(C_0/C): the first-order dip depth with stray capacitance over its C_0 = 0 value.

    To first order in u the depth is set by the junction average of the charging bracket
    (K_aa + K_bb − 2K_ab)/2 (docs/physics.md §1.3, §1.4; Pekola et al., PRL 73, 2903 (1994)
    for the first-order dip), which is (N − 1)/(2N) e²/C for C_0 = 0.
    """
    array = ArrayDescription(int(n_junctions), c0_ratio=float(c0_ratio))
    n = int(n_junctions)
    return float(array.junction_charging().mean() / ((n - 1) / (2.0 * n)))


@lru_cache(maxsize=16)
def stray_capacitance_dip(n_junctions: int, c0_ratio: float) -> np.ndarray:
    """D_N(x, u; C_0/C) on the short tables' grid (module docstring, step 4).

    D = r D_N(x, r u; 0) + Δ(x, u; C_0/C), Δ from the exact tables at C_0/C = 0.1 and 0.2 by a
    bicubic spline in (x, u) (Δ = 0 at u = 0, where every chain has the scaled first-order dip),
    continued beyond the last solved x of a column in proportion to the scaled dip, and
    interpolated in C_0/C by the polynomial through Δ = 0 at C_0 = 0 and the tables.
    """
    n = int(n_junctions)
    tables = _load_tables()
    stray = _load_stray_tables()
    x_fine, u_fine = tables["x_nodes"], tables["u_nodes"]
    # D_N(x, u; 0) from the exact table (mirrored nodes: even in x); r u <= u stays inside it.
    zero = dip_spline(x_fine, u_fine, tables[f"dip_{n}"])
    x_c, u_c = stray["x_nodes"], stray["u_nodes"]
    xg, ug = np.meshgrid(x_c, u_c, indexing="ij")
    xf, uf = np.meshgrid(x_fine, u_fine, indexing="ij")
    u_clipped = np.minimum(uf, u_c[-1])  # above the last node (u = 5 < 5.2) Δ is held, not extrapolated
    nodes = [float(c) for c in stray["c0_ratios"]]
    deltas = []
    for k, c_k in enumerate(nodes):
        r_k = first_order_depth_factor(n, c_k)
        delta = (1.0 - stray[f"conductance_{n}"][k]) / ug - r_k * zero.ev(xg, r_k * ug)
        for j in range(u_c.size):
            solved = np.isfinite(delta[:, j])
            last = int(np.nonzero(solved)[0][-1])
            scaled = zero.ev(x_c[last:], np.full(x_c.size - last, r_k * u_c[j]))
            delta[last + 1 :, j] = delta[last, j] * scaled[1:] / scaled[0]
        u_all = np.concatenate(([0.0], u_c))
        delta_all = np.concatenate((np.zeros((x_c.size, 1)), delta), axis=1)
        spline = dip_spline(x_c, u_all, delta_all, degree=3)
        inside = xf <= x_c[-1]
        delta_fine = np.zeros_like(xf)
        delta_fine[inside] = spline.ev(xf[inside], u_clipped[inside])
        deltas.append(delta_fine)
    # Lagrange polynomial in C_0/C through Δ = 0 at C_0 = 0 and the tables.
    c = float(c0_ratio)
    knots = [0.0, *nodes]
    delta_c = np.zeros_like(xf)
    for k, c_k in enumerate(nodes):
        weight = float(np.prod([(c - c_j) / (c_k - c_j) for c_j in knots if c_j != c_k]))
        delta_c += weight * deltas[k]
    r = first_order_depth_factor(n, c)
    return r * zero.ev(xf, r * uf) + delta_c


def _table_dip(n_junctions: int) -> np.ndarray:
    """D_N on the short tables' grid: exact (N ≤ 6) or continued (N > 6)."""
    tables = _load_tables()
    if n_junctions <= 4:
        return tables[f"dip_{n_junctions}"]
    exact = exact_long_dips()
    v5, v6 = long_array_weights(n_junctions)
    return v5 * exact[5] + v6 * exact[6]


@lru_cache(maxsize=1)
def tail_decay() -> float:
    """Slowest decay rate of the tabulated dips between x = 35 and 40, capped at TAIL_DECAY."""
    tables = _load_tables()
    x = tables["x_nodes"]
    i35, i40 = int(np.argmin(np.abs(x - 35.0))), int(np.argmin(np.abs(x - X_TABLE_END)))
    u = tables["u_nodes"]
    rates = [TAIL_DECAY]
    for n in (2, 3, 4):
        dip = tables[f"dip_{n}"]
        # Only where the tail is resolved (u D > 1e-8 at x = 40); below, it is rounding noise.
        sel = u * dip[i40] > 1e-8
        rates.extend(np.log(dip[i35, sel] / dip[i40, sel]) / (x[i40] - x[i35]))
    return float(min(rates))


#: Nodes mirrored to x < 0 before a table spline is fitted: D is even in x, and a spline that
#: does not know it errs between x = 0 and the first node (the fine-grid N = 2 spline, when it
#: was unmirrored, by up to 1.6e-7 near x = 0.1 at u ≈ 2.5, measured against the exact solver)
#: and has a slope at x = 0.
MIRRORED_NODES = 10


def dip_spline(x_nodes: np.ndarray, u_nodes: np.ndarray, dip: np.ndarray,
               degree: int = 5) -> RectBivariateSpline:
    """Interpolating spline of a tabulated even dip D(x, u), with nodes mirrored to x < 0."""
    k = MIRRORED_NODES
    xs = np.concatenate((-x_nodes[k:0:-1], x_nodes))
    values = np.concatenate((dip[k:0:-1], dip), axis=0)
    return RectBivariateSpline(xs, u_nodes, values, kx=degree, ky=degree, s=0)


@dataclass(frozen=True)
class FullTunnellingShape:
    """Full orthodox-tunnelling dip shape G/G_T(x, u) of a uniform chain of N junctions.

    A dip shape in the sense of analysis.cbt.models: ``shape(x, u)`` with x = eV/(N k_B T) and
    u = ΔE/(k_B T), ΔE = ((N − 1)/N) e²/C, broadcasting x against u; evaluated through a grid
    built once from the table spline (analysis.cbt.dip_grid; 1.3–1.5e7 points per second for
    16–64 walkers on a shared 2-core machine, about 5x the spline's own rate,
    benchmarks/bench_full_model.py).
    Source: the orthodox master equation of docs/physics.md §1.3 (Melsen et al., PRB 55, 10638 (1997)
    for arrays), solved exactly for N = 2–6 and continued to longer chains (module docstring).

    Validated for 0 ≤ u ≤ :data:`MAX_U` (= ``max_u``; refused outside with
    :class:`FullModelRangeError`, and the fit reads ``max_u``). ``c0_ratio`` (C_0/C, island to
    ground over junction capacitance) is taken for N = 2, 3, 4 up to :data:`MAX_C0_RATIO` from the
    exact stray-capacitance tables (module docstring, step 4) and refused elsewhere, where no
    validated table exists (the exact solver :mod:`analysis.cbt.tunnelling` handles any C_0 for
    short chains); u stays ΔE/(k_B T) with the nominal ΔE = ((N − 1)/N) e²/C.
    """

    n_junctions: int
    c0_ratio: float = 0.0
    name: str = field(init=False)
    max_u: float = field(init=False, default=MAX_U)
    min_u: float = field(init=False, default=0.0)
    _spline: RectBivariateSpline = field(init=False, repr=False, compare=False)
    _grid: GridDip = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        if not isinstance(self.n_junctions, int | np.integer) or self.n_junctions < 2:
            raise FullModelRangeError(
                f"n_junctions must be an integer >= 2; got {self.n_junctions!r}"
            )
        c0 = float(self.c0_ratio)
        if c0 != 0.0 and not (0.0 < c0 <= MAX_C0_RATIO
                              and int(self.n_junctions) in STRAY_LENGTHS):
            raise FullModelRangeError(
                f"c0_ratio = {self.c0_ratio!r} for N = {self.n_junctions}: the full model has "
                f"validated stray-capacitance tables only for N = 2-4 and 0 <= C_0/C <= "
                f"{MAX_C0_RATIO} (docs/models.md); longer arrays with 0 < C_0/C <= {MAX_C0_RATIO} are "
                "fitted by analysis.cbt.choice with u rescaled and a measured budget row"
            )
        tables = _load_tables()
        if c0 != 0.0:
            dip = stray_capacitance_dip(int(self.n_junctions), c0)
        else:
            dip = _table_dip(int(self.n_junctions))
        # Mirrored to x < 0 like the N = 5, 6 corrections (dip_spline): unmirrored, the spline
        # had a slope at x = 0 (|∂G/∂x|(0+) up to 3.8e-5 at N = 3, 1.1e-3 at N = 6, u = 5), a
        # kink of the even dip that the few-node lock-in quadrature (lockin_nodes_for) cannot
        # integrate (errors up to 5e-7 of G_T at N = 3). The fast grid mirrors its samples too.
        spline = dip_spline(tables["x_nodes"], tables["u_nodes"], dip)
        object.__setattr__(self, "_spline", spline)
        if self.n_junctions > max(EXACT_LENGTHS):
            object.__setattr__(self, "max_u", LONG_ARRAY_MAX_U)
        stray = f", C_0/C = {c0:g}" if c0 else ""
        object.__setattr__(
            self, "name",
            f"full orthodox tunnelling, N = {self.n_junctions}{stray} (master equation)"
        )
        # Evaluation path: the reference above, sampled once into a cheap quintic grid over the
        # whole tabulated u range (analysis.cbt.dip_grid); its own error is measured there.
        u_nodes = tables["u_nodes"]
        object.__setattr__(self, "_grid", GridDip(
            self._reference_reduced, (float(u_nodes[0]), float(u_nodes[-1])), X_TABLE_END,
            tail_decay()))

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
            reduced[~inside] = edge * np.exp(-tail_decay() * (xf[~inside] - X_TABLE_END))
        return reduced.reshape(xb.shape)

    def model_error(self, u: float | np.ndarray) -> float:
        """Bound on max |ΔG/G_T| over the dip at this u (measured; see :data:`MEASURED_ERROR`).

        N ≤ 4: the interpolation error of the exact table, plus for C_0 > 0 the measured error of
        the stray-capacitance tables. N ≥ 5: that of the N = 4 table, plus
        for u ≤ :data:`LONG_TABLE_MIN_U` the N = 5 residual of the 1/N² continuation scaled by
        :func:`extrapolation_length` and :data:`EXTRAPOLATION_SAFETY`; above it the measured
        error of the exact N = 5, 6 tables, and for N > 6 the measured residual of
        :data:`LONG_ARRAY_LAW` per unit of its length, times :func:`long_array_length` and the
        safety factor. Plus the measured difference of the fast evaluation grid from the table
        spline. Use it as a model-uncertainty row of the budget.
        """
        u_max = float(np.max(u))
        if not (self.min_u <= u_max <= self.max_u):
            raise FullModelRangeError(
                f"u = {u_max} is outside the validated range [{self.min_u}, {self.max_u}]"
            )
        bands = np.asarray(MEASURED_ERROR["u_band_upper"])
        i = int(np.searchsorted(bands, u_max - 1e-12))
        n = int(self.n_junctions)
        if n <= 3:
            error = MEASURED_ERROR["interpolation_short"][i]
        else:
            error = MEASURED_ERROR["interpolation_n4"][i]
        if self.c0_ratio:
            error += MEASURED_ERROR["stray_capacitance"][i]
        if n >= 5:
            if bands[i] <= LONG_TABLE_MIN_U + 1e-12:
                error += (EXTRAPOLATION_SAFETY * MEASURED_ERROR["extrapolation_n5"][i]
                          * extrapolation_length(n))
            else:
                error += MEASURED_ERROR["exact_long"][i]
                error += (EXTRAPOLATION_SAFETY * MEASURED_ERROR["long_array"][i]
                          * long_array_length(n))
        return float(error + self._grid.measured_error)

    def relative_width_error(self, u: float) -> float:
        """Relative error of the FWHM (so of T) implied by :meth:`model_error`.

        A conductance error ε shifts the half-depth point by ε/|∂G/∂x|; the slope there is taken
        from the model itself (analysis.cbt.models.relative_width_from_conductance_error).
        """
        if float(u) <= 0:
            return 0.0
        return relative_width_from_conductance_error(self, u, self.model_error(u))


@lru_cache(maxsize=16)
def shared_shape(n_junctions: int, c0_ratio: float = 0.0) -> FullTunnellingShape:
    """One FullTunnellingShape per (N, C_0/C) and process (the grid is built once)."""
    return FullTunnellingShape(n_junctions, c0_ratio)
